//! `parameters:` and `sweep:`: the points of the campaign, every combination of the axes
//! (`product`, the first axis varying slowest) or the axes' values taken together (`zip`).

use std::collections::BTreeSet;

use super::{loc, Validator};
use crate::spec::model::PointSpec;
use crate::spec::raw::{CampaignFile, OrderedMap, Scalar, Sweep};

/// The most points a sweep may make: every point is a directory, store rows and hours of
/// compute, and the points are built here, in memory, before anything runs (a few lines of
/// `product` can name 10^8 combinations). Ten times the largest run measured
/// (docs/performance.md, "Store at scale").
pub(super) const MAX_POINTS: u64 = 100_000;

/// The values of one point: axis → value, in axis order.
type Combo = Vec<(String, Scalar)>;

/// `parameters:` in file order.
pub(super) fn parameters(raw: &CampaignFile) -> Vec<(String, Scalar)> {
    raw.parameters
        .iter()
        .map(|(k, v)| (k.to_string(), v.clone()))
        .collect()
}

/// The sweep's axis names in file order (none without a sweep).
pub(super) fn axis_names(raw: &CampaignFile) -> Vec<String> {
    raw.sweep
        .as_ref()
        .and_then(|s| s.value.product.as_ref().or(s.value.zip.as_ref()))
        .map(|m| m.keys().map(str::to_string).collect())
        .unwrap_or_default()
}

/// The names a `{{param:NAME}}` may use so far: parameters and sweep axes.
pub(super) fn param_names(
    parameters: &[(String, Scalar)],
    points: &[PointSpec],
) -> BTreeSet<String> {
    let mut names: BTreeSet<String> = parameters.iter().map(|(k, _)| k.clone()).collect();
    if let Some(p) = points.first() {
        for (k, _) in &p.values {
            names.insert(k.clone());
        }
    }
    names
}

impl Validator<'_> {
    /// The points of the sweep (one point without a sweep), numbered `p001`, `p002`, ...
    pub(super) fn points(&mut self, raw: &CampaignFile) -> Vec<PointSpec> {
        let mut combos: Vec<Combo> = vec![Vec::new()];
        if let Some(spanned) = &raw.sweep {
            let sw = &spanned.value;
            match (&sw.product, &sw.zip) {
                (Some(_), Some(_)) | (None, None) => {
                    self.push(
                        loc(spanned),
                        "the sweep needs exactly one of `product` or `zip`",
                        "write sweep: { product: { axis: [values] } }",
                    );
                }
                (Some(p), None) => {
                    // Counted before it is built (saturating: forty axes overflow u64).
                    let n =
                        p.0.iter()
                            .fold(1u64, |n, (_, v)| n.saturating_mul(v.len() as u64));
                    if n > MAX_POINTS {
                        let n = if n == u64::MAX {
                            "more than 18446744073709551614".to_string()
                        } else {
                            n.to_string()
                        };
                        self.push(
                            loc(spanned),
                            format!(
                                "the sweep's product makes {n} points; at most {MAX_POINTS} are allowed"
                            ),
                            "sweep fewer values, or split the scan into several campaigns",
                        );
                    } else {
                        combos = self.product(p);
                    }
                }
                (None, Some(z)) => combos = self.zip(z),
            }
            self.axes_are_not_parameters(raw, sw);
        }
        let width = combos.len().to_string().len().max(3);
        combos
            .into_iter()
            .enumerate()
            .map(|(i, values)| PointSpec {
                id: format!("p{:0width$}", i + 1),
                index: i + 1,
                values,
            })
            .collect()
    }

    /// Every combination of the axes of `product`; an empty axis is reported.
    fn product(&mut self, p: &OrderedMap<Vec<Scalar>>) -> Vec<Combo> {
        let mut combos: Vec<Combo> = vec![Vec::new()];
        for (k, vals) in &p.0 {
            if vals.is_empty() {
                self.push(
                    loc(k),
                    format!("sweep axis `{}` is empty", k.value),
                    "give at least one value",
                );
            }
            let mut next = Vec::new();
            for c in &combos {
                for v in vals {
                    let mut c2 = c.clone();
                    c2.push((k.value.clone(), v.clone()));
                    next.push(c2);
                }
            }
            combos = next;
        }
        combos
    }

    /// The i-th values of the axes of `zip` together; axes of unequal length are reported.
    fn zip(&mut self, z: &OrderedMap<Vec<Scalar>>) -> Vec<Combo> {
        let n = z.0.first().map(|(_, v)| v.len()).unwrap_or(0);
        for (k, vals) in &z.0 {
            if vals.len() != n {
                self.push(
                    loc(k),
                    format!(
                        "zip axis `{}` has {} values, the first axis has {n}",
                        k.value,
                        vals.len()
                    ),
                    "zip axes must have equal lengths (use `product` for every combination)",
                );
            }
        }
        (0..n)
            .map(|i| {
                z.0.iter()
                    .filter_map(|(k, v)| v.get(i).map(|x| (k.value.clone(), x.clone())))
                    .collect()
            })
            .collect()
    }

    /// A name is a parameter or a sweep axis, not both.
    fn axes_are_not_parameters(&mut self, raw: &CampaignFile, sw: &Sweep) {
        let axes: Vec<&str> = sw
            .product
            .iter()
            .chain(sw.zip.iter())
            .flat_map(|m| m.keys())
            .collect();
        for (k, _) in &raw.parameters.0 {
            if axes.contains(&k.value.as_str()) {
                self.push(
                    loc(k),
                    format!("`{}` is both a parameter and a sweep axis", k.value),
                    "keep one",
                );
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::testing::*;
    use super::*;

    fn with_sweep(sweep: &str) -> CampaignFile {
        raw(&format!(
            "campaign: t
parameters: {{ u: 6.0 }}
{sweep}
cycle:
  s: {{ run: [/bin/true] }}
stop: {{ max-iterations: 1 }}
"
        ))
    }

    fn ids_and_values(points: &[PointSpec]) -> Vec<(String, String)> {
        points
            .iter()
            .map(|p| {
                let v: Vec<String> = p.values.iter().map(|(k, x)| format!("{k}={x}")).collect();
                (p.id.clone(), v.join(","))
            })
            .collect()
    }

    fn pairs(p: &[(&str, &str)]) -> Vec<(String, String)> {
        p.iter()
            .map(|(a, b)| (a.to_string(), b.to_string()))
            .collect()
    }

    #[test]
    fn a_product_varies_the_first_axis_slowest_and_a_zip_pairs_values() {
        let mut v = validator();
        let p = v.points(&with_sweep("sweep: { product: { a: [1, 2], b: [x, z] } }"));
        assert_eq!(
            ids_and_values(&p),
            pairs(&[
                ("p001", "a=1,b=x"),
                ("p002", "a=1,b=z"),
                ("p003", "a=2,b=x"),
                ("p004", "a=2,b=z")
            ])
        );
        let p = v.points(&with_sweep("sweep: { zip: { a: [1, 2], b: [x, z] } }"));
        assert_eq!(
            ids_and_values(&p),
            pairs(&[("p001", "a=1,b=x"), ("p002", "a=2,b=z")])
        );
        assert!(v.diags.is_empty(), "{:?}", found(&v));
        // no sweep: one point without values; the names are the parameters and the axes
        let p = v.points(&with_sweep(""));
        assert_eq!(ids_and_values(&p), pairs(&[("p001", "")]));
        let raw = with_sweep("sweep: { product: { a: [1] } }");
        let names = param_names(&parameters(&raw), &v.points(&raw));
        assert_eq!(names.into_iter().collect::<Vec<_>>(), ["a", "u"]);
    }

    #[test]
    fn a_sweep_with_both_or_neither_form_is_reported_at_the_sweep() {
        for s in [
            "sweep: { product: { a: [1] }, zip: { b: [1] } }",
            "sweep: {}",
        ] {
            let mut v = validator();
            v.points(&with_sweep(s));
            assert_eq!(
                found(&v),
                vec![(
                    3,
                    8,
                    "the sweep needs exactly one of `product` or `zip`".to_string()
                )],
                "{s}"
            );
        }
    }

    #[test]
    fn empty_axes_uneven_zips_and_axis_parameters_are_reported_at_their_keys() {
        let mut v = validator();
        let p = v.points(&with_sweep("sweep: { product: { a: [1], e: [] } }"));
        assert!(p.is_empty());
        let mut w = validator();
        w.points(&with_sweep("sweep: { zip: { a: [1, 2], b: [3] } }"));
        let mut x = validator();
        x.points(&with_sweep("sweep: { product: { u: [1.0, 2.0] } }"));
        assert_eq!(
            [found(&v), found(&w), found(&x)].concat(),
            vec![
                (3, 29, "sweep axis `e` is empty".to_string()),
                (
                    3,
                    28,
                    "zip axis `b` has 1 values, the first axis has 2".to_string()
                ),
                (
                    2,
                    15,
                    "`u` is both a parameter and a sweep axis".to_string()
                ),
            ]
        );
    }
}

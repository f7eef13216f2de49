//! The layout of the mixer's vector: how each input role's file (a `.npy` array, real or
//! complex, or a JSON object's numeric top-level fields) maps onto a block of it, reading
//! those files, and the state file that keeps the mixer's history together with the layout
//! it was built on (and the older one-array form of it).
//!
//! Owns file reading and layout checks for `mix`; no numerics (those are
//! `rondo_numerics::mixing`'s), no store, no scheduler.

use std::path::{Path, PathBuf};

use rondo_numerics::mixing::MixerState;
use rondo_numerics::npy;
use serde::{Deserialize, Serialize};

use super::hdf5_blocks::{self, Hdf5Dataset};
use crate::spec::LEGACY_ROLE;

/// Layout version of [`StateFile`].
pub(super) const LAYOUT_VERSION: u32 = 2;

/// How one role's file maps onto its block of the mixed vector.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub(super) enum BlockKind {
    /// A float64 `.npy` array of this shape.
    NpyReal { shape: Vec<usize> },
    /// A complex128 `.npy` array of this shape, mixed as interleaved real and imaginary parts.
    NpyComplex { shape: Vec<usize> },
    /// A JSON object; these numeric top-level fields (sorted) are mixed.
    Json { keys: Vec<String> },
    /// An HDF5 file; these float64 datasets (in the stage's order) are mixed.
    Hdf5 { datasets: Vec<Hdf5Dataset> },
}

impl BlockKind {
    pub(super) fn describe(&self) -> String {
        match self {
            BlockKind::NpyReal { shape } => format!("real array of shape {shape:?}"),
            BlockKind::NpyComplex { shape } => format!("complex array of shape {shape:?}"),
            BlockKind::Json { keys } => format!("JSON object with numeric fields {keys:?}"),
            BlockKind::Hdf5 { datasets } => format!(
                "HDF5 file with the datasets {:?}",
                datasets
                    .iter()
                    .map(|d| format!("{} {:?}", d.path, d.shape))
                    .collect::<Vec<_>>()
            ),
        }
    }
}

/// One role of the layout.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(super) struct Block {
    pub(super) role: String,
    #[serde(flatten)]
    pub(super) kind: BlockKind,
    /// Number of vector elements of the block.
    pub(super) len: usize,
    /// Weight of the block in the mixer's metric (1 unless set in `settings: weights`).
    pub(super) weight: f64,
}

/// What the state artifact holds: the mixer's own state and the layout it belongs to.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct StateFile {
    pub(super) layout_version: u32,
    /// Roles in vector order.
    pub(super) layout: Vec<Block>,
    /// The numerics crate's state (over the weighted vector).
    pub(super) mixer: MixerState,
}

/// The state of the one-array form written before multi-array mixing existed.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct LegacyStateFile {
    shape: Vec<usize>,
    complex: bool,
    mixer: MixerState,
}

/// One role's new file as read: its layout block, its values and, for JSON, the object.
pub(super) struct Loaded {
    pub(super) kind: BlockKind,
    pub(super) values: Vec<f64>,
    pub(super) json: Option<serde_json::Map<String, serde_json::Value>>,
}

/// Read one role's new file: the named float64 datasets of an HDF5 file (`datasets`, from
/// `settings: datasets`), a `.npy` array (real or complex, finite, not empty) or a JSON
/// object with at least one numeric top-level field (all finite).
pub(super) fn read_input(
    role: &str,
    path: &Path,
    datasets: Option<&[String]>,
) -> Result<Loaded, String> {
    if let Some(names) = datasets {
        let (datasets, values) = hdf5_blocks::read(role, path, names)?;
        return Ok(Loaded {
            kind: BlockKind::Hdf5 { datasets },
            values,
            json: None,
        });
    }
    let shown = path.display();
    let bytes = std::fs::read(path).map_err(|e| format!("{shown}: cannot read `{role}`: {e}"))?;
    if bytes.starts_with(b"\x93NUMPY") {
        let arr = npy::read_any(path).map_err(|e| format!("{shown}: {e}"))?;
        if arr.is_empty() {
            return Err(format!("{shown}: the array `{role}` to mix is empty"));
        }
        if arr.has_nonfinite() {
            return Err(format!(
                "{shown}: the array `{role}` to mix contains NaN or infinite values"
            ));
        }
        let shape = arr.shape.clone();
        let kind = if arr.is_complex() {
            BlockKind::NpyComplex { shape }
        } else {
            BlockKind::NpyReal { shape }
        };
        return Ok(Loaded {
            kind,
            values: arr.to_flat_f64(),
            json: None,
        });
    }
    let v: serde_json::Value = serde_json::from_slice(&bytes).map_err(|e| {
        format!("{shown}: `{role}` is neither a .npy array nor valid JSON ({e}); the mixer takes .npy arrays and JSON objects")
    })?;
    let serde_json::Value::Object(obj) = v else {
        return Err(format!(
            "{shown}: `{role}` must be a JSON object whose numeric top-level fields are mixed"
        ));
    };
    let mut keys = Vec::new();
    let mut values = Vec::new();
    let mut sorted: Vec<(&String, &serde_json::Value)> = obj.iter().collect();
    sorted.sort_by(|a, b| a.0.cmp(b.0));
    for (k, val) in sorted {
        if let Some(x) = val.as_f64() {
            if !x.is_finite() {
                return Err(format!("{shown}: field `{k}` of `{role}` is not finite"));
            }
            keys.push(k.clone());
            values.push(x);
        }
    }
    if keys.is_empty() {
        return Err(format!(
            "{shown}: `{role}` has no numeric top-level field to mix"
        ));
    }
    Ok(Loaded {
        kind: BlockKind::Json { keys },
        values,
        json: Some(obj),
    })
}

/// Read the mixer state of the previous iteration, in the current layout or the older
/// one-array form (read as a layout of the one role `new`).
pub(super) fn read_state(p: &Path) -> Result<StateFile, String> {
    let shown = p.display();
    let text = std::fs::read_to_string(p)
        .map_err(|e| format!("{shown}: cannot read the mixer state: {e}"))?;
    if text.trim().is_empty() {
        return Err(format!("{shown}: the mixer state file is empty"));
    }
    let v: serde_json::Value =
        serde_json::from_str(&text).map_err(|e| format!("{shown}: malformed mixer state: {e}"))?;
    if v.get("layout").is_none() && v.get("shape").is_some() {
        let old: LegacyStateFile = serde_json::from_value(v)
            .map_err(|e| format!("{shown}: malformed mixer state: {e}"))?;
        let len = old.shape.iter().product::<usize>() * if old.complex { 2 } else { 1 };
        let shape = old.shape;
        return Ok(StateFile {
            layout_version: LAYOUT_VERSION,
            layout: vec![Block {
                role: LEGACY_ROLE.into(),
                kind: if old.complex {
                    BlockKind::NpyComplex { shape }
                } else {
                    BlockKind::NpyReal { shape }
                },
                len,
                weight: 1.0,
            }],
            mixer: old.mixer,
        });
    }
    let s: StateFile =
        serde_json::from_value(v).map_err(|e| format!("{shown}: malformed mixer state: {e}"))?;
    if s.layout_version != LAYOUT_VERSION {
        return Err(format!(
            "{shown}: mixer state layout version {} is not the supported {LAYOUT_VERSION}",
            s.layout_version
        ));
    }
    Ok(s)
}

/// The layout of this iteration's inputs must be the one the history was built on.
pub(super) fn check_layout(
    state: &Path,
    old: &[Block],
    new: &[Block],
    roles: &[(String, PathBuf, PathBuf)],
) -> Result<(), String> {
    let names = |l: &[Block]| l.iter().map(|b| b.role.clone()).collect::<Vec<_>>();
    if names(old) != names(new) {
        return Err(format!(
            "{}: the mixer history holds the roles {:?} but this iteration mixes {:?}; \
             the stage's inputs changed between iterations",
            state.display(),
            names(old),
            names(new)
        ));
    }
    for ((o, n), (_, path, _)) in old.iter().zip(new).zip(roles) {
        if o.kind != n.kind {
            return Err(format!(
                "{}: `{}` is a {} but the mixer history's is a {}; \
                 the stage feeding the mixer changed its output layout between iterations",
                path.display(),
                n.role,
                n.kind.describe(),
                o.kind.describe()
            ));
        }
        if o.weight != n.weight {
            return Err(format!(
                "{}: the weight of `{}` is {:?} but the history was built with {:?}; \
                 weights cannot change within a point's iterations",
                state.display(),
                n.role,
                n.weight,
                o.weight
            ));
        }
    }
    Ok(())
}

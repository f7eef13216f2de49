//! The inverse hybridization matrix of one flavour with fast block updates.
//!
//! For the k creators c†(s_a) and annihilators c(e_b) of a flavour the weight carries
//! |det F| with F_{ba} = F(s_a − e_b), F(τ) = −Δ(τ) continued antiperiodically
//! (F(τ − β) = −F(τ)): tracing out the bath pairs the bath annihilator at the time of each
//! c† with the bath creator at the time of each c, ⟨T a(s) a†(e)⟩ = −g_bath(s − e). We keep M = F⁻¹ (rows: starts, columns: ends) and update it in
//! O(k²) when one (end, start) pair is added or removed (inverse by partitioning, as in
//! Gull et al., Rev. Mod. Phys. 83, 349 (2011), appendix on fast updates). A full O(k³)
//! recomputation serves as the accuracy check.

use super::delta_tau::HybFunction;
use nalgebra::DMatrix;

/// M = F⁻¹ with the operator times it is built on.
#[derive(Debug, Clone)]
pub(crate) struct HybMatrix {
    n: usize,
    stride: usize,
    /// Row-major n×n block of a stride×stride buffer; row a ↔ starts[a], column b ↔ ends[b].
    m: Vec<f64>,
    starts: Vec<f64>,
    ends: Vec<f64>,
    /// Scratch: M·Q for the last proposed insertion.
    mq: Vec<f64>,
    /// Scratch: R·M.
    rm: Vec<f64>,
    /// Scratch: the R row of the last proposed insertion.
    r: Vec<f64>,
    /// S = F(e − s) − R M Q of the last proposed insertion.
    s: f64,
}

impl HybMatrix {
    pub(crate) fn new() -> Self {
        Self {
            n: 0,
            stride: 0,
            m: Vec::new(),
            starts: Vec::new(),
            ends: Vec::new(),
            mq: Vec::new(),
            rm: Vec::new(),
            r: Vec::new(),
            s: 0.0,
        }
    }

    pub(crate) fn starts(&self) -> &[f64] {
        &self.starts
    }

    pub(crate) fn ends(&self) -> &[f64] {
        &self.ends
    }

    /// M_{ab} (row a = start index, column b = end index).
    #[inline]
    pub(crate) fn get(&self, a: usize, b: usize) -> f64 {
        self.m[a * self.stride + b]
    }

    fn grow(&mut self, need: usize) {
        if need <= self.stride {
            return;
        }
        let new_stride = (need * 2).max(8);
        let mut m = vec![0.0; new_stride * new_stride];
        for a in 0..self.n {
            m[a * new_stride..a * new_stride + self.n]
                .copy_from_slice(&self.m[a * self.stride..a * self.stride + self.n]);
        }
        self.m = m;
        self.stride = new_stride;
    }

    /// Determinant ratio det F'/det F for adding the annihilator at `end` and the creator
    /// at `start`; keeps the intermediate vectors for [`HybMatrix::accept_insert`].
    pub(crate) fn ratio_insert(&mut self, f: &HybFunction, end: f64, start: f64) -> f64 {
        let n = self.n;
        self.mq.clear();
        self.r.clear();
        // Q_b = F(start − e_b) (new column), R_a = F(s_a − end) (new row).
        let q: Vec<f64> = self.ends.iter().map(|&e| f.eval(start - e)).collect();
        self.r.extend(self.starts.iter().map(|&s| f.eval(s - end)));
        let mut rmq = 0.0;
        for a in 0..n {
            let row = &self.m[a * self.stride..a * self.stride + n];
            let v: f64 = row.iter().zip(&q).map(|(x, y)| x * y).sum();
            self.mq.push(v);
            rmq += self.r[a] * v;
        }
        self.s = f.eval(start - end) - rmq;
        self.s
    }

    /// Apply the insertion last proposed with [`HybMatrix::ratio_insert`].
    pub(crate) fn accept_insert(&mut self, end: f64, start: f64) {
        let n = self.n;
        self.rm.clear();
        self.rm.resize(n, 0.0);
        for a in 0..n {
            let ra = self.r[a];
            let row = &self.m[a * self.stride..a * self.stride + n];
            for (acc, x) in self.rm.iter_mut().zip(row) {
                *acc += ra * x;
            }
        }
        self.grow(n + 1);
        let inv_s = 1.0 / self.s;
        let st = self.stride;
        for a in 0..n {
            let va = self.mq[a] * inv_s;
            let row = &mut self.m[a * st..a * st + n];
            for (x, w) in row.iter_mut().zip(&self.rm) {
                *x += va * w;
            }
            self.m[a * st + n] = -va;
        }
        for b in 0..n {
            self.m[n * st + b] = -self.rm[b] * inv_s;
        }
        self.m[n * st + n] = inv_s;
        self.starts.push(start);
        self.ends.push(end);
        self.n = n + 1;
    }

    /// Determinant ratio for moving the annihilator at `old` to `new` (one row of F
    /// changes): ratio = Σ_a F(s_a − new) M_{ab}. Keeps v = R' − R for the update.
    pub(crate) fn ratio_move_end(&mut self, f: &HybFunction, old: f64, new: f64) -> (usize, f64) {
        let b = Self::index_of(&self.ends, old);
        self.r.clear();
        let mut ratio = 0.0;
        for (a, &s) in self.starts.iter().enumerate() {
            let new_v = f.eval(s - new);
            ratio += new_v * self.get(a, b);
            self.r.push(new_v - f.eval(s - old));
        }
        self.s = ratio;
        (b, ratio)
    }

    /// Apply the end move last proposed (Sherman–Morrison on row b of F).
    pub(crate) fn accept_move_end(&mut self, b: usize, new: f64) {
        let n = self.n;
        let st = self.stride;
        // (vᵀM)_y = Σ_a v_a M_ay.
        self.rm.clear();
        self.rm.resize(n, 0.0);
        for a in 0..n {
            let va = self.r[a];
            for y in 0..n {
                self.rm[y] += va * self.m[a * st + y];
            }
        }
        let inv = 1.0 / self.s;
        let col: Vec<f64> = (0..n).map(|x| self.m[x * st + b] * inv).collect();
        for (x, cx) in col.iter().enumerate() {
            for y in 0..n {
                self.m[x * st + y] -= cx * self.rm[y];
            }
        }
        self.ends[b] = new;
    }

    /// Determinant ratio for moving the creator at `old` to `new` (one column of F
    /// changes): ratio = Σ_b M_{ab} F(new − e_b). Keeps w = Q' − Q for the update.
    pub(crate) fn ratio_move_start(&mut self, f: &HybFunction, old: f64, new: f64) -> (usize, f64) {
        let a = Self::index_of(&self.starts, old);
        self.r.clear();
        let mut ratio = 0.0;
        for (b, &e) in self.ends.iter().enumerate() {
            let new_v = f.eval(new - e);
            ratio += self.get(a, b) * new_v;
            self.r.push(new_v - f.eval(old - e));
        }
        self.s = ratio;
        (a, ratio)
    }

    /// Apply the start move last proposed (Sherman–Morrison on column a of F).
    pub(crate) fn accept_move_start(&mut self, a: usize, new: f64) {
        let n = self.n;
        let st = self.stride;
        // (M w)_x = Σ_b M_xb w_b.
        self.mq.clear();
        for x in 0..n {
            let row = &self.m[x * st..x * st + n];
            self.mq
                .push(row.iter().zip(&self.r).map(|(m, w)| m * w).sum());
        }
        let inv = 1.0 / self.s;
        let row_a: Vec<f64> = (0..n).map(|y| self.m[a * st + y] * inv).collect();
        for x in 0..n {
            let f = self.mq[x];
            for (y, ry) in row_a.iter().enumerate() {
                self.m[x * st + y] -= f * ry;
            }
        }
        self.starts[a] = new;
    }

    fn index_of(v: &[f64], t: f64) -> usize {
        v.iter()
            .position(|&x| x == t)
            .expect("operator time present in the hybridization matrix")
    }

    /// Determinant ratio det F'/det F for removing the annihilator at `end` and the creator
    /// at `start` (up to the sign of the permutation, which the segment picture fixes).
    pub(crate) fn ratio_remove(&self, end: f64, start: f64) -> f64 {
        let a = Self::index_of(&self.starts, start);
        let b = Self::index_of(&self.ends, end);
        self.get(a, b)
    }

    /// Remove the annihilator at `end` and the creator at `start`.
    pub(crate) fn accept_remove(&mut self, end: f64, start: f64) {
        let a = Self::index_of(&self.starts, start);
        let b = Self::index_of(&self.ends, end);
        let n = self.n;
        let last = n - 1;
        let st = self.stride;
        // Move row a and column b to the end.
        if a != last {
            for c in 0..n {
                self.m.swap(a * st + c, last * st + c);
            }
            self.starts.swap(a, last);
        }
        if b != last {
            for r in 0..n {
                self.m.swap(r * st + b, r * st + last);
            }
            self.ends.swap(b, last);
        }
        let inv = 1.0 / self.m[last * st + last];
        for r in 0..last {
            let f = self.m[r * st + last] * inv;
            if f == 0.0 {
                continue;
            }
            for c in 0..last {
                self.m[r * st + c] -= f * self.m[last * st + c];
            }
        }
        self.starts.pop();
        self.ends.pop();
        self.n = last;
    }

    /// Rebuild M = F⁻¹ by LU decomposition; returns the largest deviation of the fast-updated
    /// M from it, relative to the largest element of M (0 for an empty matrix).
    pub(crate) fn recompute(&mut self, f: &HybFunction) -> f64 {
        let n = self.n;
        if n == 0 {
            return 0.0;
        }
        let fm = DMatrix::from_fn(n, n, |b, a| f.eval(self.starts[a] - self.ends[b]));
        let Some(inv) = fm.try_inverse() else {
            return f64::INFINITY;
        };
        let mut dev: f64 = 0.0;
        let mut scale: f64 = 0.0;
        let st = self.stride;
        for a in 0..n {
            for b in 0..n {
                let exact = inv[(a, b)];
                dev = dev.max((self.m[a * st + b] - exact).abs());
                scale = scale.max(exact.abs());
                self.m[a * st + b] = exact;
            }
        }
        dev / scale.max(f64::MIN_POSITIVE)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use num_complex::Complex64;
    use rondo_numerics::matsubara::fermionic_frequency;
    use rondo_numerics::rng::SplitMix64;

    #[test]
    fn fast_updates_match_lu_inverse() {
        // Random insertions, removals and operator moves; after each, M must equal the LU
        // inverse of F built from scratch, and each ratio must equal det F'/det F.
        let beta = 10.0;
        let delta: Vec<Complex64> = (0..512)
            .map(|n| {
                let iw = Complex64::new(0.0, fermionic_frequency(beta, n));
                0.25 / (iw + 0.3) + 0.5 / (iw - 0.7)
            })
            .collect();
        let tail = rondo_numerics::matsubara::fit_tail(beta, &delta).unwrap();
        let f = HybFunction::from_matsubara(beta, &delta, &tail, 2000).unwrap();
        let det = |m: &HybMatrix| {
            let n = m.ends.len();
            DMatrix::from_fn(n, n, |b, a| f.eval(m.starts[a] - m.ends[b])).determinant()
        };
        let mut rng = SplitMix64::new(3);
        let mut m = HybMatrix::new();
        let mut accepted = 0;
        for step in 0..600 {
            let before = if m.n == 0 { 1.0 } else { det(&m) };
            let n = m.n;
            let choice = if n < 2 {
                0
            } else if n > 12 {
                1
            } else {
                rng.below(4)
            };
            // Accept only well-conditioned changes (|ratio| ≥ 0.05), as the sampler mostly does.
            let ratio = match choice {
                0 => {
                    let (e, s) = (beta * rng.uniform(), beta * rng.uniform());
                    let r = m.ratio_insert(&f, e, s);
                    if r.abs() < 0.05 {
                        continue;
                    }
                    m.accept_insert(e, s);
                    r
                }
                1 => {
                    let (a, b) = (rng.below(n as u64) as usize, rng.below(n as u64) as usize);
                    let (e, s) = (m.ends[b], m.starts[a]);
                    let r = m.ratio_remove(e, s);
                    if r.abs() < 0.05 {
                        continue;
                    }
                    m.accept_remove(e, s);
                    // Removing row b, column a of F: det ratio up to the permutation sign.
                    r * if (a + b) % 2 == 0 { 1.0 } else { -1.0 }
                }
                2 => {
                    let old = m.ends[rng.below(n as u64) as usize];
                    let new = beta * rng.uniform();
                    let (b, r) = m.ratio_move_end(&f, old, new);
                    if r.abs() < 0.05 {
                        continue;
                    }
                    m.accept_move_end(b, new);
                    r
                }
                _ => {
                    let old = m.starts[rng.below(n as u64) as usize];
                    let new = beta * rng.uniform();
                    let (a, r) = m.ratio_move_start(&f, old, new);
                    if r.abs() < 0.05 {
                        continue;
                    }
                    m.accept_move_start(a, new);
                    r
                }
            };
            let after = if m.n == 0 { 1.0 } else { det(&m) };
            if choice != 1 {
                assert!(
                    (ratio - after / before).abs() < 1e-8 * (after / before).abs().max(1e-3),
                    "step {step} move {choice}: ratio {ratio} vs {}",
                    after / before
                );
            } else {
                assert!(
                    (ratio.abs() - (after / before).abs()).abs() < 1e-8 * ratio.abs().max(1e-3)
                );
            }
            let mut copy = m.clone();
            let dev = copy.recompute(&f);
            assert!(dev < 1e-8, "step {step}: relative deviation {dev}");
            accepted += 1;
        }
        assert!(accepted > 100, "{accepted} accepted changes");
    }
}

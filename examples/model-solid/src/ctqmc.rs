//! Hybridization-expansion continuous-time quantum Monte Carlo in the segment picture.
//!
//! Owns the Monte Carlo impurity solver of the model engine: one orbital, two spin flavours,
//! density-density U (P. Werner, A. Comanac, L. de' Medici, M. Troyer, A. J. Millis,
//! PRL 97, 076405 (2006); E. Gull et al., Rev. Mod. Phys. 83, 349 (2011), section on the
//! hybridization expansion). Each flavour is a set of segments on [0, β); the weight of a
//! configuration is
//!
//!   w = Π_σ |det F_σ| · exp(−ε Σ_σ L_σ − U O),
//!
//! with L_σ the occupied time of flavour σ, O the time both are occupied and
//! F_σ,ba = F(s_a − e_b), F(τ) = −Δ(τ). For a causal Δ the weights are positive (the segment
//! picture of one orbital has no sign problem); the sign is recomputed at every full check
//! and negative signs are counted in the metric `negative_sign_checks`. The constant part of
//! Δ(iω) at high frequency, c0 of the tail fit shared with the Hubbard-I solver
//! (`rondo_numerics::matsubara::fit_tail`), is moved into the level ε (metrics `level` and
//! `delta_static`); the moments c1…c3 of the same fit carry the tail of Δ(τ).
//!
//! Moves (each of the six picked with probability 1/6 for a random flavour), with the proposal
//! probabilities in the acceptance ratios (k segments before the move):
//! - insert a segment: start uniform on [0, β), length uniform on (0, l_max) with l_max the
//!   gap up to the next start (β if empty); R = β l_max/(k+1) · e^{−ε l − U o} · |det ratio|;
//! - remove one of k segments: R = k/(β l_max) · e^{+ε l + U o} · |det ratio|;
//! - insert an anti-segment (a hole) inside a segment (or the full line): start uniform,
//!   length uniform on (0, l_max) with l_max the rest of that segment (β for the full line);
//!   R = β l_max/(k+1) · e^{+ε l + U o} · |det ratio|;
//! - remove one of k holes, merging its two neighbours (l_max: from the hole's start to the
//!   end of the merged segment, β if k = 1): R = k/(β l_max) · e^{−ε l − U o} · |det ratio|;
//!
//! where l is the length of the segment or hole and o its overlap with the other flavour.
//! Two further moves shift one operator: the end of a segment uniformly within the gap up
//! to the next start, or its start within the gap after the previous end (symmetric
//! proposals, R = e^{−ε Δl − U Δo} · |det ratio|, one row or column of F changes).
//! After each sweep a global move exchanges the two flavours with probability 1/2. Its
//! acceptance ratio is 1 because ε and Δ do not depend on spin. Without it a local moment
//! (large U, low T) stays polarised for very long.
//!
//! Measurements, once per sweep after the warm-up: G(τ) from the pairs of the inverse
//! hybridization matrix, G(τ) = (1/β)⟨Σ_ab M_ab δ⁻(τ, e_b − s_a)⟩ (δ⁻ carries a minus sign for
//! negative differences shifted by β), both binned and directly as Legendre coefficients with
//! the shared kernel; the occupations, the double occupancy and P(0), P(1), P(2) from the
//! time each atomic configuration occupies. Error bars: the measurements are averaged into
//! bins of consecutive sweeps and the standard error of each observable comes from the
//! Flyvbjerg–Petersen binning analysis of its bin series (J. Chem. Phys. 91, 461 (1989)).

mod delta_tau;
mod dyson;
mod hybmatrix;
mod segments;

pub use delta_tau::HybFunction;

use crate::solve::SolverInput;
use anyhow::{bail, Result};
use hybmatrix::HybMatrix;
use nalgebra::DMatrix;
use num_complex::Complex64;
use rondo_numerics::binning::binning_analysis;
use rondo_numerics::legendre::LegendreAccumulator;
use rondo_numerics::matsubara::fit_tail;
use rondo_numerics::rng::SplitMix64;
use segments::{Flavour, Place};
use std::collections::BTreeMap;

/// Run-time parameters of the sampler.
#[derive(Debug, Clone, PartialEq)]
pub struct CtqmcParams {
    /// Measured sweeps (after the warm-up).
    pub sweeps: u64,
    /// Sweeps discarded before measuring.
    pub warmup_sweeps: u64,
    /// Proposed moves per sweep (one measurement per sweep).
    pub moves_per_sweep: u32,
    /// Number of Legendre coefficients measured.
    pub n_legendre: usize,
    /// Bins of the histogram G(τ).
    pub n_tau_bins: usize,
    /// Intervals of the Δ(τ) interpolation grid.
    pub n_tau_grid: usize,
    /// Measurement bins: consecutive sweeps are averaged into this many bins (at most one
    /// per sweep), the level-0 series of the binning analysis of the error bars.
    pub n_blocks: usize,
    /// A full recomputation of the inverse matrices every this many sweeps (0: never).
    pub check_every: u64,
}

impl Default for CtqmcParams {
    fn default() -> Self {
        Self {
            sweeps: 50_000,
            warmup_sweeps: 1_000,
            moves_per_sweep: 50,
            n_legendre: 40,
            n_tau_bins: 200,
            n_tau_grid: 5_000,
            n_blocks: 1024,
            check_every: 500,
        }
    }
}

impl CtqmcParams {
    fn validate(&self) -> Result<()> {
        if self.n_blocks < 2 {
            bail!(
                "CT-QMC needs at least 2 measurement blocks, got {}",
                self.n_blocks
            );
        }
        if self.sweeps < 2 {
            bail!(
                "CT-QMC needs at least 2 measured sweeps for an error bar, got {}",
                self.sweeps
            );
        }
        if self.moves_per_sweep == 0 || self.n_legendre == 0 || self.n_tau_bins == 0 {
            bail!("CT-QMC moves per sweep, Legendre coefficients and τ bins must be positive");
        }
        Ok(())
    }
}

/// A number with its standard error.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Estimate {
    /// Mean.
    pub value: f64,
    /// Standard error of the mean.
    pub error: f64,
}

/// Everything the solver measured and derived.
#[derive(Debug, Clone)]
pub struct CtqmcResult {
    /// Legendre coefficients G_l (spin averaged) and their errors.
    pub gl: Vec<f64>,
    /// Standard errors of `gl`.
    pub gl_err: Vec<f64>,
    /// Bin centres of the histogram G(τ).
    pub tau: Vec<f64>,
    /// Binned G(τ) (spin averaged).
    pub g_tau: Vec<f64>,
    /// Standard errors of `g_tau`.
    pub g_tau_err: Vec<f64>,
    /// G(iω_n) on the grid of Δ.
    pub g_iw: Vec<Complex64>,
    /// Standard errors of Re and Im G(iω_n) (zero where the tail is used).
    pub g_iw_err: Vec<Complex64>,
    /// Σ(iω_n).
    pub sigma: Vec<Complex64>,
    /// Linearised standard errors of Re and Im Σ(iω_n) (zero where the tail is used).
    pub sigma_err: Vec<Complex64>,
    /// Occupation per flavour (up, down).
    pub n_sigma: [Estimate; 2],
    /// ⟨n↑n↓⟩.
    pub docc: Estimate,
    /// P(0), P(1) (both spin states), P(2).
    pub p: [Estimate; 3],
    /// Metrics: name → (value, standard error if statistical).
    pub metrics: BTreeMap<&'static str, (f64, Option<f64>)>,
    /// Wall-clock seconds spent in the Monte Carlo loop (not part of the metrics: it is
    /// not reproducible).
    pub elapsed_seconds: f64,
    /// Number of proposed moves.
    pub moves: u64,
}

/// The measurement kernel for G: a sample w·δ(τ − τ_s) is added both to a histogram on
/// [0, β) and to the Legendre coefficients (shared kernel of the numerics crate).
#[derive(Debug, Clone)]
pub struct GreenEstimator {
    beta: f64,
    legendre: LegendreAccumulator,
    bins: Vec<f64>,
    bin_scale: f64,
}

impl GreenEstimator {
    /// An estimator with `n_legendre` coefficients and `n_bins` histogram bins.
    pub fn new(beta: f64, n_legendre: usize, n_bins: usize) -> Self {
        Self {
            beta,
            legendre: LegendreAccumulator::new(beta, n_legendre),
            bins: vec![0.0; n_bins],
            bin_scale: n_bins as f64 / beta,
        }
    }

    /// Add the sample w·δ(τ − tau), tau in [0, β).
    #[inline]
    pub fn add(&mut self, tau: f64, w: f64) {
        self.legendre.add(tau, w);
        let i = ((tau * self.bin_scale) as usize).min(self.bins.len() - 1);
        self.bins[i] += w * self.bin_scale;
    }

    /// Accumulated G_l.
    pub fn legendre(&self) -> &[f64] {
        self.legendre.sums()
    }

    /// Accumulated histogram (bin averages of G(τ)).
    pub fn binned(&self) -> &[f64] {
        &self.bins
    }

    /// Bin centres.
    pub fn bin_centres(&self) -> Vec<f64> {
        let h = self.beta / self.bins.len() as f64;
        (0..self.bins.len()).map(|i| (i as f64 + 0.5) * h).collect()
    }

    fn clear(&mut self) {
        self.legendre.clear();
        self.bins.fill(0.0);
    }
}

/// Proposal and acceptance counts of one move type.
#[derive(Debug, Clone, Copy, Default)]
struct MoveStats {
    proposed: u64,
    accepted: u64,
}

impl MoveStats {
    fn rate(&self) -> f64 {
        if self.proposed == 0 {
            0.0
        } else {
            self.accepted as f64 / self.proposed as f64
        }
    }
}

/// The Markov chain.
struct Sampler<'a> {
    beta: f64,
    eps: f64,
    u: f64,
    f: &'a HybFunction,
    fl: [Flavour; 2],
    mats: [HybMatrix; 2],
    rng: SplitMix64,
    stats: [MoveStats; 6],
}

impl<'a> Sampler<'a> {
    fn new(beta: f64, eps: f64, u: f64, f: &'a HybFunction, seed: u64) -> Self {
        Self {
            beta,
            eps,
            u,
            f,
            fl: [Flavour::empty(beta), Flavour::empty(beta)],
            mats: [HybMatrix::new(), HybMatrix::new()],
            rng: SplitMix64::new(seed),
            stats: [MoveStats::default(); 6],
        }
    }

    fn accept(&mut self, ratio: f64) -> bool {
        let u = self.rng.uniform();
        u < ratio
    }

    /// Global move: exchange the spin flavours (weight unchanged for spin-independent ε, Δ).
    fn maybe_flip_spins(&mut self) {
        if self.rng.uniform() < 0.5 {
            self.fl.swap(0, 1);
            self.mats.swap(0, 1);
        }
    }

    fn sweep(&mut self, moves: u32) {
        for _ in 0..moves {
            self.step();
        }
        self.maybe_flip_spins();
    }

    fn step(&mut self) {
        let s = self.rng.below(2) as usize;
        let kind = self.rng.below(6) as usize;
        self.stats[kind].proposed += 1;
        let ok = match kind {
            0 => self.insert_segment(s),
            1 => self.remove_segment(s),
            2 => self.insert_hole(s),
            3 => self.remove_hole(s),
            4 => self.move_end(s),
            _ => self.move_start(s),
        };
        if ok {
            self.stats[kind].accepted += 1;
        }
    }

    fn insert_segment(&mut self, s: usize) -> bool {
        let beta = self.beta;
        let start = beta * self.rng.uniform();
        let l_max = match self.fl[s].locate(start) {
            Place::Full | Place::Inside(_) => return false,
            Place::Empty => beta,
            Place::Outside { next } => segments::wrap(self.fl[s].seg(next).0 - start, beta),
        };
        let l = l_max * self.rng.uniform();
        let end = segments::wrap(start + l, beta);
        let o = self.fl[1 - s].overlap_with(start, l);
        let k = self.fl[s].order() as f64;
        let det = self.mats[s].ratio_insert(self.f, end, start);
        let r = beta * l_max / (k + 1.0) * (-self.eps * l - self.u * o).exp() * det.abs();
        if !self.accept(r) {
            return false;
        }
        self.mats[s].accept_insert(end, start);
        self.fl[s].insert(start, end);
        true
    }

    fn remove_segment(&mut self, s: usize) -> bool {
        let k = self.fl[s].order();
        if k == 0 {
            return false;
        }
        let beta = self.beta;
        let i = self.rng.below(k as u64) as usize;
        let (start, end) = self.fl[s].seg(i);
        let l = self.fl[s].seg_len(i);
        let l_max = if k == 1 {
            beta
        } else {
            segments::wrap(self.fl[s].seg((i + 1) % k).0 - start, beta)
        };
        let o = self.fl[1 - s].overlap_with(start, l);
        let det = self.mats[s].ratio_remove(end, start);
        let r = k as f64 / (beta * l_max) * (self.eps * l + self.u * o).exp() * det.abs();
        if !self.accept(r) {
            return false;
        }
        self.mats[s].accept_remove(end, start);
        self.fl[s].remove(i);
        true
    }

    fn insert_hole(&mut self, s: usize) -> bool {
        let beta = self.beta;
        let end = beta * self.rng.uniform();
        let (host, l_max) = match self.fl[s].locate(end) {
            Place::Empty | Place::Outside { .. } => return false,
            Place::Full => (None, beta),
            Place::Inside(i) => (Some(i), segments::wrap(self.fl[s].seg(i).1 - end, beta)),
        };
        let l = l_max * self.rng.uniform();
        let start = segments::wrap(end + l, beta);
        let o = self.fl[1 - s].overlap_with(end, l);
        let k = self.fl[s].order() as f64;
        let det = self.mats[s].ratio_insert(self.f, end, start);
        let r = beta * l_max / (k + 1.0) * (self.eps * l + self.u * o).exp() * det.abs();
        if !self.accept(r) {
            return false;
        }
        self.mats[s].accept_insert(end, start);
        self.fl[s].cut(host, end, start);
        true
    }

    fn remove_hole(&mut self, s: usize) -> bool {
        let k = self.fl[s].order();
        if k == 0 {
            return false;
        }
        let beta = self.beta;
        let i = self.rng.below(k as u64) as usize;
        let j = (i + 1) % k;
        let end = self.fl[s].seg(i).1;
        let start = self.fl[s].seg(j).0;
        let l = segments::wrap(start - end, beta);
        let l_max = if k == 1 {
            beta
        } else {
            segments::wrap(self.fl[s].seg(j).1 - end, beta)
        };
        let o = self.fl[1 - s].overlap_with(end, l);
        let det = self.mats[s].ratio_remove(end, start);
        let r = k as f64 / (beta * l_max) * (-self.eps * l - self.u * o).exp() * det.abs();
        if !self.accept(r) {
            return false;
        }
        self.mats[s].accept_remove(end, start);
        self.fl[s].merge(i);
        true
    }

    fn move_end(&mut self, s: usize) -> bool {
        let k = self.fl[s].order();
        if k == 0 {
            return false;
        }
        let beta = self.beta;
        let i = self.rng.below(k as u64) as usize;
        let (start, end) = self.fl[s].seg(i);
        let l_old = self.fl[s].seg_len(i);
        let l_max = if k == 1 {
            beta
        } else {
            segments::wrap(self.fl[s].seg((i + 1) % k).0 - start, beta)
        };
        let l_new = l_max * self.rng.uniform();
        let new_end = segments::wrap(start + l_new, beta);
        let other = &self.fl[1 - s];
        let d_o = other.overlap_with(start, l_new) - other.overlap_with(start, l_old);
        let (b, det) = self.mats[s].ratio_move_end(self.f, end, new_end);
        let r = (-self.eps * (l_new - l_old) - self.u * d_o).exp() * det.abs();
        if !self.accept(r) {
            return false;
        }
        self.mats[s].accept_move_end(b, new_end);
        self.fl[s].remove(i);
        self.fl[s].insert(start, new_end);
        true
    }

    fn move_start(&mut self, s: usize) -> bool {
        let k = self.fl[s].order();
        if k == 0 {
            return false;
        }
        let beta = self.beta;
        let i = self.rng.below(k as u64) as usize;
        let (start, end) = self.fl[s].seg(i);
        let l_old = self.fl[s].seg_len(i);
        let l_max = if k == 1 {
            beta
        } else {
            segments::wrap(end - self.fl[s].seg((i + k - 1) % k).1, beta)
        };
        let l_new = l_max * self.rng.uniform();
        let new_start = segments::wrap(end - l_new, beta);
        let other = &self.fl[1 - s];
        let d_o = other.overlap_with(new_start, l_new) - other.overlap_with(start, l_old);
        let (a, det) = self.mats[s].ratio_move_start(self.f, start, new_start);
        let r = (-self.eps * (l_new - l_old) - self.u * d_o).exp() * det.abs();
        if !self.accept(r) {
            return false;
        }
        self.mats[s].accept_move_start(a, new_start);
        self.fl[s].remove(i);
        self.fl[s].insert(new_start, end);
        true
    }

    /// Occupied times (L↑, L↓) and the overlap O.
    fn times(&self) -> (f64, f64, f64) {
        let lu = self.fl[0].occupied_length();
        let ld = self.fl[1].occupied_length();
        let o = if self.fl[0].is_full() {
            ld
        } else {
            self.fl[0]
                .segments()
                .iter()
                .enumerate()
                .map(|(i, seg)| self.fl[1].overlap_with(seg.0, self.fl[0].seg_len(i)))
                .sum()
        };
        (lu, ld, o)
    }

    /// Add the G(τ) samples of the current configuration (spin averaged).
    fn measure_green(&self, est: &mut GreenEstimator) {
        let scale = 0.5 / self.beta;
        for m in &self.mats {
            let (st, en) = (m.starts(), m.ends());
            for (a, &s) in st.iter().enumerate() {
                for (b, &e) in en.iter().enumerate() {
                    let d = e - s;
                    let mab = m.get(a, b);
                    if d < 0.0 {
                        est.add(d + self.beta, -mab * scale);
                    } else {
                        est.add(d, mab * scale);
                    }
                }
            }
        }
    }

    fn recompute(&mut self) -> f64 {
        let f = self.f;
        self.mats
            .iter_mut()
            .map(|m| m.recompute(f))
            .fold(0.0, f64::max)
    }

    /// The sign of the full weight, from the time-ordered determinant of each flavour:
    /// Π_σ sign(det F_σ) (−1)^{k_σ} (−1)^{w_σ}, with rows and columns in segment order and w_σ = 1
    /// when a segment winds through β. It is +1 for a causal Δ (the segment picture of one
    /// orbital has no sign problem); a −1 flags a non-causal hybridization function, whose
    /// weights the sampler replaces by their absolute values.
    fn weight_sign(&self) -> f64 {
        let mut sign = 1.0;
        for fl in &self.fl {
            let segs = fl.segments();
            let k = segs.len();
            if k == 0 {
                continue;
            }
            let m = DMatrix::from_fn(k, k, |i, j| self.f.eval(segs[j].0 - segs[i].1));
            let d = m.determinant();
            let wind = segs[k - 1].1 < segs[k - 1].0;
            let mut s = d.signum();
            if k % 2 == 1 {
                s = -s;
            }
            if wind {
                s = -s;
            }
            sign *= s;
        }
        sign
    }
}

/// Index of the scalar observables in a block record.
const N_SCALARS: usize = 8;
const SC_NUP: usize = 0;
const SC_NDN: usize = 1;
const SC_DOCC: usize = 2;
const SC_P0: usize = 3;
const SC_P1: usize = 4;
const SC_P2: usize = 5;
const SC_KUP: usize = 6;
const SC_KDN: usize = 7;

/// Mean and standard error of a series of measurement bins by the Flyvbjerg–Petersen
/// binning analysis of the numerics crate (plain standard error of the bins when it has too
/// few of them for a plateau).
fn estimate(bins: &[f64]) -> Estimate {
    match binning_analysis(bins) {
        Ok(a) => Estimate {
            value: a.mean,
            error: a.std_error,
        },
        Err(_) => mean_and_error(bins),
    }
}

fn mean_and_error(blocks: &[f64]) -> Estimate {
    let n = blocks.len() as f64;
    let mean = blocks.iter().sum::<f64>() / n;
    let var = blocks.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    Estimate {
        value: mean,
        error: (var / n).sqrt(),
    }
}

fn column(blocks: &[Vec<f64>], i: usize) -> Vec<f64> {
    blocks.iter().map(|b| b[i]).collect()
}

/// Solve the impurity problem by CT-QMC.
pub fn solve(input: &SolverInput<'_>, params: &CtqmcParams) -> Result<CtqmcResult> {
    params.validate()?;
    let beta = input.beta;
    if !(beta.is_finite() && beta > 0.0) {
        bail!("inverse temperature must be positive, got {beta}");
    }
    if !input.level.is_finite() || !input.u.is_finite() {
        bail!(
            "level and U must be finite (got {} and {})",
            input.level,
            input.u
        );
    }
    // The static part of Δ shifts the level; the rest goes to Δ(τ). The tail fit is the one
    // the Hubbard-I solver uses (crate::solve::delta_static), so both see the same level.
    if input.delta.is_empty() {
        bail!("the hybridization function Δ(iω_n) is empty");
    }
    let tail = fit_tail(beta, input.delta).ok_or_else(|| {
        anyhow::anyhow!("the high-frequency tail of Δ(iω_n) could not be fitted (singular fit)")
    })?;
    let c0 = tail.c0;
    let f = HybFunction::from_matsubara(beta, input.delta, &tail, params.n_tau_grid)?;
    let eps = input.level + c0;
    let mut smp = Sampler::new(beta, eps, input.u, &f, input.seed);
    let mut est = GreenEstimator::new(beta, params.n_legendre, params.n_tau_bins);
    // Bins of equal length covering all but at most per_block − 1 of the requested sweeps.
    let per_block = params.sweeps.div_ceil(params.n_blocks as u64);
    let n_bins = (params.sweeps / per_block) as usize;
    let mut max_dev: f64 = 0.0;
    let mut n_checks = 0u64;
    let mut negative_signs = 0u64;
    let mut sweep_no = 0u64;
    let t0 = std::time::Instant::now();
    let mut check = |smp: &mut Sampler<'_>, sweep_no: u64| {
        if params.check_every > 0 && sweep_no % params.check_every == 0 {
            max_dev = max_dev.max(smp.recompute());
            if smp.weight_sign() < 0.0 {
                negative_signs += 1;
            }
            n_checks += 1;
        }
    };
    for _ in 0..params.warmup_sweeps {
        smp.sweep(params.moves_per_sweep);
        sweep_no += 1;
        check(&mut smp, sweep_no);
    }
    let mut gl_blocks = Vec::with_capacity(n_bins);
    let mut gtau_blocks = Vec::with_capacity(n_bins);
    let mut sc_blocks = Vec::with_capacity(n_bins);
    for _ in 0..n_bins {
        est.clear();
        let mut sc = [0.0; N_SCALARS];
        for _ in 0..per_block {
            smp.sweep(params.moves_per_sweep);
            sweep_no += 1;
            check(&mut smp, sweep_no);
            smp.measure_green(&mut est);
            let (lu, ld, o) = smp.times();
            sc[SC_NUP] += lu / beta;
            sc[SC_NDN] += ld / beta;
            sc[SC_DOCC] += o / beta;
            sc[SC_P2] += o / beta;
            sc[SC_P1] += (lu + ld - 2.0 * o) / beta;
            sc[SC_P0] += 1.0 - (lu + ld - o) / beta;
            sc[SC_KUP] += smp.fl[0].order() as f64;
            sc[SC_KDN] += smp.fl[1].order() as f64;
        }
        let inv = 1.0 / per_block as f64;
        gl_blocks.push(est.legendre().iter().map(|v| v * inv).collect::<Vec<_>>());
        gtau_blocks.push(est.binned().iter().map(|v| v * inv).collect::<Vec<_>>());
        sc_blocks.push(sc.iter().map(|v| v * inv).collect::<Vec<_>>());
    }
    let elapsed_seconds = t0.elapsed().as_secs_f64();
    let moves = sweep_no * u64::from(params.moves_per_sweep);

    let (gl, gl_err): (Vec<f64>, Vec<f64>) = (0..params.n_legendre)
        .map(|l| {
            let e = estimate(&column(&gl_blocks, l));
            (e.value, e.error)
        })
        .unzip();
    let (g_tau, g_tau_err): (Vec<f64>, Vec<f64>) = (0..params.n_tau_bins)
        .map(|i| {
            let e = estimate(&column(&gtau_blocks, i));
            (e.value, e.error)
        })
        .unzip();
    let sc = |i: usize| estimate(&column(&sc_blocks, i));
    let n_sigma = [sc(SC_NUP), sc(SC_NDN)];
    let docc = sc(SC_DOCC);
    let p = [sc(SC_P0), sc(SC_P1), sc(SC_P2)];
    let n_tot = estimate(
        &sc_blocks
            .iter()
            .map(|b| b[SC_NUP] + b[SC_NDN])
            .collect::<Vec<_>>(),
    );
    let n_avg = 0.5 * n_tot.value;

    if gl.iter().all(|g| *g == 0.0) {
        bail!(
            "CT-QMC sampled no configuration with hybridization events in {} sweeps \
             (is Δ(iω) zero or tiny?); use the hubbard-i solver or more sweeps",
            params.sweeps
        );
    }
    let dy = dyson::dyson(&dyson::DysonInput {
        beta,
        gl: &gl,
        gl_err: &gl_err,
        gl_blocks: &gl_blocks,
        delta: input.delta,
        level: input.level,
        u: input.u,
        n_other: n_avg,
    });

    if let Some(n) = dy
        .sigma
        .iter()
        .position(|z| !(z.re.is_finite() && z.im.is_finite()))
    {
        bail!("CT-QMC produced a non-finite self-energy at ω_{n}; rerun with more sweeps");
    }
    let mut metrics: BTreeMap<&'static str, (f64, Option<f64>)> = BTreeMap::new();
    let with = |e: Estimate| (e.value, Some(e.error));
    metrics.insert("n_f", with(n_tot));
    metrics.insert("n_up", with(n_sigma[0]));
    metrics.insert("n_dn", with(n_sigma[1]));
    metrics.insert("docc", with(docc));
    metrics.insert("p0", with(p[0]));
    metrics.insert("p1", with(p[1]));
    metrics.insert("p2", with(p[2]));
    metrics.insert("order_up", with(sc(SC_KUP)));
    metrics.insert("order_dn", with(sc(SC_KDN)));
    metrics.insert("level", (eps, None));
    metrics.insert("delta_static", (c0, None));
    metrics.insert(
        "sigma_inf",
        (input.u * n_avg, Some(input.u * 0.5 * n_tot.error)),
    );
    if let (Some(s), Some(e)) = (dy.sigma.first(), dy.sigma_err.first()) {
        metrics.insert("sigma_iw0_re", (s.re, Some(e.re)));
        metrics.insert("sigma_iw0_im", (s.im, Some(e.im)));
    }
    metrics.insert("legendre_kept", (dy.kept as f64, None));
    metrics.insert(
        "legendre_dropped",
        ((params.n_legendre - dy.kept) as f64, None),
    );
    metrics.insert("tail_from_n", (dy.crossover as f64, None));
    metrics.insert("det_check_max_dev", (max_dev, None));
    metrics.insert("det_checks", (n_checks as f64, None));
    metrics.insert("negative_sign_checks", (negative_signs as f64, None));
    metrics.insert("sweeps", ((per_block * n_bins as u64) as f64, None));
    metrics.insert("accept_segment_insert", (smp.stats[0].rate(), None));
    metrics.insert("accept_segment_remove", (smp.stats[1].rate(), None));
    metrics.insert("accept_hole_insert", (smp.stats[2].rate(), None));
    metrics.insert("accept_hole_remove", (smp.stats[3].rate(), None));
    metrics.insert("accept_shift_end", (smp.stats[4].rate(), None));
    metrics.insert("accept_shift_start", (smp.stats[5].rate(), None));

    Ok(CtqmcResult {
        gl,
        gl_err,
        tau: est.bin_centres(),
        g_tau,
        g_tau_err,
        g_iw: dy.g,
        g_iw_err: dy.g_err,
        sigma: dy.sigma,
        sigma_err: dy.sigma_err,
        n_sigma,
        docc,
        p,
        metrics,
        elapsed_seconds,
        moves,
    })
}

/// The solve-stage entry point: default parameters with the sweeps of the input; the
/// metrics keep their standard errors, and G_l and G(τ) are passed on for optional output.
pub fn run(input: &SolverInput<'_>) -> Result<crate::solve::SolverOutput> {
    let mut params = CtqmcParams::default();
    if let Some(s) = input.sweeps {
        params.sweeps = s;
    }
    let r = solve(input, &params)?;
    Ok(crate::solve::SolverOutput {
        g: r.g_iw,
        sigma: r.sigma,
        metrics: r.metrics,
        imaginary_time: Some(crate::solve::ImaginaryTime {
            gl: r.gl,
            gl_err: r.gl_err,
            tau: r.tau,
            g_tau: r.g_tau,
            g_tau_err: r.g_tau_err,
        }),
    })
}

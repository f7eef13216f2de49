//! A portable, seedable random generator: SplitMix64 with Box–Muller normals.
//!
//! Bit for bit the published SplitMix64 (Steele, Lea & Flood 2014) with the textbook
//! Box–Muller transform (Box & Muller 1958), so tests can match reference data exactly and a resumed Monte Carlo run reproduces an uninterrupted one.
//! Seeds for stage attempts are derived from stable names with [`derive_seed`].

/// SplitMix64 state (Steele, Lea & Flood, OOPSLA 2014). All arithmetic wraps mod 2⁶⁴.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SplitMix64 {
    state: u64,
    spare_normal: Option<u64>,
}

impl SplitMix64 {
    /// A generator whose state starts at `seed`.
    pub fn new(seed: u64) -> Self {
        Self {
            state: seed,
            spare_normal: None,
        }
    }

    /// The raw state, for checkpointing; restore with [`SplitMix64::from_state`].
    pub fn state(&self) -> (u64, Option<f64>) {
        (self.state, self.spare_normal.map(f64::from_bits))
    }

    /// Restore a generator from [`SplitMix64::state`].
    pub fn from_state(state: u64, spare: Option<f64>) -> Self {
        Self {
            state,
            spare_normal: spare.map(f64::to_bits),
        }
    }

    /// Next 64-bit output.
    pub fn next_u64(&mut self) -> u64 {
        self.state = self.state.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.state;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in the open interval (0, 1): ((z >> 11) + 0.5) · 2⁻⁵³.
    pub fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) * (1.0 / 9_007_199_254_740_992.0)
    }

    /// Uniform integer in `0..n` (n > 0), by rejection so that it is unbiased.
    pub fn below(&mut self, n: u64) -> u64 {
        assert!(n > 0, "below(0) has no valid output");
        let zone = u64::MAX - (u64::MAX % n);
        loop {
            let z = self.next_u64();
            if z < zone {
                return z % n;
            }
        }
    }

    /// Standard normal by Box–Muller: consumes (u1, u2), emits r·cos(2πu2), then r·sin(2πu2).
    pub fn normal(&mut self) -> f64 {
        if let Some(bits) = self.spare_normal.take() {
            return f64::from_bits(bits);
        }
        let u1 = self.uniform();
        let u2 = self.uniform();
        let r = (-2.0 * u1.ln()).sqrt();
        let phase = 2.0 * std::f64::consts::PI * u2;
        self.spare_normal = Some((r * phase.sin()).to_bits());
        r * phase.cos()
    }
}

/// A 64-bit seed from a base seed and stable labels (campaign, point, iteration, stage).
///
/// Uses FNV-1a over the labels followed by SplitMix64 finalisation; stable across
/// platforms and rondo versions (changing it changes recorded results, so it never changes).
pub fn derive_seed(base: u64, labels: &[&str]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325 ^ base;
    for label in labels {
        for b in label.as_bytes().iter().chain(std::iter::once(&0xffu8)) {
            h ^= u64::from(*b);
            h = h.wrapping_mul(0x0000_0100_0000_01B3);
        }
    }
    SplitMix64::new(h).next_u64()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix_reference_outputs() {
        // Seed 0 gives the published SplitMix64 reference outputs (quoted from memory).
        let mut g = SplitMix64::new(0);
        assert_eq!(g.next_u64(), 0xe220_a839_7b1d_cdaf);
        assert_eq!(g.next_u64(), 0x6e78_9e6a_a1b9_65f4);
        // Seed 1, computed by reference/binning.py's portable generator.
        let mut g = SplitMix64::new(1);
        assert_eq!(g.next_u64(), 0x910a_2dec_8902_5cc1);
        assert_eq!(g.next_u64(), 0xbeeb_8da1_658e_ec67);
    }

    #[test]
    fn box_muller_reference_normals() {
        // Seed 1: first four Box–Muller normals, from reference/binning.py.
        let expected = [
            -0.028_249_746_095_854_695,
            -1.065_617_648_414_326,
            -0.227_919_522_867_635_17,
            0.083_094_168_471_500_97,
        ];
        let mut g = SplitMix64::new(1);
        for e in expected {
            let x = g.normal();
            assert!((x - e).abs() <= 1e-15 * e.abs().max(1.0), "{x} vs {e}");
        }
    }

    #[test]
    fn state_round_trip_continues_the_sequence() {
        let mut a = SplitMix64::new(7);
        a.normal();
        let (s, spare) = a.state();
        let mut b = SplitMix64::from_state(s, spare);
        for _ in 0..10 {
            assert_eq!(a.normal().to_bits(), b.normal().to_bits());
        }
    }

    #[test]
    fn derived_seeds_differ_by_label() {
        let a = derive_seed(1, &["c", "p1", "3", "solve"]);
        let b = derive_seed(1, &["c", "p1", "4", "solve"]);
        let c = derive_seed(1, &["c", "p13", "", "solve"]);
        assert_ne!(a, b);
        assert_ne!(a, c);
        assert_eq!(a, derive_seed(1, &["c", "p1", "3", "solve"]));
    }
}

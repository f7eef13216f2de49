//! Physical constants and unit conversions used across rondo (exact SI values, CODATA 2018).

/// Elementary charge in coulomb. Exact since the 2019 SI redefinition (CODATA 2018).
pub const ELEMENTARY_CHARGE_C: f64 = 1.602_176_634e-19;

/// Boltzmann constant in joule per kelvin. Exact since the 2019 SI redefinition (CODATA 2018).
pub const BOLTZMANN_J_PER_K: f64 = 1.380_649e-23;

/// Boltzmann constant in eV per kelvin: k_B / e, both exact (CODATA 2018).
/// 1.380649e-23 / 1.602176634e-19 = 8.617333262...e-5 eV/K.
pub const BOLTZMANN_EV_PER_K: f64 = BOLTZMANN_J_PER_K / ELEMENTARY_CHARGE_C;

/// 1 eV/Å³ in GPa: e · 10³⁰ Pa / 10⁹ = 160.2176634 GPa, exact (CODATA 2018 elementary charge).
pub const EV_PER_A3_IN_GPA: f64 = ELEMENTARY_CHARGE_C * 1.0e30 / 1.0e9;

/// Inverse temperature β in 1/eV for a temperature in kelvin.
///
/// Returns `None` for a temperature that is not finite and positive.
pub fn beta_from_kelvin(t_kelvin: f64) -> Option<f64> {
    if t_kelvin.is_finite() && t_kelvin > 0.0 {
        Some(1.0 / (BOLTZMANN_EV_PER_K * t_kelvin))
    } else {
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn boltzmann_in_ev() {
        // CODATA 2018 lists k_B = 8.617333262e-5 eV/K (exact quotient, shown truncated).
        assert!((BOLTZMANN_EV_PER_K - 8.617_333_262e-5).abs() < 1e-14);
    }

    #[test]
    fn ev_per_cubic_angstrom_in_gpa() {
        // 1 eV/Å³ = 1.602176634e-19 J / 1e-30 m³ = 160.2176634 GPa exactly (2018 SI, CODATA 2018 e).
        assert!((EV_PER_A3_IN_GPA - 160.217_663_4).abs() < 1e-10);
    }

    #[test]
    fn beta_rejects_non_positive() {
        assert!(beta_from_kelvin(-1.0).is_none());
        assert!(beta_from_kelvin(0.0).is_none());
        assert!(beta_from_kelvin(f64::NAN).is_none());
        let b = beta_from_kelvin(300.0).unwrap_or_default();
        // 1 / (k_B · 300 K) with the exact CODATA 2018 k_B and e: 38.681727071833606 eV⁻¹.
        assert!((b - 38.681_727_071_833_6).abs() < 1e-10);
    }
}

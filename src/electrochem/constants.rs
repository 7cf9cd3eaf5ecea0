//! Physical constants used by every computation in the crate.
//!
//! Values are the exact SI 2019 defining constants (BIPM, "The International
//! System of Units", 9th edition, 2019; CODATA 2018 lists the same exact
//! values). F and R follow from them by definition, so they are computed,
//! not typed in, and carry no rounding of their own.

/// Elementary charge, C (SI 2019, exact).
pub const ELEMENTARY_CHARGE_C: f64 = 1.602_176_634e-19;
/// Avogadro constant, 1/mol (SI 2019, exact).
pub const AVOGADRO_PER_MOL: f64 = 6.022_140_76e23;
/// Boltzmann constant, J/K (SI 2019, exact).
pub const BOLTZMANN_J_PER_K: f64 = 1.380_649e-23;
/// Faraday constant F = e·N_A, C/mol (≈ 96 485.332 12).
pub const FARADAY_C_PER_MOL: f64 = ELEMENTARY_CHARGE_C * AVOGADRO_PER_MOL;
/// Molar gas constant R = k_B·N_A, J/(mol·K) (≈ 8.314 462 618).
pub const GAS_CONSTANT_J_PER_MOL_K: f64 = BOLTZMANN_J_PER_K * AVOGADRO_PER_MOL;

/// The thermodynamic reference temperature of standard-state tables, K.
pub const STANDARD_TEMP_K: f64 = 298.15;
/// 0 °C in kelvin (exact by definition of the Celsius scale).
pub const ZERO_CELSIUS_K: f64 = 273.15;

/// Thermal voltage RT/F in volts at `temp_k`.
pub fn thermal_volts(temp_k: f64) -> f64 {
    GAS_CONSTANT_J_PER_MOL_K * temp_k / FARADAY_C_PER_MOL
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn derived_constants_match_si_2019() {
        // CODATA 2018 / SI 2019: F = 96 485.332 12... C/mol, R = 8.314 462 618... J/(mol K).
        assert!((FARADAY_C_PER_MOL - 96_485.332_12).abs() < 1e-5);
        assert!((GAS_CONSTANT_J_PER_MOL_K - 8.314_462_618).abs() < 1e-9);
    }

    #[test]
    fn thermal_voltage_at_25_c() {
        // RT/F = 25.693 mV at 298.15 K (textbook value, any physical chemistry text).
        assert!((thermal_volts(STANDARD_TEMP_K) * 1e3 - 25.693).abs() < 5e-4);
        // (RT/F)·ln 10 = 59.16 mV: the "59 mV per decade" rule (common practice).
        let per_decade_mv = thermal_volts(STANDARD_TEMP_K) * std::f64::consts::LN_10 * 1e3;
        assert!((per_decade_mv - 59.16).abs() < 5e-3);
    }
}

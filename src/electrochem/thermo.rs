//! The thermodynamic state of a cell reaction from one voltage.
//!
//! Everything here follows from three textbook relations (see any physical
//! chemistry text, e.g. Atkins, *Physical Chemistry*, chapter on
//! electrochemical cells):
//!
//! * ΔG = −nFE and ΔG° = −nFE°;
//! * ΔG° = −RT ln K, hence ln K = nFE°/RT;
//! * the Nernst equation E = E° − (RT/nF) ln Q, hence ln Q = nF(E° − E)/RT
//!   and the affinity ln(K/Q) = nFE/RT.
//!
//! K and Q overflow `f64` for ordinary cells (log10 K ≈ 37 for the
//! zinc–copper cell, ≈ 41 for water), so only their logarithms are ever
//! formed.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use super::constants::{FARADAY_C_PER_MOL, GAS_CONSTANT_J_PER_MOL_K, STANDARD_TEMP_K};
use serde::Serialize;

/// Which way the cell reaction, as written, wants to go.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ReactionState {
    /// E > 0: ΔG < 0, Q < K; the reaction as written runs by itself.
    Spontaneous,
    /// E < 0: ΔG > 0, Q > K; it runs only if driven.
    Driven,
    /// |E| within the stated tolerance: no driving force left.
    Equilibrium,
}

impl ReactionState {
    pub fn as_str(self) -> &'static str {
        match self {
            ReactionState::Spontaneous => "spontaneous",
            ReactionState::Driven => "driven",
            ReactionState::Equilibrium => "equilibrium",
        }
    }

    pub fn parse(text: &str) -> Option<Self> {
        match text {
            "spontaneous" => Some(ReactionState::Spontaneous),
            "driven" => Some(ReactionState::Driven),
            "equilibrium" => Some(ReactionState::Equilibrium),
            _ => None,
        }
    }
}

/// Default band around E = 0 (per cell) taken as equilibrium. One millivolt
/// is about the resolution of a bench voltmeter on a volts range (common
/// practice); channels can set their own.
pub const DEFAULT_EQUILIBRIUM_TOLERANCE_VOLTS: f64 = 1e-3;

/// The temperature dependence of a reaction's standard potential.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StandardPotential {
    /// E° at 298.15 K, volts.
    pub e_standard_298_volts: f64,
    /// dE°/dT = ΔS°/(nF), volts per kelvin.
    pub de_dt_volts_per_k: f64,
}

impl StandardPotential {
    /// E°(T) = E°(298.15 K) + (ΔS°/nF)(T − 298.15 K): the first-order
    /// Gibbs–Helmholtz correction, assuming ΔS° constant over the range
    /// (good to a few mV within ±50 K for aqueous cells).
    pub fn at(&self, temp_k: f64) -> f64 {
        self.e_standard_298_volts + self.de_dt_volts_per_k * (temp_k - STANDARD_TEMP_K)
    }
}

/// dE°/dT from the reaction entropy: ΔS°/(nF).
pub fn de_dt_from_delta_s(delta_s_j_per_mol_k: f64, n_electrons: u32) -> f64 {
    delta_s_j_per_mol_k / (f64::from(n_electrons) * FARADAY_C_PER_MOL)
}

/// Thermoneutral voltage −ΔH°/(nF): the voltage at which an electrolyser
/// neither heats nor cools (all of ΔH supplied electrically).
pub fn thermoneutral_volts(delta_h_kj_per_mol: f64, n_electrons: u32) -> f64 {
    -delta_h_kj_per_mol * 1e3 / (f64::from(n_electrons) * FARADAY_C_PER_MOL)
}

/// ΔG = −nFE in kJ per mole of reaction as written.
pub fn delta_g_kj_per_mol(n_electrons: u32, cell_volts: f64) -> f64 {
    -f64::from(n_electrons) * FARADAY_C_PER_MOL * cell_volts / 1e3
}

/// nF/RT in 1/V at `temp_k`: converts a voltage to a natural-log ratio.
pub(crate) fn nf_over_rt(n_electrons: u32, temp_k: f64) -> f64 {
    f64::from(n_electrons) * FARADAY_C_PER_MOL / (GAS_CONSTANT_J_PER_MOL_K * temp_k)
}

/// ln K = nFE°/RT.
pub fn ln_k(n_electrons: u32, e_standard_volts: f64, temp_k: f64) -> f64 {
    nf_over_rt(n_electrons, temp_k) * e_standard_volts
}

/// ln Q = nF(E° − E)/RT (Nernst equation solved for Q).
pub fn ln_q(n_electrons: u32, e_standard_volts: f64, cell_volts: f64, temp_k: f64) -> f64 {
    nf_over_rt(n_electrons, temp_k) * (e_standard_volts - cell_volts)
}

/// E = E° − (RT/nF) ln Q.
pub fn nernst_volts(n_electrons: u32, e_standard_volts: f64, ln_q: f64, temp_k: f64) -> f64 {
    e_standard_volts - ln_q / nf_over_rt(n_electrons, temp_k)
}

/// The state of a reaction whose per-cell potential is `cell_volts`.
pub fn classify(cell_volts: f64, tolerance_volts: f64) -> ReactionState {
    if cell_volts.abs() <= tolerance_volts {
        ReactionState::Equilibrium
    } else if cell_volts > 0.0 {
        ReactionState::Spontaneous
    } else {
        ReactionState::Driven
    }
}

/// Everything that follows from one per-cell potential at one temperature.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ThermoState {
    pub temp_k: f64,
    pub cell_volts: f64,
    pub e_standard_volts: f64,
    pub delta_g_kj_per_mol: f64,
    pub delta_g_standard_kj_per_mol: f64,
    pub ln_q: f64,
    pub ln_k: f64,
    /// ln(K/Q) = nFE/RT; zero at equilibrium.
    pub affinity_ln_k_over_q: f64,
    pub state: ReactionState,
}

impl ThermoState {
    pub fn log10_q(&self) -> f64 {
        self.ln_q / std::f64::consts::LN_10
    }
    pub fn log10_k(&self) -> f64 {
        self.ln_k / std::f64::consts::LN_10
    }
}

/// The full state. Inputs must already be validated (finite, T > 0, n ≥ 1);
/// [`super::evaluate`] is the checked entry point.
pub fn thermo_state(
    n_electrons: u32,
    potential: StandardPotential,
    cell_volts: f64,
    temp_k: f64,
    equilibrium_tolerance_volts: f64,
) -> ThermoState {
    let e_standard_volts = potential.at(temp_k);
    let ln_k = ln_k(n_electrons, e_standard_volts, temp_k);
    let ln_q = ln_q(n_electrons, e_standard_volts, cell_volts, temp_k);
    ThermoState {
        temp_k,
        cell_volts,
        e_standard_volts,
        delta_g_kj_per_mol: delta_g_kj_per_mol(n_electrons, cell_volts),
        delta_g_standard_kj_per_mol: delta_g_kj_per_mol(n_electrons, e_standard_volts),
        ln_q,
        ln_k,
        affinity_ln_k_over_q: ln_k - ln_q,
        state: classify(cell_volts, equilibrium_tolerance_volts),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    const DANIELL: StandardPotential = StandardPotential {
        e_standard_298_volts: 1.1037,
        de_dt_volts_per_k: 0.0,
    };

    #[test]
    fn daniell_log10_k() {
        // Textbook worked example (e.g. Atkins, Physical Chemistry): the
        // Zn/Cu cell, E° = 1.10 V, n = 2, gives K ≈ 1.5e37, log10 K ≈ 37.2–37.3.
        let s = thermo_state(2, DANIELL, 1.1037, 298.15, 1e-3);
        assert!((s.log10_k() - 37.31).abs() < 0.02, "{}", s.log10_k());
        // At E = E° the quotient is 1.
        assert!(s.ln_q.abs() < 1e-12);
        // ΔG° = −2·96485·1.1037 J = −212.98 kJ/mol (computed by hand from the same F).
        assert!((s.delta_g_standard_kj_per_mol + 212.98).abs() < 0.01);
    }

    #[test]
    fn daniell_non_standard_worked_example() {
        // Worked example (common in general chemistry texts): Zn|Zn2+(0.10 M)||Cu2+(0.0010 M)|Cu
        // Q = 0.10/0.0010 = 100; E = 1.10 − (0.05916/2)·log10(100) = 1.10 − 0.0592 = 1.041 V.
        let ln_q_value = 100f64.ln();
        let e = nernst_volts(2, 1.10, ln_q_value, 298.15);
        assert!((e - 1.0408).abs() < 1e-4, "{e}");
        // And back: the measured 1.0408 V gives Q = 100.
        let q = ln_q(2, 1.10, e, 298.15).exp();
        assert!((q - 100.0).abs() < 1e-9);
    }

    #[test]
    fn hydrogen_oxygen_from_formation_data() {
        // CODATA Key Values for Thermodynamics (Cox, Wagman, Medvedev 1989):
        // ΔfH°(H2O, l) = −285.830 kJ/mol; S°: H2O(l) 69.95, H2(g) 130.680,
        // O2(g) 205.152 J/(mol K). ΔfG° = ΔH − TΔS.
        let delta_s = 69.95 - 130.680 - 0.5 * 205.152;
        let delta_g_kj = -285.830 - 298.15 * delta_s / 1e3;
        let e_standard = -delta_g_kj * 1e3 / (2.0 * FARADAY_C_PER_MOL);
        assert!((e_standard - 1.229).abs() < 1e-3, "{e_standard}");
        assert!((thermoneutral_volts(-285.830, 2) - 1.481).abs() < 1e-3);
        let de_dt_mv = de_dt_from_delta_s(delta_s, 2) * 1e3;
        assert!((de_dt_mv + 0.846).abs() < 0.01, "{de_dt_mv}");
    }

    #[test]
    fn classification_bands() {
        assert_eq!(classify(0.0005, 1e-3), ReactionState::Equilibrium);
        assert_eq!(classify(-0.0005, 1e-3), ReactionState::Equilibrium);
        assert_eq!(classify(0.002, 1e-3), ReactionState::Spontaneous);
        assert_eq!(classify(-0.002, 1e-3), ReactionState::Driven);
    }

    proptest! {
        // Sign relations: ΔG < 0 ⇔ E > 0 ⇔ Q < K (i.e. affinity > 0).
        #[test]
        fn sign_relations(
            n in 1u32..=6,
            e_std in -3.0f64..3.0,
            e in -3.0f64..3.0,
            temp_k in 200.0f64..500.0,
        ) {
            let pot = StandardPotential { e_standard_298_volts: e_std, de_dt_volts_per_k: 0.0 };
            let s = thermo_state(n, pot, e, temp_k, 0.0);
            prop_assert_eq!(s.delta_g_kj_per_mol < 0.0, e > 0.0);
            prop_assert_eq!(s.ln_q < s.ln_k, e > 0.0);
            prop_assert_eq!(s.affinity_ln_k_over_q > 0.0, e > 0.0);
            prop_assert!(s.ln_q.is_finite() && s.ln_k.is_finite());
        }

        // ΔG = 0 ⇔ Q = K, and the Nernst relation inverts exactly.
        #[test]
        fn equilibrium_and_round_trip(
            n in 1u32..=6,
            e_std in -3.0f64..3.0,
            e in -3.0f64..3.0,
            temp_k in 200.0f64..500.0,
        ) {
            let pot = StandardPotential { e_standard_298_volts: e_std, de_dt_volts_per_k: 0.0 };
            let at_zero = thermo_state(n, pot, 0.0, temp_k, 0.0);
            prop_assert_eq!(at_zero.delta_g_kj_per_mol, 0.0);
            prop_assert!((at_zero.ln_q - at_zero.ln_k).abs() <= 1e-12 * at_zero.ln_k.abs().max(1.0));
            let s = thermo_state(n, pot, e, temp_k, 0.0);
            let back = nernst_volts(n, e_std, s.ln_q, temp_k);
            prop_assert!((back - e).abs() < 1e-9);
        }
    }
}

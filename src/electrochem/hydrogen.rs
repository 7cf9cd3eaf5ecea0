//! Hydrogen–oxygen cells (water electrolysers, hydrogen fuel cells): the
//! reversible and thermoneutral voltages at the cell's temperature and gas
//! pressures, and the figures an electrolyser engineer reports per reading.
//!
//! The reaction is written H2(g) + ½O2(g) → H2O(l), n = 2. ΔH and ΔS follow
//! the temperature with a constant ΔCp (Kirchhoff), which reproduces
//! Cantera 3.2 to better than 1 mV from 25 to 80 °C (checks in the tests).
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use super::constants::{FARADAY_C_PER_MOL, GAS_CONSTANT_J_PER_MOL_K};
use serde::{Deserialize, Serialize};

/// Electrons per H2.
pub const ELECTRONS_PER_H2: f64 = 2.0;
/// Standard pressure, bar (IUPAC).
pub const STANDARD_PRESSURE_BAR: f64 = 1.0;
/// Molar mass of H2, g/mol (IUPAC standard atomic weight of H, 1.00794 ×2).
pub const H2_MOLAR_MASS_G_PER_MOL: f64 = 2.01588;
/// Molar volume of an ideal gas at 0 °C and 1 atm, L/mol (CODATA 2018: 22.413 969 54).
pub const NORMAL_MOLAR_VOLUME_L_PER_MOL: f64 = 22.413_969_54;

const T0_K: f64 = 298.15;
/// CODATA Key Values (Cox, Wagman, Medvedev 1989): ΔfH°(H2O, l) = −285.830
/// kJ/mol, ΔfH°(H2O, g) = −241.826 kJ/mol.
const DELTA_H_LIQUID_298_J: f64 = -285_830.0;
const DELTA_H_GAS_298_J: f64 = -241_826.0;
/// Same source: S° H2O(l) 69.95, H2 130.680, O2 205.152 J/(mol K).
const DELTA_S_LIQUID_298_J_PER_K: f64 = 69.95 - 130.680 - 0.5 * 205.152;
/// Cp at 298.15 K (NIST-JANAF, from memory): H2O(l) 75.33, H2O(g) 33.58,
/// H2 28.84, O2 29.38 J/(mol K).
const DELTA_CP_LIQUID_J_PER_K: f64 = 75.33 - 28.84 - 0.5 * 29.38;
const DELTA_CP_GAS_J_PER_K: f64 = 33.58 - 28.84 - 0.5 * 29.38;

/// What the gases on each side of the cell are, for the reversible voltage.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct GasConditions {
    /// Absolute pressure on the hydrogen side, bar.
    pub h2_side_bar_abs: f64,
    /// Absolute pressure on the oxygen (or air) side, bar.
    pub o2_side_bar_abs: f64,
    /// O2 mole fraction of the dry oxygen-side gas: 1 for oxygen, 0.2095 for air.
    pub o2_dry_fraction: f64,
    /// Both gases saturated with water vapour at the cell temperature (an
    /// electrolyser's product gases, a humidified fuel cell); false = dry.
    pub saturated: bool,
    /// Activity of the product water (1 for liquid water).
    pub water_activity: f64,
}

impl Default for GasConditions {
    fn default() -> GasConditions {
        GasConditions {
            h2_side_bar_abs: 1.01325,
            o2_side_bar_abs: 1.01325,
            o2_dry_fraction: 1.0,
            saturated: false,
            water_activity: 1.0,
        }
    }
}

impl GasConditions {
    /// Refuses conditions no cell can have, naming the field.
    pub fn validate(&self) -> Result<(), (&'static str, f64, &'static str)> {
        let positive = [
            ("h2_side_bar_abs", self.h2_side_bar_abs),
            ("o2_side_bar_abs", self.o2_side_bar_abs),
        ];
        for (field, v) in positive {
            if !(v.is_finite() && v > 0.0 && v <= 1000.0) {
                return Err((
                    field,
                    v,
                    "must be an absolute pressure above 0 and at most 1000 bar",
                ));
            }
        }
        for (field, v) in [
            ("o2_dry_fraction", self.o2_dry_fraction),
            ("water_activity", self.water_activity),
        ] {
            if !(v.is_finite() && v > 0.0 && v <= 1.0) {
                return Err((field, v, "must be above 0 and at most 1"));
            }
        }
        Ok(())
    }
}

/// Saturation pressure of water, bar: IAPWS-IF97 region 4 (the saturation
/// equation), valid from 273.15 K to the critical point 647.096 K.
pub fn water_saturation_pressure_bar(temp_k: f64) -> f64 {
    const N: [f64; 10] = [
        0.116_705_214_527_67e4,
        -0.724_213_167_032_06e6,
        -0.170_738_469_400_92e2,
        0.120_208_247_024_70e5,
        -0.323_255_503_223_33e7,
        0.149_151_086_135_30e2,
        -0.482_326_573_615_91e4,
        0.405_113_405_420_57e6,
        -0.238_555_575_678_49,
        0.650_175_348_447_98e3,
    ];
    let t = temp_k.clamp(273.15, 647.096);
    let theta = t + N[8] / (t - N[9]);
    let a = theta * theta + N[0] * theta + N[1];
    let b = N[2] * theta * theta + N[3] * theta + N[4];
    let c = N[5] * theta * theta + N[6] * theta + N[7];
    let p_mpa = (2.0 * c / (-b + (b * b - 4.0 * a * c).sqrt())).powi(4);
    p_mpa * 10.0
}

fn delta_h_j(delta_h_298: f64, delta_cp: f64, temp_k: f64) -> f64 {
    delta_h_298 + delta_cp * (temp_k - T0_K)
}

fn delta_s_j_per_k(delta_s_298: f64, delta_cp: f64, temp_k: f64) -> f64 {
    delta_s_298 + delta_cp * (temp_k / T0_K).ln()
}

/// E°(T) of H2 + ½O2 → H2O(l) with all gases at 1 bar, volts.
pub fn standard_cell_volts(temp_k: f64) -> f64 {
    let dh = delta_h_j(DELTA_H_LIQUID_298_J, DELTA_CP_LIQUID_J_PER_K, temp_k);
    let ds = delta_s_j_per_k(DELTA_S_LIQUID_298_J_PER_K, DELTA_CP_LIQUID_J_PER_K, temp_k);
    -(dh - temp_k * ds) / (ELECTRONS_PER_H2 * FARADAY_C_PER_MOL)
}

/// Thermoneutral voltage on the higher heating value (liquid water), V.
pub fn thermoneutral_hhv_volts(temp_k: f64) -> f64 {
    -delta_h_j(DELTA_H_LIQUID_298_J, DELTA_CP_LIQUID_J_PER_K, temp_k)
        / (ELECTRONS_PER_H2 * FARADAY_C_PER_MOL)
}

/// The same on the lower heating value (water vapour), V.
pub fn thermoneutral_lhv_volts(temp_k: f64) -> f64 {
    -delta_h_j(DELTA_H_GAS_298_J, DELTA_CP_GAS_J_PER_K, temp_k)
        / (ELECTRONS_PER_H2 * FARADAY_C_PER_MOL)
}

/// ΔS of the liquid-water reaction at T (J/(mol K)), for dE°/dT checks.
pub fn delta_s_liquid_j_per_mol_k(temp_k: f64) -> f64 {
    delta_s_j_per_k(DELTA_S_LIQUID_298_J_PER_K, DELTA_CP_LIQUID_J_PER_K, temp_k)
}

/// Partial pressures of H2 and O2 (bar) under the given conditions: with
/// saturated gases water vapour takes its share of each side's pressure.
pub fn partial_pressures_bar(temp_k: f64, gas: &GasConditions) -> (f64, f64) {
    let vapour = if gas.saturated {
        water_saturation_pressure_bar(temp_k)
    } else {
        0.0
    };
    // A side at or below the vapour pressure would hold no gas at all; a
    // floor keeps the logarithm finite and the voltage visibly low.
    let floor = 1e-6;
    let h2 = (gas.h2_side_bar_abs - vapour).max(floor);
    let o2 = ((gas.o2_side_bar_abs - vapour) * gas.o2_dry_fraction).max(floor);
    (h2, o2)
}

/// ln Q of the reaction as written: a(H2O) / (p_H2 · p_O2^½), pressures over p°.
pub fn ln_q(temp_k: f64, gas: &GasConditions) -> f64 {
    let (h2, o2) = partial_pressures_bar(temp_k, gas);
    gas.water_activity.ln()
        - (h2 / STANDARD_PRESSURE_BAR).ln()
        - 0.5 * (o2 / STANDARD_PRESSURE_BAR).ln()
}

/// Reversible cell voltage at T and the gas conditions (Nernst), V.
pub fn reversible_cell_volts(temp_k: f64, gas: &GasConditions) -> f64 {
    standard_cell_volts(temp_k)
        - GAS_CONSTANT_J_PER_MOL_K * temp_k / (ELECTRONS_PER_H2 * FARADAY_C_PER_MOL)
            * ln_q(temp_k, gas)
}

/// What the figures are computed from: one reading of a stack.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StackReading {
    pub stack_volts: f64,
    /// Charge-positive: into the cell (electrolysis) positive.
    pub amps: f64,
    pub cells_in_series: u32,
    pub temp_k: f64,
}

/// What the channel knows about the stack beyond a reading.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StackFacts {
    pub gas: GasConditions,
    /// Stack ohmic resistance (configured or measured), Ω.
    pub resistance_ohm: Option<f64>,
    /// Fraction of the current that makes (or takes) hydrogen, (0, 1].
    pub faradaic_efficiency: f64,
    pub active_area_cm2: Option<f64>,
}

/// Why a figure is not a plain number.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum BoundBreach {
    /// Electrolysis below the reversible voltage, or a fuel cell above it:
    /// impossible; the voltage, the sign convention or the cell count is wrong.
    Reversible,
    /// Electrolysis below the thermoneutral voltage: the HHV efficiency is
    /// above 100 % because heat is drawn from the surroundings.
    Thermoneutral,
}

/// Per-reading figures of a hydrogen–oxygen stack. Voltages are per cell.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct HydrogenFigures {
    pub reversible_volts: f64,
    pub thermoneutral_hhv_volts: f64,
    pub thermoneutral_lhv_volts: f64,
    /// |V − E_rev| per cell: positive whenever the cell loses voltage to
    /// its kinetics, resistance and transport.
    pub overpotential_volts: f64,
    /// The overpotential less the ohmic drop I·R, when R is known.
    pub overpotential_ir_free_volts: Option<f64>,
    /// Electrolysis: E_tn/V; fuel cell: V/E_tn (HHV basis).
    pub voltage_efficiency_hhv: Option<f64>,
    pub voltage_efficiency_lhv: Option<f64>,
    /// Heat released by the stack, W (negative: absorbed).
    pub heat_w: f64,
    /// H2 made (positive) or consumed (negative) by the stack.
    pub h2_rate_mol_per_s: f64,
    pub h2_rate_normal_litres_per_min: f64,
    pub h2_rate_kg_per_h: f64,
    /// Electrical energy per kg of H2 made, kWh/kg (electrolysis only).
    pub specific_energy_kwh_per_kg: Option<f64>,
    pub current_density_a_per_cm2: Option<f64>,
    pub area_specific_resistance_ohm_cm2: Option<f64>,
    pub breach: Option<BoundBreach>,
}

/// Specific energy at a per-cell voltage, kWh/kg H2: V·2F/(M·η_F).
pub fn specific_energy_kwh_per_kg(cell_volts: f64, faradaic_efficiency: f64) -> f64 {
    cell_volts * ELECTRONS_PER_H2 * FARADAY_C_PER_MOL
        / (H2_MOLAR_MASS_G_PER_MOL * faradaic_efficiency)
        / 3600.0
}

/// The figures of one reading. `rest_amps` is the channel's deadband: below
/// it the cell is at open circuit and rates and efficiencies are absent.
pub fn figures(reading: StackReading, facts: &StackFacts, rest_amps: f64) -> HydrogenFigures {
    let cells = f64::from(reading.cells_in_series.max(1));
    let cell_volts = reading.stack_volts / cells;
    let e_rev = reversible_cell_volts(reading.temp_k, &facts.gas);
    let e_hhv = thermoneutral_hhv_volts(reading.temp_k);
    let e_lhv = thermoneutral_lhv_volts(reading.temp_k);
    let i = reading.amps;
    let electrolysis = i >= rest_amps;
    let fuel_cell = i <= -rest_amps;
    let ohmic_cell_volts = facts.resistance_ohm.map(|r| i * r / cells);
    let (overpotential, efficiency_hhv, efficiency_lhv) = if electrolysis {
        (
            cell_volts - e_rev,
            (cell_volts > 0.0).then(|| e_hhv / cell_volts),
            (cell_volts > 0.0).then(|| e_lhv / cell_volts),
        )
    } else if fuel_cell {
        (
            e_rev - cell_volts,
            Some(cell_volts / e_hhv),
            Some(cell_volts / e_lhv),
        )
    } else {
        (e_rev - cell_volts, None, None)
    };
    let faradaic = if electrolysis {
        facts.faradaic_efficiency
    } else {
        1.0
    };
    let h2_mol_per_s = faradaic * i * cells / (ELECTRONS_PER_H2 * FARADAY_C_PER_MOL);
    let breach = if (electrolysis && cell_volts < e_rev) || (fuel_cell && cell_volts > e_rev) {
        Some(BoundBreach::Reversible)
    } else if electrolysis && cell_volts < e_hhv {
        Some(BoundBreach::Thermoneutral)
    } else {
        None
    };
    let area = facts.active_area_cm2.filter(|a| *a > 0.0);
    HydrogenFigures {
        reversible_volts: e_rev,
        thermoneutral_hhv_volts: e_hhv,
        thermoneutral_lhv_volts: e_lhv,
        overpotential_volts: overpotential,
        overpotential_ir_free_volts: ohmic_cell_volts.map(|ir| overpotential - ir.abs()),
        voltage_efficiency_hhv: efficiency_hhv,
        voltage_efficiency_lhv: efficiency_lhv,
        heat_w: i * (reading.stack_volts - cells * e_hhv),
        h2_rate_mol_per_s: h2_mol_per_s,
        h2_rate_normal_litres_per_min: h2_mol_per_s * NORMAL_MOLAR_VOLUME_L_PER_MOL * 60.0,
        h2_rate_kg_per_h: h2_mol_per_s * H2_MOLAR_MASS_G_PER_MOL * 3.6,
        specific_energy_kwh_per_kg: electrolysis
            .then(|| specific_energy_kwh_per_kg(cell_volts, facts.faradaic_efficiency)),
        current_density_a_per_cm2: area.map(|a| i.abs() / a),
        area_specific_resistance_ohm_cm2: area
            .zip(facts.resistance_ohm)
            .map(|(a, r)| r / cells * a),
        breach,
    }
}

#[cfg(test)]
mod tests;

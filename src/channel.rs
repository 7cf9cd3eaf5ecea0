//! Channel definitions: one cell or stack on one instrument channel, as the
//! service stores it. Pure: validation against a chemistry registry only.

use crate::electrochem::builtin::WATER_CELL_ID;
use crate::electrochem::chemistry::validate_id;
use crate::electrochem::hydrogen::GasConditions;
use crate::electrochem::{Chemistry, Registry};
use crate::estimator::{CurrentSign, EstimatorConfig};
use crate::retention::RetentionPolicy;
use serde::{Deserialize, Serialize};
use std::sync::Arc;

/// One channel as a rig or a channels file defines it: which cell, how
/// many in series, how its instrument signs current, and what is plausible.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChannelDef {
    /// Stable id the rig streams under (letters, digits, `-`, `_`, `.`).
    pub channel_id: String,
    /// A built-in or user chemistry's id.
    pub chemistry_id: String,
    /// Cells in series: readings are stack volts, thermodynamics per cell.
    pub cells_in_series: u32,
    /// Rated capacity for coulomb-counted SOC, Ah; 0 = no counting.
    #[serde(default)]
    pub capacity_ah: f64,
    /// Which sign the instrument gives a charging current.
    pub current_sign: CurrentSign,
    /// Temperature assumed for readings that carry none, °C.
    #[serde(default = "default_temp_c")]
    pub default_temp_c: f64,
    /// Lower end of the per-cell plausibility window, V: a reading below
    /// it is a broken input and refused. (`min_volts` is read for one
    /// release.) Left out (both ends 0): the chemistry's default window.
    #[serde(alias = "min_volts", default)]
    pub plausible_min_cell_volts: f64,
    /// Upper end of the per-cell plausibility window, V.
    #[serde(alias = "max_volts", default)]
    pub plausible_max_cell_volts: f64,
    /// E° at 298.15 K for this channel instead of the chemistry's, V.
    #[serde(default, alias = "e_standard_override_v")]
    pub e_standard_298_override_v: Option<f64>,
    /// Apparent electron number of a Nernst chemistry's OCV curve, fitted
    /// to this cell's rests (`ApplyOcvFit`); unset: the chemistry's n.
    /// ΔG = −nFE keeps the chemistry's n.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub n_apparent: Option<f64>,
    /// Known stack resistance for V − I·R under load, Ω; unset: estimated
    /// from current steps.
    #[serde(default)]
    pub resistance_ohm: Option<f64>,
    /// Within this of E per cell counts as equilibrium, mV.
    #[serde(default = "default_tolerance_mv")]
    pub equilibrium_tolerance_mv: f64,
    /// Fraction of charge-in the count credits as stored (0–1].
    #[serde(default = "one")]
    pub coulombic_efficiency: f64,
    /// Fraction of an electrolyser's current that makes hydrogen (0–1].
    #[serde(default = "one")]
    pub faradaic_efficiency: f64,
    /// Free text for people (at most 4,096 bytes).
    #[serde(default)]
    pub description: String,
    /// Hydrogen–oxygen cells: the gases that fix the reversible voltage
    /// (unset: dry gases at 1 atm).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gas: Option<GasConditions>,
    /// Active area of one cell, cm².
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub active_area_cm2: Option<f64>,
    /// How long this channel's history is kept; unset fields take the
    /// server's `[retention]`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub retention: Option<RetentionPolicy>,
}

/// The least apparent electron number taken: a fitted n_app outside
/// [`MIN_N_APPARENT`, `MAX_N_APPARENT`] says the model does not describe
/// the cell at all.
pub const MIN_N_APPARENT: f64 = 0.2;
/// The largest apparent electron number taken.
pub const MAX_N_APPARENT: f64 = 8.0;

fn default_temp_c() -> f64 {
    25.0
}
fn default_tolerance_mv() -> f64 {
    1.0
}
fn one() -> f64 {
    1.0
}

/// Readings outside [−100 °C, 200 °C] are broken sensors, not cells.
pub const MIN_READING_TEMP_C: f64 = -100.0;
/// Upper end of the plausible reading temperature, °C (see above).
pub const MAX_READING_TEMP_C: f64 = 200.0;
/// A current beyond ±1 MA is a broken shunt or a garbled value, not a cell:
/// the largest electrolyser stacks run at tens of kA. Letting one through
/// would overflow the coulomb count to infinity for the rest of the run.
pub const MAX_READING_ABS_AMPS: f64 = 1e6;
/// Per-cell plausibility windows beyond ±1000 V describe no cell; the bound
/// keeps V·I·t finite in the energy count.
pub const MAX_WINDOW_ABS_CELL_VOLTS: f64 = 1000.0;

/// The fields whose change starts a new run: stored derived values depend
/// on them.
#[derive(Debug, Clone, PartialEq)]
pub struct RunKey {
    chemistry_id: String,
    cells_in_series: u32,
    e_standard_override_bits: Option<u64>,
    n_apparent_bits: Option<u64>,
    water: Option<[String; 3]>,
}

/// A channel definition that cannot work, naming the field and value.
pub type ChannelError = crate::error::FieldError;

/// Shows a value readably in an error, however large (f64's `Display`
/// writes 1e300 as 301 digits).
pub fn shown(v: f64) -> String {
    if v.is_finite() && v.abs() >= 1e6 {
        format!("{v:.3e}")
    } else {
        format!("{v}")
    }
}

fn err(field: &str, value: impl std::fmt::Display, reason: impl Into<String>) -> ChannelError {
    ChannelError::new(field, value, reason)
}

/// Free text (a channel's description, an acknowledgement's note) at most,
/// in bytes: enough for a paragraph, small enough that listing 1,000
/// channels stays a few MB.
pub const MAX_TEXT_BYTES: usize = 4096;

impl ChannelDef {
    /// The chemistry's default plausibility window where the definition
    /// gives none (both ends 0, as a channels file that leaves them out
    /// reads; the wire's unset fields read the same).
    pub fn with_default_window(mut self, registry: &Registry) -> ChannelDef {
        if self.plausible_min_cell_volts == 0.0
            && self.plausible_max_cell_volts == 0.0
            && let Ok(chemistry) = registry.get(&self.chemistry_id)
        {
            (self.plausible_min_cell_volts, self.plausible_max_cell_volts) =
                ChannelDef::default_window(&chemistry);
        }
        self
    }

    /// Checks the definition and resolves its chemistry (with the E°
    /// override and the apparent n).
    pub fn validate(&self, registry: &Registry) -> Result<Arc<Chemistry>, ChannelError> {
        self.check_names()?;
        let chemistry = registry.get(&self.chemistry_id).map_err(|_| {
            let id: String = self.chemistry_id.chars().take(80).collect();
            let known: Vec<String> = registry.iter().map(|c| c.id.clone()).collect();
            err(
                "chemistry_id",
                format!("{id:?}"),
                format!("unknown chemistry id; known: {}", known.join(", ")),
            )
        })?;
        if self.cells_in_series == 0 || self.cells_in_series > 10_000 {
            return Err(err(
                "cells_in_series",
                self.cells_in_series,
                "must be from 1 to 10000",
            ));
        }
        self.check_numbers()?;
        self.check_window()?;
        if let Some(retention) = &self.retention {
            retention.validate("retention")?;
        }
        if let Some(gas) = &self.gas {
            gas.validate()
                .map_err(|(field, v, reason)| err(&format!("gas.{field}"), shown(v), reason))?;
        }
        let chemistry = match self.n_apparent {
            Some(n) if !(n.is_finite() && (MIN_N_APPARENT..=MAX_N_APPARENT).contains(&n)) => {
                return Err(err(
                    "n_apparent",
                    n,
                    format!("must be from {MIN_N_APPARENT} to {MAX_N_APPARENT}"),
                ));
            }
            Some(n) => Arc::new(
                chemistry
                    .with_apparent_electrons(n)
                    .map_err(|reason| err("n_apparent", n, reason))?,
            ),
            None => chemistry,
        };
        match self.e_standard_298_override_v {
            Some(e) if !e.is_finite() => Err(err("e_standard_298_override_v", e, "must be finite")),
            Some(e) => Ok(Arc::new(chemistry.with_e_standard_override(e))),
            None => Ok(chemistry),
        }
    }

    /// The id and the free text.
    fn check_names(&self) -> Result<(), ChannelError> {
        if self.description.len() > MAX_TEXT_BYTES {
            return Err(err(
                "description",
                format!("({} bytes)", self.description.len()),
                "at most 4096 bytes",
            ));
        }
        validate_id("channel_id", &self.channel_id).map_err(|e| {
            let id: String = self.channel_id.chars().take(80).collect();
            err("channel_id", format!("{id:?}"), e.to_string())
        })
    }

    /// Capacity, tolerance, temperature, efficiencies, resistance, area.
    fn check_numbers(&self) -> Result<(), ChannelError> {
        for (name, v) in [
            ("capacity_ah", self.capacity_ah),
            ("equilibrium_tolerance_mv", self.equilibrium_tolerance_mv),
            ("resistance_ohm", self.resistance_ohm.unwrap_or(0.0)),
        ] {
            if !(v.is_finite() && v >= 0.0) {
                return Err(err(name, v, "must be finite and not negative"));
            }
        }
        if !(self.default_temp_c.is_finite()
            && (MIN_READING_TEMP_C..=MAX_READING_TEMP_C).contains(&self.default_temp_c))
        {
            return Err(err(
                "default_temp_c",
                self.default_temp_c,
                "must be from -100 to 200 °C",
            ));
        }
        for (name, v) in [
            ("coulombic_efficiency", self.coulombic_efficiency),
            ("faradaic_efficiency", self.faradaic_efficiency),
        ] {
            if !(v.is_finite() && v > 0.0 && v <= 1.0) {
                return Err(err(name, v, "must be in (0, 1]"));
            }
        }
        match self.active_area_cm2 {
            Some(a) if !(a.is_finite() && a > 0.0 && a <= 1e7) => Err(err(
                "active_area_cm2",
                shown(a),
                "must be above 0 and at most 1e7 cm²",
            )),
            _ => Ok(()),
        }
    }

    /// The per-cell plausibility window.
    fn check_window(&self) -> Result<(), ChannelError> {
        for (name, v) in [
            ("plausible_min_cell_volts", self.plausible_min_cell_volts),
            ("plausible_max_cell_volts", self.plausible_max_cell_volts),
        ] {
            if !(v.is_finite() && v.abs() <= MAX_WINDOW_ABS_CELL_VOLTS) {
                return Err(err(
                    name,
                    shown(v),
                    "must be a per-cell voltage from -1000 to 1000 V",
                ));
            }
        }
        if self.plausible_min_cell_volts >= self.plausible_max_cell_volts {
            return Err(err(
                "plausible_max_cell_volts",
                self.plausible_max_cell_volts,
                format!(
                    "must be above plausible_min_cell_volts ({})",
                    self.plausible_min_cell_volts
                ),
            ));
        }
        Ok(())
    }

    /// Fields whose change invalidates stored derived values: a new run.
    pub fn run_key(&self) -> RunKey {
        RunKey {
            chemistry_id: self.chemistry_id.clone(),
            cells_in_series: self.cells_in_series,
            e_standard_override_bits: self.e_standard_298_override_v.map(f64::to_bits),
            n_apparent_bits: self.n_apparent.map(f64::to_bits),
            // History recomputes an electrolyser's figures with these.
            water: self.is_water_cell().then(|| {
                [
                    serde_json::to_string(&self.water_gas()).unwrap_or_default(),
                    format!("{:?}", self.active_area_cm2),
                    format!("{}", self.faradaic_efficiency),
                ]
            }),
        }
    }

    /// Whether this is a hydrogen–oxygen (electrolyser or fuel-cell) channel.
    pub fn is_water_cell(&self) -> bool {
        self.chemistry_id == WATER_CELL_ID
    }

    /// The gases of a hydrogen–oxygen cell, defaults filled in.
    pub fn water_gas(&self) -> GasConditions {
        self.gas.unwrap_or_default()
    }

    /// The estimator's settings for this channel's cells, capacity and sign.
    pub fn estimator_config(&self) -> EstimatorConfig {
        let mut cfg = EstimatorConfig::for_channel(
            self.cells_in_series,
            self.capacity_ah,
            self.default_temp_c + 273.15,
        );
        cfg.resistance_ohm = self.resistance_ohm;
        cfg.coulombic_efficiency = self.coulombic_efficiency;
        cfg.faradaic_efficiency = self.faradaic_efficiency;
        cfg.equilibrium_tolerance_volts = self.equilibrium_tolerance_mv / 1e3;
        cfg.water_gas = self.is_water_cell().then(|| self.water_gas());
        cfg
    }

    /// One cell of `chemistry` with every optional field at the default a
    /// channels file would give it (charge-positive current, 25 °C, the
    /// default plausibility window, no capacity); callers set what differs.
    pub fn of_chemistry(channel_id: impl Into<String>, chemistry: &Chemistry) -> ChannelDef {
        let (plausible_min_cell_volts, plausible_max_cell_volts) =
            ChannelDef::default_window(chemistry);
        ChannelDef {
            channel_id: channel_id.into(),
            chemistry_id: chemistry.id.clone(),
            cells_in_series: 1,
            capacity_ah: 0.0,
            current_sign: CurrentSign::ChargePositive,
            default_temp_c: default_temp_c(),
            plausible_min_cell_volts,
            plausible_max_cell_volts,
            e_standard_298_override_v: None,
            n_apparent: None,
            resistance_ohm: None,
            equilibrium_tolerance_mv: default_tolerance_mv(),
            coulombic_efficiency: one(),
            faradaic_efficiency: one(),
            description: String::new(),
            gas: None,
            active_area_cm2: None,
            retention: None,
        }
    }

    /// Plausibility window when the caller gave none: the chemistry's
    /// window widened by 0.5 V each side.
    pub fn default_window(chemistry: &Chemistry) -> (f64, f64) {
        (
            chemistry.min_cell_volts - 0.5,
            chemistry.max_cell_volts + 0.5,
        )
    }
}

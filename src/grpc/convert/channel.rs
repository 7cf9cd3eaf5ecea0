//! Channels: definitions, current sign, gas conditions.

use super::super::status::invalid;
use crate::channel::ChannelDef;
use crate::electrochem;
use crate::electrochem::hydrogen::GasConditions;
use crate::estimator::CurrentSign;
use crate::ingest::RawReading;
use crate::pb;
use crate::retention::RetentionPolicy;
use tonic::Status;

impl From<&pb::Reading> for RawReading {
    fn from(r: &pb::Reading) -> RawReading {
        RawReading {
            seq: r.seq,
            time_unix_ns: r.time_unix_ns,
            volts: r.volts,
            amps: r.amps,
            temp_c: r.temp_c,
        }
    }
}

/// The instrument's sign convention; UNSPECIFIED is refused, not guessed.
pub fn sign_from_pb(code: i32) -> Result<CurrentSign, Status> {
    match pb::CurrentSign::try_from(code) {
        Ok(pb::CurrentSign::ChargePositive) => Ok(CurrentSign::ChargePositive),
        Ok(pb::CurrentSign::DischargePositive) => Ok(CurrentSign::DischargePositive),
        _ => Err(invalid(
            "channel.current_sign",
            code,
            "must be CHARGE_POSITIVE or DISCHARGE_POSITIVE",
        )),
    }
}

/// A channel definition off the wire; zero means "the default" for the
/// voltage window (from the chemistry) and the tolerance and efficiencies.
pub fn channel_from_pb(
    c: pb::Channel,
    registry: &electrochem::Registry,
) -> Result<ChannelDef, Status> {
    let current_sign = sign_from_pb(c.current_sign)?;
    let (plausible_min_cell_volts, plausible_max_cell_volts) = match (
        c.plausible_min_cell_volts,
        c.plausible_max_cell_volts,
        registry.get(&c.chemistry_id),
    ) {
        (0.0, 0.0, Ok(chem)) => ChannelDef::default_window(&chem),
        (lo, hi, _) => (lo, hi),
    };
    let or_default = |v: f64, default: f64| if v == 0.0 { default } else { v };
    Ok(ChannelDef {
        channel_id: c.channel_id,
        chemistry_id: c.chemistry_id,
        cells_in_series: c.cells_in_series,
        capacity_ah: c.capacity_ah,
        current_sign,
        default_temp_c: c.default_temp_c,
        plausible_min_cell_volts,
        plausible_max_cell_volts,
        e_standard_298_override_v: c.e_standard_298_override_v,
        n_apparent: c.n_apparent,
        resistance_ohm: c.resistance_ohm,
        equilibrium_tolerance_mv: or_default(c.equilibrium_tolerance_mv, 1.0),
        coulombic_efficiency: or_default(c.coulombic_efficiency, 1.0),
        faradaic_efficiency: or_default(c.faradaic_efficiency, 1.0),
        description: c.description,
        gas: c.gas.as_ref().map(gas_from_pb),
        active_area_cm2: c.active_area_cm2,
        retention: c.retention.map(|r| RetentionPolicy {
            raw_days: r.raw_days,
            rollup_days: r.rollup_days,
        }),
    })
}

/// A channel definition as the wire has it, with its current run.
pub fn channel_to_pb(def: &ChannelDef, run_id: i64) -> pb::Channel {
    pb::Channel {
        channel_id: def.channel_id.clone(),
        chemistry_id: def.chemistry_id.clone(),
        cells_in_series: def.cells_in_series,
        capacity_ah: def.capacity_ah,
        current_sign: match def.current_sign {
            CurrentSign::ChargePositive => pb::CurrentSign::ChargePositive as i32,
            CurrentSign::DischargePositive => pb::CurrentSign::DischargePositive as i32,
        },
        default_temp_c: def.default_temp_c,
        plausible_min_cell_volts: def.plausible_min_cell_volts,
        plausible_max_cell_volts: def.plausible_max_cell_volts,
        e_standard_298_override_v: def.e_standard_298_override_v,
        n_apparent: def.n_apparent,
        resistance_ohm: def.resistance_ohm,
        equilibrium_tolerance_mv: def.equilibrium_tolerance_mv,
        coulombic_efficiency: def.coulombic_efficiency,
        faradaic_efficiency: def.faradaic_efficiency,
        description: def.description.clone(),
        run_id: run_id as u64,
        gas: def.gas.map(|g| pb::GasConditions {
            h2_side_bar_abs: g.h2_side_bar_abs,
            o2_side_bar_abs: g.o2_side_bar_abs,
            o2_dry_fraction: g.o2_dry_fraction,
            saturated: g.saturated,
            water_activity: g.water_activity,
        }),
        active_area_cm2: def.active_area_cm2,
        retention: def.retention.map(|r| pb::Retention {
            raw_days: r.raw_days,
            rollup_days: r.rollup_days,
        }),
    }
}

/// Gas conditions from the wire: zeros mean the defaults.
pub fn gas_from_pb(g: &pb::GasConditions) -> GasConditions {
    let or = |v: f64, d: f64| if v == 0.0 { d } else { v };
    let d = GasConditions::default();
    GasConditions {
        h2_side_bar_abs: or(g.h2_side_bar_abs, d.h2_side_bar_abs),
        o2_side_bar_abs: or(g.o2_side_bar_abs, d.o2_side_bar_abs),
        o2_dry_fraction: or(g.o2_dry_fraction, d.o2_dry_fraction),
        saturated: g.saturated,
        water_activity: or(g.water_activity, d.water_activity),
    }
}

/// A chemistry as ListChemistries (and `chemistries --json`) shows it.
pub fn chemistry_to_pb(c: &electrochem::Chemistry) -> pb::ChemistryInfo {
    pb::ChemistryInfo {
        chemistry_id: c.id.clone(),
        name: c.name.clone(),
        reaction: c.reaction.clone(),
        n_electrons: c.n_electrons,
        e_standard_298_v: c.e_standard_298_volts,
        de_dt_mv_per_k: c.de_dt_volts_per_k * 1e3,
        delta_h_kj_per_mol: c.delta_h_kj_per_mol,
        thermoneutral_v: c.thermoneutral_volts(),
        min_cell_volts: c.min_cell_volts,
        max_cell_volts: c.max_cell_volts,
        soc_model_name: c.soc_model.name().into(),
        sources: c.sources.clone(),
        notes: c.notes.clone(),
        builtin: c.builtin,
        charge_cutoff_cell_volts: c.charge_cutoff_cell_volts,
        discharge_cutoff_cell_volts: c.discharge_cutoff_cell_volts,
        min_temp_c: c.min_temp_c,
        max_temp_c: c.max_temp_c,
    }
}

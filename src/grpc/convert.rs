//! Conversions between generated protobuf types and the crate's own, at
//! the edge of the gRPC shell. Conversions that can fail name the field.

use super::status::invalid;
use crate::alerts::{AlertKind, AlertRules, Threshold};
use crate::channel::ChannelDef;
use crate::electrochem;
use crate::electrochem::builtin::WATER_CELL_ID;
use crate::electrochem::hydrogen::{self, GasConditions};
use crate::estimator::{CurrentSign, CycleRecord, OcvSource};
use crate::ingest::RawReading;
use crate::pb;
use crate::store::{AlertEvent, AlertRow, EventKind, ReadingRow, RunRow, flags};
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
    let (min_volts, max_volts) = match (c.min_volts, c.max_volts, registry.get(&c.chemistry_id)) {
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
        min_volts,
        max_volts,
        e_standard_override_v: c.e_standard_override_v,
        resistance_ohm: c.resistance_ohm,
        equilibrium_tolerance_mv: or_default(c.equilibrium_tolerance_mv, 1.0),
        coulombic_efficiency: or_default(c.coulombic_efficiency, 1.0),
        faradaic_efficiency: or_default(c.faradaic_efficiency, 1.0),
        description: c.description,
        gas: c.gas.as_ref().map(gas_from_pb),
        active_area_cm2: c.active_area_cm2,
    })
}

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
        min_volts: def.min_volts,
        max_volts: def.max_volts,
        e_standard_override_v: def.e_standard_override_v,
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

pub fn state_to_pb(s: electrochem::ReactionState) -> i32 {
    match s {
        electrochem::ReactionState::Spontaneous => pb::ReactionState::Spontaneous as i32,
        electrochem::ReactionState::Driven => pb::ReactionState::Driven as i32,
        electrochem::ReactionState::Equilibrium => pb::ReactionState::Equilibrium as i32,
    }
}

/// The operating mode stored with a reading, named for its chemistry.
fn mode_to_pb(row: &ReadingRow, run: &RunRow) -> i32 {
    use crate::estimator::OperatingMode as M;
    let mode = M::of(
        row.flags & flags::CHARGING != 0,
        row.flags & flags::DISCHARGING != 0,
        row.amps.is_some(),
        run.chemistry_id == crate::electrochem::builtin::WATER_CELL_ID,
    );
    (match mode {
        None => pb::OperatingMode::Unspecified,
        Some(M::Charge) => pb::OperatingMode::Charge,
        Some(M::Discharge) => pb::OperatingMode::Discharge,
        Some(M::Rest) => pb::OperatingMode::Rest,
        Some(M::Electrolysis) => pb::OperatingMode::Electrolysis,
        Some(M::FuelCell) => pb::OperatingMode::FuelCell,
        Some(M::OpenCircuit) => pb::OperatingMode::OpenCircuit,
    }) as i32
}

fn ocv_source_to_pb(source: OcvSource) -> i32 {
    (match source {
        OcvSource::Terminal => pb::OcvSource::Terminal,
        OcvSource::Rest => pb::OcvSource::Rest,
        OcvSource::OhmicCompensated => pb::OcvSource::OhmicCompensated,
        OcvSource::CountedSoc => pb::OcvSource::CountedSoc,
        OcvSource::Reversible => pb::OcvSource::Reversible,
        OcvSource::None => pb::OcvSource::None,
    }) as i32
}

/// The channel definition a run was computed with (runs before it was
/// stored: none, and the figures that need it use defaults).
fn run_definition(run: &RunRow) -> Option<ChannelDef> {
    serde_json::from_str(run.definition_json.as_deref()?).ok()
}

/// An electrolyser's or fuel cell's figures for a stored reading.
pub fn hydrogen_to_pb(row: &ReadingRow, run: &RunRow, temp_k: f64) -> Option<pb::HydrogenFigures> {
    if run.chemistry_id != WATER_CELL_ID {
        return None;
    }
    let def = run_definition(run);
    let facts = hydrogen::StackFacts {
        gas: def.as_ref().map(ChannelDef::water_gas).unwrap_or_default(),
        resistance_ohm: def.as_ref().and_then(|d| d.resistance_ohm),
        faradaic_efficiency: def.as_ref().map_or(1.0, |d| d.faradaic_efficiency),
        active_area_cm2: def.as_ref().and_then(|d| d.active_area_cm2),
    };
    let rest_amps = def
        .as_ref()
        .map_or(1e-3, |d| d.estimator_config().rest_current_amps);
    let f = hydrogen::figures(
        hydrogen::StackReading {
            stack_volts: row.volts,
            amps: row.amps.unwrap_or(0.0),
            cells_in_series: run.cells_in_series,
            temp_k,
        },
        &facts,
        rest_amps,
    );
    Some(pb::HydrogenFigures {
        reversible_v: f.reversible_volts,
        thermoneutral_hhv_v: f.thermoneutral_hhv_volts,
        thermoneutral_lhv_v: f.thermoneutral_lhv_volts,
        overpotential_v: f.overpotential_volts,
        overpotential_ir_free_v: f.overpotential_ir_free_volts,
        voltage_efficiency_hhv: f.voltage_efficiency_hhv,
        voltage_efficiency_lhv: f.voltage_efficiency_lhv,
        heat_w: f.heat_w,
        h2_rate_mol_per_s: f.h2_rate_mol_per_s,
        h2_rate_normal_litres_per_min: f.h2_rate_normal_litres_per_min,
        h2_rate_kg_per_h: f.h2_rate_kg_per_h,
        specific_energy_kwh_per_kg: f.specific_energy_kwh_per_kg,
        current_density_a_per_cm2: f.current_density_a_per_cm2,
        area_specific_resistance_ohm_cm2: f.area_specific_resistance_ohm_cm2,
        breach: (match f.breach {
            None => pb::BoundBreach::Unspecified,
            Some(hydrogen::BoundBreach::Reversible) => pb::BoundBreach::Reversible,
            Some(hydrogen::BoundBreach::Thermoneutral) => pb::BoundBreach::Thermoneutral,
        }) as i32,
    })
}

/// Recomputes the cheap derived values from a stored row and its run.
pub fn stored_to_pb(row: &ReadingRow, run: Option<&RunRow>) -> pb::StoredReading {
    let derived = run.map(|run| {
        let temp_k = row.temp_c.unwrap_or(run.default_temp_c) + 273.15;
        let t = electrochem::thermo::thermo_state(
            run.n_electrons,
            electrochem::thermo::StandardPotential {
                e_standard_298_volts: run.e_standard_298_v,
                de_dt_volts_per_k: run.de_dt_v_per_k,
            },
            row.cell_volts_used,
            temp_k,
            run.equilibrium_tolerance_v,
        );
        let source = flags::ocv_source(row.flags);
        let known = source.known();
        let cell_terminal = row.volts / f64::from(run.cells_in_series.max(1));
        // At rest the terminal voltage is its own estimate: η is not known.
        let driving_force_v = matches!(
            source,
            OcvSource::OhmicCompensated | OcvSource::CountedSoc | OcvSource::Reversible
        )
        .then(|| cell_terminal - row.cell_volts_used);
        pb::DerivedState {
            cell_volts: row.cell_volts_used,
            ohmic_compensated: !matches!(
                source,
                OcvSource::Terminal | OcvSource::Rest | OcvSource::None
            ),
            temp_k,
            e_standard_v: t.e_standard_volts,
            delta_g_kj_per_mol: known.then_some(t.delta_g_kj_per_mol),
            delta_g_standard_kj_per_mol: t.delta_g_standard_kj_per_mol,
            ln_q: known.then_some(t.ln_q),
            log10_q: known.then(|| t.log10_q()),
            log10_k: t.log10_k(),
            affinity_ln_k_over_q: known.then_some(t.affinity_ln_k_over_q),
            state: if known {
                state_to_pb(t.state)
            } else {
                pb::ReactionState::Unspecified as i32
            },
            soc_model: row.soc_model,
            soc_clamped: row.flags & flags::SOC_CLAMPED != 0,
            soc_fused: row.soc_fused,
            charge_ah: row.charge_ah,
            energy_wh: row.energy_wh,
            operating_mode: mode_to_pb(row, run),
            soc_counted_unclamped: row.soc_counted_unclamped,
            soc_count_clamped: row.flags & flags::COUNT_CLAMPED != 0,
            resting: row.flags & flags::RESTING != 0,
            rest_settled: row.flags & flags::REST_SETTLED != 0,
            out_of_order: row.flags & flags::OUT_OF_ORDER != 0,
            soc_model_name: run.soc_model.clone(),
            ocv_source: ocv_source_to_pb(source),
            driving_force_v,
            driving_force_kj_per_mol: driving_force_v.map(|eta| {
                f64::from(run.n_electrons) * electrochem::constants::FARADAY_C_PER_MOL * eta / 1e3
            }),
            hydrogen: hydrogen_to_pb(row, run, temp_k),
        }
    });
    pb::StoredReading {
        seq: row.seq,
        time_unix_ns: row.time_ns,
        volts: row.volts,
        amps: row.amps,
        temp_c: row.temp_c,
        run_id: row.run_id as u64,
        derived,
    }
}

fn kind_to_pb(k: AlertKind) -> i32 {
    (match k {
        AlertKind::EquilibriumApproach => pb::AlertKind::EquilibriumApproach,
        AlertKind::EndOfCharge => pb::AlertKind::EndOfCharge,
        AlertKind::EndOfDischarge => pb::AlertKind::EndOfDischarge,
        AlertKind::RestSettled => pb::AlertKind::RestSettled,
        AlertKind::VoltageLimit => pb::AlertKind::VoltageLimit,
        AlertKind::CurrentLimit => pb::AlertKind::CurrentLimit,
        AlertKind::TemperatureLimit => pb::AlertKind::TemperatureLimit,
        AlertKind::SilentRig => pb::AlertKind::SilentRig,
        AlertKind::Timeline => pb::AlertKind::Timeline,
        AlertKind::DrivingForceSpent => pb::AlertKind::DrivingForceSpent,
    }) as i32
}

pub fn alert_to_pb(a: &AlertRow) -> pb::Alert {
    pb::Alert {
        alert_id: a.alert_id,
        channel_id: a.channel_id.clone(),
        run_id: a.run_id as u64,
        kind: kind_to_pb(a.kind),
        severity: a.severity.code() as i32,
        raised_unix_ns: a.raised_ns,
        raised_seq: a.raised_seq,
        trigger_value: a.trigger_value,
        threshold: a.threshold,
        unit: a.unit.clone(),
        message: a.message.clone(),
        seconds_to_target: a.seconds_to_target,
        cleared_unix_ns: a.cleared_ns,
        acknowledged_by: a.ack_by.clone(),
        acknowledged_unix_ns: a.ack_ns,
        acknowledge_note: a.ack_note.clone(),
    }
}

pub fn event_to_pb(e: &AlertEvent) -> pb::WatchAlertsResponse {
    pb::WatchAlertsResponse {
        event: match e.kind {
            EventKind::Raised => pb::AlertEventKind::Raised,
            EventKind::Cleared => pb::AlertEventKind::Cleared,
            EventKind::Acknowledged => pb::AlertEventKind::Acknowledged,
        } as i32,
        alert: Some(alert_to_pb(&e.alert)),
        resume_after_id: e.event_id,
    }
}

fn threshold_to_pb(t: &Threshold) -> pb::Threshold {
    pb::Threshold {
        enabled: t.enabled,
        raise_at: t.raise_at,
        clear_at: t.clear_at,
        hold_s: t.hold_s,
    }
}

fn threshold_from_pb(name: &str, t: Option<pb::Threshold>) -> Result<Threshold, Status> {
    let t = t.ok_or_else(|| {
        invalid(
            &format!("rules.{name}"),
            "unset",
            "every threshold must be given (enabled = false to switch it off)",
        )
    })?;
    Ok(Threshold {
        enabled: t.enabled,
        raise_at: t.raise_at,
        clear_at: t.clear_at,
        hold_s: t.hold_s,
    })
}

pub fn rules_to_pb(r: &AlertRules) -> pb::AlertRules {
    pb::AlertRules {
        equilibrium_delta_g_kj_per_mol: Some(threshold_to_pb(&r.equilibrium_delta_g_kj_per_mol)),
        end_of_charge_soc: Some(threshold_to_pb(&r.end_of_charge_soc)),
        end_of_charge_cell_volts: Some(threshold_to_pb(&r.end_of_charge_cell_volts)),
        end_of_charge_lead_s: r.end_of_charge_lead_s,
        end_of_discharge_soc: Some(threshold_to_pb(&r.end_of_discharge_soc)),
        end_of_discharge_cell_volts: Some(threshold_to_pb(&r.end_of_discharge_cell_volts)),
        rest_settled_mv_per_min: Some(threshold_to_pb(&r.rest_settled_mv_per_min)),
        min_cell_volts: r.min_cell_volts,
        max_cell_volts: r.max_cell_volts,
        max_abs_amps: r.max_abs_amps,
        min_temp_c: r.min_temp_c,
        max_temp_c: r.max_temp_c,
        silent_interval_multiple: r.silent_interval_multiple,
        silent_min_s: r.silent_min_s,
        driving_force_cell_volts: Some(threshold_to_pb(&r.driving_force_cell_volts)),
        driving_force_after_stop_s: Some(r.driving_force_after_stop_s),
    }
}

pub fn rules_from_pb(r: pb::AlertRules) -> Result<AlertRules, Status> {
    let rules = AlertRules {
        equilibrium_delta_g_kj_per_mol: threshold_from_pb(
            "equilibrium_delta_g_kj_per_mol",
            r.equilibrium_delta_g_kj_per_mol,
        )?,
        end_of_charge_soc: threshold_from_pb("end_of_charge_soc", r.end_of_charge_soc)?,
        end_of_charge_cell_volts: threshold_from_pb(
            "end_of_charge_cell_volts",
            r.end_of_charge_cell_volts,
        )?,
        end_of_charge_lead_s: r.end_of_charge_lead_s,
        end_of_discharge_soc: threshold_from_pb("end_of_discharge_soc", r.end_of_discharge_soc)?,
        end_of_discharge_cell_volts: threshold_from_pb(
            "end_of_discharge_cell_volts",
            r.end_of_discharge_cell_volts,
        )?,
        rest_settled_mv_per_min: threshold_from_pb(
            "rest_settled_mv_per_min",
            r.rest_settled_mv_per_min,
        )?,
        min_cell_volts: r.min_cell_volts,
        max_cell_volts: r.max_cell_volts,
        max_abs_amps: r.max_abs_amps,
        min_temp_c: r.min_temp_c,
        max_temp_c: r.max_temp_c,
        silent_interval_multiple: r.silent_interval_multiple,
        silent_min_s: r.silent_min_s,
        driving_force_cell_volts: match r.driving_force_cell_volts {
            // Older clients know no such rule: they get the default.
            None => AlertRules::defaults_for(0.0, 1.0).driving_force_cell_volts,
            t => threshold_from_pb("driving_force_cell_volts", t)?,
        },
        driving_force_after_stop_s: r
            .driving_force_after_stop_s
            .unwrap_or(AlertRules::defaults_for(0.0, 1.0).driving_force_after_stop_s),
    };
    rules
        .validate()
        .map_err(|m| Status::invalid_argument(format!("rules.{m}")))?;
    Ok(rules)
}

pub fn cycle_to_pb(run_id: i64, c: &CycleRecord) -> pb::Cycle {
    pb::Cycle {
        run_id: run_id as u64,
        index: c.index,
        start_unix_ns: c.start_ns,
        end_unix_ns: c.end_ns,
        charge_in_ah: c.charge_in_ah,
        charge_out_ah: c.charge_out_ah,
        energy_in_wh: c.energy_in_wh,
        energy_out_wh: c.energy_out_wh,
        coulombic_efficiency: c.coulombic_efficiency,
        energy_efficiency: c.energy_efficiency,
        voltage_efficiency: c.voltage_efficiency,
        mean_delta_g_charge_kj_per_mol: c.mean_delta_g_charge_kj_per_mol,
        mean_delta_g_discharge_kj_per_mol: c.mean_delta_g_discharge_kj_per_mol,
        start_soc: c.start_soc,
        end_soc: c.end_soc,
        open: c.open,
        partial: c.partial,
        discharge_only: c.discharge_only,
    }
}

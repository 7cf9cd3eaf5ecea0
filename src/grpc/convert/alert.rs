//! Alerts, events and rules.

use super::super::status::invalid;
use crate::alerts::{AlertKind, AlertRules, Threshold};
use crate::pb;
use crate::store::{AlertEvent, AlertRow, EventKind};
use tonic::Status;

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
        AlertKind::OcvModelMismatch => pb::AlertKind::OcvModelMismatch,
    }) as i32
}

/// A stored alert as the wire has it.
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
        historical: a.historical,
    }
}

/// One feed event (raised, cleared, acknowledged) as WatchAlerts sends it.
pub fn event_to_pb(e: &AlertEvent) -> pb::WatchAlertsResponse {
    pb::WatchAlertsResponse {
        event: match e.kind {
            EventKind::Raised => pb::AlertEventKind::Raised,
            EventKind::Cleared => pb::AlertEventKind::Cleared,
            EventKind::Acknowledged => pb::AlertEventKind::Acknowledged,
        } as i32,
        alert: Some(alert_to_pb(&e.alert)),
        resume_after_event_id: e.event_id,
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

/// A channel's alert rules as the wire has them.
pub fn rules_to_pb(r: &AlertRules) -> pb::AlertRules {
    pb::AlertRules {
        equilibrium_delta_g_kj_per_mol: Some(threshold_to_pb(&r.equilibrium_delta_g_kj_per_mol)),
        end_of_charge_soc: Some(threshold_to_pb(&r.end_of_charge_soc)),
        end_of_charge_cell_volts: Some(threshold_to_pb(&r.end_of_charge_cell_volts)),
        end_of_charge_lead_s: r.end_of_charge_lead_s,
        end_of_discharge_soc: Some(threshold_to_pb(&r.end_of_discharge_soc)),
        end_of_discharge_cell_volts: Some(threshold_to_pb(&r.end_of_discharge_cell_volts)),
        rest_settled_mv_per_min: Some(threshold_to_pb(&r.rest_settled_mv_per_min)),
        safe_min_cell_volts: r.safe_min_cell_volts,
        safe_max_cell_volts: r.safe_max_cell_volts,
        max_abs_amps: r.max_abs_amps,
        min_temp_c: r.min_temp_c,
        max_temp_c: r.max_temp_c,
        silent_interval_multiple: r.silent_interval_multiple,
        silent_min_s: r.silent_min_s,
        driving_force_cell_volts: Some(threshold_to_pb(&r.driving_force_cell_volts)),
        driving_force_after_stop_s: Some(r.driving_force_after_stop_s),
        ocv_model_mismatch_cell_volts: Some(threshold_to_pb(&r.ocv_model_mismatch_cell_volts)),
    }
}

/// Rules off the wire, validated; a missing threshold is refused naming it,
/// a missing newer rule takes its default.
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
        safe_min_cell_volts: r.safe_min_cell_volts,
        safe_max_cell_volts: r.safe_max_cell_volts,
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
        ocv_model_mismatch_cell_volts: match r.ocv_model_mismatch_cell_volts {
            None => AlertRules::defaults_for(0.0, 1.0).ocv_model_mismatch_cell_volts,
            t => threshold_from_pb("ocv_model_mismatch_cell_volts", t)?,
        },
    };
    rules
        .validate()
        .map_err(|m| Status::invalid_argument(format!("rules.{m}")))?;
    Ok(rules)
}

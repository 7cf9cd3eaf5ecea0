//! Names of the wire's enum values: snake_case ids for machine outputs
//! (JSON, CSV, as metrics spell them), labels for people (tables, lines).

use gibbsline::pb;

/// An alert kind as machine outputs spell it (`end_of_charge`).
pub(crate) fn kind_id(code: i32) -> &'static str {
    match pb::AlertKind::try_from(code) {
        Ok(pb::AlertKind::EquilibriumApproach) => "equilibrium_approach",
        Ok(pb::AlertKind::EndOfCharge) => "end_of_charge",
        Ok(pb::AlertKind::EndOfDischarge) => "end_of_discharge",
        Ok(pb::AlertKind::RestSettled) => "rest_settled",
        Ok(pb::AlertKind::VoltageLimit) => "voltage_limit",
        Ok(pb::AlertKind::CurrentLimit) => "current_limit",
        Ok(pb::AlertKind::TemperatureLimit) => "temperature_limit",
        Ok(pb::AlertKind::SilentRig) => "silent_rig",
        Ok(pb::AlertKind::Timeline) => "timeline",
        Ok(pb::AlertKind::DrivingForceSpent) => "driving_force_spent",
        Ok(pb::AlertKind::OcvModelMismatch) => "ocv_model_mismatch",
        _ => "unknown",
    }
}

/// An alert kind for people (`end of charge`).
pub(crate) fn kind_label(code: i32) -> String {
    kind_id(code).replace('_', " ")
}

/// A severity as machine outputs spell it: `info`, `warning`, `critical`.
pub(crate) fn severity_id(code: i32) -> &'static str {
    match pb::Severity::try_from(code) {
        Ok(pb::Severity::Info) => "info",
        Ok(pb::Severity::Warning) => "warning",
        Ok(pb::Severity::Critical) => "critical",
        _ => "unspecified",
    }
}

/// A severity for people: the serious ones stand out in capitals.
pub(crate) fn severity_label(code: i32) -> String {
    match pb::Severity::try_from(code) {
        Ok(pb::Severity::Info) => "info".into(),
        Ok(_) => severity_id(code).to_uppercase(),
        _ => "-".into(),
    }
}

pub(crate) fn state_name(code: i32) -> &'static str {
    match pb::ReactionState::try_from(code) {
        Ok(pb::ReactionState::Spontaneous) => "spontaneous",
        Ok(pb::ReactionState::Driven) => "driven",
        Ok(pb::ReactionState::Equilibrium) => "equilibrium",
        _ => "-",
    }
}

/// The operating mode's name, as JSON and tables show it.
pub(crate) fn mode_name(code: i32) -> &'static str {
    match pb::OperatingMode::try_from(code) {
        Ok(pb::OperatingMode::Charge) => "charge",
        Ok(pb::OperatingMode::Discharge) => "discharge",
        Ok(pb::OperatingMode::Rest) => "rest",
        Ok(pb::OperatingMode::Electrolysis) => "electrolysis",
        Ok(pb::OperatingMode::FuelCell) => "fuel_cell",
        Ok(pb::OperatingMode::OpenCircuit) => "open_circuit",
        _ => "no_current",
    }
}

pub(crate) fn ocv_source_name(code: i32) -> &'static str {
    match pb::OcvSource::try_from(code) {
        Ok(pb::OcvSource::Terminal) => "terminal",
        Ok(pb::OcvSource::Rest) => "rest",
        Ok(pb::OcvSource::OhmicCompensated) => "ohmic_compensated",
        Ok(pb::OcvSource::CountedSoc) => "counted_soc",
        Ok(pb::OcvSource::Reversible) => "reversible",
        Ok(pb::OcvSource::None) => "none",
        _ => "unspecified",
    }
}

/// Which OCV model a reading was read off: `chemistry` (uncalibrated),
/// `cell` (fitted or set for this cell), `none`.
pub(crate) fn ocv_model_name(code: i32) -> &'static str {
    match pb::OcvModelBasis::try_from(code) {
        Ok(pb::OcvModelBasis::Chemistry) => "chemistry",
        Ok(pb::OcvModelBasis::Cell) => "cell",
        _ => "none",
    }
}

pub(crate) fn breach_name(code: i32) -> Option<&'static str> {
    match pb::BoundBreach::try_from(code) {
        Ok(pb::BoundBreach::Reversible) => Some("reversible"),
        Ok(pb::BoundBreach::Thermoneutral) => Some("thermoneutral"),
        _ => None,
    }
}

pub(crate) fn event_name(code: i32) -> &'static str {
    match pb::AlertEventKind::try_from(code) {
        Ok(pb::AlertEventKind::Raised) => "raised",
        Ok(pb::AlertEventKind::Cleared) => "cleared",
        Ok(pb::AlertEventKind::Acknowledged) => "acknowledged",
        Ok(pb::AlertEventKind::Live) => "live",
        Ok(pb::AlertEventKind::Overflow) => "overflow",
        _ => "unspecified",
    }
}

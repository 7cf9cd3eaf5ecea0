//! Alert rule evaluation: pure, with hysteresis and debounce.
//!
//! Each rule watches one value. It raises when the value has been past
//! `raise_at` for `hold_s` (time from the readings, not a clock) and clears
//! when the value comes back past `clear_at`, so noise around a threshold
//! gives one alert, not a storm. At most one alert per (channel, kind) is
//! active at a time; the state here says which are.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use crate::error::FieldError;
use serde::{Deserialize, Serialize};

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum AlertKind {
    EquilibriumApproach,
    EndOfCharge,
    EndOfDischarge,
    RestSettled,
    VoltageLimit,
    CurrentLimit,
    TemperatureLimit,
    SilentRig,
    /// Readings kept out of the rules: refused as implausible jumps in
    /// time or seq, or taken as late while their seq was new.
    Timeline,
    /// The terminal voltage has come within a few mV of the cell's
    /// equilibrium voltage while current flows or just after it stopped:
    /// the driving force is spent (end of a constant-voltage taper, a
    /// relaxation done, a load the cell can no longer push).
    DrivingForceSpent,
    /// A settled rest's open-circuit voltage lies far from the SOC model
    /// at the counted SOC: the model (a built-in one, typically) does not
    /// describe this cell, and SOC read off it is off too.
    OcvModelMismatch,
}

impl AlertKind {
    pub const ALL: [AlertKind; 11] = [
        AlertKind::EquilibriumApproach,
        AlertKind::EndOfCharge,
        AlertKind::EndOfDischarge,
        AlertKind::RestSettled,
        AlertKind::VoltageLimit,
        AlertKind::CurrentLimit,
        AlertKind::TemperatureLimit,
        AlertKind::SilentRig,
        AlertKind::Timeline,
        AlertKind::DrivingForceSpent,
        AlertKind::OcvModelMismatch,
    ];
    pub fn code(self) -> i64 {
        self as i64 + 1
    }
    pub fn from_code(code: i64) -> Option<AlertKind> {
        AlertKind::ALL.get(usize::try_from(code - 1).ok()?).copied()
    }
    pub fn severity(self) -> Severity {
        match self {
            AlertKind::VoltageLimit | AlertKind::CurrentLimit | AlertKind::TemperatureLimit => {
                Severity::Critical
            }
            // A state worth knowing (a taper done, a cell relaxed), not a fault.
            AlertKind::RestSettled | AlertKind::DrivingForceSpent => Severity::Info,
            _ => Severity::Warning,
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Severity {
    Info = 1,
    Warning = 2,
    Critical = 3,
}

impl Severity {
    pub fn code(self) -> i64 {
        self as i64
    }
    pub fn from_code(code: i64) -> Severity {
        match code {
            3 => Severity::Critical,
            2 => Severity::Warning,
            _ => Severity::Info,
        }
    }
}

/// A raise/clear pair with a hold time.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Threshold {
    pub enabled: bool,
    pub raise_at: f64,
    pub clear_at: f64,
    pub hold_s: f64,
}

impl Threshold {
    pub const fn new(raise_at: f64, clear_at: f64, hold_s: f64) -> Threshold {
        Threshold {
            enabled: true,
            raise_at,
            clear_at,
            hold_s,
        }
    }
}

/// Rules for one channel.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AlertRules {
    pub equilibrium_delta_g_kj_per_mol: Threshold,
    pub end_of_charge_soc: Threshold,
    pub end_of_charge_cell_volts: Threshold,
    pub end_of_charge_lead_s: f64,
    pub end_of_discharge_soc: Threshold,
    pub end_of_discharge_cell_volts: Threshold,
    pub rest_settled_mv_per_min: Threshold,
    /// The safe window per cell, V: outside it a voltage-limit alert is
    /// raised (`min_cell_volts` is read for one release).
    #[serde(alias = "min_cell_volts")]
    pub safe_min_cell_volts: f64,
    /// Upper end of the safe window per cell, V.
    #[serde(alias = "max_cell_volts")]
    pub safe_max_cell_volts: f64,
    pub max_abs_amps: f64,
    pub min_temp_c: f64,
    pub max_temp_c: f64,
    pub silent_interval_multiple: f64,
    pub silent_min_s: f64,
    /// |η| per cell, V, at or below raise_at while current flows or for
    /// `driving_force_after_stop_s` after it stops.
    #[serde(default = "default_driving_force")]
    pub driving_force_cell_volts: Threshold,
    #[serde(default = "default_after_stop_s")]
    pub driving_force_after_stop_s: f64,
    /// |settled-rest OCV − model OCV at the counted SOC| per cell, V, at
    /// or above raise_at.
    #[serde(default = "default_ocv_mismatch")]
    pub ocv_model_mismatch_cell_volts: Threshold,
}

/// 15 mV per cell, cleared below 10 mV: well beyond a settled rest's
/// relaxation left (about 1 mV/min) and a day's count drift on a good
/// shunt, well inside the 45–85 mV a built-in vanadium model is off real
/// cells (from memory). Our own choice, set per channel.
fn default_ocv_mismatch() -> Threshold {
    Threshold::new(0.015, 0.010, 0.0)
}

/// 10 mV per cell for 10 s, cleared past 20 mV: the taper of a
/// constant-voltage charge ends well inside this (our own choice, set per
/// channel).
fn default_driving_force() -> Threshold {
    Threshold::new(0.010, 0.020, 10.0)
}

fn default_after_stop_s() -> f64 {
    60.0
}

/// What a chemistry's default rules are made from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RuleBasis {
    /// Per-cell voltage that ends a charge under current, V.
    pub charge_cutoff_cell_volts: f64,
    /// Per-cell voltage that ends a discharge under current, V.
    pub discharge_cutoff_cell_volts: f64,
    /// The chemistry's per-cell range, V.
    pub min_cell_volts: f64,
    /// Upper end of that range, V.
    pub max_cell_volts: f64,
    /// Temperatures its data hold for, °C.
    pub min_temp_c: f64,
    /// Upper end of those, °C.
    pub max_temp_c: f64,
    /// Whether it has a state of charge at all.
    pub has_soc_model: bool,
}

impl RuleBasis {
    /// The basis of `chemistry`'s defaults.
    pub fn of(chemistry: &crate::electrochem::Chemistry) -> RuleBasis {
        RuleBasis {
            charge_cutoff_cell_volts: chemistry.charge_cutoff_cell_volts,
            discharge_cutoff_cell_volts: chemistry.discharge_cutoff_cell_volts,
            min_cell_volts: chemistry.min_cell_volts,
            max_cell_volts: chemistry.max_cell_volts,
            min_temp_c: chemistry.min_temp_c,
            max_temp_c: chemistry.max_temp_c,
            has_soc_model: chemistry.soc_model.name() != "none",
        }
    }
}

impl AlertRules {
    /// Defaults from the chemistry's per-cell window (common practice:
    /// end of charge at SOC 0.95 or the charge cutoff, end of discharge at
    /// 0.05 or the discharge cutoff; limits 50 mV beyond the cutoffs).
    pub fn defaults_for(min_cell_volts: f64, max_cell_volts: f64) -> AlertRules {
        AlertRules {
            equilibrium_delta_g_kj_per_mol: Threshold::new(1.0, 2.0, 10.0),
            end_of_charge_soc: Threshold::new(0.95, 0.90, 5.0),
            end_of_charge_cell_volts: Threshold::new(max_cell_volts, max_cell_volts - 0.02, 2.0),
            end_of_charge_lead_s: 0.0,
            end_of_discharge_soc: Threshold::new(0.05, 0.10, 5.0),
            end_of_discharge_cell_volts: Threshold::new(min_cell_volts, min_cell_volts + 0.02, 2.0),
            rest_settled_mv_per_min: Threshold::new(1.0, 3.0, 60.0),
            safe_min_cell_volts: min_cell_volts - 0.05,
            safe_max_cell_volts: max_cell_volts + 0.05,
            max_abs_amps: 0.0,
            min_temp_c: -20.0,
            max_temp_c: 70.0,
            silent_interval_multiple: 10.0,
            silent_min_s: 30.0,
            driving_force_cell_volts: default_driving_force(),
            driving_force_after_stop_s: default_after_stop_s(),
            ocv_model_mismatch_cell_volts: default_ocv_mismatch(),
        }
    }

    /// Defaults from a chemistry: end of charge and discharge at its
    /// cutoffs under current (terminal voltage, as a constant-current /
    /// constant-voltage charge defines them), the safe window 50 mV beyond
    /// them, and its operating temperatures. A cell with no state of
    /// charge (the water cell) has no end of charge or discharge.
    pub fn for_chemistry(chemistry: &crate::electrochem::Chemistry) -> AlertRules {
        AlertRules::for_basis(&RuleBasis::of(chemistry))
    }

    /// [`AlertRules::for_chemistry`] from the figures it needs, which a
    /// client also has from `ListChemistries`.
    pub fn for_basis(b: &RuleBasis) -> AlertRules {
        let mut rules =
            AlertRules::defaults_for(b.discharge_cutoff_cell_volts, b.charge_cutoff_cell_volts);
        rules.safe_min_cell_volts = rules.safe_min_cell_volts.min(b.min_cell_volts);
        rules.safe_max_cell_volts = rules.safe_max_cell_volts.max(b.max_cell_volts);
        rules.min_temp_c = b.min_temp_c;
        rules.max_temp_c = b.max_temp_c;
        if !b.has_soc_model {
            for t in [
                &mut rules.end_of_charge_soc,
                &mut rules.end_of_charge_cell_volts,
                &mut rules.end_of_discharge_soc,
                &mut rules.end_of_discharge_cell_volts,
            ] {
                t.enabled = false;
            }
        }
        rules
    }

    /// Rejects rules that cannot work, naming the field and value.
    pub fn validate(&self) -> Result<(), FieldError> {
        for (name, t, rising) in self.thresholds() {
            t.check(name, rising)?;
        }
        for (name, v) in self.scalars() {
            if !v.is_finite() {
                return Err(FieldError::new(name, v, "must be finite"));
            }
        }
        below(
            "safe_min_cell_volts",
            self.safe_min_cell_volts,
            "safe_max_cell_volts",
            self.safe_max_cell_volts,
        )?;
        below("min_temp_c", self.min_temp_c, "max_temp_c", self.max_temp_c)
    }

    /// The hysteresis thresholds, and whether each raises on a rising value.
    fn thresholds(&self) -> [(&'static str, Threshold, bool); 8] {
        [
            (
                "ocv_model_mismatch_cell_volts",
                self.ocv_model_mismatch_cell_volts,
                true,
            ),
            (
                "driving_force_cell_volts",
                self.driving_force_cell_volts,
                false,
            ),
            (
                "equilibrium_delta_g_kj_per_mol",
                self.equilibrium_delta_g_kj_per_mol,
                false,
            ),
            ("end_of_charge_soc", self.end_of_charge_soc, true),
            (
                "end_of_charge_cell_volts",
                self.end_of_charge_cell_volts,
                true,
            ),
            ("end_of_discharge_soc", self.end_of_discharge_soc, false),
            (
                "end_of_discharge_cell_volts",
                self.end_of_discharge_cell_volts,
                false,
            ),
            (
                "rest_settled_mv_per_min",
                self.rest_settled_mv_per_min,
                false,
            ),
        ]
    }

    /// The plain numbers, each of which must be finite.
    fn scalars(&self) -> [(&'static str, f64); 9] {
        [
            ("end_of_charge_lead_s", self.end_of_charge_lead_s),
            ("safe_min_cell_volts", self.safe_min_cell_volts),
            ("safe_max_cell_volts", self.safe_max_cell_volts),
            ("max_abs_amps", self.max_abs_amps),
            ("min_temp_c", self.min_temp_c),
            ("max_temp_c", self.max_temp_c),
            ("silent_interval_multiple", self.silent_interval_multiple),
            ("silent_min_s", self.silent_min_s),
            (
                "driving_force_after_stop_s",
                self.driving_force_after_stop_s,
            ),
        ]
    }
}

/// A window's upper end must lie above its lower end.
fn below(low_name: &str, low: f64, high_name: &str, high: f64) -> Result<(), FieldError> {
    if low >= high {
        return Err(FieldError::new(
            high_name,
            high,
            format!("must be above {low_name} ({low})"),
        ));
    }
    Ok(())
}

impl Threshold {
    /// Finite parts, a hold that is not negative, and a clear level on the
    /// safe side of the raise level (hysteresis).
    fn check(&self, name: &str, rising: bool) -> Result<(), FieldError> {
        for (part, v) in [
            ("raise_at", self.raise_at),
            ("clear_at", self.clear_at),
            ("hold_s", self.hold_s),
        ] {
            if !v.is_finite() {
                return Err(FieldError::new(
                    format!("{name}.{part}"),
                    v,
                    "must be finite",
                ));
            }
        }
        if self.hold_s < 0.0 {
            return Err(FieldError::new(
                format!("{name}.hold_s"),
                self.hold_s,
                "must not be negative",
            ));
        }
        let safe_side = if rising {
            self.clear_at <= self.raise_at
        } else {
            self.clear_at >= self.raise_at
        };
        if !safe_side {
            return Err(FieldError::new(
                format!("{name}.clear_at"),
                self.clear_at,
                format!(
                    "must be on the safe side of raise_at ({}) for hysteresis",
                    self.raise_at
                ),
            ));
        }
        Ok(())
    }
}

/// Debounce state of one rule.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct RuleState {
    pub pending_since_ns: Option<i64>,
    pub active: bool,
}

/// Each kind's debounce state, by kind: a reading looks up eight of
/// them, so an array index instead of a map walk.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct RuleStates([RuleState; AlertKind::ALL.len()]);

impl RuleStates {
    pub fn get(&self, kind: AlertKind) -> RuleState {
        self.0[kind as usize]
    }
    pub fn get_mut(&mut self, kind: AlertKind) -> &mut RuleState {
        &mut self.0[kind as usize]
    }
    pub fn insert(&mut self, kind: AlertKind, state: RuleState) {
        self.0[kind as usize] = state;
    }
}

/// Per-channel state of all rules.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct ChannelRuleState {
    pub rules: RuleStates,
    /// Last reading with current flowing, for "just after it stopped".
    #[serde(default)]
    pub last_flowing_ns: Option<i64>,
}

impl ChannelRuleState {
    /// State after a restart: the kinds with an alert still active.
    pub fn with_active(kinds: impl IntoIterator<Item = AlertKind>) -> ChannelRuleState {
        let mut s = ChannelRuleState::default();
        for kind in kinds {
            s.rules.insert(
                kind,
                RuleState {
                    pending_since_ns: None,
                    active: true,
                },
            );
        }
        s
    }
    pub fn is_active(&self, kind: AlertKind) -> bool {
        self.rules.get(kind).active
    }
}

/// What the rules see of one derived reading.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RuleInput {
    pub time_ns: i64,
    pub seq: u64,
    pub cell_volts_terminal: f64,
    /// Charge-positive amps.
    pub amps: Option<f64>,
    pub temp_c: Option<f64>,
    /// Absent under current without an open-circuit estimate.
    pub delta_g_kj_per_mol: Option<f64>,
    /// η = V_terminal − E_eq per cell, V.
    pub driving_force_volts: Option<f64>,
    pub soc: Option<f64>,
    pub charging: bool,
    pub discharging: bool,
    pub resting: bool,
    pub dv_dt_mv_per_min: Option<f64>,
    pub soc_rate_per_s: Option<f64>,
    /// During a settled rest: OCV minus the model's at the counted SOC, V
    /// per cell.
    pub ocv_model_gap_volts: Option<f64>,
}

impl RuleInput {
    /// A reading's own values with no estimator figures (none known, or a
    /// reading out of the channel's order, which the estimator skips).
    pub fn reading_only(
        time_ns: i64,
        seq: u64,
        cell_volts_terminal: f64,
        amps: Option<f64>,
        temp_c: Option<f64>,
    ) -> RuleInput {
        RuleInput {
            time_ns,
            seq,
            cell_volts_terminal,
            amps,
            temp_c,
            delta_g_kj_per_mol: None,
            driving_force_volts: None,
            soc: None,
            charging: false,
            discharging: false,
            resting: false,
            dv_dt_mv_per_min: None,
            soc_rate_per_s: None,
            ocv_model_gap_volts: None,
        }
    }
}

/// A change the caller must store and publish.
#[derive(Debug, Clone, PartialEq)]
pub enum AlertChange {
    Raise(RaisedAlert),
    Clear { kind: AlertKind, time_ns: i64 },
}

#[derive(Debug, Clone, PartialEq)]
pub struct RaisedAlert {
    pub kind: AlertKind,
    pub severity: Severity,
    pub time_ns: i64,
    pub seq: u64,
    pub trigger_value: f64,
    pub threshold: f64,
    pub unit: &'static str,
    pub message: String,
    pub seconds_to_target: Option<f64>,
}

/// Which side of a threshold is the alarm side.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Side {
    AtOrAbove,
    AtOrBelow,
}

struct Check<M: Fn() -> String> {
    kind: AlertKind,
    /// `Some(true)` past raise, `Some(false)` back past clear, `None` in between
    /// (keep what we have) or not applicable.
    past_raise: bool,
    past_clear: bool,
    hold_s: f64,
    trigger_value: f64,
    threshold: f64,
    unit: &'static str,
    /// Built only when the alert is raised: formatting on every reading
    /// would be most of the rules' cost. A closure of its own type per
    /// check, not boxed: a box per check per reading was most of the
    /// allocations of ingest's derivation.
    message: M,
    seconds_to_target: Option<f64>,
}

fn compare(t: &Threshold, side: Side, value: f64) -> (bool, bool) {
    match side {
        Side::AtOrAbove => (value >= t.raise_at, value < t.clear_at),
        Side::AtOrBelow => (value <= t.raise_at, value > t.clear_at),
    }
}

/// Evaluates every rule against one reading.
pub fn evaluate(
    rules: &AlertRules,
    state: &mut ChannelRuleState,
    input: &RuleInput,
) -> Vec<AlertChange> {
    if input.charging || input.discharging {
        state.last_flowing_ns = Some(input.time_ns);
    }
    let since_flow_s = state
        .last_flowing_ns
        .map(|t| (input.time_ns - t) as f64 / 1e9);
    // Each check is applied as it is made: their messages are closures of
    // different types (see `Check::message`).
    let mut changes: Vec<AlertChange> = Vec::new();
    let c = &mut changes;
    apply_into(c, state, equilibrium_check(rules, input), input);
    apply_into(
        c,
        state,
        driving_force_check(rules, input, since_flow_s),
        input,
    );
    apply_into(c, state, end_of_charge_check(rules, input), input);
    apply_into(c, state, end_of_discharge_check(rules, input), input);
    apply_into(c, state, rest_settled_check(rules, input), input);
    apply_into(c, state, Some(voltage_limit_check(rules, input)), input);
    apply_into(c, state, current_limit_check(rules, input), input);
    apply_into(c, state, temperature_limit_check(rules, input), input);
    apply_into(c, state, ocv_mismatch_check(rules, input), input);
    // A reading arriving ends a silence.
    if state.is_active(AlertKind::SilentRig) {
        state
            .rules
            .insert(AlertKind::SilentRig, RuleState::default());
        changes.push(AlertChange::Clear {
            kind: AlertKind::SilentRig,
            time_ns: input.time_ns,
        });
    }
    changes
}

/// The limit rules alone (voltage, current, temperature), for a reading
/// out of the channel's order: each judges a reading on its own values, so
/// a garbled timeline must not hide a cell outside its safe window. Such a
/// reading may raise a limit alert but never clears one: a reading from
/// before the front says nothing about the cell now.
pub fn evaluate_limits(
    rules: &AlertRules,
    state: &mut ChannelRuleState,
    input: &RuleInput,
) -> Vec<AlertChange> {
    let mut changes = Vec::new();
    let c = &mut changes;
    raise_only_into(c, state, Some(voltage_limit_check(rules, input)), input);
    raise_only_into(c, state, current_limit_check(rules, input), input);
    raise_only_into(c, state, temperature_limit_check(rules, input), input);
    changes
}

fn raise_only_into<M: Fn() -> String>(
    changes: &mut Vec<AlertChange>,
    state: &mut ChannelRuleState,
    check: Option<Check<M>>,
    input: &RuleInput,
) {
    if let Some(check) = check.filter(|c| c.past_raise) {
        changes.extend(apply(state, check, input));
    }
}

/// Reaction equilibrium: |ΔG| of the cell reaction small (a concentration
/// or teaching cell run down); rarer than a spent driving force.
fn equilibrium_check(rules: &AlertRules, input: &RuleInput) -> Option<Check<impl Fn() -> String>> {
    let t = rules.equilibrium_delta_g_kj_per_mol;
    let value = input.delta_g_kj_per_mol.filter(|_| t.enabled)?.abs();
    let (past_raise, past_clear) = compare(&t, Side::AtOrBelow, value);
    Some(Check {
        kind: AlertKind::EquilibriumApproach,
        past_raise,
        past_clear,
        hold_s: t.hold_s,
        trigger_value: value,
        threshold: t.raise_at,
        unit: "kJ/mol",
        message: (move || {
            format!("|ΔG| {value:.3} kJ/mol: the cell reaction is near chemical equilibrium")
        }),
        seconds_to_target: None,
    })
}

/// The voltage approaching equilibrium: |η| small while current flows or
/// shortly after it stops. With no η (no equilibrium estimate) or long
/// after the current stopped the rule holds its state.
fn driving_force_check(
    rules: &AlertRules,
    input: &RuleInput,
    since_flow_s: Option<f64>,
) -> Option<Check<impl Fn() -> String>> {
    let t = rules.driving_force_cell_volts;
    let recent = since_flow_s.is_some_and(|s| s <= rules.driving_force_after_stop_s);
    let eta = input.driving_force_volts.filter(|_| t.enabled)?;
    let value = eta.abs();
    let (raise, clear) = compare(&t, Side::AtOrBelow, value);
    Some(Check {
        kind: AlertKind::DrivingForceSpent,
        past_raise: raise && recent,
        past_clear: clear,
        hold_s: t.hold_s,
        trigger_value: eta,
        threshold: t.raise_at,
        unit: "V",
        message: (move || {
            format!(
                "driving force spent: terminal voltage within {:.1} mV per cell of equilibrium",
                value * 1e3
            )
        }),
        seconds_to_target: None,
    })
}

/// One end of a cycle: an SOC target or a cell-voltage cutoff, judged
/// only while current flows toward that end. Without an anchored SOC only
/// the cutoff decides.
struct CycleEnd {
    kind: AlertKind,
    label: &'static str,
    side: Side,
    soc_rule: Threshold,
    volts_rule: Threshold,
    /// Raise this many seconds before the SOC target (end of charge only:
    /// `None` makes no time-to-target estimate).
    lead_s: Option<f64>,
    flowing: bool,
}

fn end_of_charge_check(
    rules: &AlertRules,
    input: &RuleInput,
) -> Option<Check<impl Fn() -> String>> {
    cycle_end_check(
        CycleEnd {
            kind: AlertKind::EndOfCharge,
            label: "end of charge",
            side: Side::AtOrAbove,
            soc_rule: rules.end_of_charge_soc,
            volts_rule: rules.end_of_charge_cell_volts,
            lead_s: Some(rules.end_of_charge_lead_s),
            flowing: input.charging,
        },
        input,
    )
}

fn end_of_discharge_check(
    rules: &AlertRules,
    input: &RuleInput,
) -> Option<Check<impl Fn() -> String>> {
    cycle_end_check(
        CycleEnd {
            kind: AlertKind::EndOfDischarge,
            label: "end of discharge",
            side: Side::AtOrBelow,
            soc_rule: rules.end_of_discharge_soc,
            volts_rule: rules.end_of_discharge_cell_volts,
            lead_s: None,
            flowing: input.discharging,
        },
        input,
    )
}

fn cycle_end_check(end: CycleEnd, input: &RuleInput) -> Option<Check<impl Fn() -> String>> {
    let (soc_rule, volts_rule) = (end.soc_rule, end.volts_rule);
    if !(soc_rule.enabled || volts_rule.enabled) {
        return None;
    }
    let mut past = false;
    let mut clear = true;
    let (mut value, mut threshold, mut unit, mut hold_s) = (
        input.cell_volts_terminal,
        volts_rule.raise_at,
        "V",
        volts_rule.hold_s,
    );
    let mut eta = None;
    if let Some(soc) = input.soc.filter(|_| soc_rule.enabled) {
        let (raise, soc_clear) = compare(&soc_rule, end.side, soc);
        if end.lead_s.is_some() {
            eta = input
                .soc_rate_per_s
                .filter(|r| *r > 0.0)
                .map(|rate| ((soc_rule.raise_at - soc) / rate).max(0.0));
        }
        let lead_s = end.lead_s.unwrap_or(0.0);
        let early = lead_s > 0.0 && eta.is_some_and(|e| e <= lead_s);
        past |= end.flowing && (raise || early);
        clear &= soc_clear && !early;
        if raise || early {
            // SOC is reported in percent: a real unit people read at once.
            (value, threshold, unit, hold_s) =
                (soc * 100.0, soc_rule.raise_at * 100.0, "%", soc_rule.hold_s);
        }
    }
    if volts_rule.enabled {
        let (raise, volts_clear) = compare(&volts_rule, end.side, input.cell_volts_terminal);
        past |= end.flowing && raise;
        // At rest the terminal voltage relaxes back past the cutoff by
        // itself; only SOC decides clearing once current has stopped.
        clear &= volts_clear || !end.flowing;
    }
    let label = end.label;
    Some(Check {
        kind: end.kind,
        past_raise: past,
        past_clear: clear && !past,
        hold_s,
        trigger_value: value,
        threshold,
        unit,
        message: (move || match (unit, eta) {
            ("%", Some(e)) if e > 0.0 => {
                format!("{label} in about {e:.0} s (SOC {value:.1} %, target {threshold:.1} %)")
            }
            ("%", _) => format!("{label}: SOC {value:.1} % reached {threshold:.1} %"),
            _ => format!("{label}: cell voltage {value:.4} V reached {threshold:.4} V"),
        }),
        seconds_to_target: eta,
    })
}

fn rest_settled_check(rules: &AlertRules, input: &RuleInput) -> Option<Check<impl Fn() -> String>> {
    let t = rules.rest_settled_mv_per_min;
    if !t.enabled {
        return None;
    }
    let rate = input.dv_dt_mv_per_min.map(f64::abs);
    let (raise, clear) = match rate {
        Some(r) if input.resting => compare(&t, Side::AtOrBelow, r),
        _ => (false, true),
    };
    Some(Check {
        kind: AlertKind::RestSettled,
        past_raise: raise,
        past_clear: clear || !input.resting,
        hold_s: t.hold_s,
        trigger_value: rate.unwrap_or(f64::NAN),
        threshold: t.raise_at,
        unit: "mV/min",
        message: (move || {
            format!(
                "rest settled: |dV/dt| {:.3} mV/min; the open-circuit SOC is now trustworthy",
                rate.unwrap_or(0.0)
            )
        }),
        seconds_to_target: None,
    })
}

/// The model against the cell, once per settled rest (no input between
/// rests: the alert stands until a later rest agrees).
fn ocv_mismatch_check(rules: &AlertRules, input: &RuleInput) -> Option<Check<impl Fn() -> String>> {
    let t = rules.ocv_model_mismatch_cell_volts;
    let gap = input.ocv_model_gap_volts.filter(|_| t.enabled)?;
    let (past_raise, past_clear) = compare(&t, Side::AtOrAbove, gap.abs());
    Some(Check {
        kind: AlertKind::OcvModelMismatch,
        past_raise,
        past_clear,
        hold_s: t.hold_s,
        trigger_value: gap,
        threshold: t.raise_at,
        unit: "V",
        message: (move || {
            format!(
                "settled-rest OCV {:+.1} mV per cell from the SOC model at the counted SOC (bound ±{:.1} mV): the model does not describe this cell and its SOC readings are off; fit the cell's own (`gibbsline channels fit-ocv`), or check capacity and current sign",
                gap * 1e3,
                t.raise_at * 1e3
            )
        }),
        seconds_to_target: None,
    })
}

/// Limits: raised at once, cleared once back inside by a small margin.
fn voltage_limit_check(rules: &AlertRules, input: &RuleInput) -> Check<impl Fn() -> String> {
    let (min, max) = (rules.safe_min_cell_volts, rules.safe_max_cell_volts);
    let v = input.cell_volts_terminal;
    let v_margin = 0.01 * (max - min);
    Check {
        kind: AlertKind::VoltageLimit,
        past_raise: v < min || v > max,
        past_clear: v > min + v_margin && v < max - v_margin,
        hold_s: 0.0,
        trigger_value: v,
        threshold: if v < min { min } else { max },
        unit: "V",
        message: (move || {
            let (v, min, max) = (
                distinct(v, min, 3),
                distinct(min, v, 3),
                distinct(max, v, 3),
            );
            format!("cell voltage {v} V outside the safe window {min}–{max} V")
        }),
        seconds_to_target: None,
    }
}

fn current_limit_check(
    rules: &AlertRules,
    input: &RuleInput,
) -> Option<Check<impl Fn() -> String>> {
    let limit = rules.max_abs_amps;
    let i = input.amps.filter(|_| limit > 0.0)?;
    Some(Check {
        kind: AlertKind::CurrentLimit,
        past_raise: i.abs() > limit,
        past_clear: i.abs() < 0.99 * limit,
        hold_s: 0.0,
        trigger_value: i,
        threshold: limit,
        unit: "A",
        message: (move || format!("current {i:.3} A beyond the limit ±{limit:.3} A")),
        seconds_to_target: None,
    })
}

fn temperature_limit_check(
    rules: &AlertRules,
    input: &RuleInput,
) -> Option<Check<impl Fn() -> String>> {
    let temp = input.temp_c?;
    let (min, max) = (rules.min_temp_c, rules.max_temp_c);
    Some(Check {
        kind: AlertKind::TemperatureLimit,
        past_raise: temp < min || temp > max,
        past_clear: temp > min + 0.5 && temp < max - 0.5,
        hold_s: 0.0,
        trigger_value: temp,
        threshold: if temp < min { min } else { max },
        unit: "°C",
        message: (move || {
            let (t, lo, hi) = (
                distinct(temp, min, 1),
                distinct(min, temp, 1),
                distinct(max, temp, 1),
            );
            format!("temperature {t} °C outside {lo}–{hi} °C")
        }),
        seconds_to_target: None,
    })
}

/// `v` with at least `digits` decimals, and more (up to 6) until it reads
/// differently from `other`: 70.004 °C against a 70 °C limit must not be
/// shown as "70.0 outside −20.0–70.0".
fn distinct(v: f64, other: f64, digits: usize) -> String {
    let mut d = digits;
    while d < 6 && v != other && format!("{v:.d$}") == format!("{other:.d$}") {
        d += 1;
    }
    format!("{v:.d$}")
}

/// Applies a check, when the rule made one, keeping the change it makes.
fn apply_into<M: Fn() -> String>(
    changes: &mut Vec<AlertChange>,
    state: &mut ChannelRuleState,
    check: Option<Check<M>>,
    input: &RuleInput,
) {
    changes.extend(check.and_then(|c| apply(state, c, input)));
}

fn apply<M: Fn() -> String>(
    state: &mut ChannelRuleState,
    check: Check<M>,
    input: &RuleInput,
) -> Option<AlertChange> {
    let rule = state.rules.get_mut(check.kind);
    if rule.active {
        if check.past_clear && !check.past_raise {
            *rule = RuleState::default();
            return Some(AlertChange::Clear {
                kind: check.kind,
                time_ns: input.time_ns,
            });
        }
        return None;
    }
    if !check.past_raise {
        rule.pending_since_ns = None;
        return None;
    }
    let since = *rule.pending_since_ns.get_or_insert(input.time_ns);
    if (input.time_ns - since) as f64 / 1e9 < check.hold_s {
        return None;
    }
    *rule = RuleState {
        pending_since_ns: None,
        active: true,
    };
    Some(AlertChange::Raise(RaisedAlert {
        kind: check.kind,
        severity: check.kind.severity(),
        time_ns: input.time_ns,
        seq: input.seq,
        trigger_value: check.trigger_value,
        threshold: check.threshold,
        unit: check.unit,
        message: (check.message)(),
        seconds_to_target: check.seconds_to_target,
    }))
}

/// Is a channel silent? `usual_interval_s` is its typical spacing of readings.
pub fn is_silent(
    last_seen_ns: i64,
    now_ns: i64,
    usual_interval_s: f64,
    rules: &AlertRules,
) -> bool {
    let quiet_s = (now_ns - last_seen_ns) as f64 / 1e9;
    let limit_s = (usual_interval_s * rules.silent_interval_multiple).max(rules.silent_min_s);
    rules.silent_interval_multiple > 0.0 && quiet_s > limit_s
}

/// Marks a silent-rig alert raised; returns it unless one is already active.
pub fn raise_silent(
    state: &mut ChannelRuleState,
    last_seen_ns: i64,
    now_ns: i64,
    last_seq: u64,
) -> Option<RaisedAlert> {
    if state.is_active(AlertKind::SilentRig) {
        return None;
    }
    state.rules.insert(
        AlertKind::SilentRig,
        RuleState {
            pending_since_ns: None,
            active: true,
        },
    );
    let quiet_s = (now_ns - last_seen_ns) as f64 / 1e9;
    Some(RaisedAlert {
        kind: AlertKind::SilentRig,
        severity: AlertKind::SilentRig.severity(),
        time_ns: now_ns,
        seq: last_seq,
        trigger_value: quiet_s,
        threshold: 0.0,
        unit: "s",
        message: format!("no reading for {quiet_s:.0} s"),
        seconds_to_target: None,
    })
}

/// Raises the timeline alert: readings that the other rules never see
/// would otherwise go unnoticed (a garbled timestamp or seq must not take
/// a channel's alerts away in silence). Names the channel's front seq,
/// the last reading the rules did see.
pub fn raise_timeline(
    state: &mut ChannelRuleState,
    now_ns: i64,
    front_seq: u64,
    kept_out: u32,
    reason: &str,
) -> Option<AlertChange> {
    if state.is_active(AlertKind::Timeline) {
        return None;
    }
    state.rules.insert(
        AlertKind::Timeline,
        RuleState {
            pending_since_ns: None,
            active: true,
        },
    );
    Some(AlertChange::Raise(RaisedAlert {
        kind: AlertKind::Timeline,
        severity: AlertKind::Timeline.severity(),
        time_ns: now_ns,
        seq: front_seq,
        trigger_value: f64::from(kept_out),
        threshold: 0.0,
        unit: "readings",
        message: format!(
            "{kept_out} reading(s) kept out of the alert rules: {reason}; if the rig's clock or numbering is wrong, fix it or reset the channel's timeline"
        ),
        seconds_to_target: None,
    }))
}

/// Clears the timeline alert once readings reach the rules again.
pub fn clear_timeline(state: &mut ChannelRuleState, time_ns: i64) -> Option<AlertChange> {
    if !state.is_active(AlertKind::Timeline) {
        return None;
    }
    state
        .rules
        .insert(AlertKind::Timeline, RuleState::default());
    Some(AlertChange::Clear {
        kind: AlertKind::Timeline,
        time_ns,
    })
}

#[cfg(test)]
mod tests;

//! Per-channel estimator: turns a reading under current into the state a
//! practitioner would report.
//!
//! Owns ohmic compensation (E_ocv ≈ V − I·R, with R configured or estimated
//! online from current steps: the current-interrupt method), rest detection
//! and relaxation (dV/dt), coulomb and energy counting by the trapezoid
//! rule, the fused SOC (model SOC re-anchored at settled rests, counted in
//! between), Faradaic product accounting and cycle segmentation.
//!
//! Pure: time comes from the readings, never from a clock. Currents here
//! are always charge-positive; the caller normalises the instrument's sign.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

mod cycles;
pub mod ocv_fit;

pub use cycles::{Counters, CycleRecord, CycleTracker};

use crate::electrochem::constants::FARADAY_C_PER_MOL;
use crate::electrochem::{self, Chemistry, EvalRequest, Evaluation};
use serde::{Deserialize, Serialize};
use std::collections::VecDeque;

pub use crate::electrochem::hydrogen::{H2_MOLAR_MASS_G_PER_MOL, NORMAL_MOLAR_VOLUME_L_PER_MOL};

/// How an instrument signs its current.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CurrentSign {
    ChargePositive,
    DischargePositive,
}

impl CurrentSign {
    /// The instrument's amps as charge-positive amps.
    pub fn to_charge_positive(self, amps: f64) -> f64 {
        match self {
            CurrentSign::ChargePositive => amps,
            CurrentSign::DischargePositive => -amps,
        }
    }
}

/// What the estimator needs to know about its channel.
#[derive(Debug, Clone, PartialEq)]
pub struct EstimatorConfig {
    pub cells_in_series: u32,
    /// 0 = unknown: no counted SOC.
    pub capacity_ah: f64,
    /// Configured stack resistance; `None` = estimate online.
    pub resistance_ohm: Option<f64>,
    /// Fraction of charge current that ends up stored (0–1].
    pub coulombic_efficiency: f64,
    /// Fraction of charge current that makes product in an electrolyser (0–1].
    pub faradaic_efficiency: f64,
    pub default_temp_k: f64,
    pub equilibrium_tolerance_volts: f64,
    /// |I| below this is "no current", A.
    pub rest_current_amps: f64,
    /// Current must stay below the threshold this long to count as a rest.
    pub rest_min_s: f64,
    /// |dV/dt| per cell below this (mV/min) for `settle_hold_s` = settled.
    pub settle_mv_per_min: f64,
    pub settle_hold_s: f64,
    /// dV/dt is the least-squares slope over this window.
    pub settle_window_s: f64,
    /// Readings further apart than this are not integrated across.
    pub gap_limit_s: f64,
    /// A current change at least this large between readings at most
    /// `step_window_s` apart is used to estimate R.
    pub step_min_amps: f64,
    pub step_window_s: f64,
    /// Hydrogen–oxygen cells: the gases that fix the reversible voltage.
    pub water_gas: Option<electrochem::hydrogen::GasConditions>,
}

impl EstimatorConfig {
    /// Practitioner defaults for a channel (thresholds are common practice:
    /// a rest is |I| < C/200 or 1 mA, settled at 1 mV/min for a minute).
    pub fn for_channel(
        cells_in_series: u32,
        capacity_ah: f64,
        default_temp_k: f64,
    ) -> EstimatorConfig {
        let c_rate_amps = if capacity_ah > 0.0 { capacity_ah } else { 1.0 };
        EstimatorConfig {
            cells_in_series,
            capacity_ah,
            resistance_ohm: None,
            coulombic_efficiency: 1.0,
            faradaic_efficiency: 1.0,
            default_temp_k,
            equilibrium_tolerance_volts: electrochem::thermo::DEFAULT_EQUILIBRIUM_TOLERANCE_VOLTS,
            rest_current_amps: (c_rate_amps / 200.0).max(1e-3),
            rest_min_s: 10.0,
            settle_mv_per_min: 1.0,
            settle_hold_s: 60.0,
            settle_window_s: 60.0,
            gap_limit_s: 300.0,
            step_min_amps: (c_rate_amps / 10.0).max(0.01),
            step_window_s: 2.0,
            water_gas: None,
        }
    }
}

/// Online resistance estimate.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, Default)]
pub struct ResistanceEstimate {
    pub ohm: f64,
    /// Exponentially weighted standard deviation of the samples.
    pub uncertainty_ohm: f64,
    pub samples: u64,
    pub last_sample_ns: i64,
}

/// Everything carried from one reading to the next. Serialisable so the
/// server can restore it after a restart.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct EstimatorState {
    pub last_time_ns: Option<i64>,
    pub last_stack_volts: f64,
    pub last_amps: Option<f64>,
    pub resistance: Option<ResistanceEstimate>,
    pub rest_since_ns: Option<i64>,
    pub settled_since_ns: Option<i64>,
    /// (time, per-cell volts) during the current rest, for dV/dt.
    pub rest_window: VecDeque<(i64, f64)>,
    /// Charge into the cell since the run began (charge positive), Ah.
    pub charge_ah: f64,
    pub energy_wh: f64,
    pub charge_in_ah: f64,
    pub charge_out_ah: f64,
    pub energy_in_wh: f64,
    pub energy_out_wh: f64,
    /// Efficiency-weighted charge, Ah: what counted SOC integrates.
    pub stored_charge_ah: f64,
    pub anchor: Option<SocAnchor>,
    pub gaps: u64,
    pub cycles: CycleTracker,
    /// The OCV-model gap of the current settled rest and the rest it
    /// belongs to (its `rest_since_ns`): computed once per rest.
    #[serde(default)]
    pub ocv_gap: Option<(i64, f64)>,
}

impl Counters {
    pub fn of(state: &EstimatorState) -> Counters {
        Counters {
            charge_in_ah: state.charge_in_ah,
            charge_out_ah: state.charge_out_ah,
            energy_in_wh: state.energy_in_wh,
            energy_out_wh: state.energy_out_wh,
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct SocAnchor {
    pub soc: f64,
    pub stored_charge_ah: f64,
    pub time_ns: i64,
}

/// One reading as the estimator sees it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EstimatorInput {
    pub time_ns: i64,
    pub stack_volts: f64,
    /// Charge-positive amps.
    pub amps: Option<f64>,
    pub temp_k: Option<f64>,
}

/// What a cell is doing, from its current: the trade's words for a
/// battery, and for a hydrogen–oxygen cell (current in splits water).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum OperatingMode {
    Charge,
    Discharge,
    Rest,
    Electrolysis,
    FuelCell,
    OpenCircuit,
}

impl OperatingMode {
    /// `None` when the reading carries no current.
    pub fn of(
        charging: bool,
        discharging: bool,
        has_current: bool,
        water_cell: bool,
    ) -> Option<OperatingMode> {
        if !has_current {
            return None;
        }
        Some(match (charging, discharging, water_cell) {
            (true, _, false) => OperatingMode::Charge,
            (_, true, false) => OperatingMode::Discharge,
            (false, false, false) => OperatingMode::Rest,
            (true, _, true) => OperatingMode::Electrolysis,
            (_, true, true) => OperatingMode::FuelCell,
            (false, false, true) => OperatingMode::OpenCircuit,
        })
    }

    pub fn as_str(self) -> &'static str {
        match self {
            OperatingMode::Charge => "charge",
            OperatingMode::Discharge => "discharge",
            OperatingMode::Rest => "rest",
            OperatingMode::Electrolysis => "electrolysis",
            OperatingMode::FuelCell => "fuel_cell",
            OperatingMode::OpenCircuit => "open_circuit",
        }
    }
}

/// Which open-circuit (equilibrium) voltage a reading's thermodynamics
/// used. Under current the terminal voltage also carries overpotential, so
/// composition terms (ΔG, ln Q, SOC from the model) come only from an
/// open-circuit estimate; without one they are absent, not invented.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum OcvSource {
    /// The reading carries no current: its voltage is taken as open circuit.
    Terminal,
    /// No current flows (below the deadband): the terminal voltage at rest.
    Rest,
    /// V − I·R with a configured or measured resistance.
    OhmicCompensated,
    /// The SOC model's OCV at the counted SOC (anchored count).
    CountedSoc,
    /// Hydrogen–oxygen cells: the reversible voltage from the temperature
    /// and gas conditions.
    Reversible,
    /// Under current with no estimate: thermodynamics absent.
    None,
}

impl OcvSource {
    pub fn as_str(self) -> &'static str {
        match self {
            OcvSource::Terminal => "terminal",
            OcvSource::Rest => "rest",
            OcvSource::OhmicCompensated => "ohmic_compensated",
            OcvSource::CountedSoc => "counted_soc",
            OcvSource::Reversible => "reversible",
            OcvSource::None => "none",
        }
    }
    /// Whether this source gives an equilibrium voltage at all.
    pub fn known(self) -> bool {
        self != OcvSource::None
    }
}

/// How the fused SOC was obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SocMethod {
    /// No SOC model, or no open-circuit voltage to read it from (under
    /// load with neither a capacity to count nor a resistance).
    None,
    /// Counting, but no trustworthy anchor yet (no settled rest, no known
    /// resistance, no operator entry): SOC is unknown, not guessed.
    Unanchored,
    /// The model SOC of this reading (no capacity or no current known).
    Model,
    /// Model SOC at a settled rest (or the first reading), anchoring the count.
    Anchored,
    /// Anchor plus counted charge.
    Counted,
}

impl SocMethod {
    pub fn as_str(self) -> &'static str {
        match self {
            SocMethod::None => "none",
            SocMethod::Unanchored => "unanchored",
            SocMethod::Model => "model",
            SocMethod::Anchored => "anchored",
            SocMethod::Counted => "counted",
        }
    }
}

/// The estimator's output for one reading.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    /// The chemistry evaluated at `cell_volts_used`. With no open-circuit
    /// estimate (`ocv_source` None) it holds the terminal voltage's
    /// numbers, which must not be shown as the cell's state.
    pub evaluation: Evaluation,
    pub temp_k: f64,
    /// Per-cell equilibrium voltage the thermodynamics used.
    pub cell_volts_used: f64,
    pub ocv_source: OcvSource,
    /// Driving force η = V_terminal − E_eq per cell, V: what pushes current
    /// through the cell. Absent without an equilibrium estimate other than
    /// the terminal voltage itself.
    pub driving_force_volts: Option<f64>,
    /// SOC the model reads off an open-circuit voltage (never off a
    /// voltage under load).
    pub soc_model: Option<f64>,
    pub resistance_ohm: Option<f64>,
    pub soc_counted: Option<f64>,
    /// The count before clamping to [0, 1]: past 1 the capacity, the
    /// efficiency or the anchor is off, and the operator should see it.
    pub soc_counted_unclamped: Option<f64>,
    pub soc_fused: Option<f64>,
    pub soc_method: SocMethod,
    pub resting: bool,
    pub rest_settled: bool,
    /// Per-cell relaxation rate during a rest, mV/min.
    pub dv_dt_mv_per_min: Option<f64>,
    /// During a settled rest: its OCV minus the model's OCV at the SOC
    /// counted from the previous anchor, V per cell. Large, it says the
    /// model does not describe this cell (see [`ocv_model_gap`]).
    pub ocv_model_gap_volts: Option<f64>,
    /// dSOC/dt from the current (per second), when capacity is known.
    pub soc_rate_per_s: Option<f64>,
    pub charge_ah: f64,
    pub energy_wh: f64,
    /// True when this reading followed a gap and was not integrated.
    pub gap: bool,
    pub cycle_closed: Option<CycleRecord>,
}

impl Estimate {
    /// ΔG of the cell reaction at this reading, when an open-circuit
    /// estimate gives one.
    pub fn delta_g_kj_per_mol(&self) -> Option<f64> {
        self.ocv_source
            .known()
            .then_some(self.evaluation.thermo.delta_g_kj_per_mol)
    }
}

#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EstimatorError {
    #[error(transparent)]
    Chemistry(#[from] electrochem::ChemistryError),
}

const NS_PER_S: f64 = 1e9;
/// Samples kept for dV/dt; decimated beyond this so memory stays bounded
/// however fast a rig samples.
const REST_WINDOW_MAX_POINTS: usize = 256;
/// Weight of a new resistance sample in the running estimate.
const RESISTANCE_EWMA_ALPHA: f64 = 0.2;

/// Advances `state` by one reading.
pub fn step(
    chemistry: &Chemistry,
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    input: EstimatorInput,
) -> Result<Estimate, EstimatorError> {
    let temp_k = input.temp_k.unwrap_or(config.default_temp_k);
    let gap = advance_counts(config, state, input);
    let terminal = Terminal::of(config, state, input);
    let rest = track_rest(
        config,
        state,
        input.time_ns,
        terminal.cell_volts,
        input.amps,
    );
    let (at_model, soc_model) = model_soc(chemistry, config, &terminal, input, temp_k)?;
    let ocv_model_gap_volts = ocv_model_gap(chemistry, config, state, &rest, &terminal, temp_k);
    let anchor_by_resistance =
        terminal.compensated_stack_volts.is_some() && config.resistance_ohm.is_some();
    let fused = fuse_soc(
        config,
        state,
        soc_model,
        input,
        rest.settled,
        anchor_by_resistance,
    );
    let eq = equilibrium(
        chemistry, config, &terminal, input, &fused, at_model, temp_k,
    );
    let cycle_closed = observe_cycle(config, state, input, terminal.cell_volts, &eq, fused.fused);
    remember(state, input);
    Ok(Estimate {
        temp_k,
        cell_volts_used: eq.ocv_cell_volts,
        ocv_source: eq.ocv_source,
        driving_force_volts: eq.driving_force_volts,
        soc_model,
        resistance_ohm: terminal.resistance_ohm,
        soc_counted: fused.counted,
        soc_counted_unclamped: fused.counted_unclamped,
        soc_fused: fused.fused,
        soc_method: fused.method,
        resting: rest.resting,
        rest_settled: rest.settled,
        dv_dt_mv_per_min: rest.dv_dt_mv_per_min,
        ocv_model_gap_volts,
        soc_rate_per_s: soc_rate_per_s(config, input.amps),
        charge_ah: state.charge_ah,
        energy_wh: state.energy_wh,
        gap,
        cycle_closed,
        evaluation: eq.evaluation,
    })
}

/// SOC this close to 0 or 1 is not judged: the model's OCV runs steep at
/// the ends, and a small count error would read as a large gap.
const GAP_SOC_MARGIN: f64 = 0.03;

/// At the first settled reading of a rest, its OCV minus the model's OCV
/// at the SOC counted from the anchor before it (a previous rest or an
/// operator's entry), V per cell; kept for the rest's duration. Where the
/// model describes the cell, counted charge and voltage agree to within
/// the count's drift; a model tens of mV off the cell disagrees with
/// itself from rest to rest. Computed before this rest re-anchors.
fn ocv_model_gap(
    chemistry: &Chemistry,
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    rest: &RestState,
    terminal: &Terminal,
    temp_k: f64,
) -> Option<f64> {
    let (Some(rest_id), true) = (state.rest_since_ns, rest.settled) else {
        state.ocv_gap = None;
        return None;
    };
    if let Some((id, gap)) = state.ocv_gap
        && id == rest_id
    {
        return Some(gap);
    }
    let anchor = state.anchor.filter(|_| config.capacity_ah > 0.0)?;
    let soc = anchor.soc + (state.stored_charge_ah - anchor.stored_charge_ah) / config.capacity_ah;
    if !(GAP_SOC_MARGIN..=1.0 - GAP_SOC_MARGIN).contains(&soc) {
        return None;
    }
    let ctx = electrochem::soc::NernstContext {
        n_electrons: chemistry.n_electrons,
        e_standard_volts: chemistry.standard_potential().at(temp_k),
        temp_k,
    };
    let model_volts = chemistry.soc_model.ocv_volts(soc, ctx)?;
    let gap = terminal.cell_volts - model_volts;
    state.ocv_gap = Some((rest_id, gap));
    Some(gap)
}

/// The open-circuit estimate, the thermodynamics there and the driving force.
struct AtEquilibrium {
    ocv_source: OcvSource,
    ocv_cell_volts: f64,
    driving_force_volts: Option<f64>,
    evaluation: electrochem::Evaluation,
}

fn equilibrium(
    chemistry: &Chemistry,
    config: &EstimatorConfig,
    terminal: &Terminal,
    input: EstimatorInput,
    fused: &FusedSoc,
    at_model: electrochem::Evaluation,
    temp_k: f64,
) -> AtEquilibrium {
    let counted_ocv = counted_ocv_cell_volts(chemistry, fused, &at_model, temp_k);
    let (ocv_source, ocv_cell_volts) = open_circuit(OpenCircuitClues {
        config,
        temp_k,
        cell_terminal: terminal.cell_volts,
        has_current: input.amps.is_some(),
        flowing: terminal.flowing,
        counted_ocv,
        compensated_cell_volts: terminal.compensated_stack_volts.map(|v| v / terminal.cells),
    });
    let evaluation = at_open_circuit(chemistry, config, at_model, ocv_cell_volts, temp_k);
    let driving_force_volts = driving_force(
        ocv_source,
        terminal.flowing,
        terminal.cell_volts,
        ocv_cell_volts,
        counted_ocv,
    );
    AtEquilibrium {
        ocv_source,
        ocv_cell_volts,
        driving_force_volts,
        evaluation,
    }
}

/// Resistance and charge since the last reading; whether the interval
/// was a gap (too long to count across).
fn advance_counts(
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    input: EstimatorInput,
) -> bool {
    let dt_s = state
        .last_time_ns
        .map(|last| (input.time_ns - last) as f64 / NS_PER_S);
    let gap = matches!(dt_s, Some(dt) if dt > config.gap_limit_s);
    if gap {
        state.gaps += 1;
    }
    let (Some(dt_s), Some(amps), Some(last_amps)) = (dt_s, input.amps, state.last_amps) else {
        return gap;
    };
    let step = Interval {
        dt_s,
        amps,
        last_amps,
    };
    sample_resistance(config, state, input, step);
    if dt_s > 0.0 && !gap {
        integrate(config, state, input, step);
    }
    gap
}

/// Since the last reading, when both it and this one carry a current.
#[derive(Clone, Copy)]
struct Interval {
    dt_s: f64,
    amps: f64,
    last_amps: f64,
}

/// The model's OCV at the counted SOC, when the count is what SOC rests on.
fn counted_ocv_cell_volts(
    chemistry: &Chemistry,
    fused: &FusedSoc,
    at_model: &electrochem::Evaluation,
    temp_k: f64,
) -> Option<f64> {
    fused
        .counted
        .filter(|_| fused.method == SocMethod::Counted)
        .and_then(|soc| {
            model_ocv_cell_volts(chemistry, soc, at_model.thermo.e_standard_volts, temp_k)
        })
}

/// What the terminals say about one reading.
struct Terminal {
    cells: f64,
    cell_volts: f64,
    resistance_ohm: Option<f64>,
    /// V − I·R of the stack, when a resistance is known and current flows.
    compensated_stack_volts: Option<f64>,
    /// Current above the rest threshold.
    flowing: bool,
    stack_volts: f64,
}

impl Terminal {
    fn of(config: &EstimatorConfig, state: &EstimatorState, input: EstimatorInput) -> Terminal {
        let cells = f64::from(config.cells_in_series.max(1));
        let resistance_ohm = config.resistance_ohm.or(state.resistance.map(|r| r.ohm));
        let compensated_stack_volts = match (resistance_ohm, input.amps) {
            (Some(r), Some(i)) if i != 0.0 => Some(input.stack_volts - i * r),
            _ => None,
        };
        Terminal {
            cells,
            cell_volts: input.stack_volts / cells,
            resistance_ohm,
            compensated_stack_volts,
            flowing: input
                .amps
                .is_some_and(|i| i.abs() >= config.rest_current_amps),
            stack_volts: input.stack_volts,
        }
    }
}

/// The model's evaluation, and its SOC when the voltage it read was an
/// open-circuit one: the terminal voltage with no current, V − I·R under
/// current, never the terminal voltage under load.
fn model_soc(
    chemistry: &Chemistry,
    config: &EstimatorConfig,
    terminal: &Terminal,
    input: EstimatorInput,
    temp_k: f64,
) -> Result<(electrochem::Evaluation, Option<f64>), EstimatorError> {
    let model_stack_volts = if terminal.flowing {
        terminal.compensated_stack_volts
    } else {
        Some(terminal.stack_volts)
    };
    let request = EvalRequest {
        stack_volts: model_stack_volts.unwrap_or(input.stack_volts),
        cells_in_series: config.cells_in_series.max(1),
        temp_k,
        equilibrium_tolerance_volts: config.equilibrium_tolerance_volts,
    };
    let at_model = electrochem::evaluate(chemistry, request)?;
    let soc = model_stack_volts.and(at_model.soc);
    Ok((at_model, soc))
}

/// The thermodynamics at the open-circuit estimate (recomputed only when
/// it differs from the voltage the model read).
fn at_open_circuit(
    chemistry: &Chemistry,
    config: &EstimatorConfig,
    mut evaluation: electrochem::Evaluation,
    ocv_cell_volts: f64,
    temp_k: f64,
) -> electrochem::Evaluation {
    if ocv_cell_volts != evaluation.thermo.cell_volts {
        evaluation.thermo = electrochem::thermo::thermo_state(
            chemistry.n_electrons,
            chemistry.standard_potential(),
            ocv_cell_volts,
            temp_k,
            config.equilibrium_tolerance_volts,
        );
    }
    evaluation
}

/// Feeds the cycle tracker; a cycle it closed, if any.
fn observe_cycle(
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    input: EstimatorInput,
    cell_volts: f64,
    eq: &AtEquilibrium,
    soc: Option<f64>,
) -> Option<CycleRecord> {
    let delta_g_kj_per_mol = eq
        .ocv_source
        .known()
        .then_some(eq.evaluation.thermo.delta_g_kj_per_mol);
    state.cycles.observe(cycles::Observation {
        time_ns: input.time_ns,
        direction: direction_of(config, input.amps),
        cell_volts,
        delta_g_kj_per_mol,
        soc,
        charge_in_ah: state.charge_in_ah,
        charge_out_ah: state.charge_out_ah,
        energy_in_wh: state.energy_in_wh,
        energy_out_wh: state.energy_out_wh,
    })
}

/// What the next reading's interval is measured from.
fn remember(state: &mut EstimatorState, input: EstimatorInput) {
    state.last_time_ns = Some(input.time_ns);
    state.last_stack_volts = input.stack_volts;
    state.last_amps = input.amps;
}

/// Resistance from a current step: ΔV/ΔI across a short interval (the
/// current-interrupt method).
fn sample_resistance(
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    input: EstimatorInput,
    step: Interval,
) {
    let (dt_s, di) = (step.dt_s, step.amps - step.last_amps);
    if !(dt_s > 0.0 && dt_s <= config.step_window_s && di.abs() >= config.step_min_amps) {
        return;
    }
    let sample = (input.stack_volts - state.last_stack_volts) / di;
    if !(sample.is_finite() && sample > 0.0) {
        return;
    }
    let r = state.resistance.get_or_insert(ResistanceEstimate {
        ohm: sample,
        uncertainty_ohm: 0.0,
        samples: 0,
        last_sample_ns: input.time_ns,
    });
    if r.samples > 0 {
        let diff = sample - r.ohm;
        r.ohm += RESISTANCE_EWMA_ALPHA * diff;
        let var = (1.0 - RESISTANCE_EWMA_ALPHA)
            * (r.uncertainty_ohm.powi(2) + RESISTANCE_EWMA_ALPHA * diff * diff);
        r.uncertainty_ohm = var.sqrt();
    }
    r.samples += 1;
    r.last_sample_ns = input.time_ns;
}

/// Coulomb and energy counting by the trapezoid rule.
fn integrate(
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    input: EstimatorInput,
    step: Interval,
) {
    let (dt_s, i_now, i_prev) = (step.dt_s, step.amps, step.last_amps);
    let dq_ah = 0.5 * (i_now + i_prev) * dt_s / 3600.0;
    let de_wh = 0.5 * (input.stack_volts * i_now + state.last_stack_volts * i_prev) * dt_s / 3600.0;
    state.charge_ah += dq_ah;
    state.energy_wh += de_wh;
    let stored_delta_ah = if dq_ah >= 0.0 {
        state.charge_in_ah += dq_ah;
        dq_ah * config.coulombic_efficiency
    } else {
        state.charge_out_ah -= dq_ah;
        dq_ah
    };
    if de_wh >= 0.0 {
        state.energy_in_wh += de_wh;
    } else {
        state.energy_out_wh -= de_wh;
    }
    state.stored_charge_ah += stored_delta_ah;
}

/// Where a reading stands in a rest.
struct RestState {
    resting: bool,
    settled: bool,
    dv_dt_mv_per_min: Option<f64>,
}

/// Rest detection and relaxation: a rest is no current for `rest_min_s`,
/// settled once |dV/dt| stays under the threshold for `settle_hold_s`.
fn track_rest(
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    time_ns: i64,
    cell_terminal: f64,
    amps: Option<f64>,
) -> RestState {
    let no_current = amps.is_some_and(|i| i.abs() < config.rest_current_amps);
    if no_current {
        state.rest_since_ns.get_or_insert(time_ns);
        state.rest_window.push_back((time_ns, cell_terminal));
        let window_ns = (config.settle_window_s * NS_PER_S) as i64;
        while state
            .rest_window
            .front()
            .is_some_and(|(t, _)| time_ns - t > window_ns)
        {
            state.rest_window.pop_front();
        }
        if state.rest_window.len() > REST_WINDOW_MAX_POINTS {
            // Keep every other point: the slope survives, memory stays bounded.
            state.rest_window = state.rest_window.iter().copied().step_by(2).collect();
        }
    } else {
        state.rest_since_ns = None;
        state.settled_since_ns = None;
        state.rest_window.clear();
    }
    let held = |since: Option<i64>, hold_s: f64| {
        since.is_some_and(|since| (time_ns - since) as f64 / NS_PER_S >= hold_s)
    };
    let resting = held(state.rest_since_ns, config.rest_min_s);
    let dv_dt_mv_per_min = if resting {
        slope_mv_per_min(&state.rest_window, config.settle_window_s)
    } else {
        None
    };
    if dv_dt_mv_per_min.is_some_and(|s| s.abs() < config.settle_mv_per_min) {
        state.settled_since_ns.get_or_insert(time_ns);
    } else {
        state.settled_since_ns = None;
    }
    RestState {
        resting,
        settled: held(state.settled_since_ns, config.settle_hold_s),
        dv_dt_mv_per_min,
    }
}

fn model_ocv_cell_volts(
    chemistry: &Chemistry,
    soc: f64,
    e_standard_volts: f64,
    temp_k: f64,
) -> Option<f64> {
    let ctx = electrochem::NernstContext {
        n_electrons: chemistry.n_electrons,
        e_standard_volts,
        temp_k,
    };
    chemistry.soc_model.ocv_volts(soc, ctx)
}

/// What is known about a reading's open-circuit voltage.
struct OpenCircuitClues<'a> {
    config: &'a EstimatorConfig,
    temp_k: f64,
    cell_terminal: f64,
    has_current: bool,
    flowing: bool,
    /// The model's OCV at the anchored, counted SOC.
    counted_ocv: Option<f64>,
    compensated_cell_volts: Option<f64>,
}

/// The equilibrium voltage a reading's thermodynamics use, and its source.
/// A hydrogen–oxygen cell's comes from its temperature and gases (its open
/// circuit voltage sits below it: crossover); a battery's, under current,
/// from the counted SOC (which carries the polarisation V − I·R leaves
/// in: common practice), else V − I·R; with neither it is unknown.
fn open_circuit(c: OpenCircuitClues) -> (OcvSource, f64) {
    if let Some(gas) = &c.config.water_gas {
        return (
            OcvSource::Reversible,
            electrochem::hydrogen::reversible_cell_volts(c.temp_k, gas),
        );
    }
    if !c.has_current {
        return (OcvSource::Terminal, c.cell_terminal);
    }
    if !c.flowing {
        return (OcvSource::Rest, c.cell_terminal);
    }
    if let Some(ocv) = c.counted_ocv {
        return (OcvSource::CountedSoc, ocv);
    }
    match c.compensated_cell_volts {
        Some(v) => (OcvSource::OhmicCompensated, v),
        None => (OcvSource::None, c.cell_terminal),
    }
}

/// η = V − E_eq per cell. At rest the terminal voltage is its own
/// estimate, so η is known only against the counted SOC's OCV (the
/// relaxation still to come).
fn driving_force(
    source: OcvSource,
    flowing: bool,
    cell_terminal: f64,
    ocv_cell_volts: f64,
    counted_ocv: Option<f64>,
) -> Option<f64> {
    match source {
        OcvSource::None => None,
        OcvSource::Terminal | OcvSource::Rest if !flowing => {
            counted_ocv.map(|ocv| cell_terminal - ocv)
        }
        _ => Some(cell_terminal - ocv_cell_volts),
    }
}

fn direction_of(config: &EstimatorConfig, amps: Option<f64>) -> cycles::Direction {
    match amps {
        Some(i) if i >= config.rest_current_amps => cycles::Direction::Charge,
        Some(i) if i <= -config.rest_current_amps => cycles::Direction::Discharge,
        _ => cycles::Direction::Rest,
    }
}

/// dSOC/dt from the current, per second, when the capacity is known.
fn soc_rate_per_s(config: &EstimatorConfig, amps: Option<f64>) -> Option<f64> {
    let i = amps.filter(|_| config.capacity_ah > 0.0)?;
    let efficiency = if i > 0.0 {
        config.coulombic_efficiency
    } else {
        1.0
    };
    Some(i * efficiency / (3600.0 * config.capacity_ah))
}

/// The SOC of one reading, with how it was found.
struct FusedSoc {
    counted: Option<f64>,
    counted_unclamped: Option<f64>,
    fused: Option<f64>,
    method: SocMethod,
}

impl FusedSoc {
    fn without_count(fused: Option<f64>, method: SocMethod) -> FusedSoc {
        FusedSoc {
            counted: None,
            counted_unclamped: None,
            fused,
            method,
        }
    }
}

/// Counted SOC between anchors. The model SOC of a reading anchors the
/// count only where it reads an open-circuit voltage: at a settled rest,
/// or from V − I·R with a resistance the operator configured (an online
/// estimate is not trusted for this). Under load without either, the
/// terminal voltage carries polarisation that would be read as charge
/// (17–34 SOC points in the demo), so SOC stays unknown until a rest or
/// an operator's entry ([`anchor_at`]).
fn fuse_soc(
    config: &EstimatorConfig,
    state: &mut EstimatorState,
    model_soc: Option<f64>,
    input: EstimatorInput,
    rest_settled: bool,
    anchor_by_resistance: bool,
) -> FusedSoc {
    let counting = config.capacity_ah > 0.0 && input.amps.is_some();
    if !counting {
        let method = if model_soc.is_some() {
            SocMethod::Model
        } else {
            SocMethod::None
        };
        return FusedSoc::without_count(model_soc, method);
    }
    if let Some(model) = model_soc {
        let open_circuit_known = rest_settled || (state.anchor.is_none() && anchor_by_resistance);
        if open_circuit_known {
            state.anchor = Some(SocAnchor {
                soc: model,
                stored_charge_ah: state.stored_charge_ah,
                time_ns: input.time_ns,
            });
        }
    }
    let Some(anchor) = state.anchor else {
        return FusedSoc::without_count(None, SocMethod::Unanchored);
    };
    let unclamped =
        anchor.soc + (state.stored_charge_ah - anchor.stored_charge_ah) / config.capacity_ah;
    let counted = unclamped.clamp(0.0, 1.0);
    FusedSoc {
        counted: Some(counted),
        counted_unclamped: Some(unclamped),
        fused: Some(counted),
        method: if anchor.time_ns == input.time_ns {
            SocMethod::Anchored
        } else {
            SocMethod::Counted
        },
    }
}

/// Anchors the count at an SOC the operator entered (from a titration, a
/// full charge to the manufacturer's end condition, a reference cell).
pub fn anchor_at(state: &mut EstimatorState, soc: f64, time_ns: i64) {
    state.anchor = Some(SocAnchor {
        soc,
        stored_charge_ah: state.stored_charge_ah,
        time_ns,
    });
}

/// Least-squares slope of the rest window, mV/min, once it spans at least
/// half the window (a shorter span is too noisy to call a rest settled).
fn slope_mv_per_min(window: &VecDeque<(i64, f64)>, window_s: f64) -> Option<f64> {
    let (first, last) = (window.front()?, window.back()?);
    let span_s = (last.0 - first.0) as f64 / NS_PER_S;
    if window.len() < 3 || span_s < 0.5 * window_s {
        return None;
    }
    let n = window.len() as f64;
    let t0 = first.0;
    let (mut st, mut sv, mut stt, mut stv) = (0.0, 0.0, 0.0, 0.0);
    for &(t, v) in window {
        let x = (t - t0) as f64 / NS_PER_S;
        st += x;
        sv += v;
        stt += x * x;
        stv += x * v;
    }
    let denom = n * stt - st * st;
    if denom <= 0.0 {
        return None;
    }
    let volts_per_s = (n * stv - st * sv) / denom;
    Some(volts_per_s * 1e3 * 60.0)
}

/// Products and efficiencies of a water electrolyser / hydrogen fuel cell.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HydrogenAccount {
    /// Positive: produced (electrolysis); negative: consumed (fuel cell).
    pub hydrogen_mol: f64,
    pub hydrogen_g: f64,
    pub hydrogen_normal_litres: f64,
    pub oxygen_mol: f64,
    pub specific_energy_kwh_per_kg: Option<f64>,
}

/// Extent of the cell reaction as written (discharge direction), mol:
/// Faraday's law ξ = Q/(nF), charge out positive.
pub fn reaction_extent_mol(state: &EstimatorState, n_electrons: u32) -> f64 {
    -state.charge_ah * 3600.0 / (f64::from(n_electrons) * FARADAY_C_PER_MOL)
}

/// Faraday's law for H2 + ½O2 ⇌ H2O with z = 2 per H2: per cell of the
/// stack, charge in makes hydrogen at the Faradaic efficiency, charge out
/// consumes it at 100 %.
pub fn hydrogen_account(state: &EstimatorState, config: &EstimatorConfig) -> HydrogenAccount {
    let cells = f64::from(config.cells_in_series.max(1));
    let per_cell_mol = |ah: f64| ah * 3600.0 / (2.0 * FARADAY_C_PER_MOL);
    let hydrogen_mol = cells
        * (config.faradaic_efficiency * per_cell_mol(state.charge_in_ah)
            - per_cell_mol(state.charge_out_ah));
    let hydrogen_g = hydrogen_mol * H2_MOLAR_MASS_G_PER_MOL;
    let specific_energy_kwh_per_kg =
        (hydrogen_g > 0.0).then(|| (state.energy_in_wh / 1e3) / (hydrogen_g / 1e3));
    HydrogenAccount {
        hydrogen_mol,
        hydrogen_g,
        hydrogen_normal_litres: hydrogen_mol * NORMAL_MOLAR_VOLUME_L_PER_MOL,
        oxygen_mol: hydrogen_mol / 2.0,
        specific_energy_kwh_per_kg,
    }
}

/// Voltage efficiency of a driven cell: reversible (or thermoneutral)
/// voltage over the per-cell terminal voltage.
pub fn driven_voltage_efficiency(reference_volts: f64, cell_terminal_volts: f64) -> Option<f64> {
    (cell_terminal_volts > 0.0 && reference_volts > 0.0)
        .then(|| reference_volts / cell_terminal_volts)
}

#[cfg(test)]
mod tests;

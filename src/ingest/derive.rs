//! The pure part of ingest: one batch's readings checked against the
//! channel's front and limits, run through the estimator and the alert
//! rules, and turned into rows to store. No I/O, no async, no clock: the
//! server's time comes in as an argument (`tests/purity.rs` checks).

use super::writer;
use super::{
    ChannelRuntime, IngestError, MAX_BATCH_READINGS, MIN_TIME_NS, RawReading, Rejection, invalid,
};
use crate::alerts::{self, AlertChange};
use crate::channel::{MAX_READING_ABS_AMPS, MAX_READING_TEMP_C, MIN_READING_TEMP_C, shown};
use crate::estimator::{self, EstimatorError, EstimatorInput};
use crate::store::{ReadingRow, flags};

/// What one batch adds to the store, all of it written in one transaction.
pub struct DerivedBatch {
    /// The channel's row key in the store.
    pub channel_key: i64,
    /// The run its readings belong to.
    pub run_id: i64,
    /// Cells in series of that run.
    pub cells_in_series: u32,
    /// Fresh readings (past the front): inserted.
    pub rows: Vec<ReadingRow>,
    /// Late readings and resends: inserted unless already stored.
    pub maybe_dup: Vec<ReadingRow>,
    /// Alerts raised and cleared by these readings.
    pub changes: Vec<AlertChange>,
    /// Cycles that closed (or changed) with these readings.
    pub cycles: Vec<estimator::CycleRecord>,
    /// The estimator after the batch, when the front moved.
    pub estimator: Option<writer::EstimatorSnapshot>,
}

fn check_reading(rt: &ChannelRuntime, r: &RawReading) -> Result<(), (&'static str, String)> {
    if !r.volts.is_finite() {
        return Err((
            "volts",
            format!("volts = {}: must be a finite number", r.volts),
        ));
    }
    let cell = r.volts / f64::from(rt.def.cells_in_series);
    if cell < rt.def.plausible_min_cell_volts || cell > rt.def.plausible_max_cell_volts {
        return Err((
            "volts",
            format!(
                "volts = {}: {} V per cell is outside the channel's plausibility window {}–{} V",
                shown(r.volts),
                shown((cell * 1e4).round() / 1e4),
                rt.def.plausible_min_cell_volts,
                rt.def.plausible_max_cell_volts
            ),
        ));
    }
    if let Some(a) = r.amps {
        if !a.is_finite() {
            return Err(("amps", format!("amps = {a}: must be a finite number")));
        }
        if a.abs() > MAX_READING_ABS_AMPS {
            return Err((
                "amps",
                format!(
                    "amps = {}: beyond ±1e6 A, not a cell current (a broken shunt or a garbled value)",
                    shown(a)
                ),
            ));
        }
    }
    if let Some(t) = r.temp_c
        && !(t.is_finite() && (MIN_READING_TEMP_C..=MAX_READING_TEMP_C).contains(&t))
    {
        return Err((
            "temp_c",
            format!("temp_c = {}: must be from -100 to 200 °C", shown(t)),
        ));
    }
    check_time(rt, r.time_unix_ns)?;
    if r.seq > i64::MAX as u64 {
        return Err(("seq", format!("seq = {}: must be below 2^63", r.seq)));
    }
    Ok(())
}

/// A reading's stamp: not before 2000 (an unset rig clock), not where the
/// channel's raw history was removed (its bucket could not be recomputed).
/// How far ahead of the server's clock a stamp may be is `check_timeline`'s.
fn check_time(rt: &ChannelRuntime, time_unix_ns: i64) -> Result<(), (&'static str, String)> {
    if time_unix_ns < MIN_TIME_NS {
        return Err((
            "time_unix_ns",
            format!("time_unix_ns = {time_unix_ns}: before 2000-01-01; is the rig's clock set?"),
        ));
    }
    if rt.retention.refuses(time_unix_ns) {
        return Err((
            "time_unix_ns",
            format!(
                "time_unix_ns = {time_unix_ns}: before {} ns, where the channel's raw history was removed by retention",
                rt.retention.raw_before_ns
            ),
        ));
    }
    Ok(())
}

/// The operating mode from the (charge-positive) current, with the
/// channel's rest threshold as the deadband.
fn mode_flags(amps: Option<f64>, deadband_amps: f64) -> i64 {
    match amps {
        Some(i) if i >= deadband_amps => flags::CHARGING,
        Some(i) if i <= -deadband_amps => flags::DISCHARGING,
        _ => 0,
    }
}

/// The checks against the channel's front and the server's clock: a
/// reading failing them is quarantined (refused and counted) rather than
/// allowed to move the front where real readings cannot follow.
fn check_timeline(
    rt: &ChannelRuntime,
    r: &RawReading,
    wall_now_ns: i64,
) -> Result<(), (&'static str, String)> {
    if r.time_unix_ns > wall_now_ns.saturating_add(rt.limits.max_future_ns) {
        return Err((
            "time_unix_ns",
            format!(
                "time_unix_ns = {}: {} s ahead of the server's clock (limit {} s); quarantined, not stored: is the rig's clock set?",
                r.time_unix_ns,
                (r.time_unix_ns - wall_now_ns) / 1_000_000_000,
                rt.limits.max_future_ns / 1_000_000_000
            ),
        ));
    }
    if let Some(front) = rt.max_seq
        && r.seq > front
        && r.seq - front > rt.limits.max_seq_jump
    {
        return Err((
            "seq",
            format!(
                "seq = {}: jumps {} past the channel's last seq {front} (limit {}); quarantined, not stored: if the rig renumbered, reset the channel's timeline (`gibbsline channels reset-timeline`)",
                r.seq,
                r.seq - front,
                rt.limits.max_seq_jump
            ),
        ));
    }
    Ok(())
}

/// Readings of one batch that the alert rules did not see, and why.
#[derive(Debug, Default)]
struct TimelineTally {
    quarantined: u32,
    /// New seq but a time not after the front's: the rig's clock went back.
    clock_back: u32,
    /// A later time but a seq at or below the front's.
    seq_behind: u32,
}

/// The timeline alert's raise or clear for one batch.
fn timeline_change(
    rt: &mut ChannelRuntime,
    tally: &TimelineTally,
    advanced: bool,
    wall_now_ns: i64,
) -> Option<AlertChange> {
    let kept_out = tally.quarantined + tally.clock_back + tally.seq_behind;
    match rt.max_seq {
        Some(front) if kept_out > 0 => {
            let reason = if tally.quarantined > 0 {
                "quarantined for a time far ahead of the server's clock or a seq jump"
            } else if tally.clock_back > 0 {
                "new seqs with times before the channel's last reading (a clock that went back)"
            } else {
                "later times with seqs behind the channel's front (a seq that jumped ahead)"
            };
            alerts::rules::raise_timeline(&mut rt.rule_state, wall_now_ns, front, kept_out, reason)
        }
        _ if advanced && kept_out == 0 => {
            alerts::rules::clear_timeline(&mut rt.rule_state, wall_now_ns)
        }
        _ => None,
    }
}

/// Batch-level checks, before any reading is looked at.
pub fn check_batch_size(readings: &[RawReading]) -> Result<(), IngestError> {
    if readings.is_empty() {
        return Err(invalid(
            "readings",
            "[]",
            "an empty batch carries nothing to store",
        ));
    }
    if readings.len() > MAX_BATCH_READINGS {
        return Err(IngestError::BatchTooLarge(readings.len()));
    }
    Ok(())
}

/// A reading that passed the checks but that the core could not evaluate
/// (the voltage it was given is what it could not use).
fn refused_by_core(index: usize, seq: u64, e: impl std::fmt::Display) -> Rejection {
    Rejection {
        index: index as u32,
        seq,
        field: "volts",
        reason: e.to_string(),
    }
}

/// What one batch's readings add up to while they are derived.
#[derive(Default)]
struct BatchParts {
    rows: Vec<ReadingRow>,
    maybe_dup: Vec<ReadingRow>,
    changes: Vec<AlertChange>,
    cycles: Vec<estimator::CycleRecord>,
    /// A fresh reading moved the estimator on.
    advanced: bool,
    /// The highest seq moved (a late reading can raise it).
    front_moved: bool,
}

impl TimelineTally {
    /// Whether `r` is past the channel's front (fresh), counting the ways
    /// a reading that is not can disagree with it.
    fn classify(&mut self, rt: &ChannelRuntime, r: &RawReading) -> bool {
        let new_seq = rt.max_seq.is_none_or(|m| r.seq > m);
        let fresh = new_seq && r.time_unix_ns > rt.last_time_ns;
        if new_seq && !fresh {
            self.clock_back += 1;
        } else if !new_seq && r.time_unix_ns > rt.last_time_ns {
            // Time moved on but the seq is behind the front: the front
            // came from a seq that jumped ahead of the rig's numbering.
            self.seq_behind += 1;
        }
        fresh
    }
}

/// The pure part of ingest for one batch, under the channel's lock.
pub fn derive_batch(
    rt: &mut ChannelRuntime,
    readings: &[RawReading],
    wall_now_ns: i64,
) -> (DerivedBatch, Vec<Rejection>) {
    let mut parts = BatchParts {
        rows: Vec::with_capacity(readings.len()),
        ..BatchParts::default()
    };
    let mut rejected = Vec::new();
    let mut timeline = TimelineTally::default();
    for (index, r) in readings.iter().enumerate() {
        let checked = check_reading(rt, r).and_then(|()| {
            check_timeline(rt, r, wall_now_ns).inspect_err(|_| timeline.quarantined += 1)
        });
        if let Err((field, reason)) = checked {
            rejected.push(Rejection {
                index: index as u32,
                seq: r.seq,
                field,
                reason,
            });
            continue;
        }
        let disordered = rt.max_seq.is_none_or(|m| r.seq > m) || r.time_unix_ns > rt.last_time_ns;
        let fresh = timeline.classify(rt, r);
        let derived = if fresh {
            derive_fresh(rt, r, &mut parts)
        } else {
            // A plain resend (seq and time both at or behind the front) was
            // judged when it first came; one the timeline disagrees with
            // was never judged, and its limits must still be.
            derive_late(rt, r, &mut parts, disordered)
        };
        // Every reading must end stored, duplicate or rejected: one the
        // core cannot evaluate is rejected with the core's reason.
        if let Err(reason) = derived {
            rejected.push(refused_by_core(index, r.seq, reason));
        }
    }
    parts
        .changes
        .extend(timeline_change(rt, &timeline, parts.advanced, wall_now_ns));
    let estimator = (parts.advanced || parts.front_moved).then(|| snapshot_of(rt));
    (
        DerivedBatch {
            channel_key: rt.key,
            run_id: rt.run_id,
            cells_in_series: rt.def.cells_in_series,
            rows: parts.rows,
            maybe_dup: parts.maybe_dup,
            changes: parts.changes,
            cycles: parts.cycles,
            estimator,
        },
        rejected,
    )
}

/// A resend or a late reading: stored (if new) with its own
/// thermodynamics, but kept out of the running counts and rules.
fn derive_late(
    rt: &mut ChannelRuntime,
    r: &RawReading,
    parts: &mut BatchParts,
    judge_limits: bool,
) -> Result<(), EstimatorError> {
    let amps = r.amps.map(|a| rt.def.current_sign.to_charge_positive(a));
    let temp_k = r
        .temp_c
        .map_or(rt.est_config.default_temp_k, |t| t + 273.15);
    let ev = crate::electrochem::evaluate(
        &rt.chemistry,
        crate::electrochem::EvalRequest {
            stack_volts: r.volts,
            cells_in_series: rt.def.cells_in_series,
            temp_k,
            equilibrium_tolerance_volts: rt.est_config.equilibrium_tolerance_volts,
        },
    )?;
    // A late reading can carry a seq above every fresh one (its clock went
    // back); it then raises the stored maximum, as the store's MAX(seq)
    // will after a restart, so both agree on what the next reading is.
    if rt.max_seq.is_some_and(|m| r.seq > m) {
        rt.max_seq = Some(r.seq);
        parts.front_moved = true;
    }
    if judge_limits {
        let cell_volts = r.volts / f64::from(rt.def.cells_in_series);
        parts.changes.extend(late_limits(rt, r, amps, cell_volts));
    }
    let clamped = if ev.soc_clamped {
        flags::SOC_CLAMPED
    } else {
        0
    };
    parts.maybe_dup.push(row_of(
        rt,
        r,
        amps,
        Figures {
            cell_volts_used: ev.thermo.cell_volts,
            soc_model: ev.soc,
            soc_fused: ev.soc,
            charge_ah: rt.est.charge_ah,
            energy_wh: rt.est.energy_wh,
            flags: flags::OUT_OF_ORDER
                | mode_flags(amps, rt.est_config.rest_current_amps)
                | clamped,
            soc_counted_unclamped: None,
        },
    ));
    Ok(())
}

/// The limit rules on an out-of-order reading's own values (no estimator
/// figures: those follow the channel's order).
fn late_limits(
    rt: &mut ChannelRuntime,
    r: &RawReading,
    amps: Option<f64>,
    cell_volts: f64,
) -> Vec<AlertChange> {
    let input =
        alerts::rules::RuleInput::reading_only(r.time_unix_ns, r.seq, cell_volts, amps, r.temp_c);
    alerts::rules::evaluate_limits(&rt.rules, &mut rt.rule_state, &input)
}

/// A reading past the front: the estimator and the alert rules move on.
fn derive_fresh(
    rt: &mut ChannelRuntime,
    r: &RawReading,
    parts: &mut BatchParts,
) -> Result<(), EstimatorError> {
    let amps = r.amps.map(|a| rt.def.current_sign.to_charge_positive(a));
    let input = EstimatorInput {
        time_ns: r.time_unix_ns,
        stack_volts: r.volts,
        amps,
        temp_k: r.temp_c.map(|t| t + 273.15),
    };
    let est = estimator::step(&rt.chemistry, &rt.est_config, &mut rt.est, input)?;
    advance_front(rt, r);
    parts.advanced = true;
    let deadband = rt.est_config.rest_current_amps;
    let rule_input = alerts::rules::RuleInput {
        time_ns: r.time_unix_ns,
        seq: r.seq,
        cell_volts_terminal: r.volts / f64::from(rt.def.cells_in_series),
        amps,
        temp_c: r.temp_c,
        delta_g_kj_per_mol: est.delta_g_kj_per_mol(),
        driving_force_volts: est.driving_force_volts,
        soc: est.soc_fused,
        charging: amps.is_some_and(|i| i >= deadband),
        discharging: amps.is_some_and(|i| i <= -deadband),
        resting: est.resting,
        dv_dt_mv_per_min: est.dv_dt_mv_per_min,
        soc_rate_per_s: est.soc_rate_per_s,
        ocv_model_gap_volts: est.ocv_model_gap_volts,
    };
    parts.changes.extend(alerts::rules::evaluate(
        &rt.rules,
        &mut rt.rule_state,
        &rule_input,
    ));
    parts.cycles.extend(est.cycle_closed.clone());
    parts.rows.push(row_of(
        rt,
        r,
        amps,
        Figures {
            cell_volts_used: est.cell_volts_used,
            soc_model: est.soc_model,
            soc_fused: est.soc_fused,
            charge_ah: est.charge_ah,
            energy_wh: est.energy_wh,
            flags: fresh_flags(&est, amps, deadband),
            soc_counted_unclamped: est.soc_counted_unclamped,
        },
    ));
    Ok(())
}

/// What derivation adds to a raw reading before it is stored.
struct Figures {
    cell_volts_used: f64,
    soc_model: Option<f64>,
    soc_fused: Option<f64>,
    charge_ah: f64,
    energy_wh: f64,
    flags: i64,
    soc_counted_unclamped: Option<f64>,
}

/// The one place a stored row is built, fresh or late.
fn row_of(rt: &ChannelRuntime, r: &RawReading, amps: Option<f64>, f: Figures) -> ReadingRow {
    ReadingRow {
        channel_key: rt.key,
        seq: r.seq,
        run_id: rt.run_id,
        time_ns: r.time_unix_ns,
        volts: r.volts,
        amps,
        temp_c: r.temp_c,
        cell_volts_used: f.cell_volts_used,
        soc_model: f.soc_model,
        soc_fused: f.soc_fused,
        charge_ah: f.charge_ah,
        energy_wh: f.energy_wh,
        flags: f.flags,
        soc_counted_unclamped: f.soc_counted_unclamped,
    }
}

/// The front moves to a fresh reading; the usual interval follows it.
fn advance_front(rt: &mut ChannelRuntime, r: &RawReading) {
    if rt.last_time_ns > 0 {
        let dt_s = (r.time_unix_ns - rt.last_time_ns) as f64 / 1e9;
        rt.usual_interval_s = if rt.usual_interval_s > 0.0 {
            0.9 * rt.usual_interval_s + 0.1 * dt_s
        } else {
            dt_s
        };
    }
    rt.max_seq = Some(r.seq);
    rt.last_time_ns = r.time_unix_ns;
}

/// The stored flags of a fresh reading.
fn fresh_flags(est: &estimator::Estimate, amps: Option<f64>, deadband_amps: f64) -> i64 {
    let count_clamped = est
        .soc_counted_unclamped
        .is_some_and(|c| !(0.0..=1.0).contains(&c));
    [
        (count_clamped, flags::COUNT_CLAMPED),
        (est.evaluation.soc_clamped, flags::SOC_CLAMPED),
        (est.resting, flags::RESTING),
        (est.rest_settled, flags::REST_SETTLED),
        (est.gap, flags::GAP_BEFORE),
    ]
    .into_iter()
    .filter(|(set, _)| *set)
    .fold(
        mode_flags(amps, deadband_amps) | flags::of_ocv_source(est.ocv_source),
        |f, (_, bit)| f | bit,
    )
}

/// What a restart resumes from: the front and the estimator.
pub(crate) fn snapshot_of(rt: &ChannelRuntime) -> writer::EstimatorSnapshot {
    writer::EstimatorSnapshot {
        last_seq: rt.max_seq.unwrap_or(0),
        last_time_ns: rt.last_time_ns,
        usual_interval_s: rt.usual_interval_s,
        state_json: serde_json::to_string(&rt.est).unwrap_or_default(),
    }
}

//! The ingest path: batch → validation → estimator and rules (per channel,
//! in seq order) → bounded queue → one batching writer → ack after commit.
//!
//! Per-channel state sits behind a std `Mutex`: it is held only for the
//! pure computation of one batch, never across an `.await`.

pub mod writer;

use crate::alerts::{self, AlertChange, AlertRules, ChannelRuleState};
use crate::channel::{
    ChannelDef, MAX_READING_ABS_AMPS, MAX_READING_TEMP_C, MIN_READING_TEMP_C, shown,
};
use crate::electrochem::{Chemistry, Registry};
use crate::estimator::{self, EstimatorConfig, EstimatorInput, EstimatorState};
use crate::store::{self, AlertEvent, ReadingRow, Store, StoreError, flags};
use std::collections::HashMap;
use std::sync::{Arc, Mutex, RwLock};
use tokio::sync::{broadcast, mpsc, oneshot};
pub use writer::{Job, ReadingsJob, WriteOutcome};

/// Readings per batch at most. 10,000 readings ≈ 400 kB of protobuf,
/// inside the 1 MiB ingest message limit the server sets.
pub const MAX_BATCH_READINGS: usize = 10_000;
/// How far a reading's clock may run ahead of the server's, and how far
/// its seq may jump past the last one: beyond either, the reading is
/// refused (quarantined: counted, named in the ack, never made the
/// channel's front), so one garbled value cannot push every later real
/// reading onto the out-of-order path and out of the alert rules.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct IngestLimits {
    pub max_future_ns: i64,
    pub max_seq_jump: u64,
}

/// Five minutes: a rig PC without time sync drifts by seconds a day; a
/// reading further ahead carries a broken clock.
pub const DEFAULT_MAX_FUTURE_S: u64 = 300;
/// A billion: a counting rig never jumps that far; one that numbers its
/// readings by its millisecond clock may be offline for 11 days. Raise it
/// for rigs that number by microseconds.
pub const DEFAULT_MAX_SEQ_JUMP: u64 = 1_000_000_000;

impl Default for IngestLimits {
    fn default() -> IngestLimits {
        IngestLimits {
            max_future_ns: DEFAULT_MAX_FUTURE_S as i64 * 1_000_000_000,
            max_seq_jump: DEFAULT_MAX_SEQ_JUMP,
        }
    }
}
/// Readings stamped before 2000-01-01T00:00:00Z come from a rig whose clock
/// was never set; storing them would misplace them in every query.
pub const MIN_TIME_NS: i64 = 946_684_800 * 1_000_000_000;

#[derive(Debug, thiserror::Error)]
pub enum IngestError {
    #[error("channel_id {0:?}: unknown channel (define it with PutChannel first)")]
    UnknownChannel(String),
    #[error("{field} = {value}: {reason}")]
    Invalid {
        field: String,
        value: String,
        reason: String,
    },
    #[error("readings: batch of {0} readings is over the limit of {MAX_BATCH_READINGS}")]
    BatchTooLarge(usize),
    #[error("alert_id {0}: no such alert")]
    AlertNotFound(u64),
    #[error("the server is shutting down; reconnect and resend from last_stored_seq")]
    ShuttingDown,
    #[error(transparent)]
    Store(#[from] StoreError),
}

fn invalid(field: &str, value: impl std::fmt::Display, reason: impl Into<String>) -> IngestError {
    IngestError::Invalid {
        field: field.into(),
        value: value.to_string(),
        reason: reason.into(),
    }
}

/// One raw reading as it came off the wire.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RawReading {
    pub seq: u64,
    pub time_unix_ns: i64,
    pub volts: f64,
    pub amps: Option<f64>,
    pub temp_c: Option<f64>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Rejection {
    pub index: u32,
    pub seq: u64,
    pub field: &'static str,
    pub reason: String,
}

#[derive(Debug, Clone, PartialEq, Default)]
pub struct Ack {
    pub channel_id: String,
    pub batch_id: u64,
    pub accepted: u32,
    pub duplicates: u32,
    pub out_of_order: u32,
    pub rejected: Vec<Rejection>,
    pub last_stored_seq: u64,
}

/// Live state of one channel.
#[derive(Debug, Clone)]
pub struct ChannelRuntime {
    pub key: i64,
    pub def: ChannelDef,
    pub chemistry: Arc<Chemistry>,
    pub run_id: i64,
    pub rules: AlertRules,
    pub est_config: EstimatorConfig,
    pub est: EstimatorState,
    pub rule_state: ChannelRuleState,
    /// The channel's front: highest seq taken (derived; committed once the
    /// batch in flight is).
    pub max_seq: Option<u64>,
    /// Highest seq in committed state: what acks and GetResumePoint say.
    pub committed_seq: Option<u64>,
    /// Held from a batch's derivation until its commit is answered, so no
    /// batch is derived on top of state the store may still refuse; on a
    /// refusal the runtime is rebuilt from the store under the same gate.
    pub commit_gate: Arc<tokio::sync::Mutex<()>>,
    /// A failed commit left this state ahead of the store and reloading
    /// it failed too: reload before the next batch.
    pub needs_reload: bool,
    pub limits: IngestLimits,
    pub last_time_ns: i64,
    /// Smoothed spacing of readings by their timestamps, s.
    pub usual_interval_s: f64,
    /// Wall-clock time the last batch arrived, and the smoothed spacing of
    /// arrivals: the silent-rig rule's yardstick (rig clocks may be
    /// replayed or accelerated; the server's clock is what "silent" means).
    pub last_arrival_wall_ns: i64,
    pub usual_arrival_interval_s: f64,
}

impl ChannelRuntime {
    /// A channel with no history (tests, fuzzing, first definition).
    pub fn fresh(
        key: i64,
        def: ChannelDef,
        chemistry: Arc<Chemistry>,
        run_id: i64,
    ) -> ChannelRuntime {
        ChannelRuntime {
            key,
            est_config: def.estimator_config(),
            rules: AlertRules::for_chemistry(&chemistry),
            def,
            chemistry,
            run_id,
            est: EstimatorState::default(),
            rule_state: ChannelRuleState::default(),
            max_seq: None,
            committed_seq: None,
            commit_gate: Arc::default(),
            needs_reload: false,
            limits: IngestLimits::default(),
            last_time_ns: 0,
            usual_interval_s: 0.0,
            last_arrival_wall_ns: 0,
            usual_arrival_interval_s: 0.0,
        }
    }

    /// Notes a batch's arrival by the server's clock (the silent-rig yardstick).
    fn note_arrival(&mut self, wall_now_ns: i64) {
        if self.last_arrival_wall_ns > 0 {
            let gap_s = (wall_now_ns - self.last_arrival_wall_ns) as f64 / 1e9;
            self.usual_arrival_interval_s = if self.usual_arrival_interval_s > 0.0 {
                0.9 * self.usual_arrival_interval_s + 0.1 * gap_s
            } else {
                gap_s
            };
        }
        self.last_arrival_wall_ns = wall_now_ns;
    }
}

/// Shared state of the service.
pub struct Hub {
    pub store: Store,
    pub registry: RwLock<Registry>,
    pub channels: RwLock<HashMap<String, Arc<Mutex<ChannelRuntime>>>>,
    pub writer: mpsc::Sender<Job>,
    pub events: broadcast::Sender<AlertEvent>,
    /// Turns true when the server begins to shut down: open streams finish
    /// the batch in hand and end with UNAVAILABLE.
    pub shutdown: tokio::sync::watch::Receiver<bool>,
    pub metrics: Arc<crate::metrics::Metrics>,
    pub auth: crate::auth::TokenTable,
    pub limits: IngestLimits,
}

/// Resolves once `stop` turns true (never, if its sender is gone without it).
pub async fn stopped(mut stop: tokio::sync::watch::Receiver<bool>) {
    loop {
        if *stop.borrow_and_update() {
            return;
        }
        if stop.changed().await.is_err() {
            std::future::pending::<()>().await;
        }
    }
}

pub fn now_ns() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos() as i64)
        .unwrap_or(0)
}

impl Hub {
    pub fn channel(&self, channel_id: &str) -> Result<Arc<Mutex<ChannelRuntime>>, IngestError> {
        self.channels
            .read()
            .expect("channel map poisoned")
            .get(channel_id)
            .cloned()
            .ok_or_else(|| IngestError::UnknownChannel(channel_id.chars().take(80).collect()))
    }

    /// Creates or replaces a channel. A change of chemistry, cell count or
    /// E° override starts a new run (fresh estimator, history keeps the
    /// old definition); other changes keep the running state.
    pub async fn put_channel(&self, def: ChannelDef) -> Result<(i64, bool), IngestError> {
        let registry = self.registry.read().expect("registry poisoned").clone();
        let chemistry = def.validate(&registry).map_err(|e| IngestError::Invalid {
            field: format!("channel.{}", e.field),
            value: e.value,
            reason: e.reason,
        })?;
        let existing = self.channel(&def.channel_id).ok();
        let new_run = match &existing {
            Some(rt) => rt.lock().expect("channel state poisoned").def.run_key() != def.run_key(),
            None => true,
        };
        let json = serde_json::to_string(&def).map_err(|e| StoreError::Corrupt(e.to_string()))?;
        let run = new_run.then(|| store::RunRow {
            run_id: 0,
            channel_key: 0,
            chemistry_id: chemistry.id.clone(),
            n_electrons: chemistry.n_electrons,
            e_standard_298_v: chemistry.e_standard_298_volts,
            de_dt_v_per_k: chemistry.de_dt_volts_per_k,
            cells_in_series: def.cells_in_series,
            default_temp_c: def.default_temp_c,
            equilibrium_tolerance_v: def.equilibrium_tolerance_mv / 1e3,
            soc_model: chemistry.soc_model.name().to_string(),
            definition_json: Some(json.clone()),
        });
        let (_, run_id) =
            store::put_channel(&self.store, &def.channel_id, &json, run, now_ns()).await?;
        match existing {
            Some(rt) => {
                let mut g = rt.lock().expect("channel state poisoned");
                g.est_config = def.estimator_config();
                g.def = def;
                g.chemistry = chemistry;
                if new_run {
                    g.est = EstimatorState::default();
                    g.run_id = run_id;
                }
            }
            None => {
                let row = store::get_channel(&self.store.writer, &def.channel_id)
                    .await?
                    .ok_or_else(|| StoreError::Corrupt("channel vanished after write".into()))?;
                let mut runtime = load_runtime(&self.store, &registry, &row).await?;
                runtime.limits = self.limits;
                self.channels
                    .write()
                    .expect("channel map poisoned")
                    .entry(def.channel_id.clone())
                    .or_insert_with(|| Arc::new(Mutex::new(runtime)));
            }
        }
        Ok((run_id, new_run))
    }

    /// Sends a job to the writer and waits for its commit.
    pub async fn submit(
        &self,
        job: impl FnOnce(oneshot::Sender<Result<WriteOutcome, StoreError>>) -> Job,
    ) -> Result<WriteOutcome, IngestError> {
        let (tx, rx) = oneshot::channel();
        // A full queue makes this await: the stream stops reading from its
        // client until the writer catches up (backpressure, no loss).
        self.writer
            .send(job(tx))
            .await
            .map_err(|_| IngestError::ShuttingDown)?;
        match rx.await {
            Ok(Ok(outcome)) => Ok(outcome),
            Ok(Err(e)) => Err(IngestError::Store(e)),
            Err(_) => Err(IngestError::ShuttingDown),
        }
    }

    /// Validates, derives and stores one batch; returns its ack after commit.
    /// Takes the readings by value and drops them once derived: a stream
    /// waiting for its commit then holds only the rows to be written, which
    /// is what bounds memory under a flood.
    pub async fn ingest(
        &self,
        channel_id: &str,
        batch_id: u64,
        readings: Vec<RawReading>,
    ) -> Result<Ack, IngestError> {
        check_batch_size(&readings)?;
        let (runtime, _turn) = self.take_turn(channel_id).await?;
        let wall_now = now_ns();
        let (derived, rejected) = {
            let mut rt = runtime.lock().expect("channel state poisoned");
            rt.note_arrival(wall_now);
            derive_batch(&mut rt, &readings, wall_now)
        };
        drop(readings);
        let outcome = match self
            .submit(|reply| Job::Readings(derived.into_job(reply)))
            .await
        {
            Ok(outcome) => outcome,
            Err(e) => {
                self.reload_after_failure(&runtime).await;
                return Err(e);
            }
        };
        let committed = {
            let mut rt = runtime.lock().expect("channel state poisoned");
            rt.committed_seq = rt.max_seq;
            rt.committed_seq
        };
        self.count(&outcome, &rejected);
        Ok(Ack {
            channel_id: channel_id.to_string(),
            batch_id,
            accepted: (outcome.fresh_inserted + outcome.late_inserted) as u32,
            duplicates: outcome.duplicates as u32,
            out_of_order: outcome.late_inserted as u32,
            rejected,
            last_stored_seq: committed.unwrap_or(0),
        })
    }

    /// Moves the channel's front back to a stored reading (see the
    /// ResetTimeline RPC): the readings behind a garbled front count as
    /// fresh again. The new front is committed with the estimator snapshot
    /// (so a restart keeps it), and the timeline alert is cleared.
    pub async fn reset_timeline(
        &self,
        channel_id: &str,
        after_seq: Option<u64>,
    ) -> Result<(u64, i64), IngestError> {
        let (runtime, _turn) = self.take_turn(channel_id).await?;
        let key = runtime.lock().expect("channel state poisoned").key;
        let Some((seq, time_ns)) =
            store::timeline_anchor(&self.store.writer, key, after_seq).await?
        else {
            return Err(match after_seq {
                Some(seq) => invalid(
                    "after_seq",
                    seq,
                    "no stored reading of this channel has that seq",
                ),
                None => invalid(
                    "after_seq",
                    "unset",
                    "no reading of this channel was taken out of order: its timeline is in step",
                ),
            });
        };
        let job = {
            let mut rt = runtime.lock().expect("channel state poisoned");
            rt.max_seq = Some(seq);
            rt.last_time_ns = time_ns;
            let changes = alerts::rules::clear_timeline(&mut rt.rule_state, now_ns())
                .into_iter()
                .collect();
            DerivedBatch {
                channel_key: rt.key,
                run_id: rt.run_id,
                rows: vec![],
                maybe_dup: vec![],
                changes,
                cycles: vec![],
                estimator: Some(snapshot_of(&rt)),
            }
        };
        if let Err(e) = self
            .submit(|reply| Job::Readings(job.into_job(reply)))
            .await
        {
            self.reload_after_failure(&runtime).await;
            return Err(e);
        }
        runtime
            .lock()
            .expect("channel state poisoned")
            .committed_seq = Some(seq);
        tracing::info!(channel_id, seq, time_ns, "timeline reset");
        Ok((seq, time_ns))
    }

    /// Anchors the channel's count at an SOC an operator entered, from its
    /// last reading on; stored as an operator event with the snapshot.
    pub async fn set_soc(
        &self,
        channel_id: &str,
        soc: f64,
        by: &str,
        note: &str,
    ) -> Result<i64, IngestError> {
        if !(0.0..=1.0).contains(&soc) {
            return Err(invalid("soc", soc, "must be from 0 to 1"));
        }
        let (runtime, _turn) = self.take_turn(channel_id).await?;
        let (change, time_ns) = {
            let mut rt = runtime.lock().expect("channel state poisoned");
            let time_ns = if rt.last_time_ns > 0 {
                rt.last_time_ns
            } else {
                now_ns()
            };
            estimator::anchor_at(&mut rt.est, soc, time_ns);
            let change = writer::OperatorChange {
                channel_key: rt.key,
                run_id: rt.run_id,
                time_ns: now_ns(),
                kind: "set_soc",
                by: by.to_string(),
                detail_json:
                    serde_json::json!({"soc": soc, "applies_from_ns": time_ns, "note": note})
                        .to_string(),
                estimator: snapshot_of(&rt),
            };
            (change, time_ns)
        };
        if let Err(e) = self.submit(|reply| Job::Operator { change, reply }).await {
            self.reload_after_failure(&runtime).await;
            return Err(e);
        }
        tracing::info!(channel_id, soc, by, "soc entered by an operator");
        Ok(time_ns)
    }

    fn count(&self, outcome: &WriteOutcome, rejected: &[Rejection]) {
        use std::sync::atomic::Ordering::Relaxed;
        let m = &self.metrics;
        m.readings_accepted
            .fetch_add(outcome.fresh_inserted + outcome.late_inserted, Relaxed);
        m.readings_duplicate.fetch_add(outcome.duplicates, Relaxed);
        m.readings_out_of_order
            .fetch_add(outcome.late_inserted, Relaxed);
        for r in rejected {
            m.reject(r.field);
        }
    }

    /// The channel and its commit gate, held until the caller's commit is
    /// answered; a channel left stale by an earlier refusal is reloaded first.
    async fn take_turn(
        &self,
        channel_id: &str,
    ) -> Result<(Arc<Mutex<ChannelRuntime>>, tokio::sync::OwnedMutexGuard<()>), IngestError> {
        let runtime = self.channel(channel_id)?;
        let gate = runtime
            .lock()
            .expect("channel state poisoned")
            .commit_gate
            .clone();
        let turn = gate.lock_owned().await;
        self.reload_if_needed(&runtime).await?;
        Ok((runtime, turn))
    }

    /// After a refused commit the runtime is ahead of the store (front,
    /// estimator, alert state): rebuild it from what was committed, so the
    /// resume point and the next derivation start from stored truth.
    pub async fn reload_after_failure(&self, runtime: &Mutex<ChannelRuntime>) {
        if let Err(e) = self.reload(runtime).await {
            let mut rt = runtime.lock().expect("channel state poisoned");
            tracing::warn!(channel_id = %rt.def.channel_id, error = %e, "channel state not reloaded after a failed commit; retrying before the next batch");
            rt.needs_reload = true;
        }
    }

    async fn reload_if_needed(&self, runtime: &Mutex<ChannelRuntime>) -> Result<(), IngestError> {
        if runtime.lock().expect("channel state poisoned").needs_reload {
            self.reload(runtime).await?;
        }
        Ok(())
    }

    async fn reload(&self, runtime: &Mutex<ChannelRuntime>) -> Result<(), IngestError> {
        let channel_id = runtime
            .lock()
            .expect("channel state poisoned")
            .def
            .channel_id
            .clone();
        let row = store::get_channel(&self.store.writer, &channel_id)
            .await?
            .ok_or_else(|| StoreError::Corrupt(format!("channel {channel_id} vanished")))?;
        let registry = self.registry.read().expect("registry poisoned").clone();
        let mut fresh = load_runtime(&self.store, &registry, &row).await?;
        let mut rt = runtime.lock().expect("channel state poisoned");
        fresh.commit_gate = rt.commit_gate.clone();
        fresh.limits = rt.limits;
        fresh.last_arrival_wall_ns = rt.last_arrival_wall_ns;
        fresh.usual_arrival_interval_s = rt.usual_arrival_interval_s;
        *rt = fresh;
        Ok(())
    }
}

pub struct DerivedBatch {
    pub channel_key: i64,
    pub run_id: i64,
    pub rows: Vec<ReadingRow>,
    pub maybe_dup: Vec<ReadingRow>,
    pub changes: Vec<AlertChange>,
    pub cycles: Vec<estimator::CycleRecord>,
    pub estimator: Option<writer::EstimatorSnapshot>,
}

impl DerivedBatch {
    fn into_job(self, reply: oneshot::Sender<Result<WriteOutcome, StoreError>>) -> ReadingsJob {
        ReadingsJob {
            channel_key: self.channel_key,
            run_id: self.run_id,
            rows: self.rows,
            maybe_dup: self.maybe_dup,
            changes: self.changes,
            cycles: self.cycles,
            estimator: self.estimator,
            reply,
        }
    }
}

fn check_reading(rt: &ChannelRuntime, r: &RawReading) -> Result<(), (&'static str, String)> {
    if !r.volts.is_finite() {
        return Err((
            "volts",
            format!("volts = {}: must be a finite number", r.volts),
        ));
    }
    let cell = r.volts / f64::from(rt.def.cells_in_series);
    if cell < rt.def.min_volts || cell > rt.def.max_volts {
        return Err((
            "volts",
            format!(
                "volts = {}: {} V per cell is outside the channel's plausibility window {}–{} V",
                shown(r.volts),
                shown((cell * 1e4).round() / 1e4),
                rt.def.min_volts,
                rt.def.max_volts
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
    if r.time_unix_ns < MIN_TIME_NS {
        return Err((
            "time_unix_ns",
            format!(
                "time_unix_ns = {}: before 2000-01-01; is the rig's clock set?",
                r.time_unix_ns
            ),
        ));
    }
    if r.seq > i64::MAX as u64 {
        return Err(("seq", format!("seq = {}: must be below 2^63", r.seq)));
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
                "seq = {}: jumps {} past the channel's last seq {front} (limit {}); quarantined, not stored: if the rig renumbered, reset the channel's timeline",
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
        let new_seq = rt.max_seq.is_none_or(|m| r.seq > m);
        let fresh = new_seq && r.time_unix_ns > rt.last_time_ns;
        if new_seq && !fresh {
            timeline.clock_back += 1;
        } else if !new_seq && r.time_unix_ns > rt.last_time_ns {
            // Time moved on but the seq is behind the front: the front
            // came from a seq that jumped ahead of the rig's numbering.
            timeline.seq_behind += 1;
        }
        let derived = if fresh {
            derive_fresh(rt, r, &mut parts)
        } else {
            derive_late(rt, r, &mut parts)
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
) -> Result<(), String> {
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
    )
    .map_err(|e| e.to_string())?;
    // A late reading can carry a seq above every fresh one (its clock went
    // back); it then raises the stored maximum, as the store's MAX(seq)
    // will after a restart, so both agree on what the next reading is.
    if rt.max_seq.is_some_and(|m| r.seq > m) {
        rt.max_seq = Some(r.seq);
        parts.front_moved = true;
    }
    let clamped = if ev.soc_clamped {
        flags::SOC_CLAMPED
    } else {
        0
    };
    parts.maybe_dup.push(ReadingRow {
        channel_key: rt.key,
        seq: r.seq,
        run_id: rt.run_id,
        time_ns: r.time_unix_ns,
        volts: r.volts,
        amps,
        temp_c: r.temp_c,
        cell_volts_used: ev.thermo.cell_volts,
        soc_model: ev.soc,
        soc_fused: ev.soc,
        charge_ah: rt.est.charge_ah,
        energy_wh: rt.est.energy_wh,
        flags: flags::OUT_OF_ORDER | mode_flags(amps, rt.est_config.rest_current_amps) | clamped,
        soc_counted_unclamped: None,
    });
    Ok(())
}

/// A reading past the front: the estimator and the alert rules move on.
fn derive_fresh(
    rt: &mut ChannelRuntime,
    r: &RawReading,
    parts: &mut BatchParts,
) -> Result<(), String> {
    let amps = r.amps.map(|a| rt.def.current_sign.to_charge_positive(a));
    let input = EstimatorInput {
        time_ns: r.time_unix_ns,
        stack_volts: r.volts,
        amps,
        temp_k: r.temp_c.map(|t| t + 273.15),
    };
    let est = estimator::step(&rt.chemistry, &rt.est_config, &mut rt.est, input)
        .map_err(|e| e.to_string())?;
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
    };
    parts.changes.extend(alerts::rules::evaluate(
        &rt.rules,
        &mut rt.rule_state,
        &rule_input,
    ));
    parts.cycles.extend(est.cycle_closed.clone());
    parts.rows.push(ReadingRow {
        channel_key: rt.key,
        seq: r.seq,
        run_id: rt.run_id,
        time_ns: r.time_unix_ns,
        volts: r.volts,
        amps,
        temp_c: r.temp_c,
        cell_volts_used: est.cell_volts_used,
        soc_model: est.soc_model,
        soc_fused: est.soc_fused,
        charge_ah: est.charge_ah,
        energy_wh: est.energy_wh,
        flags: fresh_flags(&est, amps, deadband),
        soc_counted_unclamped: est.soc_counted_unclamped,
    });
    Ok(())
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
fn snapshot_of(rt: &ChannelRuntime) -> writer::EstimatorSnapshot {
    writer::EstimatorSnapshot {
        last_seq: rt.max_seq.unwrap_or(0),
        last_time_ns: rt.last_time_ns,
        usual_interval_s: rt.usual_interval_s,
        state_json: serde_json::to_string(&rt.est).unwrap_or_default(),
    }
}

/// Builds a channel's runtime from its stored row (at start or on PutChannel).
pub async fn load_runtime(
    store: &Store,
    registry: &Registry,
    row: &store::ChannelRow,
) -> Result<ChannelRuntime, IngestError> {
    let def: ChannelDef = serde_json::from_str(&row.definition_json)
        .map_err(|e| StoreError::Corrupt(format!("channel {}: {e}", row.channel_id)))?;
    let chemistry = def
        .validate(registry)
        .map_err(|e| StoreError::Corrupt(format!("channel {}: {e}", row.channel_id)))?;
    let rules = match &row.rules_json {
        Some(json) => serde_json::from_str(json)
            .map_err(|e| StoreError::Corrupt(format!("rules of {}: {e}", row.channel_id)))?,
        None => AlertRules::for_chemistry(&chemistry),
    };
    let resume = store::load_resume_state(&store.writer, row.channel_key).await?;
    Ok(restore_runtime(
        row.channel_key,
        def,
        chemistry,
        row.current_run_id,
        rules,
        resume,
    ))
}

/// A channel's runtime rebuilt from what the store kept: the pure half of
/// [`load_runtime`], which the restart fuzz target also runs. The estimator
/// resumes exactly where its last committed batch left it; alert hold
/// timers start again (only which alerts are active is kept).
pub fn restore_runtime(
    key: i64,
    def: ChannelDef,
    chemistry: Arc<Chemistry>,
    run_id: i64,
    rules: AlertRules,
    resume: store::ResumeState,
) -> ChannelRuntime {
    let (est, last_time_ns, usual_interval_s) = match resume.estimator {
        Some((snapshot_run_id, last_time_ns, usual, json)) if snapshot_run_id == run_id => {
            let est = serde_json::from_str(&json).unwrap_or_else(|e| {
                // Counting starts again; the readings themselves are intact.
                tracing::warn!(channel_id = %def.channel_id, error = %e, "estimator snapshot unreadable, starting the count afresh");
                EstimatorState::default()
            });
            (est, last_time_ns, usual)
        }
        Some((_, last_time_ns, usual, _)) => (EstimatorState::default(), last_time_ns, usual),
        None => (EstimatorState::default(), 0, 0.0),
    };
    ChannelRuntime {
        key,
        est_config: def.estimator_config(),
        def,
        chemistry,
        run_id,
        rules,
        est,
        rule_state: ChannelRuleState::with_active(resume.active_kinds),
        max_seq: resume.max_seq,
        committed_seq: resume.max_seq,
        commit_gate: Arc::default(),
        needs_reload: false,
        limits: IngestLimits::default(),
        last_time_ns,
        usual_interval_s,
        last_arrival_wall_ns: 0,
        usual_arrival_interval_s: 0.0,
    }
}

#[cfg(test)]
mod tests;

//! The hub: the service's shared state and the operations every shell
//! (gRPC, HTTP, CLI) calls into. Fields are private: shells ask.

use super::derive::{DerivedBatch, check_batch_size, derive_batch, snapshot_of};
use super::ownership::Ownership;
use super::writer::{self, Job, ReadingsJob, WriteOutcome};
use super::{
    Ack, ChannelRuntime, IngestError, IngestLimits, RawReading, Rejection, invalid, load_runtime,
};
use crate::alerts::{self, AlertRules};
use crate::channel::ChannelDef;
use crate::electrochem::Registry;
use crate::estimator::{self, EstimatorState};
use crate::metrics::Metrics;
use crate::retention::{RetentionMarks, RetentionPolicy};
use crate::store::{self, AlertEvent, Store, StoreError, lease};
use std::collections::HashMap;
use std::sync::{Arc, Mutex, RwLock};
use tokio::sync::{broadcast, mpsc, oneshot, watch};

/// Shared state of the service.
pub struct Hub {
    store: Store,
    registry: RwLock<Registry>,
    channels: RwLock<HashMap<String, Arc<Mutex<ChannelRuntime>>>>,
    writer: mpsc::Sender<Job>,
    events: broadcast::Sender<AlertEvent>,
    /// Turns true when the server begins to shut down: open streams finish
    /// the batch in hand and end with UNAVAILABLE.
    shutdown: watch::Receiver<bool>,
    metrics: Arc<Metrics>,
    limits: IngestLimits,
    /// Several servers on one PostgreSQL database: this server's leases.
    /// `None` on SQLite, where this server owns every channel.
    ownership: Option<Arc<Ownership>>,
}

/// The other ends of a hub's queues, for the wiring: the writer takes the
/// jobs, and sending `true` on `shutdown` begins the ordered stop.
pub struct HubHandles {
    /// Write jobs, for the one writer task.
    pub jobs: mpsc::Receiver<Job>,
    /// Send `true` to begin the ordered stop.
    pub shutdown: watch::Sender<bool>,
}

/// Alert events buffered for subscribers; a subscriber more than this far
/// behind is told to resume from its last id.
const EVENT_BUFFER: usize = 4096;

/// Resolves once `stop` turns true (never, if its sender is gone without it).
pub async fn stopped(mut stop: watch::Receiver<bool>) {
    loop {
        if *stop.borrow_and_update() {
            return;
        }
        if stop.changed().await.is_err() {
            std::future::pending::<()>().await;
        }
    }
}

/// Wall-clock time, ns since the Unix epoch (0 if the clock is before it).
pub fn now_ns() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos() as i64)
        .unwrap_or(0)
}

impl Hub {
    /// A hub over `store` with every stored channel restored.
    pub async fn open(
        store: Store,
        registry: Registry,
        limits: IngestLimits,
        ownership: Option<Arc<Ownership>>,
    ) -> Result<(Arc<Hub>, HubHandles), IngestError> {
        let mut channels = HashMap::new();
        for row in store::list_channels(&store.writer).await? {
            let mut rt = load_runtime(&store, &registry, &row).await?;
            rt.limits = limits;
            channels.insert(row.channel_id.clone(), Arc::new(Mutex::new(rt)));
        }
        let (writer, jobs) = mpsc::channel(writer::WRITER_QUEUE_JOBS);
        let (events, _) = broadcast::channel(EVENT_BUFFER);
        let (shutdown_tx, shutdown) = watch::channel(false);
        let hub = Hub {
            store,
            registry: RwLock::new(registry),
            channels: RwLock::new(channels),
            writer,
            events,
            shutdown,
            metrics: Arc::default(),
            limits,
            ownership,
        };
        let handles = HubHandles {
            jobs,
            shutdown: shutdown_tx,
        };
        Ok((Arc::new(hub), handles))
    }

    /// The database every channel is stored in.
    pub fn store(&self) -> &Store {
        &self.store
    }

    /// The chemistries as they are now (a cheap clone).
    pub fn registry(&self) -> Registry {
        self.registry.read().expect("registry poisoned").clone()
    }

    /// The server's counters.
    pub fn metrics(&self) -> &Arc<Metrics> {
        &self.metrics
    }

    /// Where the writer announces committed alert events.
    pub fn events(&self) -> broadcast::Sender<AlertEvent> {
        self.events.clone()
    }

    /// Alert events committed from now on.
    pub fn subscribe(&self) -> broadcast::Receiver<AlertEvent> {
        self.events.subscribe()
    }

    /// Turns true when the server begins to stop.
    pub fn shutdown_signal(&self) -> watch::Receiver<bool> {
        self.shutdown.clone()
    }

    /// Whether the server has begun to stop (new streams are refused).
    pub fn is_shutting_down(&self) -> bool {
        *self.shutdown.borrow()
    }

    /// Jobs waiting in the writer's queue.
    pub fn writer_queue_depth(&self) -> usize {
        writer::WRITER_QUEUE_JOBS - self.writer.capacity()
    }

    /// Every channel's runtime, by channel id.
    pub fn runtimes(&self) -> Vec<(String, Arc<Mutex<ChannelRuntime>>)> {
        let mut all: Vec<_> = self
            .channels
            .read()
            .expect("channel map poisoned")
            .iter()
            .map(|(id, rt)| (id.clone(), rt.clone()))
            .collect();
        all.sort_by(|a, b| a.0.cmp(&b.0));
        all
    }

    /// Up to `size` channel definitions (with their current run) after
    /// `after` in id order, and whether more follow.
    pub fn channel_page(&self, after: &str, size: usize) -> (Vec<(ChannelDef, i64)>, bool) {
        let map = self.channels.read().expect("channel map poisoned");
        let mut ids: Vec<&String> = map.keys().filter(|id| id.as_str() > after).collect();
        ids.sort();
        let more = ids.len() > size;
        ids.truncate(size);
        let page = ids
            .iter()
            .map(|id| {
                let g = map[*id].lock().expect("channel state poisoned");
                (g.def.clone(), g.run_id)
            })
            .collect();
        (page, more)
    }

    /// Replaces a channel's alert rules, stored first.
    pub async fn put_rules(&self, channel_id: &str, rules: AlertRules) -> Result<(), IngestError> {
        let rt = self.channel(channel_id)?;
        let key = rt.lock().expect("channel state poisoned").key;
        let json = serde_json::to_string(&rules).map_err(|e| IngestError::Invalid {
            field: "rules".into(),
            value: "(unencodable)".into(),
            reason: e.to_string(),
        })?;
        store::put_rules(&self.store, key, &json).await?;
        rt.lock().expect("channel state poisoned").rules = rules;
        Ok(())
    }

    /// The store's key for a channel.
    pub fn channel_key(&self, channel_id: &str) -> Result<i64, IngestError> {
        Ok(self
            .channel(channel_id)?
            .lock()
            .expect("channel state poisoned")
            .key)
    }

    /// The highest committed seq of a channel: where its rig resumes. On
    /// a shared database the channel is claimed first (a rig asks this
    /// of the server it is about to stream to), so the answer is the
    /// store's, restored if another server wrote last.
    pub async fn resume_point(&self, channel_id: &str) -> Result<Option<u64>, IngestError> {
        let runtime = if self.ownership.is_some() {
            self.take_turn(channel_id).await?.0
        } else {
            self.channel(channel_id)?
        };
        let committed = runtime
            .lock()
            .expect("channel state poisoned")
            .committed_seq;
        Ok(committed)
    }

    /// This server's leases (a shared PostgreSQL database), if any.
    pub fn ownership(&self) -> Option<&Arc<Ownership>> {
        self.ownership.as_ref()
    }

    /// Whether this server may act for the channel now (always, on SQLite).
    pub fn owns(&self, rt: &ChannelRuntime) -> bool {
        match &self.ownership {
            None => true,
            Some(own) => {
                rt.lease_token.is_some()
                    && own.token(&lease::channel_name(rt.key)) == rt.lease_token
            }
        }
    }

    /// The lease a write for this channel is fenced by (shared database).
    pub fn lease_of(&self, rt: &ChannelRuntime) -> Option<(String, i64)> {
        self.ownership.as_ref()?;
        rt.lease_token.map(|t| (lease::channel_name(rt.key), t))
    }

    /// A defined channel's live state; unknown ids are NOT_FOUND.
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
        let def = def.with_default_window(&registry);
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
        // Plain fields and no maps: serde_json cannot refuse it.
        let json = serde_json::to_string(&def).expect("a channel definition serializes");
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
            ocv_model_of_cell: def.e_standard_298_override_v.is_some() || def.n_apparent.is_some(),
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
        historical: bool,
    ) -> Result<Ack, IngestError> {
        check_batch_size(&readings)?;
        let (runtime, _turn) = self.take_turn(channel_id).await?;
        let wall_now = now_ns();
        let ((derived, rejected), lease) = {
            let mut rt = runtime.lock().expect("channel state poisoned");
            // A recording is not the rig speaking: it must not set the
            // silent-rig yardstick (the import's pace would then make a
            // channel with no live rig look silent once the import ends).
            if !historical {
                rt.note_arrival(wall_now);
            }
            let derived = derive_batch(&mut rt, &readings, wall_now);
            (derived, self.lease_of(&rt))
        };
        drop(readings);
        let outcome = match self
            .submit(|reply| Job::Readings(derived.into_job(reply, historical, lease)))
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
            let batch = DerivedBatch {
                channel_key: rt.key,
                run_id: rt.run_id,
                cells_in_series: rt.def.cells_in_series,
                rows: vec![],
                maybe_dup: vec![],
                changes,
                cycles: vec![],
                estimator: Some(snapshot_of(&rt)),
            };
            (batch, self.lease_of(&rt))
        };
        let (job, lease) = job;
        if let Err(e) = self
            .submit(|reply| Job::Readings(job.into_job(reply, false, lease)))
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
                lease: self.lease_of(&rt),
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

    /// Records an operator's action on a channel that changes no live
    /// state of its own (applying an OCV fit, say): in the operator events
    /// of the channel's current run.
    pub async fn note_operator_event(
        &self,
        channel_id: &str,
        kind: &'static str,
        by: &str,
        detail_json: String,
    ) -> Result<(), IngestError> {
        let (runtime, _turn) = self.take_turn(channel_id).await?;
        let change = {
            let rt = runtime.lock().expect("channel state poisoned");
            writer::OperatorChange {
                channel_key: rt.key,
                run_id: rt.run_id,
                time_ns: now_ns(),
                kind,
                by: by.to_string(),
                detail_json,
                estimator: snapshot_of(&rt),
                lease: self.lease_of(&rt),
            }
        };
        if let Err(e) = self.submit(|reply| Job::Operator { change, reply }).await {
            self.reload_after_failure(&runtime).await;
            return Err(e);
        }
        Ok(())
    }

    /// Raises a channel's retention marks as its policy (over `default`)
    /// asks at its current front, stored before the runtime refuses
    /// anything by them. Returns the channel's key and marks in force.
    pub async fn raise_retention(
        &self,
        channel_id: &str,
        default: &RetentionPolicy,
    ) -> Result<(i64, RetentionMarks), IngestError> {
        let (runtime, _turn) = self.take_turn(channel_id).await?;
        let (key, current, wanted) = {
            let rt = runtime.lock().expect("channel state poisoned");
            let policy = rt.def.retention.unwrap_or_default().over(default);
            let wanted = rt.retention.advanced(&policy, rt.last_time_ns);
            (rt.key, rt.retention, wanted)
        };
        if wanted == current {
            return Ok((key, current));
        }
        store::retention::raise_marks(&self.store, key, wanted).await?;
        runtime.lock().expect("channel state poisoned").retention = wanted;
        tracing::info!(
            channel_id,
            raw_before_ns = wanted.raw_before_ns,
            rollup_before_ns = wanted.rollup_before_ns,
            "retention marks raised"
        );
        Ok((key, wanted))
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
        let runtime = self.find_channel(channel_id).await?;
        let gate = runtime
            .lock()
            .expect("channel state poisoned")
            .commit_gate
            .clone();
        let turn = gate.lock_owned().await;
        self.reload_if_needed(&runtime).await?;
        self.claim(&runtime).await?;
        Ok((runtime, turn))
    }

    /// A channel's live state; on a shared database one another server
    /// defined since this one loaded its channels is loaded now.
    async fn find_channel(
        &self,
        channel_id: &str,
    ) -> Result<Arc<Mutex<ChannelRuntime>>, IngestError> {
        match self.channel(channel_id) {
            Err(IngestError::UnknownChannel(_)) if self.ownership.is_some() => {
                if let Some(row) = store::get_channel(&self.store.reader, channel_id).await? {
                    self.insert_loaded(&row).await?;
                }
                self.channel(channel_id)
            }
            found => found,
        }
    }

    /// On a shared database: holds the channel's lease (or says who
    /// does), and restores its state from the store when the lease is new
    /// to this state (first use here, or another server wrote since).
    async fn claim(&self, runtime: &Mutex<ChannelRuntime>) -> Result<(), IngestError> {
        let Some(own) = &self.ownership else {
            return Ok(());
        };
        let (key, channel_id, held) = {
            let rt = runtime.lock().expect("channel state poisoned");
            (rt.key, rt.def.channel_id.clone(), rt.lease_token)
        };
        let token = match own.claim(&lease::channel_name(key), &channel_id).await {
            Ok(token) => token,
            Err(Ok(elsewhere)) => return Err(elsewhere.into()),
            Err(Err(e)) => return Err(e.into()),
        };
        if held != Some(token) {
            self.reload(runtime).await?;
            let mut rt = runtime.lock().expect("channel state poisoned");
            rt.lease_token = Some(token);
            // The silent-rig clock starts at the takeover: the last
            // arrival another server saw is not known here.
            rt.last_arrival_wall_ns = now_ns();
            tracing::info!(%channel_id, token, committed_seq = ?rt.committed_seq, "channel taken over: state restored from the store");
        }
        Ok(())
    }

    /// A shared database: loads channels other servers defined, re-reads
    /// the state of channels owned elsewhere (what state queries and the
    /// console show here), and reloads an owned channel another server
    /// redefined (PutChannel or new rules there), skipping any whose gate
    /// is busy.
    pub async fn refresh_from_store(&self) -> Result<(), IngestError> {
        let rows = store::list_channels(&self.store.reader).await?;
        for row in rows {
            let Ok(runtime) = self.channel(&row.channel_id) else {
                self.insert_loaded(&row).await?;
                continue;
            };
            let gate = runtime
                .lock()
                .expect("channel state poisoned")
                .commit_gate
                .clone();
            let Ok(_turn) = gate.try_lock_owned() else {
                continue;
            };
            let current = {
                let rt = runtime.lock().expect("channel state poisoned");
                self.owns(&rt) && !redefined(&rt, &row)
            };
            if !current {
                self.reload(&runtime).await?;
            }
        }
        Ok(())
    }

    /// Adds a stored channel this server has not loaded yet.
    async fn insert_loaded(&self, row: &store::ChannelRow) -> Result<(), IngestError> {
        let registry = self.registry.read().expect("registry poisoned").clone();
        let mut runtime = load_runtime(&self.store, &registry, row).await?;
        runtime.limits = self.limits;
        self.channels
            .write()
            .expect("channel map poisoned")
            .entry(row.channel_id.clone())
            .or_insert_with(|| Arc::new(Mutex::new(runtime)));
        Ok(())
    }

    /// After renewal found leases lost: the channels they cover are no
    /// longer this server's (their next use here claims and restores).
    pub fn drop_leases(&self, lost: &[String]) {
        for (channel_id, rt) in self.runtimes() {
            let mut g = rt.lock().expect("channel state poisoned");
            if lost.contains(&lease::channel_name(g.key)) {
                tracing::warn!(%channel_id, "lease lost: another server owns the channel now");
                g.lease_token = None;
            }
        }
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
        let row = store::get_channel(self.store.state_pool(), &channel_id)
            .await?
            .ok_or_else(|| StoreError::Corrupt(format!("channel {channel_id} vanished")))?;
        let registry = self.registry.read().expect("registry poisoned").clone();
        let mut fresh = load_runtime(&self.store, &registry, &row).await?;
        let mut rt = runtime.lock().expect("channel state poisoned");
        fresh.commit_gate = rt.commit_gate.clone();
        fresh.limits = rt.limits;
        fresh.last_arrival_wall_ns = rt.last_arrival_wall_ns;
        fresh.usual_arrival_interval_s = rt.usual_arrival_interval_s;
        fresh.lease_token = rt.lease_token;
        *rt = fresh;
        Ok(())
    }
}

/// Whether the stored definition, run or rules of a channel differ from
/// what its runtime holds (compared as values: a reload of an owned
/// channel costs its rules' hold timers, so only a real change may cause
/// one).
fn redefined(rt: &ChannelRuntime, row: &store::ChannelRow) -> bool {
    let def_differs =
        serde_json::from_str::<ChannelDef>(&row.definition_json).is_ok_and(|def| def != rt.def);
    let rules_differ = row
        .rules_json
        .as_deref()
        .and_then(|json| serde_json::from_str::<AlertRules>(json).ok())
        .is_some_and(|rules| rules != rt.rules);
    rt.run_id != row.current_run_id || def_differs || rules_differ
}

impl DerivedBatch {
    fn into_job(
        self,
        reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
        historical: bool,
        lease: Option<(String, i64)>,
    ) -> ReadingsJob {
        ReadingsJob {
            channel_key: self.channel_key,
            run_id: self.run_id,
            cells_in_series: self.cells_in_series,
            rows: self.rows,
            maybe_dup: self.maybe_dup,
            changes: self.changes,
            cycles: self.cycles,
            estimator: self.estimator,
            historical,
            lease,
            reply,
        }
    }
}

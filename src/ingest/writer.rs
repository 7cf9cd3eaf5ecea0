//! The single writer: drains the job queue, commits many jobs in one
//! transaction (group commit), then answers each job and publishes alert
//! events. Being the only writer, it hands out alert and event ids in
//! commit order.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use crate::alerts::{AlertChange, RaisedAlert};
use crate::estimator::CycleRecord;
use crate::store::{self, AlertEvent, ReadingRow, Store, StoreError};
use tokio::sync::{broadcast, mpsc, oneshot};

/// Jobs queued to the writer at most; senders wait when it is full. Each
/// ingest stream has at most one job in flight, so the open-stream limit
/// (`MAX_INGEST_STREAMS`) bounds the queue in practice; this is the backstop.
pub const WRITER_QUEUE_JOBS: usize = 128;
/// Rows per transaction at most: bigger commits amortise the fsync, but
/// delay every ack in them.
const MAX_ROWS_PER_COMMIT: usize = 50_000;

pub struct EstimatorSnapshot {
    pub last_seq: u64,
    pub last_time_ns: i64,
    pub usual_interval_s: f64,
    pub state_json: String,
}

pub struct ReadingsJob {
    pub channel_key: i64,
    pub run_id: i64,
    /// Cells in series of the run: the rollups' per-cell driving force.
    pub cells_in_series: u32,
    pub rows: Vec<ReadingRow>,
    pub maybe_dup: Vec<ReadingRow>,
    pub changes: Vec<AlertChange>,
    pub cycles: Vec<CycleRecord>,
    pub estimator: Option<EstimatorSnapshot>,
    /// From a recording: its alerts are stored historical.
    pub historical: bool,
    /// Shared database: the lease (name, fencing token) the rows were
    /// derived under; the write is refused if it moved on.
    pub lease: Option<(String, i64)>,
    pub reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
}

/// An operator's change to a channel's state and its record, committed
/// together.
pub struct OperatorChange {
    pub channel_key: i64,
    pub run_id: i64,
    pub time_ns: i64,
    pub kind: &'static str,
    pub by: String,
    pub detail_json: String,
    pub estimator: EstimatorSnapshot,
    /// As [`ReadingsJob::lease`].
    pub lease: Option<(String, i64)>,
}

pub enum Job {
    Operator {
        change: OperatorChange,
        reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
    },
    Readings(ReadingsJob),
    /// Silent-rig alerts from the timer.
    Alerts {
        channel_key: i64,
        run_id: i64,
        raised: Vec<RaisedAlert>,
        /// As [`ReadingsJob::lease`].
        lease: Option<(String, i64)>,
        reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
    },
    Acknowledge {
        alert_id: u64,
        by: String,
        note: String,
        time_ns: i64,
        reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
    },
    /// One retention step: at most `limit` rows below a mark (the count
    /// comes back in `WriteOutcome::pruned`).
    Prune {
        channel_key: i64,
        what: store::retention::Pruned,
        before_ns: i64,
        limit: u32,
        reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
    },
    /// One attempt to deliver an alert event to a notify target.
    Delivery {
        target: String,
        event_id: u64,
        attempt: store::outbox::Attempt,
        reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
    },
    /// One compaction step: small chunks of a channel merged, about
    /// `limit` readings rewritten at most (the count comes back in
    /// `WriteOutcome::compacted`).
    Compact {
        channel_key: i64,
        limit: u32,
        reply: oneshot::Sender<Result<WriteOutcome, StoreError>>,
    },
}

#[derive(Debug, Clone, Default)]
pub struct WriteOutcome {
    pub fresh_inserted: u64,
    pub late_inserted: u64,
    pub duplicates: u64,
    pub events: Vec<AlertEvent>,
    /// Rows a retention step deleted.
    pub pruned: u64,
    /// Readings a compaction step rewrote.
    pub compacted: u64,
}

struct Ids {
    next_alert_id: u64,
    next_event_id: u64,
}

/// Commits jobs until the queue closes or `stop` turns true; on stop, the
/// jobs already queued are committed and answered, later ones are refused
/// (their senders see the queue closed: not acknowledged, so resent).
///
/// With `owner` (several servers on one PostgreSQL database, this one's
/// lease owner id) each group commit checks its jobs' leases in its own
/// transaction, takes alert and event ids under the database-wide lock,
/// and leaves publishing events to the relay, which reads every server's
/// from the store in id order.
pub async fn run(
    store: Store,
    mut jobs: mpsc::Receiver<Job>,
    events: broadcast::Sender<AlertEvent>,
    metrics: std::sync::Arc<crate::metrics::Metrics>,
    stop: tokio::sync::watch::Receiver<bool>,
    owner: Option<String>,
) -> Result<(), StoreError> {
    let (next_alert_id, next_event_id) = store::next_ids(&store.writer).await?;
    let mut ids = Ids {
        next_alert_id,
        next_event_id,
    };
    loop {
        let first = tokio::select! {
            job = jobs.recv() => job,
            () = super::stopped(stop.clone()) => {
                jobs.close();
                jobs.recv().await
            }
        };
        let Some(first) = first else { break };
        let batch = gather(first, &mut jobs);
        let publish = owner.is_none().then_some(&events);
        commit_and_answer(&store, &mut ids, batch, publish, &metrics, owner.as_deref()).await;
    }
    Ok(())
}

/// The first job and whatever else is queued, up to the commit size.
fn gather(first: Job, jobs: &mut mpsc::Receiver<Job>) -> Vec<Job> {
    let mut rows = job_rows(&first);
    let mut batch = vec![first];
    while rows < MAX_ROWS_PER_COMMIT {
        match jobs.try_recv() {
            Ok(job) => {
                rows += job_rows(&job);
                batch.push(job);
            }
            Err(_) => break,
        }
    }
    batch
}

/// One group commit; each job is answered after it, events published.
/// Jobs whose lease moved on are refused and the rest committed without
/// them.
async fn commit_and_answer(
    store: &Store,
    ids: &mut Ids,
    mut batch: Vec<Job>,
    events: Option<&broadcast::Sender<AlertEvent>>,
    metrics: &crate::metrics::Metrics,
    owner: Option<&str>,
) {
    loop {
        let saved = (ids.next_alert_id, ids.next_event_id);
        let started = std::time::Instant::now();
        let result = commit(store, ids, &batch, owner).await;
        if result.is_err() {
            ids.next_alert_id = saved.0;
            ids.next_event_id = saved.1;
        }
        match result {
            Ok(outcomes) => {
                metrics.observe_commit(started.elapsed().as_secs_f64());
                answer(batch, outcomes, events, metrics);
                return;
            }
            Err(StoreError::Fenced(names)) => {
                let (fenced, rest): (Vec<Job>, Vec<Job>) = batch
                    .into_iter()
                    .partition(|j| job_lease(j).is_some_and(|(n, _)| names.contains(n)));
                tracing::warn!(leases = ?names, jobs = fenced.len(), "writes refused: leases lost");
                for job in fenced {
                    let _ = reply_of(job).send(Err(StoreError::Fenced(names.clone())));
                }
                if rest.is_empty() {
                    return;
                }
                batch = rest;
            }
            Err(e) => {
                tracing::error!(error = %e, jobs = batch.len(), "commit failed");
                for job in batch {
                    let _ = reply_of(job).send(Err(e.replicate()));
                }
                return;
            }
        }
    }
}

/// Answers each job of a committed group and publishes its events.
fn answer(
    batch: Vec<Job>,
    outcomes: Vec<WriteOutcome>,
    events: Option<&broadcast::Sender<AlertEvent>>,
    metrics: &crate::metrics::Metrics,
) {
    for (job, outcome) in batch.into_iter().zip(outcomes) {
        for event in &outcome.events {
            if event.kind == store::EventKind::Raised {
                metrics.alert_raised(event.alert.kind.code());
            }
            // No subscriber is fine; a lagging one is told by the channel.
            if let Some(events) = events {
                let _ = events.send(event.clone());
            }
        }
        let _ = reply_of(job).send(Ok(outcome));
    }
}

/// The lease a job's write depends on, if any.
fn job_lease(job: &Job) -> Option<&(String, i64)> {
    match job {
        Job::Readings(r) => r.lease.as_ref(),
        Job::Operator { change, .. } => change.lease.as_ref(),
        Job::Alerts { lease, .. } => lease.as_ref(),
        _ => None,
    }
}

/// Whether a job may store alert events.
fn may_store_events(job: &Job) -> bool {
    match job {
        Job::Readings(r) => !r.changes.is_empty(),
        Job::Alerts { .. } | Job::Acknowledge { .. } => true,
        _ => false,
    }
}

fn job_rows(job: &Job) -> usize {
    match job {
        Job::Readings(r) => r.rows.len() + r.maybe_dup.len(),
        Job::Prune { limit, .. } | Job::Compact { limit, .. } => *limit as usize,
        _ => 1,
    }
}

fn reply_of(job: Job) -> oneshot::Sender<Result<WriteOutcome, StoreError>> {
    match job {
        Job::Readings(r) => r.reply,
        Job::Alerts { reply, .. }
        | Job::Acknowledge { reply, .. }
        | Job::Operator { reply, .. }
        | Job::Prune { reply, .. }
        | Job::Compact { reply, .. }
        | Job::Delivery { reply, .. } => reply,
    }
}

/// Writes a group of jobs in one transaction; `Ok` only once committed.
async fn commit(
    store: &Store,
    ids: &mut Ids,
    batch: &[Job],
    owner: Option<&str>,
) -> Result<Vec<WriteOutcome>, StoreError> {
    store
        .write(async |tx| {
            if let Some(owner) = owner {
                fence(tx, owner, ids, batch).await?;
            }
            let outcomes = write_jobs(tx, ids, batch).await?;
            if owner.is_some() && outcomes.iter().any(|o| !o.events.is_empty()) {
                store::lease::notify_events(tx).await?;
            }
            Ok(outcomes)
        })
        .await
}

/// Shared database: refuses the group (naming the leases) if a job's
/// lease moved on, and takes the next alert and event ids under the
/// database-wide lock when the group may store events.
async fn fence(
    tx: &mut store::Tx<'_>,
    owner: &str,
    ids: &mut Ids,
    batch: &[Job],
) -> Result<(), StoreError> {
    let mut held: Vec<(String, i64)> = batch.iter().filter_map(job_lease).cloned().collect();
    held.sort();
    held.dedup();
    let fenced = store::lease::fenced_out(tx, owner, &held).await?;
    if !fenced.is_empty() {
        return Err(StoreError::Fenced(fenced));
    }
    if batch.iter().any(may_store_events) {
        let (alert, event) = store::lease::next_ids_locked(tx).await?;
        ids.next_alert_id = alert;
        ids.next_event_id = event;
    }
    Ok(())
}

async fn write_jobs(
    tx: &mut store::Tx<'_>,
    ids: &mut Ids,
    batch: &[Job],
) -> Result<Vec<WriteOutcome>, StoreError> {
    let mut outcomes = Vec::with_capacity(batch.len());
    for job in batch {
        let mut out = WriteOutcome::default();
        match job {
            Job::Readings(r) => write_readings(tx, ids, r, &mut out).await?,
            Job::Alerts {
                channel_key,
                run_id,
                raised,
                ..
            } => {
                for a in raised {
                    out.events
                        .push(raise(tx, ids, *channel_key, *run_id, a, false).await?);
                }
            }
            Job::Operator { change, .. } => write_operator(tx, change).await?,
            Job::Acknowledge {
                alert_id,
                by,
                note,
                time_ns,
                ..
            } => {
                let event =
                    store::acknowledge_alert(tx, ids.next_event_id, *alert_id, by, note, *time_ns)
                        .await?;
                if let Some(ev) = event {
                    ids.next_event_id += 1;
                    out.events.push(ev);
                }
            }
            Job::Prune {
                channel_key,
                what,
                before_ns,
                limit,
                ..
            } => {
                out.pruned =
                    store::retention::prune(tx, *channel_key, *what, *before_ns, *limit).await?;
            }
            Job::Delivery {
                target,
                event_id,
                attempt,
                ..
            } => store::outbox::record(tx, target, *event_id, attempt).await?,
            Job::Compact {
                channel_key, limit, ..
            } => {
                out.compacted = store::chunks::compact(tx, *channel_key, u64::from(*limit)).await?;
            }
        }
        outcomes.push(out);
    }
    Ok(outcomes)
}

/// One batch's rows, alert changes, closed cycles and estimator snapshot.
async fn write_readings(
    tx: &mut store::Tx<'_>,
    ids: &mut Ids,
    r: &ReadingsJob,
    out: &mut WriteOutcome,
) -> Result<(), StoreError> {
    let fresh = store::insert_new(tx, &r.rows).await?;
    out.fresh_inserted = fresh.iter().filter(|n| **n).count() as u64;
    // A fresh row can only collide if two streams raced on a channel;
    // count it as the duplicate it is.
    out.duplicates += r.rows.len() as u64 - out.fresh_inserted;
    // Rollups in the same transaction: a crash can't leave them out of
    // step with the readings they summarise. Fresh rows add to their
    // buckets; if one met a stored row, its buckets are recomputed.
    let mut recompute: Vec<i64> = Vec::new();
    if out.fresh_inserted == r.rows.len() as u64 {
        store::rollup::add_fresh(tx, r.channel_key, r.cells_in_series, &r.rows).await?;
    } else {
        recompute.extend(r.rows.iter().map(|row| row.time_ns));
    }
    let late = store::insert_new(tx, &r.maybe_dup).await?;
    for (row, new) in r.maybe_dup.iter().zip(late) {
        if new {
            out.late_inserted += 1;
            recompute.push(row.time_ns);
        } else {
            out.duplicates += 1;
        }
    }
    store::rollup::refresh(tx, r.channel_key, &recompute).await?;
    for change in &r.changes {
        let event = match change {
            AlertChange::Raise(a) => {
                Some(raise(tx, ids, r.channel_key, r.run_id, a, r.historical).await?)
            }
            AlertChange::Clear { kind, time_ns } => {
                let event =
                    store::clear_alert(tx, ids.next_event_id, r.channel_key, *kind, *time_ns)
                        .await?;
                if event.is_some() {
                    ids.next_event_id += 1;
                }
                event
            }
        };
        out.events.extend(event);
    }
    for c in &r.cycles {
        let json = serde_json::to_string(c).unwrap_or_default();
        store::insert_cycle(tx, r.channel_key, r.run_id, c.index, &json).await?;
    }
    if let Some(s) = &r.estimator {
        save_snapshot(tx, r.channel_key, r.run_id, s).await?;
    }
    Ok(())
}

/// Raises one alert with the next alert and event ids.
async fn raise(
    tx: &mut store::Tx<'_>,
    ids: &mut Ids,
    channel_key: i64,
    run_id: i64,
    alert: &RaisedAlert,
    historical: bool,
) -> Result<AlertEvent, StoreError> {
    let event = store::raise_alert(
        tx,
        ids.next_alert_id,
        ids.next_event_id,
        channel_key,
        run_id,
        alert,
        historical,
    )
    .await?;
    ids.next_alert_id += 1;
    ids.next_event_id += 1;
    Ok(event)
}

/// An operator's change, with the estimator snapshot it leaves behind.
async fn write_operator(tx: &mut store::Tx<'_>, c: &OperatorChange) -> Result<(), StoreError> {
    store::insert_operator_event(
        tx,
        c.channel_key,
        c.run_id,
        c.time_ns,
        c.kind,
        &c.by,
        &c.detail_json,
    )
    .await?;
    save_snapshot(tx, c.channel_key, c.run_id, &c.estimator).await
}

async fn save_snapshot(
    tx: &mut store::Tx<'_>,
    channel_key: i64,
    run_id: i64,
    s: &EstimatorSnapshot,
) -> Result<(), StoreError> {
    store::save_estimator(
        tx,
        channel_key,
        run_id,
        s.last_seq,
        s.last_time_ns,
        s.usual_interval_s,
        &s.state_json,
    )
    .await
}

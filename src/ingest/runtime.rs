//! One channel's live state, and how it is rebuilt from the store.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use super::IngestError;
use super::IngestLimits;
use crate::alerts::{AlertRules, ChannelRuleState};
use crate::channel::ChannelDef;
use crate::electrochem::{Chemistry, Registry};
use crate::estimator::{EstimatorConfig, EstimatorState};
use crate::retention::RetentionMarks;
use crate::store::{self, Store};
use std::sync::Arc;

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
    /// Where the channel's kept history begins: readings stamped before
    /// the raw mark are refused (their bucket could not be recomputed).
    pub retention: RetentionMarks,
    /// On a shared PostgreSQL database: the fencing token of the lease
    /// this state was restored or derived under (`None`: not owned here;
    /// a different token means another server wrote in between and the
    /// state is reloaded before use).
    pub lease_token: Option<i64>,
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
            retention: RetentionMarks::default(),
            lease_token: None,
        }
    }

    /// Notes a batch's arrival by the server's clock (the silent-rig yardstick).
    pub(crate) fn note_arrival(&mut self, wall_now_ns: i64) {
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

/// Builds a channel's runtime from its stored row (at start or on PutChannel).
pub async fn load_runtime(
    store: &Store,
    registry: &Registry,
    row: &store::ChannelRow,
) -> Result<ChannelRuntime, IngestError> {
    let unusable = |part: &'static str, reason: String| IngestError::StoredUnusable {
        channel_id: row.channel_id.clone(),
        part,
        reason,
    };
    let def: ChannelDef = serde_json::from_str(&row.definition_json)
        .map_err(|e| unusable("definition", e.to_string()))?;
    let chemistry = def
        .validate(registry)
        .map_err(|e| unusable("definition", e.to_string()))?;
    let rules = match &row.rules_json {
        Some(json) => {
            serde_json::from_str(json).map_err(|e| unusable("alert rules", e.to_string()))?
        }
        None => AlertRules::for_chemistry(&chemistry),
    };
    let resume = store::load_resume_state(store.state_pool(), row.channel_key).await?;
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
        retention: resume.marks,
        lease_token: None,
    }
}

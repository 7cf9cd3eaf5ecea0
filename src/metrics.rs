//! Counters for the Prometheus text endpoint. Plain atomics: updating one
//! costs a relaxed add on the hot path, and nothing here ever blocks.

use std::fmt::Write;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering::Relaxed};

/// Upper bounds of the commit-latency histogram, seconds.
const COMMIT_BUCKETS_S: [f64; 10] = [0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0];
/// Rejection reasons that get their own series (the field that was wrong).
pub const REJECT_FIELDS: [&str; 6] = ["volts", "amps", "temp_c", "time_unix_ns", "seq", "other"];
const ALERT_KIND_NAMES: [&str; 8] = [
    "equilibrium_approach",
    "end_of_charge",
    "end_of_discharge",
    "rest_settled",
    "voltage_limit",
    "current_limit",
    "temperature_limit",
    "silent_rig",
];

#[derive(Debug, Default)]
pub struct Metrics {
    pub readings_accepted: AtomicU64,
    pub readings_duplicate: AtomicU64,
    pub readings_out_of_order: AtomicU64,
    pub rejected: [AtomicU64; 6],
    pub batches_refused: AtomicU64,
    pub commits: AtomicU64,
    commit_buckets: [AtomicU64; 10],
    commit_sum_us: AtomicU64,
    pub alerts_raised: [AtomicU64; 8],
    pub subscribers: AtomicU64,
    pub ingest_streams: AtomicU64,
}

/// One taken place of a bounded gauge (open streams, subscribers), given
/// back when dropped, however the holder ends.
pub struct Slot {
    metrics: Arc<Metrics>,
    gauge: fn(&Metrics) -> &AtomicU64,
}

impl Drop for Slot {
    fn drop(&mut self) {
        (self.gauge)(&self.metrics).fetch_sub(1, Relaxed);
    }
}

impl Metrics {
    /// Takes a place of `gauge` if fewer than `limit` are taken.
    pub fn take_slot(
        self: &Arc<Metrics>,
        gauge: fn(&Metrics) -> &AtomicU64,
        limit: u64,
    ) -> Option<Slot> {
        let previous = gauge(self).fetch_add(1, Relaxed);
        let slot = Slot {
            metrics: self.clone(),
            gauge,
        };
        (previous < limit).then_some(slot)
    }

    pub fn reject(&self, field: &str) {
        let i = REJECT_FIELDS
            .iter()
            .position(|f| *f == field)
            .unwrap_or(REJECT_FIELDS.len() - 1);
        self.rejected[i].fetch_add(1, Relaxed);
    }

    pub fn observe_commit(&self, seconds: f64) {
        self.commits.fetch_add(1, Relaxed);
        self.commit_sum_us
            .fetch_add((seconds * 1e6) as u64, Relaxed);
        for (i, bound) in COMMIT_BUCKETS_S.iter().enumerate() {
            if seconds <= *bound {
                self.commit_buckets[i].fetch_add(1, Relaxed);
            }
        }
    }

    pub fn alert_raised(&self, kind_code: i64) {
        if let Some(c) = usize::try_from(kind_code - 1)
            .ok()
            .and_then(|i| self.alerts_raised.get(i))
        {
            c.fetch_add(1, Relaxed);
        }
    }

    /// Prometheus text exposition format 0.0.4.
    pub fn render(&self, queue_depth: usize, channel_ages_s: &[(String, f64)]) -> String {
        let mut o = String::new();
        let counter = |o: &mut String, name: &str, help: &str, v: u64| {
            let _ = writeln!(o, "# HELP {name} {help}\n# TYPE {name} counter\n{name} {v}");
        };
        counter(
            &mut o,
            "gibbsline_readings_accepted_total",
            "Readings stored.",
            self.readings_accepted.load(Relaxed),
        );
        counter(
            &mut o,
            "gibbsline_readings_duplicate_total",
            "Readings already stored (resends).",
            self.readings_duplicate.load(Relaxed),
        );
        counter(
            &mut o,
            "gibbsline_readings_out_of_order_total",
            "Late readings stored and flagged.",
            self.readings_out_of_order.load(Relaxed),
        );
        counter(
            &mut o,
            "gibbsline_batches_refused_total",
            "Batches refused whole (unknown channel, empty, too large).",
            self.batches_refused.load(Relaxed),
        );
        let _ = writeln!(
            o,
            "# HELP gibbsline_readings_rejected_total Readings rejected, by the field at fault.\n# TYPE gibbsline_readings_rejected_total counter"
        );
        for (i, f) in REJECT_FIELDS.iter().enumerate() {
            let _ = writeln!(
                o,
                "gibbsline_readings_rejected_total{{field=\"{f}\"}} {}",
                self.rejected[i].load(Relaxed)
            );
        }
        let _ = writeln!(
            o,
            "# HELP gibbsline_alerts_raised_total Alerts raised, by kind.\n# TYPE gibbsline_alerts_raised_total counter"
        );
        for (i, k) in ALERT_KIND_NAMES.iter().enumerate() {
            let _ = writeln!(
                o,
                "gibbsline_alerts_raised_total{{kind=\"{k}\"}} {}",
                self.alerts_raised[i].load(Relaxed)
            );
        }
        let _ = writeln!(
            o,
            "# HELP gibbsline_commit_seconds Writer transaction latency.\n# TYPE gibbsline_commit_seconds histogram"
        );
        for (i, b) in COMMIT_BUCKETS_S.iter().enumerate() {
            let _ = writeln!(
                o,
                "gibbsline_commit_seconds_bucket{{le=\"{b}\"}} {}",
                self.commit_buckets[i].load(Relaxed)
            );
        }
        let commits = self.commits.load(Relaxed);
        let _ = writeln!(
            o,
            "gibbsline_commit_seconds_bucket{{le=\"+Inf\"}} {commits}"
        );
        let _ = writeln!(
            o,
            "gibbsline_commit_seconds_sum {}",
            self.commit_sum_us.load(Relaxed) as f64 / 1e6
        );
        let _ = writeln!(o, "gibbsline_commit_seconds_count {commits}");
        let gauge = |o: &mut String, name: &str, help: &str, v: f64| {
            let _ = writeln!(o, "# HELP {name} {help}\n# TYPE {name} gauge\n{name} {v}");
        };
        gauge(
            &mut o,
            "gibbsline_writer_queue_depth",
            "Jobs waiting for the writer.",
            queue_depth as f64,
        );
        gauge(
            &mut o,
            "gibbsline_alert_subscribers",
            "Open WatchAlerts streams.",
            self.subscribers.load(Relaxed) as f64,
        );
        gauge(
            &mut o,
            "gibbsline_ingest_streams",
            "Open StreamReadings streams.",
            self.ingest_streams.load(Relaxed) as f64,
        );
        let _ = writeln!(
            o,
            "# HELP gibbsline_channel_last_seen_age_seconds Seconds since a channel's last batch arrived.\n# TYPE gibbsline_channel_last_seen_age_seconds gauge"
        );
        for (id, age) in channel_ages_s {
            let _ = writeln!(
                o,
                "gibbsline_channel_last_seen_age_seconds{{channel_id=\"{id}\"}} {age}"
            );
        }
        o
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn renders_counters_and_histogram() {
        let m = Metrics::default();
        m.readings_accepted.fetch_add(5, Relaxed);
        m.reject("volts");
        m.reject("nonsense");
        m.observe_commit(0.004);
        m.alert_raised(2);
        let text = m.render(3, &[("hl-vrb-1".into(), 1.5)]);
        for line in [
            "gibbsline_readings_accepted_total 5",
            "gibbsline_readings_rejected_total{field=\"volts\"} 1",
            "gibbsline_readings_rejected_total{field=\"other\"} 1",
            "gibbsline_commit_seconds_bucket{le=\"0.002\"} 0",
            "gibbsline_commit_seconds_bucket{le=\"0.005\"} 1",
            "gibbsline_alerts_raised_total{kind=\"end_of_charge\"} 1",
            "gibbsline_writer_queue_depth 3",
            "gibbsline_channel_last_seen_age_seconds{channel_id=\"hl-vrb-1\"} 1.5",
        ] {
            assert!(text.contains(line), "missing {line}\n{text}");
        }
    }
}

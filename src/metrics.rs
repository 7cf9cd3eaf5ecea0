//! Counters for the Prometheus text endpoint. Plain atomics: updating one
//! costs a relaxed add on the hot path, and nothing here ever blocks.

use std::fmt::Write;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering::Relaxed};

/// Upper bounds of the commit-latency histogram, seconds.
const COMMIT_BUCKETS_S: [f64; 10] = [0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0];
/// Rejection reasons that get their own series (the field that was wrong).
pub const REJECT_FIELDS: [&str; 6] = ["volts", "amps", "temp_c", "time_unix_ns", "seq", "other"];
/// Indexed by alert kind code − 1 (the proto's numbering).
const ALERT_KIND_NAMES: [&str; 11] = [
    "equilibrium_approach",
    "end_of_charge",
    "end_of_discharge",
    "rest_settled",
    "voltage_limit",
    "current_limit",
    "temperature_limit",
    "silent_rig",
    "timeline",
    "driving_force_spent",
    "ocv_model_mismatch",
];

/// The server's counters and gauges, shared by every task and read by
/// `/metrics`. Relaxed atomics: each figure is exact, their sum is a
/// snapshot of moments a few microseconds apart.
#[derive(Debug, Default)]
pub struct Metrics {
    /// Readings stored (fresh and late).
    pub readings_accepted: AtomicU64,
    /// Readings already stored (a resend after a lost ack).
    pub readings_duplicate: AtomicU64,
    /// Readings stored behind the channel's front.
    pub readings_out_of_order: AtomicU64,
    /// Readings refused, by the field that was wrong (`REJECT_FIELDS`).
    pub rejected: [AtomicU64; 6],
    /// Whole batches refused (unknown channel, too large, shutting down).
    pub batches_refused: AtomicU64,
    /// Group commits done by the writer.
    pub commits: AtomicU64,
    commit_buckets: [AtomicU64; 10],
    commit_sum_us: AtomicU64,
    /// Alerts raised, by kind (`ALERT_KIND_NAMES`).
    pub alerts_raised: [AtomicU64; 10],
    /// `WatchAlerts` streams open now.
    pub subscribers: AtomicU64,
    /// `StreamReadings` streams open now.
    pub ingest_streams: AtomicU64,
    /// Raw readings deleted by retention.
    pub pruned_readings: AtomicU64,
    /// 10 s and 1 min rollups deleted by retention.
    pub pruned_rollups: AtomicU64,
    /// Pruning passes finished.
    pub prune_passes: AtomicU64,
    /// Readings rewritten by compaction (small chunks merged).
    pub compacted_readings: AtomicU64,
    /// Alert deliveries (webhook, MQTT) the target took.
    pub deliveries_ok: AtomicU64,
    /// Alert delivery attempts that failed (each is retried).
    pub deliveries_failed: AtomicU64,
    delivery_latency_sum_us: AtomicU64,
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

    /// Counts one reading refused for `field` (unknown fields count as `other`).
    pub fn reject(&self, field: &str) {
        let i = REJECT_FIELDS
            .iter()
            .position(|f| *f == field)
            .unwrap_or(REJECT_FIELDS.len() - 1);
        self.rejected[i].fetch_add(1, Relaxed);
    }

    /// Counts one commit and puts its duration in the histogram.
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

    /// Counts one raised alert of the kind with this wire code.
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
        self.render_counters(&mut o);
        labelled(
            &mut o,
            "gibbsline_readings_rejected_total",
            "Readings rejected, by the field at fault.",
            "field",
            &REJECT_FIELDS,
            &self.rejected,
        );
        labelled(
            &mut o,
            "gibbsline_alerts_raised_total",
            "Alerts raised, by kind.",
            "kind",
            &ALERT_KIND_NAMES,
            &self.alerts_raised,
        );
        self.render_commits(&mut o);
        self.render_gauges(&mut o, queue_depth, channel_ages_s);
        o
    }

    /// The plain counters, one family each.
    fn render_counters(&self, o: &mut String) {
        family(
            o,
            "gibbsline_alert_delivery_seconds_sum",
            "Seconds from an event's commit to its delivery, summed over deliveries (divide by gibbsline_alert_deliveries_total).",
            "counter",
        );
        let _ = writeln!(
            o,
            "gibbsline_alert_delivery_seconds_sum {}",
            self.delivery_latency_sum_us.load(Relaxed) as f64 / 1e6
        );
        for (name, help, counter) in [
            (
                "gibbsline_readings_accepted_total",
                "Readings stored.",
                &self.readings_accepted,
            ),
            (
                "gibbsline_readings_duplicate_total",
                "Readings already stored (resends).",
                &self.readings_duplicate,
            ),
            (
                "gibbsline_readings_out_of_order_total",
                "Late readings stored and flagged.",
                &self.readings_out_of_order,
            ),
            (
                "gibbsline_batches_refused_total",
                "Batches refused whole (unknown channel, empty, too large).",
                &self.batches_refused,
            ),
            (
                "gibbsline_pruned_readings_total",
                "Raw readings deleted by retention.",
                &self.pruned_readings,
            ),
            (
                "gibbsline_pruned_rollups_total",
                "10 s and 1 min rollups deleted by retention.",
                &self.pruned_rollups,
            ),
            (
                "gibbsline_prune_passes_total",
                "Retention passes finished.",
                &self.prune_passes,
            ),
            (
                "gibbsline_compacted_readings_total",
                "Readings rewritten when small chunks were merged.",
                &self.compacted_readings,
            ),
            (
                "gibbsline_alert_deliveries_total",
                "Alert events delivered to a webhook or the MQTT broker.",
                &self.deliveries_ok,
            ),
            (
                "gibbsline_alert_delivery_failures_total",
                "Alert delivery attempts that failed (retried with backoff).",
                &self.deliveries_failed,
            ),
        ] {
            family(o, name, help, "counter");
            let _ = writeln!(o, "{name} {}", counter.load(Relaxed));
        }
    }

    /// Notes how long a delivered event waited from its commit.
    pub fn note_delivery_latency(&self, ns: i64) {
        self.delivery_latency_sum_us
            .fetch_add((ns.max(0) / 1_000) as u64, Relaxed);
    }

    /// Queue depth, open streams and subscribers, each channel's age.
    fn render_gauges(&self, o: &mut String, queue_depth: usize, channel_ages_s: &[(String, f64)]) {
        for (name, help, v) in [
            (
                "gibbsline_writer_queue_depth",
                "Jobs waiting for the writer.",
                queue_depth as u64,
            ),
            (
                "gibbsline_alert_subscribers",
                "Open WatchAlerts streams.",
                self.subscribers.load(Relaxed),
            ),
            (
                "gibbsline_ingest_streams",
                "Open StreamReadings streams.",
                self.ingest_streams.load(Relaxed),
            ),
        ] {
            family(o, name, help, "gauge");
            let _ = writeln!(o, "{name} {v}");
        }
        let name = "gibbsline_channel_last_seen_age_seconds";
        family(
            o,
            name,
            "Seconds since a channel's last batch arrived.",
            "gauge",
        );
        for (id, age) in channel_ages_s {
            let _ = writeln!(o, "{name}{{channel_id=\"{id}\"}} {age}");
        }
    }

    /// The commit-latency histogram (cumulative buckets, sum, count).
    fn render_commits(&self, o: &mut String) {
        let name = "gibbsline_commit_seconds";
        family(o, name, "Writer transaction latency.", "histogram");
        for (b, count) in COMMIT_BUCKETS_S.iter().zip(&self.commit_buckets) {
            let _ = writeln!(o, "{name}_bucket{{le=\"{b}\"}} {}", count.load(Relaxed));
        }
        let commits = self.commits.load(Relaxed);
        let _ = writeln!(o, "{name}_bucket{{le=\"+Inf\"}} {commits}");
        let sum_s = self.commit_sum_us.load(Relaxed) as f64 / 1e6;
        let _ = writeln!(o, "{name}_sum {sum_s}");
        let _ = writeln!(o, "{name}_count {commits}");
    }
}

/// A metric family's HELP and TYPE lines.
/// The database's size on disk: file and write-ahead log, bytes. Row
/// counts cost a scan and are left to `gibbsline db stats`.
pub fn render_storage(o: &mut String, file_bytes: u64, wal_bytes: u64) {
    for (name, help, v) in [
        (
            "gibbsline_db_file_bytes",
            "Size of the database file.",
            file_bytes,
        ),
        (
            "gibbsline_db_wal_bytes",
            "Size of its write-ahead log.",
            wal_bytes,
        ),
    ] {
        family(o, name, help, "gauge");
        let _ = writeln!(o, "{name} {v}");
    }
}

fn family(o: &mut String, name: &str, help: &str, kind: &str) {
    let _ = writeln!(o, "# HELP {name} {help}\n# TYPE {name} {kind}");
}

/// A counter family with one series per label value.
fn labelled(
    o: &mut String,
    name: &str,
    help: &str,
    label: &str,
    values: &[&str],
    counters: &[AtomicU64],
) {
    family(o, name, help, "counter");
    for (value, c) in values.iter().zip(counters) {
        let _ = writeln!(o, "{name}{{{label}=\"{value}\"}} {}", c.load(Relaxed));
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

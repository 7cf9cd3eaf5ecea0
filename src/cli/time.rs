//! Times for people: ISO 8601 in the local zone (or UTC with `--utc`).
//! Machine outputs keep `…_unix_ns` and add an ISO column beside it.

use std::sync::atomic::{AtomicBool, Ordering};

/// Set once from `--utc` before any command runs; a display choice,
/// read by every row the output layer prints.
static UTC: AtomicBool = AtomicBool::new(false);

pub(crate) fn show_utc(utc: bool) {
    UTC.store(utc, Ordering::Relaxed);
}

/// `2026-12-03T08:15:02.123+01:00` (local) or `…Z` (UTC), to the
/// millisecond; an instant chrono cannot show stays in ns.
pub(crate) fn iso(unix_ns: i64) -> String {
    let t = chrono::DateTime::from_timestamp_nanos(unix_ns);
    if UTC.load(Ordering::Relaxed) {
        t.format("%Y-%m-%dT%H:%M:%S%.3fZ").to_string()
    } else {
        t.with_timezone(&chrono::Local)
            .format("%Y-%m-%dT%H:%M:%S%.3f%:z")
            .to_string()
    }
}

/// The same instant in UTC whatever `--utc` says: CSV and JSON carry it
/// beside the ns so files from different zones compare.
pub(crate) fn iso_utc(unix_ns: i64) -> String {
    chrono::DateTime::from_timestamp_nanos(unix_ns)
        .format("%Y-%m-%dT%H:%M:%S%.9fZ")
        .to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn utc_iso_is_exact_to_the_nanosecond() {
        // 2026-01-01T00:00:00Z is 1,767,225,600 s after the epoch.
        assert_eq!(
            iso_utc(1_767_225_600_000_000_001),
            "2026-01-01T00:00:00.000000001Z"
        );
        show_utc(true);
        assert_eq!(iso(1_767_225_600_250_000_000), "2026-01-01T00:00:00.250Z");
    }
}

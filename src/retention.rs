//! Retention: how much of a channel's history is kept, and the marks below
//! which it is gone. Pure: the pruning task (`ingest::prune`) and the
//! store act on what this decides.
//!
//! Two horizons, each measured back from the channel's *front* (the time
//! of its newest reading), not from the server's clock: a bench that sits
//! idle keeps its last test, and a recording imported months later keeps
//! its own last days. The disk a channel can take is bounded all the same.
//! - `raw_days`: raw readings older than this are deleted;
//! - `rollup_days`: the 10 s and 1 min rollups older than this are deleted.
//!   The 1 h tier is kept for the channel's life (about 8,800 rows a year).
//!
//! Marks sit on whole hours (the coarsest rollup tier), so a bucket on any
//! tier is either wholly kept or wholly gone: a late reading above the raw
//! mark recomputes its 10 s bucket from readings that are all still there,
//! and its 1 min and 1 h buckets from finer rollups that are still there.
//! Readings below the raw mark are refused (their bucket's readings are
//! gone, so it could not be recomputed exactly). Fine rollups are never
//! pruned past the raw mark: what a rollup needs is never deleted first.

use crate::error::FieldError;
use serde::{Deserialize, Serialize};

/// Nanoseconds in a day.
const NS_PER_DAY: f64 = 86_400e9;
/// Marks sit on multiples of this: the coarsest rollup tier (1 h).
pub const MARK_ALIGN_NS: i64 = 3_600_000_000_000;
/// A century: anything longer is a typo, not a policy.
const MAX_DAYS: f64 = 36_500.0;

/// How long a channel's history is kept; an unset field means "for ever"
/// where it is the server default, and "the server default" on a channel.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RetentionPolicy {
    /// Raw readings are kept this many days behind the channel's newest.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub raw_days: Option<f64>,
    /// 10 s and 1 min rollups are kept this many days behind the newest
    /// reading (at least as long as raw readings).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rollup_days: Option<f64>,
}

impl RetentionPolicy {
    /// Refuses days that are not positive finite numbers up to a century,
    /// naming `prefix.field`.
    pub fn validate(&self, prefix: &str) -> Result<(), FieldError> {
        for (name, value) in [
            ("raw_days", self.raw_days),
            ("rollup_days", self.rollup_days),
        ] {
            if let Some(days) = value
                && !(days.is_finite() && days > 0.0 && days <= MAX_DAYS)
            {
                return Err(FieldError::new(
                    format!("{prefix}.{name}"),
                    days,
                    "must be a number of days above 0 and at most 36500 (leave it out to keep for ever)",
                ));
            }
        }
        if let (Some(raw), Some(rollup)) = (self.raw_days, self.rollup_days)
            && rollup < raw
        {
            return Err(FieldError::new(
                format!("{prefix}.rollup_days"),
                rollup,
                format!(
                    "must be at least raw_days ({raw}): rollups are recomputed from the readings they cover"
                ),
            ));
        }
        Ok(())
    }

    /// This policy's fields, each falling back to `default`'s.
    pub fn over(&self, default: &RetentionPolicy) -> RetentionPolicy {
        RetentionPolicy {
            raw_days: self.raw_days.or(default.raw_days),
            rollup_days: self.rollup_days.or(default.rollup_days),
        }
    }

    /// Whether anything is ever deleted under this policy.
    pub fn prunes(&self) -> bool {
        self.raw_days.is_some() || self.rollup_days.is_some()
    }
}

/// Where a channel's kept history begins: readings before `raw_before_ns`
/// and 10 s / 1 min rollups before `rollup_before_ns` are gone (or going).
/// Zero: nothing pruned. Marks only ever rise.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct RetentionMarks {
    /// Raw readings before this are deleted; later readings there are refused.
    pub raw_before_ns: i64,
    /// Fine rollups before this are deleted; never above `raw_before_ns`.
    pub rollup_before_ns: i64,
}

impl RetentionMarks {
    /// The marks `policy` asks for with the channel's newest reading at
    /// `front_ns`, never below `self` (marks only rise).
    pub fn advanced(&self, policy: &RetentionPolicy, front_ns: i64) -> RetentionMarks {
        let horizon = |days: Option<f64>| match days {
            Some(d) if front_ns > 0 => {
                let back_ns = (d * NS_PER_DAY).min(i64::MAX as f64) as i64;
                front_ns
                    .saturating_sub(back_ns)
                    .div_euclid(MARK_ALIGN_NS)
                    .saturating_mul(MARK_ALIGN_NS)
                    .max(0)
            }
            _ => 0,
        };
        let raw = horizon(policy.raw_days).max(self.raw_before_ns);
        let rollup = match policy.rollup_days {
            // Fine rollups go at most as far as the raw readings do.
            Some(_) => horizon(policy.rollup_days).min(raw),
            None => 0,
        };
        RetentionMarks {
            raw_before_ns: raw,
            rollup_before_ns: rollup.max(self.rollup_before_ns),
        }
    }

    /// Whether a reading stamped `time_ns` falls where raw history is gone.
    pub fn refuses(&self, time_ns: i64) -> bool {
        time_ns < self.raw_before_ns
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const H: i64 = MARK_ALIGN_NS;
    const DAY: i64 = 24 * H;

    fn policy(raw: Option<f64>, rollup: Option<f64>) -> RetentionPolicy {
        RetentionPolicy {
            raw_days: raw,
            rollup_days: rollup,
        }
    }

    #[test]
    fn marks_sit_on_whole_hours_behind_the_front() {
        let front = 100 * DAY + 5 * H + 17;
        let m = RetentionMarks::default().advanced(&policy(Some(2.0), Some(10.0)), front);
        assert_eq!(m.raw_before_ns, 98 * DAY + 5 * H);
        assert_eq!(m.rollup_before_ns, 90 * DAY + 5 * H);
        assert!(m.refuses(98 * DAY + 5 * H - 1));
        assert!(!m.refuses(98 * DAY + 5 * H));
    }

    #[test]
    fn marks_never_fall_and_nothing_goes_without_a_policy() {
        let raised = RetentionMarks {
            raw_before_ns: 50 * DAY,
            rollup_before_ns: 40 * DAY,
        };
        // A front moved back (a reset timeline) or a longer policy keeps them.
        assert_eq!(
            raised.advanced(&policy(Some(30.0), Some(60.0)), 51 * DAY),
            raised
        );
        assert_eq!(
            RetentionMarks::default().advanced(&RetentionPolicy::default(), 90 * DAY),
            RetentionMarks::default()
        );
        // No front yet: nothing to measure back from.
        assert_eq!(
            RetentionMarks::default().advanced(&policy(Some(1.0), None), 0),
            RetentionMarks::default()
        );
    }

    #[test]
    fn fine_rollups_outlive_raw_readings() {
        // Only rollup_days: raw readings kept for ever, so are fine rollups.
        let m = RetentionMarks::default().advanced(&policy(None, Some(1.0)), 10 * DAY);
        assert_eq!(m.raw_before_ns, 0);
        assert_eq!(m.rollup_before_ns, 0);
        // Only raw_days: fine rollups kept for ever.
        let m = RetentionMarks::default().advanced(&policy(Some(1.0), None), 10 * DAY);
        assert_eq!((m.raw_before_ns, m.rollup_before_ns), (9 * DAY, 0));
    }

    #[test]
    fn a_channel_policy_falls_back_field_by_field() {
        let server = policy(Some(30.0), Some(365.0));
        let channel = policy(Some(7.0), None);
        assert_eq!(channel.over(&server), policy(Some(7.0), Some(365.0)));
        assert!(!RetentionPolicy::default().prunes());
    }

    #[test]
    fn bad_days_are_refused_naming_the_field() {
        for (p, field) in [
            (policy(Some(0.0), None), "retention.raw_days"),
            (policy(Some(f64::NAN), None), "retention.raw_days"),
            (policy(None, Some(-1.0)), "retention.rollup_days"),
            (policy(None, Some(1e9)), "retention.rollup_days"),
            (policy(Some(30.0), Some(7.0)), "retention.rollup_days"),
        ] {
            assert_eq!(p.validate("retention").unwrap_err().field, field, "{p:?}");
        }
        assert!(policy(Some(0.5), Some(0.5)).validate("retention").is_ok());
    }
}

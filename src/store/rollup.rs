//! Rollups: readings summarised per channel on fixed tiers, kept in the
//! same transaction as the readings, so history at any zoom reads a few
//! hundred rows instead of millions.
//!
//! Tiers are 10 s, 1 min and 1 h. Fresh readings (past the channel's
//! front, each stored for the first time) are added to their buckets on
//! every tier: counts and sums add, min and max widen, `last` goes to the
//! later time. Anything else (late readings, a fresh row that met a
//! stored one) makes its buckets be recomputed whole: the 10 s tier from
//! the readings it covers, each tier above from the one below. Adding is
//! what keeps ingest fast at 1 kHz, where a 10 s bucket holds 10,000
//! readings; recomputing is what keeps the rare cases exact.

use super::{BucketRow, ReadingRow, StoreError, Tx};
use sqlx::{QueryBuilder, Row, Sqlite, SqlitePool};
use std::collections::BTreeMap;

/// The tiers, seconds, finest first.
pub const TIERS_S: [i64; 3] = [10, 60, 3600];

const NS_PER_S: i64 = 1_000_000_000;

/// The summary columns of a bucket of readings, as SQL: one text for the
/// 10 s tier, the raw bucket query and (by hand) the migration.
macro_rules! readings_summary {
    () => {
        "COUNT(*) AS n, MAX(time_ns) AS last_ns, \
         MIN(volts) AS v_min, MAX(volts) AS v_max, SUM(volts) AS v_sum, \
         COUNT(soc_fused) AS s_n, MIN(soc_fused) AS s_min, MAX(soc_fused) AS s_max, SUM(soc_fused) AS s_sum, \
         MIN(cell_volts_used) AS e_min, MAX(cell_volts_used) AS e_max, SUM(cell_volts_used) AS e_sum"
    };
}
pub(super) use readings_summary;

/// The same columns merged from rollup rows of a finer tier.
macro_rules! rollups_summary {
    () => {
        "SUM(n) AS n, MAX(last_ns) AS last_ns, \
         MIN(v_min) AS v_min, MAX(v_max) AS v_max, SUM(v_sum) AS v_sum, \
         SUM(s_n) AS s_n, MIN(s_min) AS s_min, MAX(s_max) AS s_max, SUM(s_sum) AS s_sum, \
         MIN(e_min) AS e_min, MAX(e_max) AS e_max, SUM(e_sum) AS e_sum"
    };
}

/// The coarsest tier whose buckets tile a bucket of `width_ns` exactly
/// (a tier no wider than it and dividing it); none means raw readings.
pub fn tier_for(width_ns: i64) -> Option<i64> {
    TIERS_S
        .iter()
        .rev()
        .copied()
        .find(|t| width_ns >= t * NS_PER_S && width_ns % (t * NS_PER_S) == 0)
}

/// The bucket width a query for `width_ns` is answered with: the asked
/// width when a tier tiles it or when it is finer than every tier (raw
/// readings answer it then), otherwise the nearest multiple of the
/// coarsest tier no wider than it. That is within 5 % of the asked width
/// once it is ten times the tier (a week over 1,000 buckets: 604.8 s → 600
/// s), and at worst a third off just above a tier (15 s → 20 s). A
/// dashboard asking for "span / 1000" gets rollups, not millions of rows;
/// the response says the width.
pub fn answered_width(width_ns: i64) -> i64 {
    if tier_for(width_ns).is_some() {
        return width_ns;
    }
    match TIERS_S
        .iter()
        .rev()
        .map(|t| t * NS_PER_S)
        .find(|t| width_ns >= *t)
    {
        Some(tier_ns) => ((width_ns + tier_ns / 2) / tier_ns).max(1) * tier_ns,
        None => width_ns,
    }
}

/// The spans `[lo, hi)` of whole buckets of `width_ns` that hold `times`,
/// neighbours merged: one statement per span, and a late reading far back
/// costs its own bucket, not everything in between.
pub fn spans(times: impl IntoIterator<Item = i64>, width_ns: i64) -> Vec<(i64, i64)> {
    let mut starts: Vec<i64> = times
        .into_iter()
        .map(|t| t.div_euclid(width_ns) * width_ns)
        .collect();
    starts.sort_unstable();
    starts.dedup();
    let mut out: Vec<(i64, i64)> = Vec::new();
    for s in starts {
        match out.last_mut() {
            Some((_, hi)) if *hi == s => *hi = s + width_ns,
            _ => out.push((s, s + width_ns)),
        }
    }
    out
}

/// The spans of whole buckets of `width_ns` that cover `spans`, merged.
pub fn widen(spans: &[(i64, i64)], width_ns: i64) -> Vec<(i64, i64)> {
    let mut out: Vec<(i64, i64)> = Vec::new();
    for &(lo, hi) in spans {
        let lo = lo.div_euclid(width_ns) * width_ns;
        let hi = (hi - 1).div_euclid(width_ns) * width_ns + width_ns;
        match out.last_mut() {
            Some((_, last_hi)) if *last_hi >= lo => *last_hi = (*last_hi).max(hi),
            _ => out.push((lo, hi)),
        }
    }
    out
}

/// One bucket's summary of some readings, as the table holds it.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Summary {
    n: i64,
    last_ns: i64,
    last_seq: u64,
    run_id: i64,
    volts: [f64; 4],
    soc_n: i64,
    soc: [Option<f64>; 4],
    cell: [f64; 4],
}

impl Summary {
    fn of(r: &ReadingRow) -> Summary {
        let s = r.soc_fused;
        Summary {
            n: 1,
            last_ns: r.time_ns,
            last_seq: r.seq,
            run_id: r.run_id,
            volts: [r.volts; 4],
            soc_n: i64::from(s.is_some()),
            soc: [s; 4],
            cell: [r.cell_volts_used; 4],
        }
    }

    fn add(&mut self, r: &ReadingRow) {
        self.add_summary(&Summary::of(r));
    }

    /// Widens this summary by another of the same bucket.
    fn add_summary(&mut self, o: &Summary) {
        let later = (o.last_ns, o.last_seq) > (self.last_ns, self.last_seq);
        let pick = |a: Option<f64>, b: Option<f64>, f: fn(f64, f64) -> f64| match (a, b) {
            (Some(a), Some(b)) => Some(f(a, b)),
            (a, b) => a.or(b),
        };
        self.n += o.n;
        self.volts = merge(self.volts, o.volts, later);
        self.cell = merge(self.cell, o.cell, later);
        self.soc_n += o.soc_n;
        self.soc = [
            pick(self.soc[0], o.soc[0], f64::min),
            pick(self.soc[1], o.soc[1], f64::max),
            pick(self.soc[2], o.soc[2], |a, b| a + b),
            if later { o.soc[3] } else { self.soc[3] },
        ];
        if later {
            (self.last_ns, self.last_seq, self.run_id) = (o.last_ns, o.last_seq, o.run_id);
        }
    }
}

/// min, max, sum, last of two summaries; `later` says whose last wins.
fn merge(a: [f64; 4], b: [f64; 4], later: bool) -> [f64; 4] {
    [
        a[0].min(b[0]),
        a[1].max(b[1]),
        a[2] + b[2],
        if later { b[3] } else { a[3] },
    ]
}

/// Summaries of `rows` per bucket of `width_ns`.
fn summarise(rows: &[ReadingRow], width_ns: i64) -> BTreeMap<i64, Summary> {
    let mut out: BTreeMap<i64, Summary> = BTreeMap::new();
    for r in rows {
        let start = r.time_ns.div_euclid(width_ns) * width_ns;
        out.entry(start)
            .and_modify(|s| s.add(r))
            .or_insert_with(|| Summary::of(r));
    }
    out
}

/// Adds fresh readings, each stored just now for the first time, to their
/// buckets on every tier.
pub async fn add_fresh(
    tx: &mut Tx<'_>,
    channel_key: i64,
    rows: &[ReadingRow],
) -> Result<(), StoreError> {
    for tier_s in TIERS_S {
        let summaries = summarise(rows, tier_s * NS_PER_S);
        let list: Vec<_> = summaries.into_iter().collect();
        for chunk in list.chunks(200) {
            upsert(tx, channel_key, tier_s, chunk).await?;
        }
    }
    Ok(())
}

async fn upsert(
    tx: &mut Tx<'_>,
    key: i64,
    tier_s: i64,
    buckets: &[(i64, Summary)],
) -> Result<(), StoreError> {
    let mut qb: QueryBuilder<Sqlite> = QueryBuilder::new(
        "INSERT INTO rollups (channel_key, width_s, start_ns, run_id, n, last_ns, \
         v_min, v_max, v_sum, v_last, s_n, s_min, s_max, s_sum, s_last, e_min, e_max, e_sum, e_last) ",
    );
    qb.push_values(buckets, |mut b, (start, s)| {
        b.push_bind(key)
            .push_bind(tier_s)
            .push_bind(*start)
            .push_bind(s.run_id)
            .push_bind(s.n)
            .push_bind(s.last_ns);
        for v in s.volts {
            b.push_bind(v);
        }
        b.push_bind(s.soc_n);
        for v in s.soc {
            b.push_bind(v);
        }
        for v in s.cell {
            b.push_bind(v);
        }
    });
    // SET expressions read the row as it was: `last_ns` on the right is
    // the stored one. SQLite's two-argument MIN/MAX return NULL if either
    // is NULL, hence the COALESCEs for SOC, which may be unknown.
    qb.push(
        " ON CONFLICT (channel_key, width_s, start_ns) DO UPDATE SET \
         n = n + excluded.n, \
         run_id = CASE WHEN excluded.last_ns >= last_ns THEN excluded.run_id ELSE run_id END, \
         v_min = MIN(v_min, excluded.v_min), v_max = MAX(v_max, excluded.v_max), \
         v_sum = v_sum + excluded.v_sum, \
         v_last = CASE WHEN excluded.last_ns >= last_ns THEN excluded.v_last ELSE v_last END, \
         s_n = s_n + excluded.s_n, \
         s_min = COALESCE(MIN(s_min, excluded.s_min), s_min, excluded.s_min), \
         s_max = COALESCE(MAX(s_max, excluded.s_max), s_max, excluded.s_max), \
         s_sum = COALESCE(s_sum + excluded.s_sum, s_sum, excluded.s_sum), \
         s_last = CASE WHEN excluded.last_ns >= last_ns THEN excluded.s_last ELSE s_last END, \
         e_min = MIN(e_min, excluded.e_min), e_max = MAX(e_max, excluded.e_max), \
         e_sum = e_sum + excluded.e_sum, \
         e_last = CASE WHEN excluded.last_ns >= last_ns THEN excluded.e_last ELSE e_last END, \
         last_ns = MAX(last_ns, excluded.last_ns)",
    );
    qb.build().execute(&mut **tx).await?;
    Ok(())
}

/// Recomputes every bucket, on every tier, that holds one of `times`
/// (the readings this transaction wrote for the channel).
pub async fn refresh(tx: &mut Tx<'_>, channel_key: i64, times: &[i64]) -> Result<(), StoreError> {
    if times.is_empty() {
        return Ok(());
    }
    let finest = TIERS_S[0] * NS_PER_S;
    let mut touched = spans(times.iter().copied(), finest);
    for &(lo, hi) in &touched {
        from_readings(tx, channel_key, lo, hi).await?;
    }
    for pair in TIERS_S.windows(2) {
        let (child_s, parent_s) = (pair[0], pair[1]);
        let width = parent_s * NS_PER_S;
        touched = widen(&touched, width);
        for &(lo, hi) in &touched {
            from_child(tx, channel_key, child_s, parent_s, lo, hi).await?;
        }
    }
    Ok(())
}

async fn from_readings(tx: &mut Tx<'_>, key: i64, lo: i64, hi: i64) -> Result<(), StoreError> {
    let width = TIERS_S[0] * NS_PER_S;
    sqlx::query(concat!(
        "INSERT OR REPLACE INTO rollups \
         WITH agg AS ( \
           SELECT (time_ns / ?4) * ?4 AS b, ", readings_summary!(), " \
           FROM readings WHERE channel_key = ?1 AND time_ns >= ?2 AND time_ns < ?3 GROUP BY b \
         ), tagged AS ( \
           SELECT agg.*, (SELECT seq FROM readings r WHERE r.channel_key = ?1 AND r.time_ns = agg.last_ns \
                          ORDER BY seq DESC LIMIT 1) AS last_seq FROM agg \
         ) \
         SELECT ?1, ?5, t.b, r.run_id, t.n, t.last_ns, t.v_min, t.v_max, t.v_sum, r.volts, \
                t.s_n, t.s_min, t.s_max, t.s_sum, r.soc_fused, t.e_min, t.e_max, t.e_sum, r.cell_volts_used \
         FROM tagged t JOIN readings r ON r.channel_key = ?1 AND r.seq = t.last_seq",
    ))
    .bind(key)
    .bind(lo)
    .bind(hi)
    .bind(width)
    .bind(TIERS_S[0])
    .execute(&mut **tx)
    .await?;
    Ok(())
}

async fn from_child(
    tx: &mut Tx<'_>,
    key: i64,
    child_s: i64,
    parent_s: i64,
    lo: i64,
    hi: i64,
) -> Result<(), StoreError> {
    sqlx::query(concat!(
        "INSERT OR REPLACE INTO rollups \
         WITH agg AS ( \
           SELECT (start_ns / ?5) * ?5 AS b, ", rollups_summary!(), " \
           FROM rollups WHERE channel_key = ?1 AND width_s = ?4 AND start_ns >= ?2 AND start_ns < ?3 \
           GROUP BY b \
         ) \
         SELECT ?1, ?6, a.b, c.run_id, a.n, a.last_ns, a.v_min, a.v_max, a.v_sum, c.v_last, \
                a.s_n, a.s_min, a.s_max, a.s_sum, c.s_last, a.e_min, a.e_max, a.e_sum, c.e_last \
         FROM agg a JOIN rollups c ON c.channel_key = ?1 AND c.width_s = ?4 \
           AND c.start_ns >= a.b AND c.start_ns < a.b + ?5 AND c.last_ns = a.last_ns",
    ))
    .bind(key)
    .bind(lo)
    .bind(hi)
    .bind(child_s)
    .bind(parent_s * NS_PER_S)
    .bind(parent_s)
    .execute(&mut **tx)
    .await?;
    Ok(())
}

/// Buckets of `width_ns` from `start_ns` (aligned) to `end_ns`, merged
/// from the rollups of tier `tier_s` (see [`tier_for`]).
pub async fn query(
    pool: &SqlitePool,
    key: i64,
    start_ns: i64,
    end_ns: i64,
    width_ns: i64,
    tier_s: i64,
) -> Result<Vec<BucketRow>, StoreError> {
    let rows = sqlx::query(concat!(
        "WITH agg AS ( \
           SELECT (start_ns - ?2) / ?4 AS bucket, ", rollups_summary!(), " \
           FROM rollups WHERE channel_key = ?1 AND width_s = ?5 AND start_ns >= ?2 AND start_ns < ?3 \
           GROUP BY bucket \
         ) \
         SELECT a.*, c.v_last, c.s_last, c.e_last, c.run_id FROM agg a JOIN rollups c \
           ON c.channel_key = ?1 AND c.width_s = ?5 AND c.last_ns = a.last_ns \
           AND c.start_ns >= ?2 + a.bucket * ?4 AND c.start_ns < ?2 + (a.bucket + 1) * ?4 \
         ORDER BY a.bucket",
    ))
    .bind(key)
    .bind(start_ns)
    .bind(end_ns)
    .bind(width_ns)
    .bind(tier_s)
    .fetch_all(pool)
    .await?;
    rows.iter().map(bucket_of).collect()
}

/// One merged bucket; means from sums, so every tier gives the same mean.
pub(super) fn bucket_of(r: &sqlx::sqlite::SqliteRow) -> Result<BucketRow, StoreError> {
    let n: i64 = r.try_get("n")?;
    let s_n: i64 = r.try_get("s_n")?;
    let mean = |sum: f64, count: i64| sum / count as f64;
    Ok(BucketRow {
        bucket: r.try_get("bucket")?,
        count: n as u64,
        volts: [
            r.try_get("v_min")?,
            r.try_get("v_max")?,
            mean(r.try_get("v_sum")?, n),
            r.try_get("v_last")?,
        ],
        soc: if s_n > 0 {
            Some([
                r.try_get("s_min")?,
                r.try_get("s_max")?,
                mean(r.try_get("s_sum")?, s_n),
                r.try_get::<Option<f64>, _>("s_last")?.unwrap_or(f64::NAN),
            ])
        } else {
            None
        },
        cell_volts_used: [
            r.try_get("e_min")?,
            r.try_get("e_max")?,
            mean(r.try_get("e_sum")?, n),
            r.try_get("e_last")?,
        ],
        last_run_id: r.try_get("run_id")?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_coarsest_tier_that_tiles_the_width() {
        let s = NS_PER_S;
        assert_eq!(tier_for(5 * s), None);
        assert_eq!(tier_for(15 * s), None);
        assert_eq!(tier_for(10 * s), Some(10));
        assert_eq!(tier_for(30 * s), Some(10));
        assert_eq!(tier_for(120 * s), Some(60));
        assert_eq!(tier_for(86_400 * s), Some(3600));
        assert_eq!(tier_for(90 * 60 * s), Some(60));
    }

    #[test]
    fn odd_widths_are_answered_on_the_coarsest_tier_below_them() {
        let s = NS_PER_S;
        // Tiled widths and widths finer than every tier stay as asked.
        assert_eq!(answered_width(30 * s), 30 * s);
        assert_eq!(answered_width(3 * s), 3 * s);
        // Just above a tier: its nearest multiple.
        assert_eq!(answered_width(15 * s), 20 * s);
        assert_eq!(answered_width(14 * s), 10 * s);
        assert_eq!(answered_width(59_900_000_000), 60 * s);
        // A week over 1,000 buckets (604.8 s) goes to the 1 min tier.
        assert_eq!(answered_width(604_800_000_000), 600 * s);
        assert_eq!(answered_width(105 * s), 120 * s);
        assert_eq!(answered_width(9 * 3600 * s + 1), 9 * 3600 * s);
        for w in [10 * s + 1, 19 * s, 101 * s, 777 * s, 12_345 * s, 86_399 * s] {
            let a = answered_width(w);
            assert!(tier_for(a).is_some(), "{w} -> {a}");
            assert!(((a - w) as f64).abs() <= 0.5 * w as f64, "{w} -> {a}");
        }
        for w in [100 * s, 611 * s, 36_001 * s, 1_000_000 * s] {
            let a = answered_width(w);
            assert!(((a - w) as f64).abs() <= 0.05 * w as f64, "{w} -> {a}");
        }
    }

    #[test]
    fn spans_merge_neighbours_and_keep_far_buckets_apart() {
        assert_eq!(spans([25, 5, 12, 19], 10), vec![(0, 30)]);
        assert_eq!(spans([5, 95, -3], 10), vec![(-10, 10), (90, 100)]);
        assert!(spans([], 10).is_empty());
    }

    #[test]
    fn widened_spans_cover_every_parent_bucket_in_between() {
        assert_eq!(widen(&[(0, 600)], 60), vec![(0, 600)]);
        assert_eq!(widen(&[(10, 130)], 60), vec![(0, 180)]);
        assert_eq!(
            widen(&[(0, 10), (50, 70), (500, 510)], 60),
            vec![(0, 120), (480, 540)]
        );
    }
}

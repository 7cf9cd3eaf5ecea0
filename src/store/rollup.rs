//! Rollups: readings summarised per channel on fixed tiers, kept in the
//! same transaction as the readings, so history at any zoom reads a few
//! hundred rows instead of millions.
//!
//! Tiers are 10 s, 1 min and 1 h. Fresh readings (past the channel's
//! front, each stored for the first time) are added to their buckets on
//! every tier: counts and sums add, min and max widen, `last` goes to the
//! later time. Anything else (late readings, a fresh row that met a
//! stored one) makes its buckets be recomputed whole: the 10 s tier from
//! the readings it covers (decoded from their chunks), each tier above
//! from the one below. Adding is
//! what keeps ingest fast at 1 kHz, where a 10 s bucket holds 10,000
//! readings; recomputing is what keeps the rare cases exact.

use super::Pool;
use super::{BucketRow, ReadingRow, StoreError, Tx};
use sqlx::Row;
use std::collections::{BTreeMap, HashMap};

/// The tiers, seconds, finest first.
pub const TIERS_S: [i64; 3] = [10, 60, 3600];

const NS_PER_S: i64 = 1_000_000_000;

/// The same columns merged from rollup rows of a finer tier.
macro_rules! rollups_summary {
    () => {
        "CAST(SUM(n) AS BIGINT) AS n, MAX(last_ns) AS last_ns, \
         MIN(v_min) AS v_min, MAX(v_max) AS v_max, SUM(v_sum) AS v_sum, \
         CAST(SUM(s_n) AS BIGINT) AS s_n, MIN(s_min) AS s_min, MAX(s_max) AS s_max, SUM(s_sum) AS s_sum, \
         CAST(SUM(e_n) AS BIGINT) AS e_n, MIN(e_min) AS e_min, MAX(e_max) AS e_max, SUM(e_sum) AS e_sum, \
         CAST(SUM(d_n) AS BIGINT) AS d_n, MIN(d_min) AS d_min, MAX(d_max) AS d_max, SUM(d_sum) AS d_sum"
    };
}

/// The last child's values, from a rollup row `c`.
macro_rules! rollups_last {
    () => {
        "c.run_id, c.v_last, c.s_last, c.e_last, c.d_last, c.c_last, c.w_last"
    };
}

/// The table's columns in the order the statements above produce them.
macro_rules! rollup_columns {
    () => {
        "(channel_key, width_s, start_ns, n, last_ns, v_min, v_max, v_sum, \
          s_n, s_min, s_max, s_sum, e_n, e_min, e_max, e_sum, d_n, d_min, d_max, d_sum, \
          run_id, v_last, s_last, e_last, d_last, c_last, w_last)"
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

/// Count, min, max, sum and last of a value some readings lack.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
struct Partial {
    n: i64,
    min: Option<f64>,
    max: Option<f64>,
    sum: Option<f64>,
    last: Option<f64>,
}

impl Partial {
    fn of(v: Option<f64>) -> Partial {
        Partial {
            n: i64::from(v.is_some()),
            min: v,
            max: v,
            sum: v,
            last: v,
        }
    }

    fn add(&mut self, o: &Partial, later: bool) {
        let pick = |a: Option<f64>, b: Option<f64>, f: fn(f64, f64) -> f64| match (a, b) {
            (Some(a), Some(b)) => Some(f(a, b)),
            (a, b) => a.or(b),
        };
        self.n += o.n;
        self.min = pick(self.min, o.min, f64::min);
        self.max = pick(self.max, o.max, f64::max);
        self.sum = pick(self.sum, o.sum, |a, b| a + b);
        if later {
            self.last = o.last;
        }
    }
}

/// One bucket's summary of some readings, as the table holds it.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Summary {
    n: i64,
    last_ns: i64,
    last_seq: u64,
    run_id: i64,
    volts: [f64; 4],
    soc: Partial,
    equilibrium: Partial,
    driving_force: Partial,
    charge_ah_last: f64,
    energy_wh_last: f64,
}

impl Summary {
    /// One reading of a stack of `cells` in series.
    fn of(r: &ReadingRow, cells: u32) -> Summary {
        let known = r.flags & super::flags::OCV_NONE == 0;
        let pushed = r.flags & DRIVING_FORCE_SOURCES != 0;
        Summary {
            n: 1,
            last_ns: r.time_ns,
            last_seq: r.seq,
            run_id: r.run_id,
            volts: [r.volts; 4],
            soc: Partial::of(r.soc_fused),
            equilibrium: Partial::of(known.then_some(r.cell_volts_used)),
            driving_force: Partial::of(
                pushed.then(|| r.volts / f64::from(cells.max(1)) - r.cell_volts_used),
            ),
            charge_ah_last: r.charge_ah,
            energy_wh_last: r.energy_wh,
        }
    }

    fn add(&mut self, o: &Summary) {
        let later = (o.last_ns, o.last_seq) > (self.last_ns, self.last_seq);
        self.n += o.n;
        self.volts = [
            self.volts[0].min(o.volts[0]),
            self.volts[1].max(o.volts[1]),
            self.volts[2] + o.volts[2],
            if later { o.volts[3] } else { self.volts[3] },
        ];
        self.soc.add(&o.soc, later);
        self.equilibrium.add(&o.equilibrium, later);
        self.driving_force.add(&o.driving_force, later);
        if later {
            (self.last_ns, self.last_seq, self.run_id) = (o.last_ns, o.last_seq, o.run_id);
            (self.charge_ah_last, self.energy_wh_last) = (o.charge_ah_last, o.energy_wh_last);
        }
    }
}

/// The open-circuit sources under which a reading has a driving force (the
/// readings' `ocv_source`; `readings_view` spells the same bits as 2096).
const DRIVING_FORCE_SOURCES: i64 =
    super::flags::OCV_OHMIC | super::flags::OCV_COUNTED | super::flags::OCV_REVERSIBLE;

/// Summaries of `rows` per bucket of `width_ns`.
fn summarise(rows: &[ReadingRow], cells: u32, width_ns: i64) -> BTreeMap<i64, Summary> {
    let mut out: BTreeMap<i64, Summary> = BTreeMap::new();
    for r in rows {
        let start = r.time_ns.div_euclid(width_ns) * width_ns;
        let one = Summary::of(r, cells);
        out.entry(start).and_modify(|s| s.add(&one)).or_insert(one);
    }
    out
}

/// Adds fresh readings of a stack of `cells`, each stored just now for the
/// first time, to their buckets on every tier.
pub async fn add_fresh(
    tx: &mut Tx<'_>,
    channel_key: i64,
    cells: u32,
    rows: &[ReadingRow],
) -> Result<(), StoreError> {
    for tier_s in TIERS_S {
        let summaries = summarise(rows, cells, tier_s * NS_PER_S);
        let list: Vec<_> = summaries.into_iter().collect();
        for chunk in list.chunks(200) {
            upsert(tx, channel_key, tier_s, chunk, Upsert::Add).await?;
        }
    }
    Ok(())
}

/// What a summary does to a stored bucket of the same start.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Upsert {
    /// Adds to it (fresh readings).
    Add,
    /// Replaces it (a recomputation from everything the bucket holds).
    Replace,
}

async fn upsert(
    tx: &mut Tx<'_>,
    key: i64,
    tier_s: i64,
    buckets: &[(i64, Summary)],
    how: Upsert,
) -> Result<(), StoreError> {
    let engine = super::Engine::of(tx);
    let mut q = super::Binds::new(
        engine,
        concat!("INSERT INTO rollups ", rollup_columns!(), " VALUES "),
    );
    for (i, (start, s)) in buckets.iter().enumerate() {
        q.push(if i == 0 { "(" } else { ", (" });
        q.bind(key)
            .bind(tier_s)
            .bind(*start)
            .bind(s.n)
            .bind(s.last_ns);
        for v in &s.volts[..3] {
            q.bind(*v);
        }
        for p in [&s.soc, &s.equilibrium, &s.driving_force] {
            q.bind(p.n).bind(p.min).bind(p.max).bind(p.sum);
        }
        q.bind(s.run_id)
            .bind(s.volts[3])
            .bind(s.soc.last)
            .bind(s.equilibrium.last)
            .bind(s.driving_force.last)
            .bind(s.charge_ah_last)
            .bind(s.energy_wh_last);
        q.push(")");
    }
    q.push(match how {
        Upsert::Add => merge_on_conflict(engine),
        Upsert::Replace => REPLACE_ON_CONFLICT,
    });
    q.execute(tx).await?;
    Ok(())
}

/// The `ON CONFLICT` clause that replaces a stored bucket with the new
/// summary (a recomputation).
const REPLACE_ON_CONFLICT: &str = " ON CONFLICT (channel_key, width_s, start_ns) DO UPDATE SET \
     n = excluded.n, last_ns = excluded.last_ns, v_min = excluded.v_min, v_max = excluded.v_max, \
     v_sum = excluded.v_sum, s_n = excluded.s_n, s_min = excluded.s_min, s_max = excluded.s_max, \
     s_sum = excluded.s_sum, e_n = excluded.e_n, e_min = excluded.e_min, e_max = excluded.e_max, \
     e_sum = excluded.e_sum, d_n = excluded.d_n, d_min = excluded.d_min, d_max = excluded.d_max, \
     d_sum = excluded.d_sum, run_id = excluded.run_id, v_last = excluded.v_last, \
     s_last = excluded.s_last, e_last = excluded.e_last, d_last = excluded.d_last, \
     c_last = excluded.c_last, w_last = excluded.w_last";

/// The `ON CONFLICT` clause that adds a new summary to a stored bucket.
/// SET expressions read the row as it was (`rollups.last_ns` on the right
/// is the stored one; the table name keeps PostgreSQL from calling a bare
/// column ambiguous). SQLite's two-argument MIN/MAX return NULL if either
/// is NULL (PostgreSQL's LEAST/GREATEST skip it), hence the COALESCEs for
/// the values some readings lack.
fn merge_on_conflict(engine: super::Engine) -> &'static str {
    static CLAUSES: [std::sync::OnceLock<String>; 2] =
        [std::sync::OnceLock::new(), std::sync::OnceLock::new()];
    CLAUSES[engine as usize].get_or_init(|| {
        let (min, max) = (engine.least(), engine.greatest());
        let later = |col: &str| {
            format!(
                "{col} = CASE WHEN excluded.last_ns >= rollups.last_ns THEN excluded.{col} ELSE rollups.{col} END"
            )
        };
        let mut set = vec![
            "n = rollups.n + excluded.n".to_string(),
            later("run_id"),
            format!("v_min = {min}(rollups.v_min, excluded.v_min)"),
            format!("v_max = {max}(rollups.v_max, excluded.v_max)"),
            "v_sum = rollups.v_sum + excluded.v_sum".into(),
            later("v_last"),
        ];
        for x in ["s", "e", "d"] {
            set.push(format!("{x}_n = rollups.{x}_n + excluded.{x}_n"));
            for (stat, f) in [("min", min), ("max", max)] {
                set.push(format!(
                    "{x}_{stat} = COALESCE({f}(rollups.{x}_{stat}, excluded.{x}_{stat}), rollups.{x}_{stat}, excluded.{x}_{stat})"
                ));
            }
            set.push(format!(
                "{x}_sum = COALESCE(rollups.{x}_sum + excluded.{x}_sum, rollups.{x}_sum, excluded.{x}_sum)"
            ));
            set.push(later(&format!("{x}_last")));
        }
        set.push(later("c_last"));
        set.push(later("w_last"));
        set.push(format!("last_ns = {max}(rollups.last_ns, excluded.last_ns)"));
        format!(
            " ON CONFLICT (channel_key, width_s, start_ns) DO UPDATE SET {}",
            set.join(", ")
        )
    })
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

/// Recomputes the 10 s buckets in `[lo, hi)` from every reading stored
/// there.
async fn from_readings(tx: &mut Tx<'_>, key: i64, lo: i64, hi: i64) -> Result<(), StoreError> {
    let cells = run_cells(tx, key).await?;
    let width = TIERS_S[0] * NS_PER_S;
    let mut buckets: BTreeMap<i64, Summary> = BTreeMap::new();
    super::chunks::for_each_between(tx, key, lo, hi, |r| {
        add_to(&mut buckets, r.time_ns.div_euclid(width) * width, r, &cells);
    })
    .await?;
    let list: Vec<_> = buckets.into_iter().collect();
    for chunk in list.chunks(200) {
        upsert(tx, key, TIERS_S[0], chunk, Upsert::Replace).await?;
    }
    Ok(())
}

/// Each of the channel's runs' cells in series (the driving force is per
/// cell).
async fn run_cells(conn: &mut super::Conn, key: i64) -> Result<HashMap<i64, u32>, StoreError> {
    let rows = sqlx::query("SELECT run_id, cells_in_series FROM runs WHERE channel_key = $1")
        .bind(key)
        .fetch_all(conn)
        .await?;
    rows.iter()
        .map(|r| {
            let cells: i64 = r.try_get("cells_in_series")?;
            Ok((r.try_get("run_id")?, cells.max(1) as u32))
        })
        .collect()
}

/// Adds reading `r` to the bucket starting at `start`.
fn add_to(
    buckets: &mut BTreeMap<i64, Summary>,
    start: i64,
    r: &ReadingRow,
    cells: &HashMap<i64, u32>,
) {
    let one = Summary::of(r, cells.get(&r.run_id).copied().unwrap_or(1));
    buckets
        .entry(start)
        .and_modify(|s| s.add(&one))
        .or_insert(one);
}

async fn from_child(
    tx: &mut Tx<'_>,
    key: i64,
    child_s: i64,
    parent_s: i64,
    lo: i64,
    hi: i64,
) -> Result<(), StoreError> {
    let sql = concat!(
        "INSERT INTO rollups ",
        rollup_columns!(),
        " \
         WITH agg AS ( \
           SELECT (start_ns / $5) * $5 AS b, ",
        rollups_summary!(),
        " \
           FROM rollups WHERE channel_key = $1 AND width_s = $4 AND start_ns >= $2 AND start_ns < $3 \
           GROUP BY b \
         ) \
         SELECT $1, $6, a.*, ",
        rollups_last!(),
        " \
         FROM agg a CROSS JOIN rollups c ON c.channel_key = $1 AND c.width_s = $4 \
           AND c.start_ns >= a.b AND c.start_ns < a.b + $5 AND c.last_ns = a.last_ns \
         WHERE true"
    );
    let sql = super::dialect(super::Engine::of(tx), sql) + REPLACE_ON_CONFLICT;
    sqlx::query(sqlx::AssertSqlSafe(sql))
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
    pool: &Pool,
    key: i64,
    start_ns: i64,
    end_ns: i64,
    width_ns: i64,
    tier_s: i64,
    max_buckets: u32,
) -> Result<Vec<BucketRow>, StoreError> {
    let sql = concat!(
        "WITH agg AS ( \
           SELECT (start_ns - $2) / $4 AS bucket, ",
        rollups_summary!(),
        " \
           FROM rollups WHERE channel_key = $1 AND width_s = $5 AND start_ns >= $2 AND start_ns < $3 \
           GROUP BY bucket \
         ) \
         SELECT a.*, ",
        rollups_last!(),
        " FROM agg a CROSS JOIN rollups c \
           ON c.channel_key = $1 AND c.width_s = $5 AND c.last_ns = a.last_ns \
           AND c.start_ns >= $2 + a.bucket * $4 AND c.start_ns < $2 + (a.bucket + 1) * $4 \
         ORDER BY a.bucket LIMIT $6",
    );
    let rows = sqlx::query(sqlx::AssertSqlSafe(super::dialect(
        super::pool_engine(pool),
        sql,
    )))
    .bind(key)
    .bind(start_ns)
    .bind(end_ns)
    .bind(width_ns)
    .bind(tier_s)
    .bind(i64::from(max_buckets))
    .fetch_all(pool)
    .await?;
    rows.iter().map(bucket_of).collect()
}

/// Buckets straight from the readings, for widths no tier tiles (under
/// 10 s); the same columns as [`query`]. At most `max_buckets`: the
/// readings past the last of them are read but not kept, so a width of
/// 1 ns over a million readings holds no more than the bound.
pub async fn query_readings(
    pool: &Pool,
    key: i64,
    start_ns: i64,
    end_ns: i64,
    width_ns: i64,
    max_buckets: u32,
) -> Result<Vec<BucketRow>, StoreError> {
    let mut conn = pool.begin().await?;
    let cells = run_cells(&mut conn, key).await?;
    let mut buckets: BTreeMap<i64, Summary> = BTreeMap::new();
    let max = max_buckets as usize;
    super::chunks::for_each_between(&mut conn, key, start_ns, end_ns, |r| {
        let bucket = (r.time_ns - start_ns) / width_ns;
        if buckets.len() < max || buckets.contains_key(&bucket) {
            add_to(&mut buckets, bucket, r, &cells);
        } else if buckets
            .last_key_value()
            .is_some_and(|(last, _)| bucket < *last)
        {
            // A reading earlier than the kept last bucket (readings come
            // in time order per chunk, not across late chunks): keep the
            // earliest buckets.
            add_to(&mut buckets, bucket, r, &cells);
            buckets.pop_last();
        }
    })
    .await?;
    Ok(buckets
        .iter()
        .map(|(bucket, s)| bucket_of_summary(*bucket, s))
        .collect())
}

/// A bucket of readings summarised in code, as [`bucket_of`] reads one
/// from the table.
fn bucket_of_summary(bucket: i64, s: &Summary) -> BucketRow {
    let stats = |p: &Partial| {
        (p.n > 0).then(|| {
            let v = |x: Option<f64>| x.unwrap_or(f64::NAN);
            [v(p.min), v(p.max), v(p.sum) / p.n as f64, v(p.last)]
        })
    };
    BucketRow {
        bucket,
        count: s.n as u64,
        volts: [s.volts[0], s.volts[1], s.volts[2] / s.n as f64, s.volts[3]],
        soc: stats(&s.soc),
        equilibrium_cell_volts: stats(&s.equilibrium),
        driving_force_v: stats(&s.driving_force),
        charge_ah_last: s.charge_ah_last,
        energy_wh_last: s.energy_wh_last,
        last_run_id: s.run_id,
    }
}

/// One merged bucket; means from sums, so every tier gives the same mean.
fn bucket_of(r: &super::DbRow) -> Result<BucketRow, StoreError> {
    let n: i64 = r.try_get("n")?;
    Ok(BucketRow {
        bucket: r.try_get("bucket")?,
        count: n as u64,
        volts: [
            r.try_get("v_min")?,
            r.try_get("v_max")?,
            r.try_get::<f64, _>("v_sum")? / n as f64,
            r.try_get("v_last")?,
        ],
        soc: partial_of(r, "s")?,
        equilibrium_cell_volts: partial_of(r, "e")?,
        driving_force_v: partial_of(r, "d")?,
        charge_ah_last: r.try_get("c_last")?,
        energy_wh_last: r.try_get("w_last")?,
        last_run_id: r.try_get("run_id")?,
    })
}

/// min, max, mean and last of a value some readings lack (columns
/// `<x>_n`, `<x>_min`, …); none when no reading in the bucket had it, and
/// `last` NaN when the last reading lacked it.
fn partial_of(r: &super::DbRow, x: &str) -> Result<Option<[f64; 4]>, StoreError> {
    let n: i64 = r.try_get(format!("{x}_n").as_str())?;
    if n == 0 {
        return Ok(None);
    }
    let get = |stat: &str| -> Result<Option<f64>, StoreError> {
        Ok(r.try_get(format!("{x}_{stat}").as_str())?)
    };
    let value = |v: Option<f64>| v.unwrap_or(f64::NAN);
    Ok(Some([
        value(get("min")?),
        value(get("max")?),
        value(get("sum")?) / n as f64,
        value(get("last")?),
    ]))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_migration_spells_the_same_flag_bits_as_the_code() {
        use super::super::flags;
        assert_eq!(flags::OCV_NONE, 4096);
        assert_eq!(DRIVING_FORCE_SOURCES, 2096);
        let sql = include_str!("../../migrations/0007_rollup_equilibrium.sql");
        assert!(sql.contains("flags & 4096 = 0"), "{sql}");
        assert!(sql.contains("flags & 2096 != 0"), "{sql}");
    }

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

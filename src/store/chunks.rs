//! Readings as compressed chunks: the SQL around [`super::codec`].
//!
//! Each writer commit stores a channel's new readings as one chunk per
//! hour they fall in (a batch of a thousand readings is one row, not a
//! thousand). Small chunks, from slow rigs sending a reading or two per
//! batch, are merged later by [`compact`]. Chunks of a channel may overlap
//! in time (a late reading lands in a chunk of its own), never in stored
//! readings: [`keep_new`] decodes the chunks whose seq range meets a batch
//! before it is written, so a seq is stored once. Every read sorts what it
//! decodes by (time, seq).
//!
//! All of it runs on one connection (`&mut Conn`): the
//! writer's transaction, or a read transaction from the read pool. A read
//! of several queries must be one transaction, one snapshot: compaction
//! may commit between two of its queries and move readings the scan has
//! not reached into a chunk behind its cursor (a test lost readings so
//! before the store's readers began a transaction).

use super::Conn;
use super::codec;
use super::{ReadingRow, StoreError};
use sqlx::Row;
use std::collections::HashSet;

/// No chunk spans an hour boundary (retention's marks are whole hours, so
/// it deletes whole chunks), hence a chunk starts less than this before
/// any reading it holds.
pub const SPAN_NS: i64 = 3_600 * 1_000_000_000;
/// Rows in one chunk at most: bigger chunks compress a little better, but
/// a read decodes a whole chunk to use part of it.
pub const CHUNK_ROWS: usize = 4_096;
/// Chunks under this many rows are merged with their neighbours in the
/// same hour (the partial index `chunks_small` spells the same number).
pub const SMALL_ROWS: i64 = 256;
/// Chunks fetched per query while scanning.
const SCAN_CHUNKS: i64 = 16;

fn corrupt(e: codec::CodecError) -> StoreError {
    StoreError::Corrupt(e.to_string())
}

fn hour_of(time_ns: i64) -> i64 {
    time_ns.div_euclid(SPAN_NS)
}

fn by_time(a: &ReadingRow, b: &ReadingRow) -> std::cmp::Ordering {
    (a.time_ns, a.seq).cmp(&(b.time_ns, b.seq))
}

/// The most rows a page reserves before it knows how many it will hold.
const MAX_PAGE_RESERVE: usize = 16_384;
/// Room past the page's rows for the rest of the chunk that filled it.
const PAGE_RESERVE_SLACK: usize = 4_096;

/// Sorts by (time, seq); chunks read in start order are mostly in order
/// already, and checking costs less than a sort's moves.
fn sort_by_time(rows: &mut [ReadingRow]) {
    if !rows.is_sorted_by(|a, b| by_time(a, b).is_le()) {
        rows.sort_by(by_time);
    }
}

/// Keeps, of the rows from `from` on, those `wanted` says, in order.
fn keep_tail(rows: &mut Vec<ReadingRow>, from: usize, wanted: impl Fn(&ReadingRow) -> bool) {
    let mut kept = from;
    for i in from..rows.len() {
        if wanted(&rows[i]) {
            rows.swap(kept, i);
            kept += 1;
        }
    }
    rows.truncate(kept);
}

/// Stores readings not stored before as chunks: sorted by (time, seq),
/// one group per hour, each group cut into near-equal chunks of at most
/// [`CHUNK_ROWS`].
pub async fn write(conn: &mut Conn, key: i64, rows: &[ReadingRow]) -> Result<(), StoreError> {
    let mut sorted;
    let rows = if rows.is_sorted_by(|a, b| by_time(a, b).is_le()) {
        rows
    } else {
        sorted = rows.to_vec();
        sorted.sort_by(by_time);
        &sorted[..]
    };
    for hour in rows.chunk_by(|a, b| hour_of(a.time_ns) == hour_of(b.time_ns)) {
        let parts = hour.len().div_ceil(CHUNK_ROWS);
        for part in hour.chunks(hour.len().div_ceil(parts)) {
            insert_one(conn, key, part).await?;
        }
    }
    Ok(())
}

/// One chunk of rows sorted by (time, seq), all in one hour.
async fn insert_one(conn: &mut Conn, key: i64, rows: &[ReadingRow]) -> Result<(), StoreError> {
    let body = codec::encode(rows).map_err(corrupt)?;
    let first_seq = rows.iter().map(|r| r.seq).min().unwrap_or(0);
    let last_seq = rows.iter().map(|r| r.seq).max().unwrap_or(0);
    sqlx::query(
        "INSERT INTO chunks (channel_key, first_seq, last_seq, start_ns, end_ns, n, body) \
         VALUES ($1, $2, $3, $4, $5, $6, $7)",
    )
    .bind(key)
    .bind(first_seq as i64)
    .bind(last_seq as i64)
    .bind(rows[0].time_ns)
    .bind(rows[rows.len() - 1].time_ns)
    .bind(rows.len() as i64)
    .bind(body)
    .execute(conn)
    .await?;
    Ok(())
}

/// For each of `rows`, whether it is new: not stored, and not an earlier
/// row of `rows` again. A batch past everything stored costs one index
/// probe.
pub async fn keep_new(
    conn: &mut Conn,
    key: i64,
    rows: &[ReadingRow],
) -> Result<Vec<bool>, StoreError> {
    let Some(lo) = rows.iter().map(|r| r.seq).min() else {
        return Ok(Vec::new());
    };
    let hi = rows.iter().map(|r| r.seq).max().unwrap_or(lo);
    let bodies = sqlx::query(
        "SELECT body FROM chunks WHERE channel_key = $1 AND last_seq >= $2 AND first_seq <= $3",
    )
    .bind(key)
    .bind(lo as i64)
    .bind(hi as i64)
    .fetch_all(&mut *conn)
    .await?;
    let mut stored = HashSet::new();
    let mut decoded = Vec::new();
    for b in &bodies {
        decoded.clear();
        codec::decode_into(b.try_get("body")?, key, &mut decoded).map_err(corrupt)?;
        stored.extend(
            decoded
                .iter()
                .map(|r| r.seq)
                .filter(|s| (lo..=hi).contains(s)),
        );
    }
    Ok(rows.iter().map(|r| stored.insert(r.seq)).collect())
}

/// Stores the rows of `rows` that are new ([`keep_new`]); for each row,
/// whether it was.
pub async fn insert_new(
    conn: &mut Conn,
    key: i64,
    rows: &[ReadingRow],
) -> Result<Vec<bool>, StoreError> {
    let new = keep_new(conn, key, rows).await?;
    if new.iter().all(|n| *n) {
        write(conn, key, rows).await?;
    } else {
        let kept: Vec<ReadingRow> = rows
            .iter()
            .zip(&new)
            .filter(|(_, n)| **n)
            .map(|(r, _)| r.clone())
            .collect();
        write(conn, key, &kept).await?;
    }
    Ok(new)
}

/// A chunk's place, without its body.
struct Head {
    id: i64,
    start_ns: i64,
}

/// Up to `count` chunks that may hold readings in `[from_ns, to_ns)`,
/// after `cursor` (start, id) in start order.
async fn scan(
    conn: &mut Conn,
    key: i64,
    from_ns: i64,
    to_ns: i64,
    cursor: (i64, i64),
    count: i64,
) -> Result<Vec<(Head, Vec<u8>)>, StoreError> {
    let rows = sqlx::query(
        "SELECT chunk_id, start_ns, body FROM chunks WHERE channel_key = $1 \
         AND (start_ns, chunk_id) > ($2, $3) AND start_ns < $4 AND end_ns >= $5 \
         ORDER BY start_ns, chunk_id LIMIT $6",
    )
    .bind(key)
    .bind(cursor.0)
    .bind(cursor.1)
    .bind(to_ns)
    .bind(from_ns)
    .bind(count)
    .fetch_all(conn)
    .await?;
    rows.iter()
        .map(|r| {
            Ok((
                Head {
                    id: r.try_get("chunk_id")?,
                    start_ns: r.try_get("start_ns")?,
                },
                r.try_get("body")?,
            ))
        })
        .collect()
}

/// Where the next chunk [`scan`] would return starts, if there is one.
async fn next_start(
    conn: &mut Conn,
    key: i64,
    from_ns: i64,
    to_ns: i64,
    cursor: (i64, i64),
) -> Result<Option<i64>, StoreError> {
    let row = sqlx::query(
        "SELECT start_ns FROM chunks WHERE channel_key = $1 \
         AND (start_ns, chunk_id) > ($2, $3) AND start_ns < $4 AND end_ns >= $5 \
         ORDER BY start_ns, chunk_id LIMIT 1",
    )
    .bind(key)
    .bind(cursor.0)
    .bind(cursor.1)
    .bind(to_ns)
    .bind(from_ns)
    .fetch_optional(conn)
    .await?;
    Ok(row.map(|r| r.try_get("start_ns")).transpose()?)
}

/// The first cursor of a scan from `from_ns`: no chunk starting an hour
/// or more before it holds a reading at or after it.
fn first_cursor(from_ns: i64) -> (i64, i64) {
    (from_ns.saturating_sub(SPAN_NS), i64::MAX)
}

/// Calls `each` on every stored reading of the channel in
/// `[start_ns, end_ns)`, chunk by chunk (in chunk start order; not
/// sorted where chunks overlap).
pub async fn for_each_between(
    conn: &mut Conn,
    key: i64,
    start_ns: i64,
    end_ns: i64,
    mut each: impl FnMut(&ReadingRow),
) -> Result<(), StoreError> {
    let mut cursor = first_cursor(start_ns);
    let mut rows = Vec::new();
    loop {
        let batch = scan(conn, key, start_ns, end_ns, cursor, SCAN_CHUNKS).await?;
        for (head, body) in &batch {
            rows.clear();
            codec::decode_into(body, key, &mut rows).map_err(corrupt)?;
            rows.iter()
                .filter(|r| r.time_ns >= start_ns && r.time_ns < end_ns)
                .for_each(&mut each);
            cursor = (head.start_ns, head.id);
        }
        if (batch.len() as i64) < SCAN_CHUNKS {
            return Ok(());
        }
    }
}

/// One page of readings in `[start_ns, end_ns)` in (time, seq) order,
/// after the reading `after` (time, seq): chunks are read in start order
/// until no later one can hold a reading before the page's last.
pub async fn page(
    conn: &mut Conn,
    key: i64,
    start_ns: i64,
    end_ns: i64,
    after: (i64, i64),
    limit: usize,
) -> Result<Vec<ReadingRow>, StoreError> {
    let from_ns = start_ns.max(after.0);
    let mut cursor = first_cursor(from_ns);
    // Sized for the page and a chunk past it up front: growing it by
    // doubling copied every row decoded so far, again and again.
    let mut out: Vec<ReadingRow> =
        Vec::with_capacity(limit.min(MAX_PAGE_RESERVE) + PAGE_RESERVE_SLACK);
    // Enough chunks for the page in one query if they hold a thousand
    // readings or more (a rig's batches; compaction merges smaller ones);
    // a chunk fetched but not needed is not decoded. Each query is a
    // round trip to the database's thread, which costs more than a body.
    let mut count = (limit as i64 / 1_000 + 2).min(SCAN_CHUNKS);
    loop {
        let batch = scan(conn, key, from_ns, end_ns, cursor, count).await?;
        for (head, body) in &batch {
            // Full, and this chunk starts after the page's last reading:
            // neither it nor any after it can hold a reading before.
            if trim_full(&mut out, limit) && head.start_ns > out[limit - 1].time_ns {
                return Ok(out);
            }
            // Decoded in place and the rows outside the page dropped there:
            // a reading is moved once, not three times.
            let before = out.len();
            codec::decode_into(body, key, &mut out).map_err(corrupt)?;
            keep_tail(&mut out, before, |r| {
                r.time_ns >= from_ns && r.time_ns < end_ns && (r.time_ns, r.seq as i64) > after
            });
            cursor = (head.start_ns, head.id);
        }
        let full = trim_full(&mut out, limit);
        if limit == 0 || (batch.len() as i64) < count {
            sort_by_time(&mut out);
            out.truncate(limit);
            return Ok(out);
        }
        // Full, and no chunk not read yet starts before the page's last
        // reading: nothing can come before it any more.
        if full {
            let next = next_start(conn, key, from_ns, end_ns, cursor).await?;
            if next.is_none_or(|start| start > out[limit - 1].time_ns) {
                return Ok(out);
            }
        }
        count = (count * 2).min(SCAN_CHUNKS);
    }
}

/// Whether `rows` hold a full page of `limit` (and then sorts and cuts
/// them to it).
fn trim_full(rows: &mut Vec<ReadingRow>, limit: usize) -> bool {
    let full = limit > 0 && rows.len() >= limit;
    if full {
        sort_by_time(rows);
        rows.truncate(limit);
    }
    full
}

/// Decodes the chunks a query selected (binds: the channel, then `binds`)
/// and keeps the reading `better` prefers over the others.
async fn best_of(
    conn: &mut Conn,
    sql: &'static str,
    key: i64,
    bind: i64,
    better: impl Fn(&ReadingRow, &ReadingRow) -> bool,
) -> Result<Option<ReadingRow>, StoreError> {
    let bodies = sqlx::query(sqlx::AssertSqlSafe(sql))
        .bind(key)
        .bind(bind)
        .fetch_all(conn)
        .await?;
    let mut best: Option<ReadingRow> = None;
    let mut rows = Vec::new();
    for b in &bodies {
        rows.clear();
        codec::decode_into(b.try_get("body")?, key, &mut rows).map_err(corrupt)?;
        for r in rows.drain(..) {
            if best.as_ref().is_none_or(|b| better(&r, b)) {
                best = Some(r);
            }
        }
    }
    Ok(best)
}

/// The reading with seq `seq`, if stored.
pub async fn find_seq(
    conn: &mut Conn,
    key: i64,
    seq: u64,
) -> Result<Option<ReadingRow>, StoreError> {
    let found = best_of(
        conn,
        "SELECT body FROM chunks WHERE channel_key = $1 AND last_seq >= $2 AND first_seq <= $2",
        key,
        seq as i64,
        |r, _| r.seq == seq,
    )
    .await?;
    Ok(found.filter(|r| r.seq == seq))
}

/// The stored reading with the highest seq.
pub async fn latest(conn: &mut Conn, key: i64) -> Result<Option<ReadingRow>, StoreError> {
    // Chunks may overlap in seq; the highest seq is in the chunk whose
    // last seq is highest.
    best_of(
        conn,
        "SELECT body FROM chunks WHERE channel_key = $1 AND $2 = $2 ORDER BY last_seq DESC LIMIT 1",
        key,
        0,
        |r, b| r.seq > b.seq,
    )
    .await
}

/// The highest seq stored.
pub async fn max_seq(conn: &mut Conn, key: i64) -> Result<Option<u64>, StoreError> {
    let m: Option<i64> =
        sqlx::query("SELECT MAX(last_seq) AS m FROM chunks WHERE channel_key = $1")
            .bind(key)
            .fetch_one(conn)
            .await?
            .try_get("m")?;
    Ok(m.map(|m| m as u64))
}

/// Readings stored for the channel.
pub async fn count(conn: &mut Conn, key: i64) -> Result<u64, StoreError> {
    let n: i64 = sqlx::query(
        "SELECT CAST(COALESCE(SUM(n), 0) AS BIGINT) AS n FROM chunks WHERE channel_key = $1",
    )
    .bind(key)
    .fetch_one(conn)
    .await?
    .try_get("n")?;
    Ok(n as u64)
}

/// The stored reading with the highest seq among those with `flag` set,
/// read from the newest chunks back until no older one can beat it.
pub async fn last_flagged(
    conn: &mut Conn,
    key: i64,
    flag: i64,
) -> Result<Option<ReadingRow>, StoreError> {
    let mut best: Option<ReadingRow> = None;
    let mut below = i64::MAX;
    let mut rows = Vec::new();
    loop {
        let batch = sqlx::query(
            "SELECT last_seq, body FROM chunks WHERE channel_key = $1 AND last_seq < $2 \
             ORDER BY last_seq DESC LIMIT $3",
        )
        .bind(key)
        .bind(below)
        .bind(SCAN_CHUNKS)
        .fetch_all(&mut *conn)
        .await?;
        for c in &batch {
            let last_seq: i64 = c.try_get("last_seq")?;
            if best.as_ref().is_some_and(|b| b.seq as i64 > last_seq) {
                return Ok(best);
            }
            rows.clear();
            codec::decode_into(c.try_get("body")?, key, &mut rows).map_err(corrupt)?;
            for r in rows.drain(..).filter(|r| r.flags & flag != 0) {
                if best.as_ref().is_none_or(|b| r.seq > b.seq) {
                    best = Some(r);
                }
            }
            below = last_seq;
        }
        if (batch.len() as i64) < SCAN_CHUNKS {
            return Ok(best);
        }
    }
}

/// The latest stored reading (by time, then seq) before `time_ns`: chunks
/// starting before it, newest first, until one starts an hour before the
/// best found (it could hold nothing later).
pub async fn last_before(
    conn: &mut Conn,
    key: i64,
    time_ns: i64,
) -> Result<Option<ReadingRow>, StoreError> {
    let mut best: Option<ReadingRow> = None;
    let mut cursor = (time_ns, i64::MIN);
    let mut rows = Vec::new();
    loop {
        let batch = sqlx::query(
            "SELECT chunk_id, start_ns, body FROM chunks WHERE channel_key = $1 \
             AND (start_ns, chunk_id) < ($2, $3) ORDER BY start_ns DESC, chunk_id DESC LIMIT $4",
        )
        .bind(key)
        .bind(cursor.0)
        .bind(cursor.1)
        .bind(SCAN_CHUNKS)
        .fetch_all(&mut *conn)
        .await?;
        for c in &batch {
            let start_ns: i64 = c.try_get("start_ns")?;
            if best
                .as_ref()
                .is_some_and(|b| start_ns + SPAN_NS <= b.time_ns)
            {
                return Ok(best);
            }
            rows.clear();
            codec::decode_into(c.try_get("body")?, key, &mut rows).map_err(corrupt)?;
            for r in rows.drain(..).filter(|r| r.time_ns < time_ns) {
                if best.as_ref().is_none_or(|b| by_time(&r, b).is_gt()) {
                    best = Some(r);
                }
            }
            cursor = (start_ns, c.try_get("chunk_id")?);
        }
        if (batch.len() as i64) < SCAN_CHUNKS {
            return Ok(best);
        }
    }
}

/// Deletes the channel's chunks before `before_ns` (a whole hour: no
/// chunk straddles it), oldest first, until at least `limit` readings
/// went or none is left; returns how many readings went.
pub async fn prune(
    conn: &mut Conn,
    key: i64,
    before_ns: i64,
    limit: u64,
) -> Result<u64, StoreError> {
    let heads = sqlx::query(
        "SELECT chunk_id, n FROM chunks WHERE channel_key = $1 AND start_ns < $2 AND end_ns < $3 \
         ORDER BY start_ns LIMIT 256",
    )
    .bind(key)
    .bind(before_ns)
    .bind(before_ns)
    .fetch_all(&mut *conn)
    .await?;
    let mut gone = 0u64;
    let mut ids = Vec::new();
    for h in &heads {
        if gone >= limit {
            break;
        }
        ids.push(h.try_get::<i64, _>("chunk_id")?);
        gone += h.try_get::<i64, _>("n")? as u64;
    }
    delete(conn, &ids).await?;
    Ok(gone)
}

async fn delete(conn: &mut Conn, ids: &[i64]) -> Result<(), StoreError> {
    for part in ids.chunks(500) {
        let mut q = super::Binds::new(
            super::Engine::of(conn),
            "DELETE FROM chunks WHERE chunk_id IN ",
        );
        q.list(part.iter().copied());
        q.execute(&mut *conn).await?;
    }
    Ok(())
}

/// Merges the channel's small chunks that share an hour into chunks of up
/// to [`CHUNK_ROWS`], until about `limit` readings were rewritten; returns
/// how many were. One call is one step of the writer's transaction: a
/// crash leaves the chunks as they were before it or after it.
pub async fn compact(conn: &mut Conn, key: i64, limit: u64) -> Result<u64, StoreError> {
    let heads = sqlx::query(
        "SELECT chunk_id, start_ns, n FROM chunks WHERE channel_key = $1 AND n < 256 \
         ORDER BY start_ns, chunk_id LIMIT 4096",
    )
    .bind(key)
    .fetch_all(&mut *conn)
    .await?;
    let mut small = Vec::with_capacity(heads.len());
    for h in &heads {
        let start: i64 = h.try_get("start_ns")?;
        small.push((hour_of(start), h.try_get::<i64, _>("chunk_id")?));
    }
    let mut merged = 0u64;
    for group in small.chunk_by(|a, b| a.0 == b.0) {
        if group.len() < 2 {
            continue;
        }
        let ids: Vec<i64> = group.iter().map(|(_, id)| *id).collect();
        merged += merge(conn, key, &ids).await?;
        if merged >= limit {
            break;
        }
    }
    Ok(merged)
}

/// Rewrites the chunks `ids` (one hour's) as one run of chunks.
async fn merge(conn: &mut Conn, key: i64, ids: &[i64]) -> Result<u64, StoreError> {
    let mut rows = Vec::new();
    for part in ids.chunks(500) {
        let mut q = super::Binds::new(
            super::Engine::of(conn),
            "SELECT body FROM chunks WHERE chunk_id IN ",
        );
        q.list(part.iter().copied());
        for b in q.query().fetch_all(&mut *conn).await? {
            codec::decode_into(b.try_get("body")?, key, &mut rows).map_err(corrupt)?;
        }
    }
    delete(conn, ids).await?;
    write(conn, key, &rows).await?;
    Ok(rows.len() as u64)
}

/// Readings a server before chunks stored one per row, moved into chunks
/// at most `limit` at a time (one call per transaction); returns how many
/// moved, zero once none is left.
pub async fn adopt_rows(conn: &mut Conn, limit: u32) -> Result<u64, StoreError> {
    let Some(key) = sqlx::query("SELECT channel_key FROM readings LIMIT 1")
        .fetch_optional(&mut *conn)
        .await?
    else {
        return Ok(0);
    };
    let key: i64 = key.try_get("channel_key")?;
    let rows =
        sqlx::query("SELECT * FROM readings WHERE channel_key = $1 ORDER BY time_ns, seq LIMIT $2")
            .bind(key)
            .bind(i64::from(limit))
            .fetch_all(&mut *conn)
            .await?;
    let rows: Vec<ReadingRow> = rows
        .iter()
        .map(super::reading_from_row)
        .collect::<Result<_, _>>()?;
    let Some(last) = rows.last() else {
        return Ok(0);
    };
    write(conn, key, &rows).await?;
    sqlx::query("DELETE FROM readings WHERE channel_key = $1 AND (time_ns, seq) <= ($2, $3)")
        .bind(key)
        .bind(last.time_ns)
        .bind(last.seq as i64)
        .execute(&mut *conn)
        .await?;
    Ok(rows.len() as u64)
}

#[cfg(test)]
mod tests;

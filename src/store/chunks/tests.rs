//! Chunks against a plain list of the readings written: every read gives
//! what sorting that list gives, whatever the batches, late readings,
//! merges and deletions.

use super::*;
use proptest::prelude::*;
use sqlx::Connection;

const KEY: i64 = 5;
const HOUR: i64 = SPAN_NS;

async fn db() -> Conn {
    crate::store::install_drivers();
    let mut conn = Conn::connect("sqlite::memory:").await.unwrap();
    sqlx::migrate!("./migrations").run(&mut conn).await.unwrap();
    conn
}

fn row(seq: u64, time_ns: i64) -> ReadingRow {
    ReadingRow {
        channel_key: KEY,
        seq,
        run_id: 1,
        time_ns,
        volts: 1.3 + seq as f64 * 1e-5,
        amps: Some(2.0),
        temp_c: Some(25.0),
        cell_volts_used: 1.3,
        soc_model: None,
        soc_fused: Some(0.5),
        charge_ah: seq as f64 * 1e-3,
        energy_wh: seq as f64 * 2e-3,
        flags: i64::from(seq.is_multiple_of(7)),
        soc_counted_unclamped: None,
    }
}

fn sorted(rows: &[ReadingRow]) -> Vec<(i64, u64)> {
    let mut v: Vec<_> = rows.iter().map(|r| (r.time_ns, r.seq)).collect();
    v.sort();
    v
}

/// Stores `rows` the way the writer does: only what is new.
async fn store(conn: &mut Conn, rows: &[ReadingRow]) -> Vec<bool> {
    insert_new(conn, KEY, rows).await.unwrap()
}

async fn all_pages(conn: &mut Conn, start: i64, end: i64, limit: usize) -> Vec<(i64, u64)> {
    let mut out = Vec::new();
    let mut after = (i64::MIN, i64::MIN);
    loop {
        let page = page(conn, KEY, start, end, after, limit).await.unwrap();
        out.extend(page.iter().map(|r| (r.time_ns, r.seq)));
        match page.last() {
            Some(last) if page.len() == limit => after = (last.time_ns, last.seq as i64),
            _ => return out,
        }
    }
}

async fn chunk_spans(conn: &mut Conn) -> Vec<(i64, i64, i64)> {
    sqlx::query("SELECT start_ns, end_ns, n FROM chunks WHERE channel_key = ?")
        .bind(KEY)
        .fetch_all(conn)
        .await
        .unwrap()
        .iter()
        .map(|r| (r.get("start_ns"), r.get("end_ns"), r.get("n")))
        .collect()
}

fn run<F: std::future::Future>(f: F) -> F::Output {
    tokio::runtime::Builder::new_current_thread()
        .build()
        .unwrap()
        .block_on(f)
}

prop_compose! {
    /// Batches of a rig at 10 Hz over about three hours, then late and
    /// resent readings anywhere in that span.
    fn history()(
        batch_sizes in proptest::collection::vec(1usize..700, 1..40),
        late in proptest::collection::vec((0u64..20_000, 0i64..3 * HOUR), 0..40),
    ) -> (Vec<Vec<ReadingRow>>, Vec<ReadingRow>) {
        let mut seq = 0u64;
        let base = 1_700_000_000 * 1_000_000_000i64 / HOUR * HOUR + HOUR / 2;
        let batches = batch_sizes.iter().map(|n| (0..*n).map(|_| {
            seq += 1;
            row(seq, base + seq as i64 * 1_000_000_000)
        }).collect()).collect();
        let late = late.iter().map(|(s, t)| row(*s, base + t)).collect();
        (batches, late)
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(16))]

    #[test]
    fn reads_give_the_sorted_readings_whatever_was_written((batches, late) in history(), limit in 1usize..3000, merge_at in 0usize..40) {
        run(async {
            let mut conn = db().await;
            let mut stored: Vec<ReadingRow> = Vec::new();
            let mut seen = HashSet::new();
            for (i, b) in batches.iter().enumerate() {
                let new = store(&mut conn, b).await;
                prop_assert!(new.iter().all(|n| *n));
                stored.extend(b.iter().cloned());
                seen.extend(b.iter().map(|r| r.seq));
                if i == merge_at {
                    compact(&mut conn, KEY, u64::MAX).await.unwrap();
                }
            }
            let new = store(&mut conn, &late).await;
            for (r, n) in late.iter().zip(&new) {
                // New exactly when its seq was not stored (nor earlier in the batch).
                prop_assert_eq!(*n, seen.insert(r.seq));
                if *n {
                    stored.push(r.clone());
                }
            }
            compact(&mut conn, KEY, u64::MAX).await.unwrap();
            let want = sorted(&stored);
            prop_assert_eq!(all_pages(&mut conn, 0, i64::MAX, limit).await, want.clone());
            // A window, read whole and by for_each_between.
            let (lo, hi) = (want[want.len() / 3].0, want[want.len() * 2 / 3].0 + 1);
            let inside: Vec<_> = want.iter().copied().filter(|(t, _)| *t >= lo && *t < hi).collect();
            prop_assert_eq!(all_pages(&mut conn, lo, hi, limit).await, inside.clone());
            let mut each = Vec::new();
            for_each_between(&mut conn, KEY, lo, hi, |r| each.push((r.time_ns, r.seq))).await.unwrap();
            each.sort();
            prop_assert_eq!(each, inside);
            // No chunk spans an hour boundary; counts add up.
            for (start, end, _) in chunk_spans(&mut conn).await {
                prop_assert_eq!(start.div_euclid(HOUR), end.div_euclid(HOUR));
            }
            prop_assert_eq!(count(&mut conn, KEY).await.unwrap(), want.len() as u64);
            // Point lookups.
            let top = stored.iter().map(|r| r.seq).max();
            prop_assert_eq!(max_seq(&mut conn, KEY).await.unwrap(), top);
            prop_assert_eq!(latest(&mut conn, KEY).await.unwrap().map(|r| r.seq), top);
            let flagged = stored.iter().filter(|r| r.flags & 1 != 0).map(|r| r.seq).max();
            prop_assert_eq!(last_flagged(&mut conn, KEY, 1).await.unwrap().map(|r| r.seq), flagged);
            let probe = want[want.len() / 2].0;
            let before = want.iter().rev().find(|(t, _)| *t < probe).copied();
            let got = last_before(&mut conn, KEY, probe).await.unwrap().map(|r| (r.time_ns, r.seq));
            prop_assert_eq!(got, before);
            let some = &stored[stored.len() / 2];
            let found = find_seq(&mut conn, KEY, some.seq).await.unwrap();
            prop_assert_eq!(found.as_ref(), Some(some));
            Ok(())
        })?;
    }
}

#[test]
fn small_chunks_of_one_hour_merge_and_keep_every_value() {
    run(async {
        let mut conn = db().await;
        let base = 10 * HOUR;
        let rows: Vec<_> = (1..=600)
            .map(|s| row(s, base + s as i64 * 10_000_000_000))
            .collect();
        // A slow rig: one reading per batch, over two hours.
        for r in &rows {
            store(&mut conn, std::slice::from_ref(r)).await;
        }
        assert_eq!(chunk_spans(&mut conn).await.len(), 600);
        let merged = compact(&mut conn, KEY, u64::MAX).await.unwrap();
        assert_eq!(merged, 600);
        // 360 readings in the first hour, 240 in the second: one chunk each.
        let mut spans = chunk_spans(&mut conn).await;
        spans.sort();
        assert_eq!(
            spans.iter().map(|s| s.2).collect::<Vec<_>>(),
            vec![359, 241]
        );
        let back = page(&mut conn, KEY, 0, i64::MAX, (i64::MIN, i64::MIN), 1000)
            .await
            .unwrap();
        assert_eq!(back, rows);
        // A pass with nothing to merge rewrites nothing.
        assert_eq!(compact(&mut conn, KEY, u64::MAX).await.unwrap(), 0);
    });
}

#[test]
fn pruning_deletes_whole_hours_before_the_mark() {
    run(async {
        let mut conn = db().await;
        let base = 100 * HOUR;
        // Three hours at one reading a second, in batches of 1,000.
        let rows: Vec<_> = (0..10_800)
            .map(|s| row(s + 1, base + s as i64 * 1_000_000_000))
            .collect();
        for b in rows.chunks(1_000) {
            store(&mut conn, b).await;
        }
        let mark = base + 2 * HOUR;
        let mut gone = 0;
        loop {
            let step = prune(&mut conn, KEY, mark, 2_000).await.unwrap();
            gone += step;
            if step < 2_000 {
                break;
            }
        }
        assert_eq!(gone, 7_200);
        let kept = page(&mut conn, KEY, 0, i64::MAX, (i64::MIN, i64::MIN), 20_000)
            .await
            .unwrap();
        assert_eq!(kept.len(), 3_600);
        assert!(kept.iter().all(|r| r.time_ns >= mark));
        assert_eq!(prune(&mut conn, KEY, mark, 2_000).await.unwrap(), 0);
    });
}

#[test]
fn rows_from_before_chunks_move_into_chunks_whole() {
    run(async {
        let mut conn = db().await;
        let rows: Vec<_> = (1..=1_234)
            .map(|s| row(s, HOUR + s as i64 * 5_000_000_000))
            .collect();
        for r in &rows {
            sqlx::query(
                "INSERT INTO readings (channel_key, seq, run_id, time_ns, volts, amps, temp_c, cell_volts_used, \
                 soc_model, soc_fused, charge_ah, energy_wh, flags, soc_counted_unclamped) \
                 VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            )
            .bind(r.channel_key).bind(r.seq as i64).bind(r.run_id).bind(r.time_ns)
            .bind(r.volts).bind(r.amps).bind(r.temp_c).bind(r.cell_volts_used)
            .bind(r.soc_model).bind(r.soc_fused).bind(r.charge_ah).bind(r.energy_wh)
            .bind(r.flags).bind(r.soc_counted_unclamped)
            .execute(&mut conn)
            .await
            .unwrap();
        }
        let mut moved = 0;
        loop {
            let n = adopt_rows(&mut conn, 500).await.unwrap();
            if n == 0 {
                break;
            }
            moved += n;
        }
        assert_eq!(moved, 1_234);
        let left: i64 = sqlx::query("SELECT COUNT(*) AS n FROM readings")
            .fetch_one(&mut conn)
            .await
            .unwrap()
            .get("n");
        assert_eq!(left, 0);
        let back = page(&mut conn, KEY, 0, i64::MAX, (i64::MIN, i64::MIN), 2_000)
            .await
            .unwrap();
        assert_eq!(back, rows);
    });
}

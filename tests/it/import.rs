//! `gibbsline import`: what `readings --format csv` exported comes back
//! the same into another server (a channel that signs discharge
//! positive, so the sign is turned back on the way in), a second import
//! stores nothing, and a bad line is refused by its line number.

use crate::cli::{bin, output_of};
use crate::harness::*;
use gibbsline::pb;

fn def() -> pb::Channel {
    pb::Channel {
        current_sign: pb::CurrentSign::DischargePositive as i32,
        ..channel_def("rec-1", "vanadium-redox")
    }
}

/// Charge, rest, discharge: instrument amps discharge positive.
fn recorded(t0: i64) -> Vec<pb::Reading> {
    (1..=300u64)
        .map(|s| {
            let amps = match s {
                1..=120 => -1.5,
                121..=180 => 0.0,
                _ => 1.25,
            };
            let volts = 1.30 + 0.001 * (s % 120) as f64 + 1.0 / 3.0 * 1e-3;
            pb::Reading {
                seq: s,
                time_unix_ns: t0 + s as i64 * 1_000_000_007,
                volts,
                amps: Some(amps),
                temp_c: Some(24.0 + s as f64 / 7.0),
            }
        })
        .collect()
}

async fn import(addr: &str, file: &std::path::Path) -> serde_json::Value {
    let mut cmd = bin();
    cmd.args([
        "import",
        "--connect",
        addr,
        "--channel",
        "rec-1",
        "--format",
        "json",
        "--batch",
        "64",
    ])
    .arg(file);
    let out = output_of(cmd).await;
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    v[0].clone()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_export_imports_back_the_same_once() {
    let (dir, db_a) = temp_db();
    let a = Server::start(&db_a).await;
    let ch_a = a.channel().await;
    put_channel(&ch_a, def()).await;
    let t0 = now_ns() - 3_600_000_000_000;
    let mut ingest = pb::ingest_service_client::IngestServiceClient::new(ch_a.clone());
    let batch = pb::ReadingBatch {
        historical: false,
        channel_id: "rec-1".into(),
        batch_id: 1,
        readings: recorded(t0),
    };
    send_batches(&mut ingest, vec![batch]).await;
    let mut export = bin();
    export.args([
        "readings",
        "--connect",
        &a.addr.to_string(),
        "--channel",
        "rec-1",
        "--format",
        "csv",
    ]);
    let out = output_of(export).await;
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let csv_path = dir.path().join("rec-1.csv");
    std::fs::write(&csv_path, &out.stdout).unwrap();

    let db_b = dir.path().join("b.db");
    let b = Server::start(&db_b).await;
    let ch_b = b.channel().await;
    put_channel(&ch_b, def()).await;
    let addr_b = b.addr.to_string();
    let first = import(&addr_b, &csv_path).await;
    assert_eq!(
        (
            first["rows_read"].as_u64(),
            first["stored"].as_u64(),
            first["rejected"].as_u64()
        ),
        (Some(300), Some(300), Some(0))
    );

    let mut history_a = pb::history_service_client::HistoryServiceClient::new(ch_a.clone());
    let mut history_b = pb::history_service_client::HistoryServiceClient::new(ch_b.clone());
    let was = stored_readings(&mut history_a, "rec-1").await;
    let now = stored_readings(&mut history_b, "rec-1").await;
    assert_eq!(was.len(), 300);
    for (x, y) in was.iter().zip(&now) {
        // Bit for bit, raw and derived (the same readings in the same order
        // derive the same state).
        assert_eq!(
            (x.seq, x.time_unix_ns, x.volts.to_bits()),
            (y.seq, y.time_unix_ns, y.volts.to_bits())
        );
        assert_eq!(
            x.amps_charge_positive.map(f64::to_bits),
            y.amps_charge_positive.map(f64::to_bits)
        );
        assert_eq!(x.temp_c.map(f64::to_bits), y.temp_c.map(f64::to_bits));
        let (dx, dy) = (x.derived.as_ref().unwrap(), y.derived.as_ref().unwrap());
        assert_eq!(
            dx.charge_ah.to_bits(),
            dy.charge_ah.to_bits(),
            "seq {}",
            x.seq
        );
        assert_eq!(
            dx.soc_fused.map(f64::to_bits),
            dy.soc_fused.map(f64::to_bits),
            "seq {}",
            x.seq
        );
    }
    // Charge-positive on the wire out, so the instrument's discharge-positive
    // sign was turned back on the way in: charging first.
    assert_eq!(now[0].amps_charge_positive, Some(1.5));

    let again = import(&addr_b, &csv_path).await;
    assert_eq!(
        (again["stored"].as_u64(), again["duplicates"].as_u64()),
        (Some(0), Some(300))
    );

    // A damaged copy: one value unreadable, one reading the server refuses.
    let text = String::from_utf8(out.stdout).unwrap();
    let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
    let header: Vec<&str> = lines[0].split(',').collect();
    let volts_at = header.iter().position(|h| *h == "volts").unwrap();
    let mut cells: Vec<String> = lines[5].split(',').map(str::to_string).collect();
    cells[volts_at] = "1;2".into();
    lines[5] = cells.join(",");
    let mut cells: Vec<String> = lines[9].split(',').map(str::to_string).collect();
    cells[volts_at] = "NaN".into();
    lines[9] = cells.join(",");
    let damaged = dir.path().join("damaged.csv");
    std::fs::write(&damaged, lines.join("\n")).unwrap();
    let db_c = dir.path().join("c.db");
    let c = Server::start(&db_c).await;
    put_channel(&c.channel().await, def()).await;
    let report = import(&c.addr.to_string(), &damaged).await;
    assert_eq!(
        (report["stored"].as_u64(), report["rejected"].as_u64()),
        (Some(298), Some(2))
    );
    let refusals = report["refusals"].as_array().unwrap();
    assert_eq!(
        (refusals[0]["line"].as_u64(), refusals[0]["field"].as_str()),
        (Some(6), Some("volts"))
    );
    assert_eq!(
        (refusals[1]["line"].as_u64(), refusals[1]["field"].as_str()),
        (Some(10), Some("volts"))
    );
    for s in [a, b, c] {
        s.stop().await;
    }
}

/// Alerts a recording raises are stored and listed as historical; live
/// subscribers hear nothing of them, and still hear a live alert after.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_import_raises_historical_alerts_that_are_not_pushed() {
    use tokio_stream::StreamExt;
    let (dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("hist-1", "daniell")).await;
    let mut alerts = pb::alert_service_client::AlertServiceClient::new(ch.clone());
    let mut watch = alerts
        .watch_alerts(pb::WatchAlertsRequest {
            after_event_id: u64::MAX >> 1,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    let live = watch.next().await.unwrap().unwrap();
    assert_eq!(live.event, pb::AlertEventKind::Live as i32);

    // Daniell's safe window ends at 1.30 V: seqs 10–15 go over it.
    let t0 = now_ns() - 3_600_000_000_000;
    let mut csv = String::from("seq,time_unix_ns,volts,amps_charge_positive,temp_c\n");
    for s in 1..=20u64 {
        let volts = if (10..=15).contains(&s) { 1.35 } else { 1.10 };
        csv.push_str(&format!(
            "{s},{},{volts},0,25\n",
            t0 + s as i64 * 100_000_000
        ));
    }
    let file = dir.path().join("recorded.csv");
    std::fs::write(&file, csv).unwrap();
    let mut cmd = bin();
    cmd.args([
        "import",
        "--connect",
        &server.addr.to_string(),
        "--channel",
        "hist-1",
    ])
    .arg(&file);
    assert!(output_of(cmd).await.status.success());
    let listed = alerts
        .list_alerts(pb::ListAlertsRequest {
            channel_id: "hist-1".into(),
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner()
        .alerts;
    let limit = listed
        .iter()
        .find(|a| a.kind == pb::AlertKind::VoltageLimit as i32)
        .expect("the recording's voltage-limit alert is stored");
    assert!(limit.historical && limit.cleared_unix_ns.is_some());

    // A live reading over the limit is pushed: the first thing the
    // subscriber hears, so nothing of the import came before it.
    let batch = pb::ReadingBatch {
        channel_id: "hist-1".into(),
        batch_id: 1,
        historical: false,
        readings: vec![reading(21, t0 + 21 * 100_000_000, 1.35, Some(0.0))],
    };
    let mut ingest = pb::ingest_service_client::IngestServiceClient::new(ch.clone());
    send_batches(&mut ingest, vec![batch]).await;
    let first = tokio::time::timeout(std::time::Duration::from_secs(10), watch.next())
        .await
        .unwrap()
        .unwrap()
        .unwrap();
    let a = first.alert.unwrap();
    assert_eq!((a.raised_seq, a.historical), (21, false));
    server.stop().await;
}

/// A recording in another program's layout, read through a map: `;`,
/// decimal commas, elapsed seconds, mA signed discharge-positive; seqs by
/// line number, so a second import stores nothing; a bad line is named.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_mapped_recording_imports_once_by_line_number() {
    let (dir, db) = temp_db();
    let server = Server::start(&db).await;
    put_channel(
        &server.channel().await,
        channel_def("pot-1", "vanadium-redox"),
    )
    .await;
    let mut text = String::from("Zeit/s;Ewe/V;I/mA;T/degC\n");
    for i in 0..40 {
        text.push_str(&format!("{i},5;1,{:03};250,0;24,5\n", 300 + i));
    }
    text.push_str("40,5;nicht;250,0;24,5\n");
    let data = dir.path().join("run7.txt");
    std::fs::write(&data, text).unwrap();
    let map = dir.path().join("map.toml");
    std::fs::write(
        &map,
        "delimiter = \";\"\ndecimal_comma = true\ncurrent_sign = \"discharge_positive\"\n\
         time = { column = \"Zeit/s\", format = \"elapsed_s\", start = \"2026-11-30T09:00:00Z\" }\n\
         volts = { column = \"Ewe/V\", unit = \"V\" }\namps = { column = \"I/mA\", unit = \"mA\" }\n\
         temp_c = { column = \"T/degC\", unit = \"C\" }\n",
    )
    .unwrap();
    let run = || {
        let mut cmd = bin();
        cmd.args([
            "import",
            "--connect",
            &server.addr.to_string(),
            "--channel",
            "pot-1",
            "--format",
            "json",
            "--map",
        ])
        .arg(&map)
        .arg(&data);
        async move {
            let out = output_of(cmd).await;
            assert!(
                out.status.success(),
                "{}",
                String::from_utf8_lossy(&out.stderr)
            );
            serde_json::from_slice::<serde_json::Value>(&out.stdout).unwrap()[0].clone()
        }
    };
    let first = run().await;
    assert_eq!(
        (
            first["rows_read"].as_u64(),
            first["stored"].as_u64(),
            first["rejected"].as_u64()
        ),
        (Some(41), Some(40), Some(1))
    );
    assert_eq!(
        (
            first["refusals"][0]["line"].as_u64(),
            first["refusals"][0]["field"].as_str()
        ),
        (Some(42), Some("volts"))
    );
    let again = run().await;
    assert_eq!(
        (again["stored"].as_u64(), again["duplicates"].as_u64()),
        (Some(0), Some(40))
    );

    let mut history = pb::history_service_client::HistoryServiceClient::new(server.channel().await);
    let rows = stored_readings(&mut history, "pot-1").await;
    assert_eq!(
        rows.iter().map(|r| r.seq).collect::<Vec<_>>(),
        (2..=41).collect::<Vec<u64>>()
    );
    let r = &rows[3];
    // 2026-11-30T09:00:00Z + 3.5 s; 250 mA discharge-positive is 0.25 A out.
    assert_eq!(r.time_unix_ns, 1_796_029_200_000_000_000 + 3_500_000_000);
    assert_eq!(
        (r.volts, r.amps_charge_positive, r.temp_c),
        (1.303, Some(-0.25), Some(24.5))
    );
    server.stop().await;
}

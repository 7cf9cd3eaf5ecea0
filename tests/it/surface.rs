//! One surface: every command in every format it accepts, parsed back, and
//! one name per quantity across protos, CSV headers and JSON keys.

use crate::harness::*;
use gibbsline::pb;
use prost::Message;
use std::collections::BTreeSet;
use std::io::BufRead;
use std::process::{Command, Stdio};

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_gibbsline"))
}

/// Names this project used once for a quantity that now has another
/// (README, "Names"): none may come back in a proto field, a CSV column or
/// a JSON key.
const RETIRED: &[&str] = &[
    "volts_v",
    "amps_a",
    "cell_volts_used",
    "cell_volts_used_v",
    "soc_model",
    "e_standard_v",
    "e_standard_override_v",
    "e_standard_298_volts",
    "de_dt_volts_per_k",
    "min_volts",
    "max_volts",
    "min_cell_volts_v",
    "max_cell_volts_v",
    "after_id",
    "next_after_id",
    "resume_after_id",
    "volts_min_v",
    "delta_g_mean_kj_per_mol",
    "id",
];

/// The names each quantity has everywhere; each must be a proto field and
/// must be what the CLI prints for it where it prints it.
const SHARED: &[&str] = &[
    "volts",
    "amps_charge_positive",
    "temp_c",
    "equilibrium_cell_volts",
    "soc_from_model",
    "soc_fused",
    "delta_g_kj_per_mol",
    "log10_q",
    "log10_k",
    "e_standard_298_v",
    "e_standard_at_temp_v",
    "soc_model_name",
    "de_dt_mv_per_k",
    "chemistry_id",
    "plausible_min_cell_volts",
    "plausible_max_cell_volts",
    "charge_in_ah",
    "coulombic_efficiency",
    "alert_id",
    "raised_unix_ns",
    "acknowledged_unix_ns",
    "run_id",
];

fn proto_field_names() -> BTreeSet<String> {
    let set = prost_types::FileDescriptorSet::decode(pb::FILE_DESCRIPTOR_SET).unwrap();
    set.file
        .iter()
        .flat_map(|f| &f.message_type)
        .flat_map(|m| &m.field)
        .filter_map(|f| f.name.clone())
        .collect()
}

fn json_keys(v: &serde_json::Value, out: &mut BTreeSet<String>) {
    match v {
        serde_json::Value::Object(map) => {
            for (k, v) in map {
                out.insert(k.clone());
                json_keys(v, out);
            }
        }
        serde_json::Value::Array(items) => items.iter().for_each(|v| json_keys(v, out)),
        _ => {}
    }
}

/// What one command printed, checked for its format: a JSON array (or
/// object for `eval`), CSV whose every row has the header's width, or a
/// table with a heading line. Returns the machine names it used.
fn parse(format: &str, args: &[String], text: &str) -> BTreeSet<String> {
    let mut names = BTreeSet::new();
    match format {
        "json" => {
            let v: serde_json::Value = serde_json::from_str(text)
                .unwrap_or_else(|e| panic!("{args:?}: not one JSON value ({e}): {text}"));
            assert!(v.is_array() || v.is_object(), "{args:?}: {text}");
            json_keys(&v, &mut names);
        }
        "csv" => {
            let mut r = csv::Reader::from_reader(text.as_bytes());
            let header = r.headers().unwrap().clone();
            names.extend(header.iter().map(str::to_string));
            for row in r.records() {
                let row = row.unwrap_or_else(|e| panic!("{args:?}: bad CSV row: {e}"));
                assert_eq!(row.len(), header.len(), "{args:?}");
            }
        }
        _ => assert!(!text.trim().is_empty(), "{args:?}: empty table"),
    }
    names
}

fn run(args: &[String]) -> String {
    let out = bin().args(args).output().unwrap();
    assert!(
        out.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// A vanadium channel with a charge, a rest and a voltage-limit excursion:
/// readings, buckets, an alert, a cycle to print.
async fn bench_with_history(server: &Server) {
    let ch = server.channel().await;
    put_channel(&ch, channel_def("face-1", "vanadium-redox")).await;
    let t0 = now_ns() - 400_000_000_000;
    let readings: Vec<_> = (1..=300u64)
        .map(|s| {
            let (volts, amps) = match s {
                1..=100 => (1.40 + 0.001 * s as f64, Some(1.0)),
                101..=110 => (1.80, Some(0.0)),
                111..=200 => (1.45, Some(0.0)),
                _ => (1.45 - 0.001 * (s - 200) as f64, Some(-1.0)),
            };
            reading(s, t0 + s as i64 * 1_000_000_000, volts, amps)
        })
        .collect();
    let mut ingest = pb::ingest_service_client::IngestServiceClient::new(ch);
    let batch = pb::ReadingBatch {
        historical: false,
        channel_id: "face-1".into(),
        batch_id: 1,
        readings,
    };
    let acks = send_batches(&mut ingest, vec![batch]).await;
    assert_eq!(acks[0].accepted, 300);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_command_prints_every_format_it_accepts_under_one_set_of_names() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    bench_with_history(&server).await;
    let addr = server.addr.to_string();
    let s = |v: &[&str]| v.iter().map(|x| x.to_string()).collect::<Vec<_>>();
    let connect = ["--connect", addr.as_str()];
    let mut commands: Vec<(Vec<String>, &[&str])> = Vec::new();
    let all: &[&str] = &["table", "csv", "json"];
    let table_json: &[&str] = &["table", "json"];
    for cmd in [
        vec!["readings", "--channel", "face-1"],
        vec!["readings", "--channel", "face-1", "--bucket", "1m"],
        vec!["alerts", "list"],
        vec!["alerts", "list", "--min-severity", "warning"],
        vec!["alerts", "deliveries"],
        vec!["channels", "list"],
        vec!["channels", "get", "face-1"],
        vec!["cycles", "--channel", "face-1"],
    ] {
        commands.push(([s(&cmd), s(&connect)].concat(), all));
    }
    commands.push(([s(&["state"]), s(&connect)].concat(), table_json));
    let db_path = db.display().to_string();
    commands.push((s(&["db", "stats", "--db", db_path.as_str()]), table_json));
    let mut printed = BTreeSet::new();
    let machine_names = tokio::task::spawn_blocking(move || {
        for (args, formats) in &commands {
            for format in *formats {
                let args = [args.clone(), s(&["--format", format])].concat();
                printed.extend(parse(format, &args, &run(&args)));
            }
        }
        for (args, format) in [
            (s(&["chemistries"]), "table"),
            (s(&["chemistries", "--json"]), "json"),
            (
                s(&["eval", "--chemistry", "daniell", "--volts", "1.1"]),
                "table",
            ),
            (
                s(&["eval", "--chemistry", "daniell", "--volts", "1.1", "--json"]),
                "json",
            ),
        ] {
            printed.extend(parse(format, &args, &run(&args)));
        }
        printed
    })
    .await
    .unwrap();
    let watched = first_watch_line(&addr).await;
    let mut names = machine_names;
    names.extend(parse("json", &s(&["alerts", "watch"]), &watched));

    let proto = proto_field_names();
    for retired in RETIRED {
        assert!(
            !proto.contains(*retired),
            "proto field {retired} is retired"
        );
        assert!(
            !names.contains(*retired),
            "CLI prints retired name {retired}"
        );
    }
    for name in SHARED {
        assert!(proto.contains(*name), "{name} is no proto field");
        assert!(names.contains(*name), "no CLI output names {name}");
    }
    server.stop().await;
}

/// `alerts watch --format json` is a stream: its first line, then it is
/// stopped.
async fn first_watch_line(addr: &str) -> String {
    let addr = addr.to_string();
    tokio::task::spawn_blocking(move || {
        let mut child = bin()
            .args(["alerts", "watch", "--connect", &addr, "--format", "json"])
            .stdout(Stdio::piped())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let mut line = String::new();
        std::io::BufReader::new(child.stdout.take().unwrap())
            .read_line(&mut line)
            .unwrap();
        let _ = child.kill();
        let _ = child.wait();
        line
    })
    .await
    .unwrap()
}

/// `db stats` beside a running server: every table, and each channel's
/// readings with their span, as the store has them.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn db_stats_reports_rows_and_bytes_beside_a_running_server() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    bench_with_history(&server).await;
    let path = db.display().to_string();
    let text = tokio::task::spawn_blocking(move || {
        run(&[
            "db".into(),
            "stats".into(),
            "--db".into(),
            path,
            "--format".into(),
            "json".into(),
        ])
    })
    .await
    .unwrap();
    let v: serde_json::Value = serde_json::from_str(&text).unwrap();
    let table = |name: &str| {
        v["tables"]
            .as_array()
            .unwrap()
            .iter()
            .find(|t| t["table"] == name)
            .unwrap()
            .clone()
    };
    // Readings live in compressed chunks, a few per batch; the table of
    // one row per reading stays, empty.
    let chunks = table("chunks");
    assert!(
        (1..300).contains(&chunks["rows"].as_u64().unwrap()),
        "{chunks}"
    );
    assert!(chunks["bytes"].as_u64().unwrap() > 0);
    assert_eq!(table("readings")["rows"], 0);
    let channel = &v["channels"][0];
    assert_eq!(channel["channel_id"], "face-1");
    assert_eq!(channel["readings"], 300);
    assert!(channel["oldest_unix_ns"].as_i64() < channel["newest_unix_ns"].as_i64());
    assert!(v["file_bytes"].as_u64().unwrap() + v["wal_bytes"].as_u64().unwrap() > 0);
    server.stop().await;
}

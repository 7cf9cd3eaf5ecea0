//! The Prometheus endpoint over real HTTP after real ingest: each counter
//! moves by what the streamed batches did.

use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

async fn scrape(addr: std::net::SocketAddr) -> String {
    let mut socket = tokio::net::TcpStream::connect(addr).await.unwrap();
    socket
        .write_all(b"GET /metrics HTTP/1.1\r\nhost: test\r\nconnection: close\r\n\r\n")
        .await
        .unwrap();
    let mut response = String::new();
    socket.read_to_string(&mut response).await.unwrap();
    assert!(response.starts_with("HTTP/1.1 200 OK\r\n"), "{response}");
    assert!(response.contains("content-type: text/plain; version=0.0.4"));
    response
}

/// The value of `series` on a server that may still be starting: none
/// while its metrics endpoint does not answer yet.
pub(crate) async fn sample_when_up(addr: std::net::SocketAddr, series: &str) -> Option<f64> {
    let mut socket = tokio::net::TcpStream::connect(addr).await.ok()?;
    socket
        .write_all(b"GET /metrics HTTP/1.1\r\nhost: test\r\nconnection: close\r\n\r\n")
        .await
        .ok()?;
    let mut text = String::new();
    socket.read_to_string(&mut text).await.ok()?;
    Some(sample(&text, series))
}

/// The value of the sample line named exactly `series`.
pub(crate) fn sample(text: &str, series: &str) -> f64 {
    text.lines()
        .find_map(|l| l.strip_prefix(series)?.strip_prefix(' '))
        .unwrap_or_else(|| panic!("no {series} in\n{text}"))
        .parse()
        .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_count_what_ingest_did() {
    let (_dir, db) = temp_db();
    let metrics_listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let metrics_addr = metrics_listener.local_addr().unwrap();
    let listeners = gibbsline::app::Listeners {
        grpc: tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap(),
        metrics: Some(metrics_listener),
        http: None,
    };
    let server = Server::start_with_listeners(config_for(&db), listeners).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("met-1", "daniell")).await;
    let t0 = now_ns() - 60_000_000_000;
    let at = |s: u64| t0 + s as i64 * 1_000_000_000;
    let batch = |readings: Vec<pb::Reading>| pb::ReadingBatch {
        historical: false,
        channel_id: "met-1".into(),
        readings,
        batch_id: 1,
    };
    let mut first: Vec<pb::Reading> = (1..=10).map(|s| reading(s, at(s), 1.08, None)).collect();
    first.push(reading(11, at(11), f64::NAN, None));
    first.push(reading(12, at(12), 1.08, Some(-1e300)));
    let resend: Vec<pb::Reading> = first[..5].to_vec();
    // Daniell's charge cutoff is 1.25 V; the voltage-limit rule fires at
    // once 50 mV beyond it, inside the channel's plausibility window.
    let over_limit = vec![reading(13, at(13), 1.40, None)];
    let unknown = pb::ReadingBatch {
        historical: false,
        channel_id: "met-nobody".into(),
        ..batch(vec![reading(1, at(1), 1.08, None)])
    };
    let mut ingest = IngestServiceClient::new(ch.clone());
    let acks = send_batches(
        &mut ingest,
        vec![batch(first), batch(resend), batch(over_limit), unknown],
    )
    .await;
    assert_eq!(
        acks.iter()
            .map(|a| (a.accepted, a.duplicates))
            .collect::<Vec<_>>(),
        [(10, 0), (0, 5), (1, 0), (0, 0)]
    );

    let text = scrape(metrics_addr).await;
    for (series, expected) in [
        ("gibbsline_readings_accepted_total", 11.0),
        ("gibbsline_readings_duplicate_total", 5.0),
        ("gibbsline_readings_out_of_order_total", 0.0),
        ("gibbsline_batches_refused_total", 1.0),
        ("gibbsline_readings_rejected_total{field=\"volts\"}", 1.0),
        ("gibbsline_readings_rejected_total{field=\"amps\"}", 1.0),
        ("gibbsline_alerts_raised_total{kind=\"voltage_limit\"}", 1.0),
        ("gibbsline_alerts_raised_total{kind=\"end_of_charge\"}", 0.0),
        ("gibbsline_alert_subscribers", 0.0),
    ] {
        assert_eq!(sample(&text, series), expected, "{series}");
    }
    // Three batches reached the writer; it may have committed them together.
    let commits = sample(&text, "gibbsline_commit_seconds_count");
    assert!((1.0..=3.0).contains(&commits), "{commits} commits");
    assert_eq!(
        sample(&text, "gibbsline_commit_seconds_bucket{le=\"+Inf\"}"),
        commits
    );
    let age = sample(
        &text,
        "gibbsline_channel_last_seen_age_seconds{channel_id=\"met-1\"}",
    );
    assert!((0.0..60.0).contains(&age), "last seen {age} s ago");
    assert!(sample(&text, "gibbsline_writer_queue_depth") >= 0.0);
    // The database's size, as the file system has it (WAL mode: the file
    // holds at least the schema's pages, the log the recent commits).
    let file_bytes = sample(&text, "gibbsline_db_file_bytes");
    assert!(file_bytes >= 4096.0, "{file_bytes}");
    assert!(sample(&text, "gibbsline_db_wal_bytes") >= 0.0);
    server.stop().await;
}

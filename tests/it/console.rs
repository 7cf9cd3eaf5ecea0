//! The JSON API and live feed beside gRPC: every route answers in the
//! shape `proto/openapi.json` documents, bad input is named, tokens and
//! roles hold as on gRPC, and the live feed carries committed readings
//! and alert events.

use crate::harness::*;
use crate::web::{self, Events, assert_documented, request};
use gibbsline::auth::Role;
use gibbsline::pb;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use serde_json::{Value, json};

/// Daniell (voltage limit 0.85–1.30 V): charging at 0.5 A, then over the
/// limit from `over_from` on, so a critical alert stays raised.
fn batch(channel: &str, t0: i64, seqs: std::ops::Range<u64>, over_from: u64) -> pb::ReadingBatch {
    pb::ReadingBatch {
        historical: false,
        channel_id: channel.into(),
        batch_id: seqs.start,
        readings: seqs
            .map(|s| {
                let volts = if s >= over_from {
                    1.35
                } else {
                    1.10 + s as f64 * 1e-4
                };
                reading(s, t0 + s as i64 * 100_000_000, volts, Some(0.5))
            })
            .collect(),
    }
}

async fn fill(ch: &tonic::transport::Channel, channel: &str, t0: i64) {
    put_channel(ch, channel_def(channel, "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    send_batches(&mut ingest, vec![batch(channel, t0, 1..200, 150)]).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_route_answers_in_the_documented_shape() {
    let (_dir, db) = temp_db();
    let (server, http) = Server::start_with_console(config_for(&db)).await;
    let ch = server.channel().await;
    let t0 = now_ns() - 60_000_000_000;
    fill(&ch, "api-1", t0).await;
    fill(&ch, "api-2", t0).await;
    let doc = web::openapi();

    // The router's routes are the document's paths, method for method.
    let documented: std::collections::BTreeSet<(String, String)> = doc["paths"]
        .as_object()
        .unwrap()
        .iter()
        .flat_map(|(p, ops)| {
            ops.as_object()
                .unwrap()
                .keys()
                .map(move |m| (m.clone(), p.clone()))
        })
        .collect();
    let routed = gibbsline::http::API_ROUTES
        .iter()
        .map(|(m, p)| (m.to_string(), p.to_string()))
        .collect();
    assert_eq!(documented, routed);

    let end = t0 + 100 * 1_000_000_000;
    let gets = [
        ("/api/v1/overview", "/api/v1/overview".to_string()),
        ("/api/v1/channels", "/api/v1/channels".into()),
        (
            "/api/v1/channels/{channel_id}",
            "/api/v1/channels/api-1".into(),
        ),
        (
            "/api/v1/channels/{channel_id}/state",
            "/api/v1/channels/api-1/state".into(),
        ),
        (
            "/api/v1/channels/{channel_id}/readings",
            format!(
                "/api/v1/channels/api-1/readings?start_unix_ns={t0}&end_unix_ns={end}&limit=500"
            ),
        ),
        (
            "/api/v1/channels/{channel_id}/buckets",
            format!(
                "/api/v1/channels/api-1/buckets?start_unix_ns={t0}&end_unix_ns={end}&bucket_width_ns=1000000000"
            ),
        ),
        (
            "/api/v1/channels/{channel_id}/cycles",
            "/api/v1/channels/api-1/cycles".into(),
        ),
        (
            "/api/v1/alerts",
            "/api/v1/alerts?min_severity=warning&active_only=true".into(),
        ),
        ("/api/v1/chemistries", "/api/v1/chemistries".into()),
    ];
    let mut answers = std::collections::BTreeMap::new();
    for (documented, path) in gets {
        let answer = request(http, "GET", &path, None, None).await;
        assert_documented(&doc, documented, "get", &answer);
        answers.insert(documented, answer.json());
    }

    // What the answers say, not only their shape.
    let overview = &answers["/api/v1/overview"];
    let ids: Vec<&str> = overview["states"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["channel"]["channel_id"].as_str().unwrap())
        .collect();
    assert_eq!(ids, ["api-1", "api-2"]);
    assert!(
        overview["states"][0]["last_arrival_unix_ns"]
            .as_i64()
            .unwrap()
            > 0
    );
    assert_eq!(overview["states"][0]["latest"]["seq"], 199);
    let active = overview["active_alerts"].as_array().unwrap();
    // Per channel: over the safe window (critical), and at 1.35 V past the
    // end-of-charge voltage too (warning).
    let kinds: Vec<(&str, &str, &str)> = active
        .iter()
        .map(|a| {
            (
                a["channel_id"].as_str().unwrap(),
                a["kind"].as_str().unwrap(),
                a["severity"].as_str().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        kinds,
        [
            ("api-1", "voltage_limit", "critical"),
            ("api-1", "end_of_charge", "warning"),
            ("api-2", "voltage_limit", "critical"),
            ("api-2", "end_of_charge", "warning"),
        ]
    );
    let readings = answers["/api/v1/channels/{channel_id}/readings"]["readings"]
        .as_array()
        .unwrap();
    assert_eq!(readings.len(), 199);
    assert_eq!(readings[0]["seq"], 1);
    assert_eq!(readings[0]["derived"]["operating_mode"], "charge");
    let buckets = &answers["/api/v1/channels/{channel_id}/buckets"];
    assert_eq!(buckets["bucket_width_ns"], 1_000_000_000);
    let counted: u64 = buckets["buckets"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| b["count"].as_u64().unwrap())
        .sum();
    assert_eq!(counted, 199);

    // The acknowledgement through the API is the stored one.
    let alert_id = active[0]["alert_id"].as_u64().unwrap();
    let path = format!("/api/v1/alerts/{alert_id}/acknowledge");
    let body = json!({"acknowledged_by": "M. Osei", "note": "cell swapped"});
    let answer = request(http, "POST", &path, None, Some(&body)).await;
    assert_documented(
        &doc,
        "/api/v1/alerts/{alert_id}/acknowledge",
        "post",
        &answer,
    );
    let stored = pb::alert_service_client::AlertServiceClient::new(ch.clone())
        .list_alerts(pb::ListAlertsRequest::default())
        .await
        .unwrap()
        .into_inner()
        .alerts;
    let a = stored.iter().find(|a| a.alert_id == alert_id).unwrap();
    assert_eq!(a.acknowledged_by.as_deref(), Some("M. Osei"));
    assert_eq!(a.acknowledge_note.as_deref(), Some("cell swapped"));
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_input_is_named_and_unknown_things_are_not_found() {
    let (_dir, db) = temp_db();
    let (server, http) = Server::start_with_console(config_for(&db)).await;
    let ch = server.channel().await;
    fill(&ch, "api-1", now_ns() - 60_000_000_000).await;
    let cases: [(&str, &str, u16, &str); 7] = [
        ("GET", "/api/v1/alerts?limit=ten", 400, "limit = \"ten\""),
        (
            "GET",
            "/api/v1/alerts?min_severity=loud",
            400,
            "min_severity = \"loud\"",
        ),
        ("GET", "/api/v1/alerts?limt=5", 400, "limt"),
        (
            "GET",
            "/api/v1/channels/api-1/buckets",
            400,
            "bucket_width_ns",
        ),
        (
            "GET",
            "/api/v1/channels/api-1/buckets?bucket_width_ns=-5",
            400,
            "bucket_width_ns",
        ),
        ("GET", "/api/v1/channels/nope/state", 404, "nope"),
        (
            "POST",
            "/api/v1/alerts/x/acknowledge",
            400,
            "alert_id = \"x\"",
        ),
    ];
    for (method, path, status, names) in cases {
        let body = (method == "POST").then(|| json!({"acknowledged_by": "A"}));
        let answer = request(http, method, path, None, body.as_ref()).await;
        assert_eq!(answer.status, status, "{path}");
        let message = answer.json()["error"]["message"]
            .as_str()
            .unwrap()
            .to_string();
        assert!(message.contains(names), "{path}: {message}");
    }
    // An acknowledgement without a name is refused, naming the field.
    let answer = request(
        http,
        "POST",
        "/api/v1/alerts/1/acknowledge",
        None,
        Some(&json!({"note": "x"})),
    )
    .await;
    assert_eq!(answer.status, 400);
    assert!(
        answer.json()["error"]["message"]
            .as_str()
            .unwrap()
            .contains("acknowledged_by")
    );
    let answer = request(
        http,
        "POST",
        "/api/v1/alerts/999/acknowledge",
        None,
        Some(&json!({"acknowledged_by": "A"})),
    )
    .await;
    assert_eq!(
        answer.status,
        404,
        "{}",
        String::from_utf8_lossy(&answer.body)
    );
    server.stop().await;
}

fn token(name: &str, role: Role, secret: &str) -> gibbsline::auth::TokenSpec {
    crate::security::token(name, role, secret, &[])
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tokens_and_roles_hold_as_on_grpc() {
    let (_dir, db) = temp_db();
    let mut config = config_for(&db);
    config.token = vec![
        token("wall-screen", Role::Viewer, "viewer-secret"),
        token("night-shift", Role::Operator, "operator-secret"),
        token("lab-lead", Role::Admin, "admin-secret"),
    ];
    let (server, http) = Server::start_with_console(config).await;
    // The pages themselves are public; what they read is not.
    assert_eq!(request(http, "GET", "/", None, None).await.status, 200);
    let none = request(http, "GET", "/api/v1/overview", None, None).await;
    assert_eq!(none.status, 401);
    assert_eq!(none.header("www-authenticate"), Some("Bearer"));
    assert_eq!(
        request(http, "GET", "/api/v1/overview", Some("guess"), None)
            .await
            .status,
        401
    );
    assert_eq!(
        request(http, "GET", "/metrics", None, None).await.status,
        401
    );
    assert_eq!(
        request(http, "GET", "/api/v1/live", None, None)
            .await
            .status,
        401
    );
    assert_eq!(
        request(http, "GET", "/api/v1/overview", Some("viewer-secret"), None)
            .await
            .status,
        200
    );
    assert_eq!(
        request(http, "GET", "/metrics", Some("viewer-secret"), None)
            .await
            .status,
        200
    );

    let body = json!({"acknowledged_by": "A. Viewer"});
    let viewer = request(
        http,
        "POST",
        "/api/v1/alerts/1/acknowledge",
        Some("viewer-secret"),
        Some(&body),
    )
    .await;
    assert_eq!(
        viewer.status,
        403,
        "{}",
        String::from_utf8_lossy(&viewer.body)
    );
    // The operator gets past the role check (and finds no alert 1).
    let operator = request(
        http,
        "POST",
        "/api/v1/alerts/1/acknowledge",
        Some("operator-secret"),
        Some(&body),
    )
    .await;
    assert_eq!(operator.status, 404);
    // No answer repeats a token.
    for answer in [none, viewer, operator] {
        let text = String::from_utf8_lossy(&answer.body).to_string();
        assert!(!text.contains("secret"), "{text}");
    }
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_live_feed_carries_committed_readings_and_alerts() {
    let (_dir, db) = temp_db();
    let (server, http) = Server::start_with_console(config_for(&db)).await;
    let ch = server.channel().await;
    let t0 = now_ns() - 60_000_000_000;
    put_channel(&ch, channel_def("live-1", "daniell")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    send_batches(&mut ingest, vec![batch("live-1", t0, 1..10, 1000)]).await;

    let mut feed = Events::open(http, "/api/v1/live?channel_id=live-1", None).await;
    let (name, live) = feed.next().await;
    assert_eq!((name.as_str(), &live["event"]), ("alert", &json!("live")));
    // Nothing from before the feed opened; the next batch arrives whole.
    send_batches(&mut ingest, vec![batch("live-1", t0, 10..40, 35)]).await;
    let mut seqs = Vec::new();
    let mut alert = None;
    while seqs.len() < 30 || alert.is_none() {
        let (name, body) = tokio::time::timeout(std::time::Duration::from_secs(10), feed.next())
            .await
            .expect("live events within 10 s");
        match name.as_str() {
            "readings" => seqs.extend(
                body["readings"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|r| r["seq"].as_u64().unwrap()),
            ),
            "alert" => alert = Some(body),
            other => panic!("unexpected event {other}: {body}"),
        }
    }
    assert_eq!(seqs, (10..40).collect::<Vec<u64>>());
    let alert: Value = alert.unwrap();
    assert_eq!(alert["event"], "raised");
    assert_eq!(alert["alert"]["raised_seq"], 35);
    server.stop().await;
}

/// The server's own log (debug level, every layer) while the console is
/// asked with a right token, a wrong one and one whose role falls short:
/// no token text appears in it.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tokens_never_reach_the_log() {
    let (dir, db) = temp_db();
    let config = dir.path().join("gibbsline.toml");
    let http = crate::crash::free_addr();
    std::fs::write(
        &config,
        format!(
            "http_listen = \"{http}\"\n\n[[token]]\nname = \"wall-screen\"\nrole = \"viewer\"\nsha256 = \"{}\"\n",
            gibbsline::auth::sha256_hex("viewer-token-7f3a9c")
        ),
    )
    .unwrap();
    let log = dir.path().join("server.log");
    let grpc = crate::crash::free_addr();
    let mut server = std::process::Command::new(env!("CARGO_BIN_EXE_gibbsline"))
        .args(["serve", "--listen", &grpc, "--config"])
        .arg(&config)
        .arg("--db")
        .arg(&db)
        .env("RUST_LOG", "debug")
        .stdout(std::fs::File::create(&log).unwrap())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    crate::crash::connect(&grpc).await;
    let http: std::net::SocketAddr = http.parse().unwrap();
    let body = json!({"acknowledged_by": "A"});
    for _ in 0..50 {
        if tokio::net::TcpStream::connect(http).await.is_ok() {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
    }
    let cases = [
        ("GET", "/api/v1/overview", Some("viewer-token-7f3a9c"), 200),
        ("GET", "/api/v1/overview", Some("wrong-token-b81d44"), 401),
        (
            "POST",
            "/api/v1/alerts/1/acknowledge",
            Some("viewer-token-7f3a9c"),
            403,
        ),
        ("GET", "/api/v1/live", Some("wrong-token-b81d44"), 401),
    ];
    for (method, path, token, status) in cases {
        let b = (method == "POST").then_some(&body);
        assert_eq!(
            request(http, method, path, token, b).await.status,
            status,
            "{path}"
        );
    }
    server.kill().unwrap();
    server.wait().unwrap();
    let text = std::fs::read_to_string(&log).unwrap();
    assert!(text.contains("denied"), "the denials are logged:\n{text}");
    for secret in [
        "viewer-token-7f3a9c",
        "wrong-token-b81d44",
        "7f3a9c",
        "b81d44",
    ] {
        assert!(!text.contains(secret), "{secret} in the log:\n{text}");
    }
}

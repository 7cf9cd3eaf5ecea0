//! The console in a real browser: headless Chromium driven through
//! ChromeDriver (WebDriver over HTTP on loopback), against a real server
//! fed by the simulated bench (`gibbsline rig simulate`) and one channel
//! the test drives over a limit. The page must list every channel, plot
//! live points, take a token without putting it in any URL, and
//! acknowledge an alert that the store then holds. Screenshots go to
//! `target/tmp/console-shots/`.
//!
//! Needs `chromium` and `chromium-driver` (Debian packages; `.ci/run`
//! installs them). Set `GIBBSLINE_SKIP_BROWSER=1` to leave this test out
//! on a machine without them; it fails otherwise, it never passes empty.

use crate::harness::*;
use crate::web::request;
use base64::Engine;
use gibbsline::auth::Role;
use gibbsline::pb;
use serde_json::{Value, json};
use std::net::SocketAddr;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

const CHROMIUM: &str = "/usr/bin/chromium";
const CHROMEDRIVER: &str = "/usr/bin/chromedriver";
const ELEMENT: &str = "element-6066-11e4-a52e-4f735466cecf";

/// Kills its process when the test ends, however it ends.
struct Reaped(Child);
impl Drop for Reaped {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// One WebDriver session.
struct Browser {
    driver: SocketAddr,
    session: String,
    _process: Reaped,
    _profile: tempfile::TempDir,
}

impl Browser {
    async fn start() -> Browser {
        let port = {
            let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
            l.local_addr().unwrap().port()
        };
        let process = Reaped(
            Command::new(CHROMEDRIVER)
                .arg(format!("--port={port}"))
                .stdout(Stdio::null())
                .stderr(Stdio::null())
                .spawn()
                .expect("chromedriver"),
        );
        let driver: SocketAddr = format!("127.0.0.1:{port}").parse().unwrap();
        let deadline = Instant::now() + Duration::from_secs(20);
        while tokio::net::TcpStream::connect(driver).await.is_err() {
            assert!(Instant::now() < deadline, "chromedriver did not start");
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        let profile = tempfile::tempdir().unwrap();
        let args = [
            "--headless".to_string(),
            "--no-sandbox".into(),
            "--disable-gpu".into(),
            "--disable-background-networking".into(),
            "--disable-component-update".into(),
            "--no-first-run".into(),
            "--window-size=1400,1000".into(),
            format!("--user-data-dir={}", profile.path().display()),
        ];
        let caps = json!({"capabilities": {"alwaysMatch": {
            "browserName": "chrome",
            "goog:chromeOptions": {"binary": CHROMIUM, "args": args}
        }}});
        let answer = request(driver, "POST", "/session", None, Some(&caps)).await;
        let body = answer.json();
        let session = body["value"]["sessionId"]
            .as_str()
            .unwrap_or_else(|| panic!("no session: {body}"))
            .to_string();
        Browser {
            driver,
            session,
            _process: process,
            _profile: profile,
        }
    }

    async fn call(&self, method: &str, what: &str, body: Value) -> Value {
        let path = format!("/session/{}{what}", self.session);
        let body = (method == "POST").then_some(body);
        let answer = request(self.driver, method, &path, None, body.as_ref()).await;
        let v = answer.json();
        assert_eq!(answer.status, 200, "{method} {what}: {v}");
        v["value"].clone()
    }

    async fn go(&self, url: &str) {
        self.call("POST", "/url", json!({ "url": url })).await;
    }

    async fn run(&self, script: &str) -> Value {
        self.call(
            "POST",
            "/execute/sync",
            json!({"script": script, "args": []}),
        )
        .await
    }

    /// Waits until `script` returns something truthy; its value.
    async fn until(&self, what: &str, script: &str) -> Value {
        let deadline = Instant::now() + Duration::from_secs(30);
        loop {
            let v = self.run(script).await;
            if !(v.is_null() || v == json!(false) || v == json!(0) || v == json!("")) {
                return v;
            }
            assert!(Instant::now() < deadline, "waited 30 s for {what}");
            tokio::time::sleep(Duration::from_millis(200)).await;
        }
    }

    async fn element(&self, css: &str) -> String {
        let v = self
            .call(
                "POST",
                "/element",
                json!({"using": "css selector", "value": css}),
            )
            .await;
        v[ELEMENT].as_str().unwrap().to_string()
    }

    /// Clicks the element `css` names. A list that live events redraw may
    /// replace the element between finding and clicking it (WebDriver's
    /// "stale element reference"): it is found again, a few times.
    async fn click(&self, css: &str) {
        for _ in 0..5 {
            let id = self.element(css).await;
            let path = format!("/session/{}/element/{id}/click", self.session);
            let answer = request(self.driver, "POST", &path, None, Some(&json!({}))).await;
            let v = answer.json();
            if answer.status == 200 {
                return;
            }
            assert_eq!(
                v["value"]["error"], "stale element reference",
                "click {css}: {v}"
            );
        }
        panic!("{css}: replaced on every one of 5 clicks");
    }

    async fn type_into(&self, css: &str, text: &str) {
        let id = self.element(css).await;
        self.call(
            "POST",
            &format!("/element/{id}/value"),
            json!({ "text": text }),
        )
        .await;
    }

    async fn screenshot(&self, name: &str) {
        let v = self.call("GET", "/screenshot", json!({})).await;
        let png = base64::engine::general_purpose::STANDARD
            .decode(v.as_str().unwrap())
            .unwrap();
        let dir = std::path::Path::new(env!("CARGO_TARGET_TMPDIR")).join("console-shots");
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::write(dir.join(name), png).unwrap();
    }

    async fn quit(self) {
        let path = format!("/session/{}", self.session);
        request(self.driver, "DELETE", &path, None, None).await;
    }
}

fn token(name: &str, role: Role, secret: &str) -> gibbsline::auth::TokenSpec {
    crate::security::token(name, role, secret, &[])
}

/// The simulated bench as its own process, streaming to `grpc`.
fn start_rig(grpc: SocketAddr) -> Reaped {
    Reaped(
        Command::new(env!("CARGO_BIN_EXE_gibbsline"))
            .args(["rig", "simulate", "--connect", &grpc.to_string()])
            .args(["--channels", "4", "--speed", "60"])
            .env("GIBBSLINE_TOKEN", "admin-secret")
            .env("RUST_LOG", "warn")
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap(),
    )
}

fn with_token<T>(msg: T) -> tonic::Request<T> {
    let mut r = tonic::Request::new(msg);
    r.metadata_mut()
        .insert("authorization", "Bearer admin-secret".parse().unwrap());
    r
}

/// A Daniell channel driven over its voltage limit: one active critical alert.
async fn raise_alert(ch: tonic::transport::Channel) -> u64 {
    let mut channels = pb::channel_service_client::ChannelServiceClient::new(ch.clone());
    let def = channel_def("alarm-1", "daniell");
    channels
        .put_channel(with_token(pb::PutChannelRequest { channel: Some(def) }))
        .await
        .unwrap();
    let t0 = now_ns() - 10_000_000_000;
    let readings = (1..20)
        .map(|s| {
            reading(
                s,
                t0 + s as i64 * 100_000_000,
                if s >= 10 { 1.35 } else { 1.1 },
                Some(0.0),
            )
        })
        .collect();
    let batch = pb::ReadingBatch {
        historical: false,
        channel_id: "alarm-1".into(),
        batch_id: 1,
        readings,
    };
    let mut ingest = pb::ingest_service_client::IngestServiceClient::new(ch.clone());
    let outbound = tokio_stream::iter([pb::StreamReadingsRequest { batch: Some(batch) }]);
    let mut acks = ingest
        .stream_readings(with_token(outbound))
        .await
        .unwrap()
        .into_inner();
    use tokio_stream::StreamExt;
    acks.next().await.unwrap().unwrap();
    let alerts = pb::alert_service_client::AlertServiceClient::new(ch)
        .list_alerts(with_token(pb::ListAlertsRequest {
            channel_id: "alarm-1".into(),
            ..Default::default()
        }))
        .await
        .unwrap()
        .into_inner()
        .alerts;
    alerts
        .iter()
        .find(|a| a.kind == pb::AlertKind::VoltageLimit as i32)
        .expect("a voltage-limit alert")
        .alert_id
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_console_in_a_real_browser() {
    if std::env::var_os("GIBBSLINE_SKIP_BROWSER").is_some() {
        eprintln!("GIBBSLINE_SKIP_BROWSER is set: the browser test is left out");
        return;
    }
    assert!(
        std::path::Path::new(CHROMEDRIVER).exists() && std::path::Path::new(CHROMIUM).exists(),
        "the browser test needs {CHROMIUM} and {CHROMEDRIVER} (apt-get install chromium chromium-driver), \
         or GIBBSLINE_SKIP_BROWSER=1 to leave it out"
    );
    let (_dir, db) = temp_db();
    let mut config = config_for(&db);
    config.token = vec![
        token("rig-pc", Role::Admin, "admin-secret"),
        token("night-shift", Role::Operator, "operator-secret"),
    ];
    let (server, http) = Server::start_with_console(config).await;
    let _rig = start_rig(server.addr);
    let alert_id = raise_alert(server.channel().await).await;
    let browser = Browser::start().await;
    let base = format!("http://{http}/");

    // No token yet: the page asks for one, and keeps it out of URLs.
    browser.go(&base).await;
    browser
        .until(
            "the token dialog",
            "return document.getElementById('token-dialog').open",
        )
        .await;
    browser.type_into("#token-input", "operator-secret").await;
    browser.click("#token-ok").await;
    let listed = browser
        .until(
            "the overview to list all five channels",
            "const g = document.getElementById('overview'); \
             return g && g.querySelectorAll('[data-channel]').length === 5 && \
               [...g.querySelectorAll('[data-channel]')].map(c => c.dataset.channel).join(',')",
        )
        .await;
    assert_eq!(listed, "alarm-1,hl-fecr-2,hl-lfp-3,hl-pem-stack,hl-vrb-1");
    let disclaimer = browser
        .run("return document.getElementById('disclaimer').textContent")
        .await;
    assert!(disclaimer.as_str().unwrap().contains("not a safety system"));
    browser.screenshot("overview.png").await;

    // A channel's live plots fill as the rig streams.
    browser.click("[data-channel='hl-vrb-1']").await;
    let points = browser
        .until(
            "the voltage plot to hold 30 points",
            "const c = document.getElementById('plot-volts'); \
             return c && Number(c.dataset.points) >= 30 && Number(c.dataset.points)",
        )
        .await;
    assert!(points.as_u64().unwrap() >= 30);
    browser.screenshot("channel.png").await;

    // Acknowledge through the page; the store then holds it.
    browser.go(&format!("{base}#/alerts")).await;
    let row = format!("tr[data-alert='{alert_id}'] button.ack");
    browser
        .until(
            "the alert row",
            &format!("return !!document.querySelector(\"{row}\")"),
        )
        .await;
    browser.click(&row).await;
    browser.type_into("#ack-name", "R. Lindqvist").await;
    browser.type_into("#ack-note", "probe reseated").await;
    browser.click("#ack-ok").await;
    browser
        .until(
            "the row to show the acknowledgement",
            &format!(
                "const r = document.querySelector(\"tr[data-alert='{alert_id}']\"); \
                 return r && r.textContent.includes('R. Lindqvist: probe reseated')"
            ),
        )
        .await;
    browser.screenshot("alerts.png").await;
    let stored = request(
        http,
        "GET",
        "/api/v1/alerts?channel_id=alarm-1",
        Some("operator-secret"),
        None,
    )
    .await
    .json();
    let a = stored["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["alert_id"] == alert_id)
        .unwrap()
        .clone();
    assert_eq!(a["acknowledged_by"], "R. Lindqvist");
    assert_eq!(a["acknowledge_note"], "probe reseated");

    // Every URL the page loaded or fetched, and its own: no token in any.
    let urls = browser
        .run("return [location.href, ...performance.getEntries().map(e => e.name)].join('\\n')")
        .await;
    let urls = urls.as_str().unwrap();
    assert!(urls.contains("/api/v1/overview"), "{urls}");
    assert!(!urls.contains("operator-secret"), "{urls}");
    browser.quit().await;
    server.stop().await;
}

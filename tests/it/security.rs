//! TLS, client certificates, and every role against every RPC family.

use crate::harness::*;
use gibbsline::app;
use gibbsline::auth::{Role, TokenSpec, sha256_hex};
use gibbsline::pb;
use rcgen::{BasicConstraints, CertificateParams, CertifiedIssuer, IsCa, KeyPair};
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};

struct Pki {
    ca_pem: String,
    server: (String, String),
    client: (String, String),
}

fn pki() -> Pki {
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    let ca = CertifiedIssuer::self_signed(ca_params, KeyPair::generate().unwrap()).unwrap();
    let leaf = |name: &str| {
        let key = KeyPair::generate().unwrap();
        let cert = CertificateParams::new(vec![name.to_string()])
            .unwrap()
            .signed_by(&key, &ca)
            .unwrap();
        (cert.pem(), key.serialize_pem())
    };
    Pki {
        ca_pem: ca.pem(),
        server: leaf("localhost"),
        client: leaf("rig-client"),
    }
}

/// A token table entry for `secret` (its digest), granted `channels`.
pub(crate) fn token(name: &str, role: Role, secret: &str, channels: &[&str]) -> TokenSpec {
    TokenSpec {
        name: name.into(),
        role,
        sha256: sha256_hex(secret),
        channels: channels.iter().map(|c| c.to_string()).collect(),
    }
}

async fn start_secure(
    db: &std::path::Path,
    pki: &Pki,
) -> (
    std::net::SocketAddr,
    tokio::sync::oneshot::Sender<()>,
    tokio::task::JoinHandle<Result<(), app::AppError>>,
) {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let mut config = config_for(db);
    // The server reads PEM files, as a deployment's config names them.
    let dir = db.parent().unwrap();
    let write = |name: &str, pem: &str| {
        let path = dir.join(name);
        std::fs::write(&path, pem).unwrap();
        path.display().to_string()
    };
    config.tls = Some(gibbsline::config::TlsSpec {
        cert: write("server.crt", &pki.server.0),
        key: write("server.key", &pki.server.1),
        client_ca: Some(write("clients-ca.crt", &pki.ca_pem)),
    });
    config.token = vec![
        token("bench-rig", Role::Rig, "rig-secret", &["granted-1"]),
        token("wall-screen", Role::Viewer, "viewer-secret", &[]),
        token("night-shift", Role::Operator, "operator-secret", &[]),
        token("lab-lead", Role::Admin, "admin-secret", &[]),
    ];
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let task = tokio::spawn(app::run(
        config,
        app::Listeners::grpc_only(listener),
        async move {
            let _ = rx.await;
        },
    ));
    (addr, tx, task)
}

async fn tls_channel(
    addr: std::net::SocketAddr,
    pki: &Pki,
    with_client_cert: bool,
) -> Result<Channel, tonic::transport::Error> {
    let mut tls = ClientTlsConfig::new()
        .ca_certificate(Certificate::from_pem(&pki.ca_pem))
        .domain_name("localhost");
    if with_client_cert {
        tls = tls.identity(Identity::from_pem(&pki.client.0, &pki.client.1));
    }
    let mut last = None;
    for _ in 0..50 {
        let endpoint = Channel::from_shared(format!("https://localhost:{}", addr.port()))
            .unwrap()
            .tls_config(tls.clone())
            .unwrap();
        match endpoint.connect().await {
            Ok(c) => return Ok(c),
            Err(e) => last = Some(e),
        }
        tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    }
    Err(last.unwrap())
}

fn with_token<T>(msg: T, secret: Option<&str>) -> tonic::Request<T> {
    let mut r = tonic::Request::new(msg);
    if let Some(s) = secret {
        r.metadata_mut()
            .insert("authorization", format!("Bearer {s}").parse().unwrap());
    }
    r
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tls_mtls_and_roles() {
    let (_dir, db) = temp_db();
    let pki = pki();
    let (addr, stop, task) = start_secure(&db, &pki).await;

    // mTLS: without a client certificate no RPC gets through.
    if let Ok(c) = tls_channel(addr, &pki, false).await {
        let r = pb::channel_service_client::ChannelServiceClient::new(c)
            .list_channels(with_token(
                pb::ListChannelsRequest::default(),
                Some("admin-secret"),
            ))
            .await;
        assert!(r.is_err(), "a client without a certificate was served");
    }
    let ch = tls_channel(addr, &pki, true).await.unwrap();
    let mut channels = pb::channel_service_client::ChannelServiceClient::new(ch.clone());
    let mut ingest = pb::ingest_service_client::IngestServiceClient::new(ch.clone());
    let mut alerts = pb::alert_service_client::AlertServiceClient::new(ch.clone());
    let mut history = pb::history_service_client::HistoryServiceClient::new(ch.clone());
    channels
        .put_channel(with_token(
            pb::PutChannelRequest {
                channel: Some(channel_def("granted-1", "daniell")),
            },
            Some("admin-secret"),
        ))
        .await
        .unwrap();
    channels
        .put_channel(with_token(
            pb::PutChannelRequest {
                channel: Some(channel_def("other-2", "daniell")),
            },
            Some("admin-secret"),
        ))
        .await
        .unwrap();

    use tonic::Code::{
        NotFound, Ok as Fine, PermissionDenied as Denied, Unauthenticated as NoAuth,
    };
    // Families: ingest, read, operate (ack an unknown alert: allowed → NOT_FOUND), administer.
    let table: [(Option<&str>, [tonic::Code; 4]); 6] = [
        (Some("rig-secret"), [Fine, Denied, Denied, Denied]),
        (Some("viewer-secret"), [Denied, Fine, Denied, Denied]),
        (Some("operator-secret"), [Denied, Fine, NotFound, Denied]),
        (Some("admin-secret"), [Fine, Fine, NotFound, Fine]),
        (Some("stolen-guess"), [NoAuth, NoAuth, NoAuth, NoAuth]),
        (None, [NoAuth, NoAuth, NoAuth, NoAuth]),
    ];
    let code = |r: Result<(), tonic::Status>| r.map(|_| Fine).unwrap_or_else(|s| s.code());
    for (secret, expected) in table {
        let got = [
            code(
                ingest
                    .get_resume_point(with_token(
                        pb::GetResumePointRequest {
                            channel_id: "granted-1".into(),
                        },
                        secret,
                    ))
                    .await
                    .map(|_| ()),
            ),
            code(
                history
                    .get_channel_state(with_token(
                        pb::GetChannelStateRequest {
                            channel_id: "granted-1".into(),
                        },
                        secret,
                    ))
                    .await
                    .map(|_| ()),
            ),
            code(
                alerts
                    .acknowledge_alert(with_token(
                        pb::AcknowledgeAlertRequest {
                            alert_id: 424242,
                            acknowledged_by: "x".into(),
                            note: String::new(),
                        },
                        secret,
                    ))
                    .await
                    .map(|_| ()),
            ),
            code(
                channels
                    .put_channel(with_token(
                        pb::PutChannelRequest {
                            channel: Some(channel_def("granted-1", "daniell")),
                        },
                        secret,
                    ))
                    .await
                    .map(|_| ()),
            ),
        ];
        assert_eq!(got, expected, "token {secret:?}");
    }
    // A rig is held to its granted channels, on the stream too.
    let s = ingest
        .get_resume_point(with_token(
            pb::GetResumePointRequest {
                channel_id: "other-2".into(),
            },
            Some("rig-secret"),
        ))
        .await
        .unwrap_err();
    assert_eq!(s.code(), Denied);
    assert!(s.message().contains("other-2") && !s.message().contains("rig-secret"));
    let t = now_ns() - 10_000_000_000;
    let batches = vec![
        pb::StreamReadingsRequest {
            batch: Some(pb::ReadingBatch {
                historical: false,
                channel_id: "granted-1".into(),
                batch_id: 1,
                readings: vec![reading(1, t, 1.1, None)],
            }),
        },
        pb::StreamReadingsRequest {
            batch: Some(pb::ReadingBatch {
                historical: false,
                channel_id: "other-2".into(),
                batch_id: 2,
                readings: vec![reading(1, t, 1.1, None)],
            }),
        },
    ];
    let mut acks = ingest
        .stream_readings(with_token(tokio_stream::iter(batches), Some("rig-secret")))
        .await
        .unwrap()
        .into_inner();
    use tokio_stream::StreamExt;
    assert_eq!(acks.next().await.unwrap().unwrap().ack.unwrap().accepted, 1);
    assert_eq!(acks.next().await.unwrap().unwrap_err().code(), Denied);

    // Health stays open for probes.
    let mut health = tonic_health::pb::health_client::HealthClient::new(ch.clone());
    assert!(
        health
            .check(tonic_health::pb::HealthCheckRequest {
                service: String::new()
            })
            .await
            .is_ok()
    );
    let _ = stop.send(());
    task.await.unwrap().unwrap();
}

/// The client commands over TLS with client certificates and tokens, as an
/// operator's laptop or a rig PC on the lab network would run them.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cli_speaks_tls_with_certificates_and_tokens() {
    let (dir, db) = temp_db();
    let pki = pki();
    let (addr, stop, task) = start_secure(&db, &pki).await;
    let file = |name: &str, pem: &str| {
        let path = dir.path().join(name);
        std::fs::write(&path, pem).unwrap();
        path
    };
    let ca = file("ca.pem", &pki.ca_pem);
    let cert = file("client.pem", &pki.client.0);
    let key = file("client.key", &pki.client.1);
    let url = format!("https://localhost:{}", addr.port());
    let cli = move |token: Option<&str>, args: &[&str]| {
        let mut cmd = std::process::Command::new(env!("CARGO_BIN_EXE_gibbsline"));
        cmd.args(args)
            .args(["--connect", url.as_str()])
            .env("GIBBSLINE_CA_FILE", &ca)
            .env("GIBBSLINE_CLIENT_CERT", &cert)
            .env("GIBBSLINE_CLIENT_KEY", &key)
            .env_remove("GIBBSLINE_TOKEN")
            .stdin(std::process::Stdio::null());
        if let Some(t) = token {
            cmd.env("GIBBSLINE_TOKEN", t);
        }
        let out = cmd.output().unwrap();
        (
            out.status.code(),
            String::from_utf8_lossy(&out.stdout).to_string(),
            String::from_utf8_lossy(&out.stderr).to_string(),
        )
    };
    let run = |token: Option<&'static str>, args: &'static [&'static str]| {
        let cli = cli.clone();
        tokio::task::spawn_blocking(move || cli(token, args))
    };

    // The simulator defines its channels, so it needs an admin token.
    let (code, stdout, stderr) = run(
        Some("admin-secret"),
        &[
            "rig",
            "simulate",
            "--channels",
            "1",
            "--speed",
            "600",
            "--duration",
            "3s",
        ],
    )
    .await
    .unwrap();
    assert_eq!(code, Some(0), "{stdout}{stderr}");
    let acknowledged: u64 = stdout
        .split(" acknowledged")
        .next()
        .and_then(|s| s.rsplit(' ').next())
        .and_then(|n| n.parse().ok())
        .unwrap_or_else(|| panic!("no acknowledged count in {stdout}"));
    assert!(acknowledged > 0, "{stdout}");

    let (code, stdout, stderr) = run(Some("viewer-secret"), &["state"]).await.unwrap();
    assert_eq!(code, Some(0), "{stdout}{stderr}");
    assert!(stdout.contains("hl-"), "{stdout}");

    // Without a token, and with one whose role does not reach the RPC,
    // the command fails and says why; the token never appears in output.
    let (code, _, stderr) = run(None, &["state"]).await.unwrap();
    assert_eq!(code, Some(1), "{stderr}");
    assert!(stderr.to_lowercase().contains("token"), "{stderr}");
    let (code, stdout, stderr) = run(Some("rig-secret"), &["state"]).await.unwrap();
    assert_eq!(code, Some(1), "{stdout}{stderr}");
    assert!(stderr.contains("rig"), "{stderr}");
    assert!(!stderr.contains("rig-secret") && !stdout.contains("rig-secret"));

    // Plaintext against the TLS port: one line saying what to do, exit 3.
    let plain_addr = format!("127.0.0.1:{}", addr.port());
    let plain = tokio::task::spawn_blocking(move || {
        std::process::Command::new(env!("CARGO_BIN_EXE_gibbsline"))
            .args(["state", "--connect", &plain_addr])
            .env_remove("GIBBSLINE_TOKEN")
            .stdin(std::process::Stdio::null())
            .output()
            .unwrap()
    })
    .await
    .unwrap();
    let stderr = String::from_utf8_lossy(&plain.stderr);
    assert_eq!(plain.status.code(), Some(3), "{:?}: {stderr}", plain.status);
    assert_eq!(stderr.trim().lines().count(), 1, "{stderr}");
    assert!(stderr.contains("https://"), "{stderr}");

    let _ = stop.send(());
    task.await.unwrap().unwrap();
}

use gibbsline::app;
use gibbsline::config::ServerConfig;
use gibbsline::pb;
use std::path::{Path, PathBuf};
use tokio::sync::oneshot;
use tonic::transport::Channel;

/// Every default, on `db`, with the durability the tests run at.
pub(crate) fn config_for(db: &Path) -> ServerConfig {
    ServerConfig::for_db(db, gibbsline::store::Durability::Normal)
}

pub(crate) struct Server {
    pub addr: std::net::SocketAddr,
    stop: Option<oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), app::AppError>>,
}

impl Server {
    pub(crate) async fn start(db: &Path) -> Server {
        Server::start_on(db, "127.0.0.1:0").await
    }

    pub(crate) async fn start_on(db: &Path, addr: &str) -> Server {
        Server::start_with(config_for(db), addr).await
    }

    pub(crate) async fn start_with(config: ServerConfig, addr: &str) -> Server {
        let listener = tokio::net::TcpListener::bind(addr).await.unwrap();
        Server::start_with_listeners(config, app::Listeners::grpc_only(listener)).await
    }

    /// A server with its web console on another loopback port; returns
    /// the console's address too.
    pub(crate) async fn start_with_console(config: ServerConfig) -> (Server, std::net::SocketAddr) {
        let grpc = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let http = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let http_addr = http.local_addr().unwrap();
        let mut listeners = app::Listeners::grpc_only(grpc);
        listeners.http = Some(http);
        (
            Server::start_with_listeners(config, listeners).await,
            http_addr,
        )
    }

    pub(crate) async fn start_with_listeners(
        config: ServerConfig,
        listeners: app::Listeners,
    ) -> Server {
        let addr = listeners.grpc.local_addr().unwrap();
        let (tx, rx) = oneshot::channel::<()>();
        let task = tokio::spawn(app::run(config, listeners, async move {
            let _ = rx.await;
        }));
        Server {
            addr,
            stop: Some(tx),
            task,
        }
    }

    pub(crate) async fn channel(&self) -> Channel {
        for _ in 0..100 {
            if let Ok(c) = Channel::from_shared(format!("http://{}", self.addr))
                .unwrap()
                .connect()
                .await
            {
                return c;
            }
            tokio::time::sleep(std::time::Duration::from_millis(20)).await;
        }
        panic!("server did not come up");
    }

    pub(crate) async fn stop(mut self) {
        let _ = self.stop.take().unwrap().send(());
        self.task.await.unwrap().unwrap();
    }
}

/// A database of its own for one test: a SQLite file in a temporary
/// directory, or with `GIBBSLINE_TEST_ENGINE=postgres` a fresh PostgreSQL
/// database (its URL in place of the path; the directory is still there
/// for the test's other files).
pub(crate) fn temp_db() -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().unwrap();
    if on_postgres() {
        return (dir, PathBuf::from(fresh_pg_database()));
    }
    let path = dir.path().join("test.db");
    (dir, path)
}

/// Whether this run's tests use PostgreSQL (`GIBBSLINE_TEST_ENGINE`).
pub(crate) fn on_postgres() -> bool {
    std::env::var("GIBBSLINE_TEST_ENGINE").is_ok_and(|e| e == "postgres")
}

/// The server the PostgreSQL runs use (`GIBBSLINE_TEST_PG`, default the
/// local one with trust authentication).
pub(crate) fn pg_admin_url() -> String {
    std::env::var("GIBBSLINE_TEST_PG")
        .unwrap_or_else(|_| "postgres://postgres@127.0.0.1:5432/postgres".into())
}

/// Creates an empty database named `gl_t_<pid>_<n>` and returns its URL.
/// `.ci/test` drops the `gl_t_` databases of earlier runs.
pub(crate) fn fresh_pg_database() -> String {
    use sqlx::Connection;
    static N: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    let n = N.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let name = format!("gl_t_{}_{n}", std::process::id());
    let admin = pg_admin_url();
    let create = format!("CREATE DATABASE {name}");
    // Called from inside the tests' runtime, which must not block: a
    // thread with a runtime of its own makes the database.
    std::thread::spawn(move || {
        tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .unwrap()
            .block_on(async move {
                let mut conn = sqlx::PgConnection::connect(&admin).await.unwrap();
                sqlx::query(sqlx::AssertSqlSafe(create))
                    .execute(&mut conn)
                    .await
                    .unwrap();
                let (base, _) = admin.rsplit_once('/').unwrap();
                format!("{base}/{name}")
            })
    })
    .join()
    .unwrap()
}

pub(crate) fn now_ns() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_nanos() as i64
}

pub(crate) fn channel_def(id: &str, chemistry: &str) -> pb::Channel {
    pb::Channel {
        channel_id: id.into(),
        chemistry_id: chemistry.into(),
        cells_in_series: 1,
        capacity_ah: 2.0,
        current_sign: pb::CurrentSign::ChargePositive as i32,
        default_temp_c: 25.0,
        ..Default::default()
    }
}

pub(crate) fn reading(seq: u64, time_unix_ns: i64, volts: f64, amps: Option<f64>) -> pb::Reading {
    pb::Reading {
        seq,
        time_unix_ns,
        volts,
        amps,
        temp_c: Some(25.0),
    }
}

/// Every stored reading of a channel (up to ten million), all pages, in time order.
pub(crate) async fn stored_readings(
    history: &mut pb::history_service_client::HistoryServiceClient<Channel>,
    channel: &str,
) -> Vec<pb::StoredReading> {
    use tokio_stream::StreamExt;
    let mut pages = history
        .query_readings(pb::QueryReadingsRequest {
            channel_id: channel.into(),
            limit: 10_000_000,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    let mut out = Vec::new();
    while let Some(page) = pages.next().await {
        out.extend(page.unwrap().readings);
    }
    out
}

/// Sends batches on one stream and returns their acks, in order.
pub(crate) async fn send_batches(
    client: &mut pb::ingest_service_client::IngestServiceClient<Channel>,
    batches: Vec<pb::ReadingBatch>,
) -> Vec<pb::BatchAck> {
    let n = batches.len();
    let outbound = tokio_stream::iter(
        batches
            .into_iter()
            .map(|b| pb::StreamReadingsRequest { batch: Some(b) }),
    );
    use tokio_stream::StreamExt;
    let mut inbound = client.stream_readings(outbound).await.unwrap().into_inner();
    let mut acks = Vec::new();
    while acks.len() < n {
        acks.push(inbound.next().await.unwrap().unwrap().ack.unwrap());
    }
    acks
}

/// Defines a channel (see [`channel_def`]) through the real API.
pub(crate) async fn put_channel(ch: &Channel, def: pb::Channel) {
    pb::channel_service_client::ChannelServiceClient::new(ch.clone())
        .put_channel(pb::PutChannelRequest { channel: Some(def) })
        .await
        .unwrap();
}

//! Wiring: open the store, restore channel state, start the writer and the
//! silent-rig timer, serve gRPC until `shutdown` resolves, then stop in
//! order (health NOT_SERVING → stop taking streams → flush the writer →
//! close the pool).

use crate::alerts::rules as alert_rules;
use crate::config::{ServerConfig, TlsPem};
use crate::electrochem::{Registry, chemistry::ChemistrySpec};
use crate::grpc;
use crate::ingest::{self, Hub, Job, hub::HubHandles, ownership::Ownership, writer};
use crate::pb;
use crate::store::{self, Store};
use std::future::Future;
use std::sync::{Arc, Mutex};
use std::time::Duration;
use tokio::net::TcpListener;

/// The sockets a server answers on, bound by the caller (so a test can
/// bind port 0 and know the address, and a bad address fails before any
/// database is opened).
#[derive(Debug)]
pub struct Listeners {
    /// The gRPC services, health and reflection.
    pub grpc: TcpListener,
    /// Prometheus text endpoint (`metrics_listen`); none means off.
    pub metrics: Option<TcpListener>,
    /// Web console and JSON API (`http_listen`); none means off.
    pub http: Option<TcpListener>,
}

impl Listeners {
    /// gRPC alone: no metrics endpoint.
    pub fn grpc_only(grpc: TcpListener) -> Listeners {
        Listeners {
            grpc,
            metrics: None,
            http: None,
        }
    }
}

/// HTTP/2 streams one connection may have open at once.
const MAX_STREAMS_PER_CONNECTION: u32 = 128;
/// Why a server would not start or stopped serving.
#[derive(Debug, thiserror::Error)]
pub enum AppError {
    /// The database could not be opened, migrated or written.
    #[error(transparent)]
    Store(#[from] store::StoreError),
    /// Restoring a stored channel or putting a configured one failed.
    #[error(transparent)]
    Ingest(#[from] ingest::IngestError),
    /// The gRPC transport (TLS set-up, accept) failed.
    #[error("serving: {0}")]
    Transport(#[from] tonic::transport::Error),
    /// The reflection service could not read the descriptor sets.
    #[error("reflection: {0}")]
    Reflection(String),
    /// A setting the server only checks as it starts (TLS files, tokens).
    #[error("config: {0}")]
    Config(#[from] crate::error::FieldError),
    /// A configured chemistry did not validate.
    #[error("config: chemistry[{index}]: {source}")]
    Chemistry {
        /// Its place among the config's `[[chemistry]]` tables.
        index: usize,
        /// What is wrong with it.
        source: crate::electrochem::ChemistryError,
    },
}

/// Serves until `shutdown` resolves, then stops in order (see the module
/// comment). Returns once the writer has flushed and the pool is closed.
pub async fn run(
    config: ServerConfig,
    listeners: Listeners,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> Result<(), AppError> {
    let Listeners {
        grpc: listener,
        metrics: metrics_listener,
        http: http_listener,
    } = listeners;
    let tls = config.read_tls()?;
    let db = store::Location::parse(&config.db).map_err(|reason| store::StoreError::Open {
        path: config.db.clone().into(),
        reason,
    })?;
    let store = Store::open_location(&db, config.durability).await?;
    if let Ok(addr) = listener.local_addr() {
        store.note_holder(&addr.to_string());
    }
    let registry = build_registry(&store, &config.chemistry).await?;
    let ownership = shared_ownership(&store, &config, &listener);
    let owner = ownership.as_ref().map(|o| o.instance.clone());
    let (hub, handles) = Hub::open(
        store.clone(),
        registry,
        config.limits.ingest(),
        ownership.clone(),
    )
    .await?;
    let HubHandles {
        jobs: writer_rx,
        shutdown: shutdown_tx,
    } = handles;
    put_configured(&hub, config.channel.clone()).await?;
    let (writer_stop_tx, writer_stop_rx) = tokio::sync::watch::channel(false);
    let writer_task = tokio::spawn(writer::run(
        store.clone(),
        writer_rx,
        hub.events(),
        hub.metrics().clone(),
        writer_stop_rx,
        owner,
    ));
    let (health_reporter, health_service) = tonic_health::server::health_reporter();
    set_health(&health_reporter, tonic_health::ServingStatus::Serving).await;
    let mut background =
        Background::start(&hub, &config, metrics_listener, health_reporter.clone()).await?;
    let addr = listener.local_addr().ok();
    tracing::info!(?addr, db = %db.display_name(), "serving");
    let connection_idle = Duration::from_secs(config.limits.connection_idle_timeout_s);
    let incoming = crate::listen::incoming(listener, connection_idle);
    let tokens = Arc::new(crate::auth::TokenTable::new(&config.token)?);
    let apis = grpc::Apis::new(&hub, config.limits);
    if let Some(l) = http_listener {
        background
            .aborted
            .push(spawn_console(l, &hub, &apis, &tokens, tls.as_ref())?);
    }
    let router = server_builder(&config.limits, tls.as_ref())?
        .layer(grpc::authz::AuthLayer::new(tokens.as_ref().clone()))
        .add_service(health_service);
    let router = add_reflection(router)?;
    let serve =
        grpc::add_services(router, &apis).serve_with_incoming_shutdown(incoming, async move {
            shutdown.await;
            tracing::info!("shutting down: health NOT_SERVING");
            let _ = shutdown_tx.send(true);
            set_health(&health_reporter, tonic_health::ServingStatus::NotServing).await;
        });
    let shutdown_budget = Duration::from_secs(config.limits.shutdown_timeout_s);
    let result = serve_until_deadline(serve, hub.shutdown_signal(), shutdown_budget / 2).await;
    background.stop().await;
    // Connections cut at the deadline may leave tasks holding the hub (and
    // so the writer's queue): the writer is told to stop, not left waiting
    // for every sender to go.
    let _ = writer_stop_tx.send(true);
    drop(hub);
    flush_and_close(writer_task, store, shutdown_budget / 2, ownership).await;
    result.map_err(AppError::from)
}

/// On a shared PostgreSQL database, this server's leases, advertised at
/// `advertise` or the address it listens on.
fn shared_ownership(
    store: &Store,
    config: &ServerConfig,
    listener: &TcpListener,
) -> Option<Arc<Ownership>> {
    if store.engine() != store::Engine::Postgres {
        return None;
    }
    let addr = config.advertise.clone().unwrap_or_else(|| {
        listener
            .local_addr()
            .map_or_else(|_| config.listen.clone(), |a| a.to_string())
    });
    let own = Ownership::new(store.reader.clone(), addr);
    tracing::info!(instance = %own.instance, advertise = %own.addr, "shared database: channels are leased");
    Some(Arc::new(own))
}

/// Shared database: renews this server's leases (channels whose lease
/// was lost stop being written here) and re-reads channels owned
/// elsewhere, on one timer.
async fn keep_leases(hub: Arc<Hub>) {
    let Some(own) = hub.ownership().cloned() else {
        return;
    };
    let mut tick = tokio::time::interval(ingest::ownership::RENEW_EVERY);
    loop {
        tick.tick().await;
        match own.renew().await {
            Ok(lost) if !lost.is_empty() => hub.drop_leases(&lost),
            Ok(_) => {}
            Err(e) => tracing::warn!(error = %e, "leases not renewed"),
        }
        if let Err(e) = hub.refresh_from_store().await {
            tracing::warn!(error = %e, "channels not refreshed from the store");
        }
    }
}

/// Starts the console and JSON API on `listener`, with HTTPS when the
/// server has TLS files.
fn spawn_console(
    listener: TcpListener,
    hub: &Arc<Hub>,
    apis: &grpc::Apis,
    tokens: &Arc<crate::auth::TokenTable>,
    tls: Option<&TlsPem>,
) -> Result<tokio::task::JoinHandle<()>, AppError> {
    let acceptor = tls.map(crate::http::conn::acceptor).transpose()?;
    let state = Arc::new(crate::http::api::ApiState {
        apis: apis.clone(),
        hub: hub.clone(),
        tokens: tokens.clone(),
        feeds: Default::default(),
    });
    let addr = listener.local_addr().ok();
    tracing::info!(?addr, https = acceptor.is_some(), "console and JSON API");
    Ok(tokio::spawn(crate::http::serve(listener, state, acceptor)))
}

/// The tasks beside the transport.
struct Background {
    /// Timers, endpoints and couriers: ended at once when serving ends.
    aborted: Vec<tokio::task::JoinHandle<()>>,
    /// The pruner: ended at its next deletion step (it watches the
    /// shutdown signal; what it leaves, the next start drains).
    prune: tokio::task::JoinHandle<()>,
}

impl Background {
    /// The silent-rig timer, the pruner, the metrics endpoint, the
    /// couriers and the storage-health follower.
    async fn start(
        hub: &Arc<Hub>,
        config: &ServerConfig,
        metrics_listener: Option<TcpListener>,
        health_reporter: tonic_health::server::HealthReporter,
    ) -> Result<Background, AppError> {
        let mut background = Background {
            aborted: vec![tokio::spawn(silent_watch(hub.clone()))],
            prune: tokio::spawn(ingest::prune::run(hub.clone(), config.retention)),
        };
        let metrics =
            metrics_listener.map(|l| tokio::spawn(crate::http::serve_metrics(l, hub.clone())));
        background.aborted.extend(metrics);
        // Couriers stop at the shutdown signal; one cut mid-send sends its
        // event again at the next start (at least once).
        background
            .aborted
            .extend(crate::notify::start(hub, &config.notify).await?);
        if hub.ownership().is_some() {
            background
                .aborted
                .push(tokio::spawn(keep_leases(hub.clone())));
        }
        if let Some(waker) = store::lease::EventWaker::for_store(hub.store()) {
            background
                .aborted
                .push(tokio::spawn(ingest::relay::run(hub.clone(), waker)));
        }
        background.aborted.push(tokio::spawn(follow_storage_health(
            hub.store().clone(),
            health_reporter,
            hub.shutdown_signal(),
        )));
        Ok(background)
    }

    async fn stop(self) {
        for task in self.aborted {
            task.abort();
        }
        if tokio::time::timeout(Duration::from_secs(2), self.prune)
            .await
            .is_err()
        {
            tracing::warn!("retention pass still running at shutdown: left for the next start");
        }
    }
}

/// The config's channels (and rules), put at every start: the file is
/// the truth for what it defines.
async fn put_configured(
    hub: &Hub,
    channels: Vec<crate::config::ChannelEntry>,
) -> Result<(), AppError> {
    for entry in channels {
        let id = entry.def.channel_id.clone();
        let chemistry = hub.registry().get(&entry.def.chemistry_id).ok();
        hub.put_channel(entry.def).await?;
        // The config was checked as it loaded: the chemistry is known and
        // the patch applies.
        if let (Some(patch), Some(chemistry)) = (entry.rules, chemistry) {
            let rules = patch.over(&crate::alerts::AlertRules::for_chemistry(&chemistry))?;
            hub.put_rules(&id, rules).await?;
        }
    }
    Ok(())
}

/// The whole server's health and the ingest service's, together.
async fn set_health(
    reporter: &tonic_health::server::HealthReporter,
    status: tonic_health::ServingStatus,
) {
    reporter.set_service_status("", status).await;
    reporter
        .set_service_status(grpc::INGEST_SERVICE_NAME, status)
        .await;
}

/// Reflection (v1 and v1alpha) over our protos and the health service's.
fn add_reflection<L>(
    router: tonic::transport::server::Router<L>,
) -> Result<tonic::transport::server::Router<L>, AppError> {
    let builder = || {
        tonic_reflection::server::Builder::configure()
            .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
            .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
    };
    let fail = |e: tonic_reflection::server::Error| AppError::Reflection(e.to_string());
    Ok(router
        .add_service(builder().build_v1().map_err(fail)?)
        .add_service(builder().build_v1alpha().map_err(fail)?))
}

/// The transport: per-connection stream limit, small flow-control
/// windows, keepalive pings inside the idle limit, TLS if configured.
fn server_builder(
    limits: &crate::config::Limits,
    tls: Option<&TlsPem>,
) -> Result<tonic::transport::Server, AppError> {
    let keepalive = Duration::from_secs(limits.connection_idle_timeout_s) / 3;
    let mut builder = tonic::transport::Server::builder()
        .max_concurrent_streams(Some(MAX_STREAMS_PER_CONNECTION))
        // Small flow-control windows: a client that sends faster than the
        // writer commits is held back by HTTP/2 itself, instead of the server
        // buffering megabytes per stream.
        .initial_stream_window_size(Some(256 * 1024))
        .initial_connection_window_size(Some(1024 * 1024))
        // Pings keep live connections inside the idle limit (listen.rs):
        // at least three per idle period.
        .http2_keepalive_interval(Some(keepalive.min(Duration::from_secs(30))))
        .http2_keepalive_timeout(Some(keepalive.min(Duration::from_secs(20))));
    if let Some(tls) = tls {
        let mut tls_config = tonic::transport::ServerTlsConfig::new()
            .identity(tonic::transport::Identity::from_pem(&tls.cert, &tls.key));
        if let Some(ca) = &tls.client_ca {
            tls_config = tls_config.client_ca_root(tonic::transport::Certificate::from_pem(ca));
        }
        builder = builder.tls_config(tls_config)?;
    }
    Ok(builder)
}

/// Waits (bounded) for the writer's last commit, then closes the pools.
async fn flush_and_close(
    writer_task: tokio::task::JoinHandle<Result<(), store::StoreError>>,
    store: Store,
    budget: Duration,
    ownership: Option<Arc<Ownership>>,
) {
    match tokio::time::timeout(budget, writer_task).await {
        Ok(Ok(Ok(()))) => tracing::info!("writer flushed"),
        Ok(Ok(Err(e))) => tracing::error!(error = %e, "writer failed"),
        Ok(Err(e)) => tracing::error!(error = %e, "writer task panicked"),
        Err(_) => tracing::error!(budget_s = budget.as_secs(), "writer did not flush in time"),
    }
    // Only after the last commit: another server that takes a channel
    // then restores everything this one acknowledged.
    if let Some(own) = ownership {
        own.release_all().await;
    }
    if tokio::time::timeout(Duration::from_secs(1), store.close())
        .await
        .is_err()
    {
        tracing::warn!("database connections still busy at exit");
    }
}

/// Serves until the server's own graceful end, or until `grace` after
/// shutdown began: an idle connection or an unread response cannot hold
/// the process (what is left is dropped with this future).
async fn serve_until_deadline(
    serve: impl Future<Output = Result<(), tonic::transport::Error>>,
    stopping: tokio::sync::watch::Receiver<bool>,
    grace: Duration,
) -> Result<(), tonic::transport::Error> {
    tokio::select! {
        result = serve => result,
        () = async {
            ingest::stopped(stopping).await;
            tokio::time::sleep(grace).await;
        } => {
            tracing::warn!(grace_s = grace.as_secs_f64(), "connections still open at the shutdown deadline: closing them");
            Ok(())
        }
    }
}

/// Health follows the store: NOT_SERVING while writes fail (full,
/// read-only, deleted, …), SERVING again once a probe write succeeds.
async fn follow_storage_health(
    store: Store,
    reporter: tonic_health::server::HealthReporter,
    stopping: tokio::sync::watch::Receiver<bool>,
) {
    let mut health = store.health();
    loop {
        let fault = *health.borrow_and_update();
        if *stopping.borrow() {
            return;
        }
        let status = match fault {
            Some(_) => tonic_health::ServingStatus::NotServing,
            None => tonic_health::ServingStatus::Serving,
        };
        reporter.set_service_status("", status).await;
        reporter
            .set_service_status(grpc::INGEST_SERVICE_NAME, status)
            .await;
        if fault.is_some() {
            tokio::time::sleep(STORAGE_PROBE_INTERVAL).await;
            if let Err(e) = store.probe_write(ingest::now_ns()).await {
                tracing::debug!(error = %e, "storage still refuses writes");
            }
        } else if health.changed().await.is_err() {
            return;
        }
    }
}

/// How often a store that refused a write is tried again.
const STORAGE_PROBE_INTERVAL: Duration = Duration::from_secs(1);

/// Raises silent-rig alerts; the decision itself is the pure rule.
async fn silent_watch(hub: Arc<Hub>) {
    let mut tick = tokio::time::interval(Duration::from_secs(1));
    loop {
        tick.tick().await;
        let now = ingest::now_ns();
        for (_, rt) in hub.runtimes() {
            raise_if_silent(&hub, &rt, now).await;
        }
    }
}

/// One channel's silent-rig check; under the channel's commit gate, like
/// a batch, so a refused write is undone by reloading from the store.
async fn raise_if_silent(hub: &Hub, rt: &Mutex<ingest::ChannelRuntime>, now: i64) {
    let gate = rt
        .lock()
        .expect("channel state poisoned")
        .commit_gate
        .clone();
    let _turn = gate.lock().await;
    let job = {
        let mut g = rt.lock().expect("channel state poisoned");
        if g.last_arrival_wall_ns <= 0
            || !alert_rules::is_silent(
                g.last_arrival_wall_ns,
                now,
                g.usual_arrival_interval_s,
                &g.rules,
            )
        {
            return;
        }
        if !hub.owns(&g) {
            return;
        }
        let seq = g.max_seq.unwrap_or(0);
        let last = g.last_arrival_wall_ns;
        let lease = hub.lease_of(&g);
        alert_rules::raise_silent(&mut g.rule_state, last, now, seq)
            .map(|a| (g.key, g.run_id, a, lease))
    };
    if let Some((channel_key, run_id, alert, lease)) = job {
        let written = hub
            .submit(|reply| Job::Alerts {
                channel_key,
                run_id,
                raised: vec![alert],
                lease,
                reply,
            })
            .await;
        if written.is_err() {
            hub.reload_after_failure(rt).await;
        }
    }
}

/// The metrics page's text for this hub, with each channel's last-seen age.
pub fn render_metrics(hub: &Hub) -> String {
    let now = ingest::now_ns();
    let ages: Vec<(String, f64)> = hub
        .runtimes()
        .into_iter()
        .filter_map(|(id, rt)| {
            let last = rt
                .lock()
                .expect("channel state poisoned")
                .last_arrival_wall_ns;
            (last > 0).then(|| (id, (now - last) as f64 / 1e9))
        })
        .collect();
    let mut page = hub.metrics().render(hub.writer_queue_depth(), &ages);
    if hub.store().engine() == store::Engine::Sqlite {
        let db = hub.store().path();
        let file_bytes = std::fs::metadata(db).map(|m| m.len()).unwrap_or(0);
        crate::metrics::render_storage(&mut page, file_bytes, store::report::wal_bytes(db));
    }
    page
}

/// The built-ins, those stored by earlier runs, and the config's own.
async fn build_registry(store: &Store, user: &[ChemistrySpec]) -> Result<Registry, AppError> {
    let stored = store::list_chemistry_specs(&store.writer)
        .await?
        .iter()
        .filter_map(|json| serde_json::from_str::<ChemistrySpec>(json).ok())
        .collect::<Vec<_>>();
    Registry::assemble(stored, user)
        .map_err(|(index, source)| AppError::Chemistry { index, source })
}

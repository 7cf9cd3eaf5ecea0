//! Server configuration: TOML file, then `GIBBSLINE_*` environment, then
//! command-line flags, resolved once into one validated [`ServerConfig`]
//! that the server runs on. Parsing does no I/O beyond the texts it is
//! given, and the layers come in as values, so all of it is testable.

use crate::alerts::AlertRules;
use crate::channel::ChannelDef;
use crate::electrochem::{ChemistrySpec, Registry};
use crate::error::FieldError;
use crate::retention::RetentionPolicy;
use crate::store::Durability;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// The file as written.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct ConfigFile {
    /// gRPC address (see [`ServerConfig::listen`]).
    pub listen: Option<String>,
    /// Database file (see [`ServerConfig::db`]).
    pub db: Option<String>,
    /// Commit durability (see [`ServerConfig::durability`]).
    pub durability: Option<Durability>,
    /// Prometheus text endpoint, e.g. "127.0.0.1:9464"; unset = off.
    pub metrics_listen: Option<String>,
    /// Web console and JSON API (see [`ServerConfig::http_listen`]).
    pub http_listen: Option<String>,
    /// Where rigs reach this server (see [`ServerConfig::advertise`]).
    pub advertise: Option<String>,
    /// Confirms serving beyond loopback without TLS.
    #[serde(default)]
    pub allow_insecure: bool,
    /// `[tls]`: certificate, key and optional client CA.
    pub tls: Option<TlsSpec>,
    /// `[[token]]` tables.
    #[serde(default)]
    pub token: Vec<crate::auth::TokenSpec>,
    /// `[[chemistry]]` tables: the site's own chemistries.
    #[serde(default)]
    pub chemistry: Vec<ChemistrySpec>,
    /// `[[channel]]` tables, put at every start.
    #[serde(default)]
    pub channel: Vec<ChannelEntry>,
    /// `[limits]`; unset fields take their defaults.
    pub limits: Option<Limits>,
    /// `[retention]`: the default for every channel; unset keeps all.
    pub retention: Option<RetentionSettings>,
    /// `[notify]`: webhooks and MQTT for alert events.
    pub notify: Option<crate::notify::NotifySettings>,
}

/// `[retention]`: how long history is kept unless a channel says
/// otherwise, and how often the pruning task looks (see `crate::retention`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RetentionSettings {
    /// Days of raw readings kept behind each channel's newest; unset: for ever.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub raw_days: Option<f64>,
    /// Days of 10 s and 1 min rollups (at least `raw_days`); unset: for ever.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rollup_days: Option<f64>,
    /// Seconds between pruning passes.
    #[serde(default = "default_prune_interval_s")]
    pub prune_interval_s: u64,
}

fn default_prune_interval_s() -> u64 {
    60
}

impl Default for RetentionSettings {
    fn default() -> RetentionSettings {
        RetentionSettings {
            raw_days: None,
            rollup_days: None,
            prune_interval_s: default_prune_interval_s(),
        }
    }
}

impl RetentionSettings {
    /// The policy every channel falls back to.
    pub fn policy(&self) -> RetentionPolicy {
        RetentionPolicy {
            raw_days: self.raw_days,
            rollup_days: self.rollup_days,
        }
    }

    fn validate(&self) -> Result<(), FieldError> {
        self.policy().validate("retention")?;
        if !(1..=86_400).contains(&self.prune_interval_s) {
            return Err(FieldError::new(
                "retention.prune_interval_s",
                self.prune_interval_s,
                "must be from 1 to 86400 s",
            ));
        }
        Ok(())
    }
}

/// What one client, one reading or one request may take of the server.
/// Every field has a default; see README, "Limits and promises".
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Limits {
    /// A reading may be this far ahead of the server's clock, s.
    pub max_future_s: u64,
    /// A reading's seq may jump this far past the channel's last one.
    pub max_seq_jump: u64,
    /// From SIGTERM to exit at most, s: streams end, the writer flushes,
    /// then every connection still open is closed.
    pub shutdown_timeout_s: u64,
    /// An ingest stream with no readings for this long is ended, s (an
    /// empty batch does not count as one).
    pub stream_idle_timeout_s: u64,
    /// A connection that has not spoken HTTP/2 for this long is closed, s
    /// (live connections answer keepalive pings, so only dead or idle
    /// ones reach it).
    pub connection_idle_timeout_s: u64,
    /// Ingest streams one token, and one peer address, may hold at once
    /// (a quarter of the server's 128 by default).
    pub max_streams_per_client: u64,
    /// Rows one QueryReadings call returns at most.
    pub max_query_rows: u32,
}

impl Default for Limits {
    fn default() -> Limits {
        Limits {
            max_future_s: crate::ingest::DEFAULT_MAX_FUTURE_S,
            max_seq_jump: crate::ingest::DEFAULT_MAX_SEQ_JUMP,
            shutdown_timeout_s: 10,
            stream_idle_timeout_s: 300,
            connection_idle_timeout_s: 120,
            max_streams_per_client: 32,
            max_query_rows: 1_000_000,
        }
    }
}

impl Limits {
    /// The part of the limits ingest checks each reading against.
    pub fn ingest(&self) -> crate::ingest::IngestLimits {
        crate::ingest::IngestLimits {
            max_future_ns: (self.max_future_s.min(86_400 * 365) * 1_000_000_000) as i64,
            max_seq_jump: self.max_seq_jump,
        }
    }

    fn validate(&self) -> Result<(), FieldError> {
        for (name, value, min) in [
            ("max_future_s", self.max_future_s, 0),
            ("max_seq_jump", self.max_seq_jump, 1),
            ("shutdown_timeout_s", self.shutdown_timeout_s, 1),
            ("stream_idle_timeout_s", self.stream_idle_timeout_s, 1),
            (
                "connection_idle_timeout_s",
                self.connection_idle_timeout_s,
                1,
            ),
            ("max_streams_per_client", self.max_streams_per_client, 1),
            ("max_query_rows", u64::from(self.max_query_rows), 1),
        ] {
            if value < min {
                return Err(FieldError::new(
                    format!("limits.{name}"),
                    value,
                    format!("must be at least {min}"),
                ));
            }
        }
        if self.max_future_s > 86_400 {
            return Err(FieldError::new(
                "limits.max_future_s",
                self.max_future_s,
                "at most 86400 (a day)",
            ));
        }
        Ok(())
    }
}

/// Certificate and key (PEM files); `client_ca` turns on client
/// certificates (mTLS): only clients signed by it may connect.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TlsSpec {
    /// The server's certificate chain, PEM file path.
    pub cert: String,
    /// Its private key, PEM file path.
    pub key: String,
    /// CA that signs client certificates, PEM file path.
    pub client_ca: Option<String>,
}

/// The TLS files' contents, as read at start.
#[derive(Debug, Clone)]
pub struct TlsPem {
    /// Certificate chain, PEM.
    pub cert: Vec<u8>,
    /// Private key, PEM.
    pub key: Vec<u8>,
    /// Client CA, PEM.
    pub client_ca: Option<Vec<u8>>,
}

/// `[channel.rules]` as the user wrote it: any subset of the rules, a
/// threshold's table in part (`end_of_charge_soc = { raise_at = 0.9 }`).
/// What is not written takes the chemistry's default.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(transparent)]
pub struct RulesPatch(pub toml::Table);

impl RulesPatch {
    /// The whole rules: `base` (the chemistry's defaults) with this patch
    /// over it, checked; an unknown key or a bad value is refused naming it.
    pub fn over(&self, base: &AlertRules) -> Result<AlertRules, FieldError> {
        let mut merged = toml::Table::try_from(base)
            .map_err(|e| FieldError::new("rules", "(defaults)", e.to_string()))?;
        for (written, value) in &self.0 {
            // Names read for one release under their new names, so a
            // patch in the old spelling replaces the default, not joins it.
            let key = match written.as_str() {
                "min_cell_volts" => "safe_min_cell_volts",
                "max_cell_volts" => "safe_max_cell_volts",
                other => other,
            };
            match (merged.get_mut(key), value) {
                (Some(toml::Value::Table(into)), toml::Value::Table(part)) => {
                    into.extend(part.iter().map(|(k, v)| (k.clone(), v.clone())));
                }
                _ => {
                    merged.insert(key.to_string(), value.clone());
                }
            }
        }
        let rules: AlertRules = toml::Value::Table(merged)
            .try_into()
            .map_err(|e: toml::de::Error| self.refusal(e.message().trim()))?;
        rules.validate()?;
        Ok(rules)
    }

    /// A refusal from the rules' own parser, naming the key it names
    /// (`unknown field `x``) and the value written for it.
    fn refusal(&self, message: &str) -> FieldError {
        let key = message.split('`').nth(1).unwrap_or("(table)");
        let value = self
            .0
            .get(key)
            .map(|v| v.to_string())
            .unwrap_or_else(|| "(as written)".into());
        FieldError::new(key, value, message)
    }
}

/// A channel with optional rules.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChannelEntry {
    /// The channel's fields, at the table's top level.
    #[serde(flatten)]
    pub def: ChannelDef,
    /// `[channel.rules]` as written: only what differs from the
    /// chemistry's defaults (see [`RulesPatch`]); unset: all defaults.
    pub rules: Option<RulesPatch>,
}

/// The effective, validated configuration.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ServerConfig {
    /// gRPC address, `host:port`.
    pub listen: String,
    /// The database: a SQLite file, created and migrated on first start,
    /// or a `postgres://` URL (several servers may share it).
    pub db: String,
    /// How hard each commit is pushed to disk.
    pub durability: Durability,
    /// Prometheus text endpoint; none means off.
    pub metrics_listen: Option<String>,
    /// Web console, JSON API and `/metrics` over HTTP (HTTPS with
    /// `[tls]`), `host:port`; none (`"off"`) means off.
    #[serde(serialize_with = "off_when_none")]
    pub http_listen: Option<String>,
    /// On a shared PostgreSQL database: the gRPC address other servers
    /// name when a rig streams to them for a channel this server owns;
    /// none means the address it listens on.
    pub advertise: Option<String>,
    /// Serving beyond loopback without TLS is confirmed.
    pub allow_insecure: bool,
    /// TLS files; none means plain text (loopback, or behind a proxy).
    pub tls: Option<TlsSpec>,
    /// Bearer tokens; none means an open server.
    pub token: Vec<crate::auth::TokenSpec>,
    /// The site's own chemistries (file and `--chemistry-file`).
    pub chemistry: Vec<ChemistrySpec>,
    /// Channels (with rules) put at every start.
    pub channel: Vec<ChannelEntry>,
    /// What one client, reading or request may take.
    pub limits: Limits,
    /// How long history is kept unless a channel says otherwise.
    pub retention: RetentionSettings,
    /// Where alert events are delivered besides `WatchAlerts`.
    pub notify: crate::notify::NotifySettings,
}

/// Where the server listens unless told.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:50051";
/// Where the web console listens unless told (`"off"` turns it off).
pub const DEFAULT_HTTP_LISTEN: &str = "127.0.0.1:8080";
/// The database file unless told, in the working directory.
pub const DEFAULT_DB: &str = "gibbsline.db";

/// A config that cannot be served, with the file and line it comes from.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{path}{}: {message}", line.map(|l| format!(":{l}")).unwrap_or_default())]
pub struct ConfigError {
    /// The file (or `(defaults)`).
    pub path: String,
    /// 1-based line of the entry, when one can be named.
    pub line: Option<usize>,
    /// What is wrong, naming the field and value.
    pub message: String,
}

/// Line (1-based) of the `index`-th `[[header]]` table in `text`.
/// The line of a top-level `key = …`, if the file has one.
fn key_line(text: &str, key: &str) -> Option<usize> {
    text.lines()
        .take_while(|l| !l.trim_start().starts_with('['))
        .position(|l| {
            l.trim_start()
                .strip_prefix(key)
                .is_some_and(|rest| rest.trim_start().starts_with('='))
        })
        .map(|i| i + 1)
}

fn table_line(text: &str, header: &str, index: usize) -> Option<usize> {
    text.lines()
        .enumerate()
        .filter(|(_, l)| l.trim_start().starts_with(header))
        .nth(index)
        .map(|(n, _)| n + 1)
}

fn line_of_offset(text: &str, offset: usize) -> usize {
    text[..offset.min(text.len())].matches('\n').count() + 1
}

/// Command-line flags: the last layer, over the environment and the file.
/// Texts, not parsed values, so a bad one is refused by the same checks
/// and with the same kind of message as a bad file entry.
#[derive(Debug, Clone, Default)]
pub struct Flags {
    /// `--listen`.
    pub listen: Option<String>,
    /// `--db`.
    pub db: Option<String>,
    /// `--durability`, as typed.
    pub durability: Option<String>,
    /// `--metrics-listen`.
    pub metrics_listen: Option<String>,
    /// `--http-listen`.
    pub http_listen: Option<String>,
    /// `--advertise`.
    pub advertise: Option<String>,
    /// `--allow-insecure`.
    pub allow_insecure: bool,
    /// `--chemistry-file` files as (path, text): their chemistries join
    /// the file's `[[chemistry]]` tables.
    pub chemistry_files: Vec<(String, String)>,
}

/// Parses `text` (from `path`, for messages), applies `env` overrides and
/// validates everything a server would refuse at start.
pub fn load(
    path: &str,
    text: &str,
    env: &BTreeMap<String, String>,
) -> Result<ServerConfig, ConfigError> {
    load_with_flags(path, text, env, &Flags::default())
}

/// [`load`] with the command line's flags as the last layer.
pub fn load_with_flags(
    path: &str,
    text: &str,
    env: &BTreeMap<String, String>,
    flags: &Flags,
) -> Result<ServerConfig, ConfigError> {
    let mut file: ConfigFile = toml::from_str(text).map_err(|e| ConfigError {
        path: path.into(),
        line: e.span().map(|s| line_of_offset(text, s.start)),
        message: e.message().to_string(),
    })?;
    let fail = |message: String| ConfigError {
        path: path.into(),
        line: None,
        message,
    };
    // A flag outranks the environment, so it goes in as the top of that
    // layer and meets the same checks.
    let mut env = env.clone();
    for (key, flag) in [
        ("GIBBSLINE_LISTEN", &flags.listen),
        ("GIBBSLINE_DB", &flags.db),
        ("GIBBSLINE_METRICS_LISTEN", &flags.metrics_listen),
        ("GIBBSLINE_HTTP_LISTEN", &flags.http_listen),
        ("GIBBSLINE_ADVERTISE", &flags.advertise),
    ] {
        if let Some(v) = flag {
            env.insert(key.into(), v.clone());
        }
    }
    if let Some(d) = &flags.durability {
        file.durability = Some(d.parse().map_err(|e| fail(format!("--durability {e}")))?);
        env.remove("GIBBSLINE_DURABILITY");
    }
    if flags.allow_insecure {
        env.insert("GIBBSLINE_ALLOW_INSECURE".into(), "true".into());
    }
    for (file_path, file_text) in &flags.chemistry_files {
        // Each file is checked on its own first, so an error names it.
        crate::electrochem::chemistry::parse_chemistry_file(file_path, file_text)
            .map_err(|e| fail(format!("--chemistry-file {e}")))?;
        let specs = crate::electrochem::chemistry::read_chemistry_specs(file_path, file_text)
            .map_err(|e| fail(format!("--chemistry-file {e}")))?;
        file.chemistry.extend(specs);
    }
    resolve(path, text, file, &env)
}

/// Where in the file a problem is (a line, if one can be named) and what it is.
type Problem = (Option<usize>, String);

/// The parsed file with the environment over it, validated; `text` only
/// gives errors their line numbers.
pub fn resolve(
    path: &str,
    text: &str,
    file: ConfigFile,
    env: &BTreeMap<String, String>,
) -> Result<ServerConfig, ConfigError> {
    let fail = |(line, message): Problem| ConfigError {
        path: path.into(),
        line,
        message,
    };
    let durability = match env.get("GIBBSLINE_DURABILITY") {
        Some(v) => v
            .parse()
            .map_err(|e| fail((None, format!("GIBBSLINE_DURABILITY {e}"))))?,
        None => file.durability.unwrap_or_default(),
    };
    let (listen, metrics_listen) = addresses(&file, env).map_err(fail)?;
    let http_listen = http_address(&file, env).map_err(fail)?;
    let allow_insecure = match env.get("GIBBSLINE_ALLOW_INSECURE") {
        Some(v) => matches!(v.as_str(), "1" | "true" | "yes"),
        None => file.allow_insecure,
    };
    let db = match env.get("GIBBSLINE_DB") {
        Some(v) => v.clone(),
        None => file.db.clone().unwrap_or_else(|| DEFAULT_DB.into()),
    };
    let db_key = if env.contains_key("GIBBSLINE_DB") {
        "GIBBSLINE_DB (or --db)"
    } else {
        "db"
    };
    crate::store::Location::parse(&db).map_err(|reason| {
        let line = file.db.is_some().then(|| key_line(text, "db")).flatten();
        fail((line, format!("{db_key} = {db:?}: {reason}")))
    })?;
    let advertise = env
        .get("GIBBSLINE_ADVERTISE")
        .cloned()
        .or(file.advertise.clone());
    crate::auth::TokenTable::new(&file.token)
        .map_err(|e| fail((table_line(text, "[[token]]", 0), e.to_string())))?;
    check_definitions(text, &file).map_err(fail)?;
    let limits = file.limits.unwrap_or_default();
    limits
        .validate()
        .map_err(|e| fail((table_line(text, "[limits]", 0), e.to_string())))?;
    let notify = file.notify.unwrap_or_default();
    notify
        .validate()
        .map_err(|e| fail((table_line(text, "[notify", 0), e.to_string())))?;
    let retention = file.retention.unwrap_or_default();
    retention
        .validate()
        .map_err(|e| fail((table_line(text, "[retention]", 0), e.to_string())))?;
    Ok(ServerConfig {
        limits,
        retention,
        listen,
        db,
        durability,
        metrics_listen,
        http_listen,
        advertise,
        allow_insecure,
        tls: file.tls,
        notify,
        token: file.token,
        chemistry: file.chemistry,
        channel: file.channel,
    })
}

/// The gRPC and metrics addresses, the environment before the file.
fn addresses(
    file: &ConfigFile,
    env: &BTreeMap<String, String>,
) -> Result<(String, Option<String>), Problem> {
    let listen = env
        .get("GIBBSLINE_LISTEN")
        .cloned()
        .or(file.listen.clone())
        .unwrap_or_else(|| DEFAULT_LISTEN.into());
    if listen.parse::<std::net::SocketAddr>().is_err() {
        return Err((
            None,
            format!("listen = {listen:?}: expected an address like 127.0.0.1:50051"),
        ));
    }
    let metrics_listen = env
        .get("GIBBSLINE_METRICS_LISTEN")
        .cloned()
        .or(file.metrics_listen.clone());
    if let Some(m) = &metrics_listen
        && m.parse::<std::net::SocketAddr>().is_err()
    {
        return Err((
            None,
            format!("metrics_listen = {m:?}: expected an address like 127.0.0.1:9464"),
        ));
    }
    Ok((listen, metrics_listen))
}

/// Printed configs say `"off"` for a console that is off: left out, it
/// would load back as the default address.
fn off_when_none<S: serde::Serializer>(v: &Option<String>, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(v.as_deref().unwrap_or("off"))
}

/// The console's address, the environment before the file; `"off"` is none.
fn http_address(
    file: &ConfigFile,
    env: &BTreeMap<String, String>,
) -> Result<Option<String>, Problem> {
    let http = env
        .get("GIBBSLINE_HTTP_LISTEN")
        .cloned()
        .or(file.http_listen.clone())
        .unwrap_or_else(|| DEFAULT_HTTP_LISTEN.into());
    if http == "off" {
        return Ok(None);
    }
    if http.parse::<std::net::SocketAddr>().is_err() {
        return Err((
            None,
            format!("http_listen = {http:?}: expected an address like 127.0.0.1:8080, or \"off\""),
        ));
    }
    Ok(Some(http))
}

/// The file's chemistries, channels and their rules, each against the
/// registry the server will have; errors name the table's line.
fn check_definitions(text: &str, file: &ConfigFile) -> Result<(), Problem> {
    let registry = Registry::assemble([], &file.chemistry).map_err(|(i, e)| {
        let id = &file.chemistry[i].id;
        (
            table_line(text, "[[chemistry]]", i),
            format!("chemistry[{i}] ({id:?}): {e}"),
        )
    })?;
    let mut seen = std::collections::BTreeSet::new();
    for (i, entry) in file.channel.iter().enumerate() {
        let line = table_line(text, "[[channel]]", i);
        let id = &entry.def.channel_id;
        entry
            .def
            .clone()
            .with_default_window(&registry)
            .validate(&registry)
            .map_err(|e| (line, format!("channel[{i}] ({id:?}): {e}")))?;
        if !seen.insert(id.clone()) {
            return Err((
                line,
                format!("channel[{i}]: channel_id = {id:?} is defined twice"),
            ));
        }
        if let Some(patch) = &entry.rules {
            let chemistry = registry
                .get(&entry.def.chemistry_id)
                .map_err(|e| (line, format!("channel[{i}] ({id:?}): {e}")))?;
            patch
                .over(&AlertRules::for_chemistry(&chemistry))
                .map_err(|e| (line, format!("channel[{i}] ({id:?}): rules.{e}")))?;
        }
    }
    Ok(())
}

impl ServerConfig {
    /// Every default, on the database at `db`: what a server started by
    /// code (tests, `bench`, `demo`) runs on before it sets what differs.
    pub fn for_db(db: &std::path::Path, durability: Durability) -> ServerConfig {
        let mut config =
            load("(defaults)", "", &BTreeMap::new()).expect("the empty configuration is valid");
        config.db = db.display().to_string();
        config.durability = durability;
        config
    }

    /// Refuses to serve beyond loopback without transport security.
    pub fn check_exposure(&self) -> Result<(), FieldError> {
        let addr: std::net::SocketAddr = self.listen.parse().map_err(|_| {
            FieldError::new("listen", format!("{:?}", self.listen), "not an address")
        })?;
        if !addr.ip().is_loopback() && self.tls.is_none() && !self.allow_insecure {
            return Err(FieldError::new(
                "listen",
                &self.listen,
                "not a loopback address and no [tls] is configured; \
                 set [tls] cert and key, or pass --allow-insecure (allow_insecure = true) if a proxy or mesh provides TLS",
            ));
        }
        // The console has the same tokens as gRPC, and TLS with [tls].
        if let Some(h) = &self.http_listen
            && let Ok(addr) = h.parse::<std::net::SocketAddr>()
            && !addr.ip().is_loopback()
            && self.tls.is_none()
            && !self.allow_insecure
        {
            return Err(FieldError::new(
                "http_listen",
                h,
                "not a loopback address and no [tls] is configured; \
                 set [tls] cert and key, or pass --allow-insecure (allow_insecure = true) if a proxy provides TLS",
            ));
        }
        // The metrics page is plain HTTP and unauthenticated: beyond
        // loopback it needs the same confirmation.
        if let Some(m) = &self.metrics_listen
            && let Ok(addr) = m.parse::<std::net::SocketAddr>()
            && !addr.ip().is_loopback()
            && !self.allow_insecure
        {
            return Err(FieldError::new(
                "metrics_listen",
                m,
                "not a loopback address; the metrics page has no TLS or tokens: \
                 pass --allow-insecure (allow_insecure = true) if the network in between is trusted",
            ));
        }
        Ok(())
    }

    /// Reads the TLS files the config names, as a start would.
    pub fn read_tls(&self) -> Result<Option<TlsPem>, FieldError> {
        let Some(t) = &self.tls else { return Ok(None) };
        let read = |what: &str, path: &str| {
            std::fs::read(path).map_err(|e| {
                FieldError::new(format!("tls.{what}"), format!("{path:?}"), e.to_string())
            })
        };
        let pem = TlsPem {
            cert: read("cert", &t.cert)?,
            key: read("key", &t.key)?,
            client_ca: t
                .client_ca
                .as_deref()
                .map(|p| read("client_ca", p))
                .transpose()?,
        };
        for (what, path, bytes) in [("cert", &t.cert, &pem.cert), ("key", &t.key, &pem.key)] {
            if !String::from_utf8_lossy(bytes).contains("-----BEGIN ") {
                return Err(FieldError::new(
                    format!("tls.{what}"),
                    format!("{path:?}"),
                    "not a PEM file",
                ));
            }
        }
        Ok(Some(pem))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
listen = "127.0.0.1:50999"
db = "lab.db"
durability = "normal"

[[channel]]
channel_id = "hl-vrb-1"
chemistry_id = "vanadium-redox"
cells_in_series = 1
capacity_ah = 2.0
current_sign = "charge_positive"
plausible_min_cell_volts = 0.5
plausible_max_cell_volts = 2.0
"#;

    /// A channel that leaves its plausibility window out gets its
    /// chemistry's; an unknown chemistry is refused listing the known ones.
    #[test]
    fn a_channel_without_a_window_takes_its_chemistrys_and_unknown_ids_list_the_known() {
        let text = "[[channel]]\nchannel_id = \"b1\"\nchemistry_id = \"vanadium-redox\"\n\
                    cells_in_series = 1\ncurrent_sign = \"charge_positive\"\n";
        let config = load("c.toml", text, &env(&[])).unwrap();
        let def = config.channel[0]
            .def
            .clone()
            .with_default_window(&crate::electrochem::Registry::builtin());
        let chem = crate::electrochem::Registry::builtin()
            .get("vanadium-redox")
            .unwrap();
        assert_eq!(
            (def.plausible_min_cell_volts, def.plausible_max_cell_volts),
            ChannelDef::default_window(&chem)
        );
        let e = load(
            "c.toml",
            &text.replace("vanadium-redox", "vanadium"),
            &env(&[]),
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("chemistry_id = \"vanadium\"") && e.contains("known: daniell"),
            "{e}"
        );
    }

    /// An empty `db` would be a temporary database SQLite throws away at
    /// exit: refused, naming where it came from; other schemes as such.
    #[test]
    fn an_empty_or_unknown_db_is_refused_naming_its_key() {
        let text = GOOD.replace("db = \"lab.db\"", "db = \"\"");
        let e = load("f.toml", &text, &env(&[])).unwrap_err().to_string();
        assert!(e.contains("db = \"\": empty"), "{e}");
        assert!(e.starts_with("f.toml:3:"), "{e}");
        let e = load("f.toml", GOOD, &env(&[("GIBBSLINE_DB", "")]))
            .unwrap_err()
            .to_string();
        assert!(e.contains("GIBBSLINE_DB (or --db) = \"\": empty"), "{e}");
        for (db, says) in [
            ("mysql://lab@db/gl", "the scheme mysql:// is not served"),
            (":memory:", "names no file"),
            ("sqlite://", "names no file"),
        ] {
            let e = load("f.toml", GOOD, &env(&[("GIBBSLINE_DB", db)]))
                .unwrap_err()
                .to_string();
            assert!(e.contains(says), "{db}: {e}");
        }
        for db in [
            "lab.db",
            "sqlite:///var/lib/gl.db",
            "postgres://127.0.0.1/test",
        ] {
            assert!(
                load("f.toml", GOOD, &env(&[("GIBBSLINE_DB", db)])).is_ok(),
                "{db}"
            );
        }
    }

    fn env(pairs: &[(&str, &str)]) -> BTreeMap<String, String> {
        pairs
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect()
    }

    #[test]
    fn parses_and_overrides() {
        let c = load("lab.toml", GOOD, &env(&[])).unwrap();
        assert_eq!(
            (c.listen.as_str(), c.db.as_str(), c.durability),
            ("127.0.0.1:50999", "lab.db", Durability::Normal)
        );
        let c = load(
            "lab.toml",
            GOOD,
            &env(&[
                ("GIBBSLINE_DB", "/var/lib/x.db"),
                ("GIBBSLINE_DURABILITY", "full"),
            ]),
        )
        .unwrap();
        assert_eq!(
            (c.db.as_str(), c.durability),
            ("/var/lib/x.db", Durability::Full)
        );
    }

    #[test]
    fn flags_outrank_the_environment_and_meet_the_same_checks() {
        let over = env(&[("GIBBSLINE_DB", "env.db"), ("GIBBSLINE_DURABILITY", "full")]);
        let flags = Flags {
            db: Some("flag.db".into()),
            durability: Some("off".into()),
            listen: Some("127.0.0.1:50123".into()),
            ..Flags::default()
        };
        let c = load_with_flags("lab.toml", GOOD, &over, &flags).unwrap();
        assert_eq!(
            (c.db.as_str(), c.durability, c.listen.as_str()),
            ("flag.db", Durability::Off, "127.0.0.1:50123")
        );
        let bad_listen = Flags {
            listen: Some("everywhere".into()),
            ..Flags::default()
        };
        let e = load_with_flags("lab.toml", GOOD, &over, &bad_listen).unwrap_err();
        assert!(e.to_string().contains(r#"listen = "everywhere""#), "{e}");
        let bad_durability = Flags {
            durability: Some("sometimes".into()),
            ..Flags::default()
        };
        let e = load_with_flags("lab.toml", GOOD, &over, &bad_durability).unwrap_err();
        assert!(e.to_string().contains("--durability"), "{e}");
    }

    #[test]
    fn chemistry_files_join_the_config_and_may_not_take_a_builtin_id() {
        let builtin = crate::electrochem::builtin::builtin_files()
            .next()
            .map(|(_, text)| text.to_string())
            .unwrap();
        let flags = Flags {
            chemistry_files: vec![("lab-chem.toml".into(), builtin)],
            ..Flags::default()
        };
        let e = load_with_flags("lab.toml", GOOD, &env(&[]), &flags).unwrap_err();
        assert!(e.to_string().contains("duplicate chemistry id"), "{e}");
        let own = "[[chemistry]]\nid = \"lab-cell\"\n";
        let flags = Flags {
            chemistry_files: vec![("lab-chem.toml".into(), own.into())],
            ..Flags::default()
        };
        let e = load_with_flags("lab.toml", GOOD, &env(&[]), &flags).unwrap_err();
        assert!(e.to_string().contains("lab-chem.toml"), "{e}");
    }

    #[test]
    fn a_partial_rules_table_takes_the_chemistry_defaults_for_the_rest() {
        let chemistry = Registry::builtin().get("vanadium-redox").unwrap();
        let defaults = AlertRules::for_chemistry(&chemistry);
        let rules_of = |rules: &str| {
            let c = load(
                "lab.toml",
                &format!("{GOOD}\n[channel.rules]\n{rules}"),
                &env(&[]),
            );
            c.unwrap().channel[0]
                .rules
                .as_ref()
                .unwrap()
                .over(&defaults)
                .unwrap()
        };
        let rules = rules_of("max_abs_amps = 40.0\nend_of_charge_soc = { raise_at = 0.9 }\n");
        assert_eq!(rules.max_abs_amps, 40.0);
        assert_eq!(rules.end_of_charge_soc.raise_at, 0.9);
        // The rest of that threshold, and every other rule, as the chemistry has them.
        assert_eq!(
            rules.end_of_charge_soc.clear_at,
            defaults.end_of_charge_soc.clear_at
        );
        assert_eq!(rules.safe_max_cell_volts, defaults.safe_max_cell_volts);
        // The old name of the safe window still reads, and replaces the default.
        assert_eq!(rules_of("max_cell_volts = 1.9\n").safe_max_cell_volts, 1.9);
        let typo = format!("{GOOD}\n[channel.rules]\nmax_abs_amp = 40.0\n");
        let e = load("lab.toml", &typo, &env(&[])).unwrap_err().to_string();
        assert!(e.contains("max_abs_amp") && e.contains("lab.toml:"), "{e}");
        let bad = format!("{GOOD}\n[channel.rules]\nend_of_charge_soc = {{ clear_at = 0.99 }}\n");
        let e = load("lab.toml", &bad, &env(&[])).unwrap_err().to_string();
        assert!(e.contains("end_of_charge_soc.clear_at = 0.99"), "{e}");
    }

    fn error_for(from: &str, to: &str) -> String {
        let text = GOOD.replace(from, to);
        assert_ne!(text, GOOD);
        load("lab.toml", &text, &env(&[])).unwrap_err().to_string()
    }

    #[test]
    fn errors_name_file_line_and_field() {
        let e = error_for("cells_in_series = 1", "cells_in_series = 0");
        assert!(
            e.starts_with("lab.toml:6:") && e.contains("cells_in_series = 0"),
            "{e}"
        );
        let e = error_for("durability = \"normal\"", "durability = \"sometimes\"");
        assert!(e.contains("lab.toml:4") && e.contains("sometimes"), "{e}");
        let e = error_for("capacity_ah = 2.0", "capacity_ah = 2.0\ncolour = \"blue\"");
        assert!(e.contains("colour"), "{e}");
        let e = error_for(
            "chemistry_id = \"vanadium-redox\"",
            "chemistry_id = \"unobtainium\"",
        );
        assert!(
            e.contains("chemistry_id") && e.contains("unobtainium"),
            "{e}"
        );
        let e = error_for("listen = \"127.0.0.1:50999\"", "listen = \"nowhere\"");
        assert!(e.contains("listen = \"nowhere\""), "{e}");
        let e = error_for(
            "plausible_max_cell_volts = 2.0",
            "plausible_max_cell_volts = 0.1",
        );
        assert!(e.contains("plausible_max_cell_volts = 0.1"), "{e}");
    }

    #[test]
    fn non_loopback_needs_confirmation() {
        let c = load(
            "f",
            &GOOD.replace("127.0.0.1:50999", "0.0.0.0:50051"),
            &env(&[]),
        )
        .unwrap();
        assert!(
            c.check_exposure()
                .unwrap_err()
                .to_string()
                .contains("--allow-insecure")
        );
        let c = load(
            "f",
            &GOOD.replace("127.0.0.1:50999", "0.0.0.0:50051"),
            &env(&[("GIBBSLINE_ALLOW_INSECURE", "true")]),
        )
        .unwrap();
        assert!(c.check_exposure().is_ok());
    }
}

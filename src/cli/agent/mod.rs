//! `gibbsline rig run --config rig.toml`: the piece next to the
//! instruments. Each `[[source]]` is polled on its period into one
//! channel; every reading is written to a local spool (an embedded
//! SQLite file, fsynced per write) before anything else, and streamed to
//! the server from there; a spooled reading is deleted only after the
//! server has acknowledged it. With the server away the agent keeps
//! measuring into the spool (bounded by `max_spooled`; past it the oldest
//! are dropped, counted and warned about) and replays in order when it
//! comes back, from the server's resume point.

pub(crate) mod file;
mod modbus;
mod scpi;
mod spool;
mod uplink;

use super::UsageError;
use serde::Deserialize;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

/// The agent's file.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RigFile {
    /// The server, `host:port` (token and TLS from the environment as for
    /// every client command).
    pub connect: String,
    /// The spool file; created if missing.
    pub spool: PathBuf,
    /// Readings kept in the spool at most, all channels; the oldest go first.
    #[serde(default = "default_max_spooled")]
    pub max_spooled: u64,
    /// Serve the agent's metrics (spooled, dropped, acknowledged, read
    /// errors) at `/metrics` on this address, e.g. `127.0.0.1:9465`.
    #[serde(default)]
    pub metrics_listen: Option<String>,
    /// Readings older than this (by their own time) leave the spool
    /// unsent, counted and warned about, e.g. `7d`; unset: no age bound.
    #[serde(default)]
    pub max_spooled_age: Option<String>,
    pub source: Vec<SourceSpec>,
}

fn default_max_spooled() -> u64 {
    10_000_000
}

/// One instrument channel.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct SourceSpec {
    pub channel_id: String,
    /// `scpi` or `file`.
    pub kind: String,
    /// `host:port` of the instrument (5025 is the common SCPI port), or
    /// the path of the file an instrument program writes.
    pub address: String,
    /// How often to read (or look for new lines), e.g. `100ms`, `1s`.
    pub period: String,
    /// `file`: the time column and how its times are written.
    #[serde(default)]
    pub time: Option<TimeColumn>,
    /// `file`: the field separator (`,`, `;` or `\t`); from the header if unset.
    #[serde(default)]
    pub delimiter: Option<String>,
    /// `file`: numbers written with a decimal comma (`1,234`).
    #[serde(default)]
    pub decimal_comma: bool,
    /// `modbus`: the unit (slave) id (default 1).
    #[serde(default)]
    pub unit_id: Option<u8>,
    /// How long one query may take (default 1s).
    #[serde(default)]
    pub timeout: Option<String>,
    /// The instrument's sign of current: `charge_positive` or
    /// `discharge_positive`.
    #[serde(default = "default_sign")]
    pub current_sign: String,
    pub volts: Quantity,
    #[serde(default)]
    pub amps: Option<Quantity>,
    #[serde(default)]
    pub temp_c: Option<Quantity>,
}

fn default_sign() -> String {
    "charge_positive".into()
}

/// How one quantity is read.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct Quantity {
    /// `scpi`: the query, e.g. `MEAS:VOLT?`.
    #[serde(default)]
    pub query: Option<String>,
    /// `file`: the column, by header name or `#n` (1-based).
    #[serde(default)]
    pub column: Option<String>,
    /// `modbus`: the register's address (0-based).
    #[serde(default)]
    pub register: Option<u16>,
    /// `modbus`: `u16` (default), `i16`, `u32`, `i32` or `f32`.
    #[serde(default)]
    pub r#type: Option<String>,
    /// `modbus`: `high_first` (default) or `low_first` for two registers.
    #[serde(default)]
    pub word_order: Option<String>,
    /// `modbus`: `holding` (default) or `input`.
    #[serde(default)]
    pub table: Option<String>,
    /// `modbus`: raw × scale + offset is the value in `unit`.
    #[serde(default)]
    pub scale: Option<f64>,
    #[serde(default)]
    pub offset: Option<f64>,
    /// `V`/`mV`, `A`/`mA`, `C`/`K`.
    pub unit: String,
}

/// `file`: where a line's time is.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct TimeColumn {
    /// By header name or `#n`.
    pub column: String,
    /// `iso8601` (no offset: UTC), `epoch_s`, `epoch_ms`, or `elapsed_s`
    /// (seconds since `start`).
    pub format: String,
    /// For `elapsed_s`: when the recording began (RFC 3339).
    #[serde(default)]
    pub start: Option<String>,
}

/// How a source is read.
#[derive(Debug, Clone)]
pub(crate) enum Kind {
    Scpi,
    File(file::Layout),
    /// The unit id and the registers of volts, amps and °C.
    Modbus {
        unit_id: u8,
        volts: modbus::Reg,
        amps: Option<modbus::Reg>,
        temp_c: Option<modbus::Reg>,
    },
}

/// A source as the agent runs it: validated, units turned into factors.
#[derive(Debug, Clone)]
pub(crate) struct Source {
    pub channel_id: String,
    pub kind: Kind,
    pub address: String,
    pub period: Duration,
    pub timeout: Duration,
    /// Multiplies the instrument's amps into charge-positive amps.
    pub to_charge_positive: f64,
    /// (query or column, scale, offset) for volts, amps, °C.
    pub volts: (String, f64, f64),
    pub amps: Option<(String, f64, f64)>,
    pub temp_c: Option<(String, f64, f64)>,
}

fn unit_factor(
    field: &str,
    unit: &str,
    allowed: &[(&str, f64, f64)],
) -> Result<(f64, f64), UsageError> {
    allowed
        .iter()
        .find(|(u, _, _)| *u == unit)
        .map(|(_, scale, offset)| (*scale, *offset))
        .ok_or_else(|| {
            let names: Vec<&str> = allowed.iter().map(|(u, _, _)| *u).collect();
            UsageError(format!(
                "{field}.unit = {unit:?}: expected one of {names:?}"
            ))
        })
}

impl SourceSpec {
    /// What reads this source, with what each kind needs besides.
    fn kind_of(&self, at: &str) -> Result<Kind, UsageError> {
        Ok(match self.kind.as_str() {
            "scpi" => Kind::Scpi,
            "file" => Kind::File(file::Layout::of(self, at)?),
            "modbus" => {
                let reg = |name: &str, q: &Quantity| modbus::Reg::of(q, &format!("{at}.{name}"));
                Kind::Modbus {
                    unit_id: self.unit_id.unwrap_or(1),
                    volts: reg("volts", &self.volts)?,
                    amps: self.amps.as_ref().map(|q| reg("amps", q)).transpose()?,
                    temp_c: self.temp_c.as_ref().map(|q| reg("temp_c", q)).transpose()?,
                }
            }
            other => {
                return Err(UsageError(format!(
                    "{at}.kind = {other:?}: expected scpi, modbus or file"
                )));
            }
        })
    }

    fn resolve(&self, at: &str) -> Result<Source, UsageError> {
        let kind = self.kind_of(at)?;
        let duration = |field: &str, text: &str| {
            super::parse_duration(text).map_err(|e| UsageError(format!("{at}.{field}: {e}")))
        };
        let period = duration("period", &self.period)?;
        if period < Duration::from_millis(10) {
            return Err(UsageError(format!(
                "{at}.period = {:?}: at least 10ms",
                self.period
            )));
        }
        let timeout = duration("timeout", self.timeout.as_deref().unwrap_or("1s"))?;
        let to_charge_positive = match self.current_sign.as_str() {
            "charge_positive" => 1.0,
            "discharge_positive" => -1.0,
            other => {
                return Err(UsageError(format!(
                    "{at}.current_sign = {other:?}: expected charge_positive or discharge_positive"
                )));
            }
        };
        let q = |name: &str, q: &Quantity, units: &[(&str, f64, f64)]| {
            let (key, given) = match &kind {
                Kind::File(_) => ("column", q.column.clone()),
                Kind::Scpi => ("query", q.query.clone()),
                Kind::Modbus { .. } => ("register", q.register.map(|r| format!("register {r}"))),
            };
            let given = given.ok_or_else(|| {
                UsageError(format!(
                    "{at}.{name}.{key}: required for a {} source",
                    self.kind
                ))
            })?;
            unit_factor(&format!("{at}.{name}"), &q.unit, units).map(|(s, o)| (given, s, o))
        };
        let volts = q("volts", &self.volts, &[("V", 1.0, 0.0), ("mV", 1e-3, 0.0)])?;
        let amps = self
            .amps
            .as_ref()
            .map(|a| q("amps", a, &[("A", 1.0, 0.0), ("mA", 1e-3, 0.0)]))
            .transpose()?;
        let temp_c = self
            .temp_c
            .as_ref()
            .map(|t| q("temp_c", t, &[("C", 1.0, 0.0), ("K", 1.0, -273.15)]))
            .transpose()?;
        Ok(Source {
            kind,
            channel_id: self.channel_id.clone(),
            address: self.address.clone(),
            period,
            timeout,
            to_charge_positive,
            volts,
            amps,
            temp_c,
        })
    }
}

/// `import --map`: how a recorded file is laid out, in a file source's
/// words (time, delimiter, decimal comma, current sign, columns and units).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct MapFile {
    time: TimeColumn,
    #[serde(default)]
    delimiter: Option<String>,
    #[serde(default)]
    decimal_comma: bool,
    #[serde(default = "default_sign")]
    current_sign: String,
    volts: Quantity,
    #[serde(default)]
    amps: Option<Quantity>,
    #[serde(default)]
    temp_c: Option<Quantity>,
}

/// The layout of a recorded file from its map, as a file source reads it.
pub(crate) fn recording_layout(
    map: &std::path::Path,
    channel_id: &str,
) -> Result<Source, UsageError> {
    let name = map.display();
    let text = std::fs::read_to_string(map).map_err(|e| UsageError(format!("{name}: {e}")))?;
    let m: MapFile = toml::from_str(&text).map_err(|e| UsageError(format!("{name}: {e}")))?;
    let spec = SourceSpec {
        channel_id: channel_id.to_string(),
        kind: "file".into(),
        address: String::new(),
        period: "1s".into(),
        timeout: None,
        time: Some(m.time),
        delimiter: m.delimiter,
        decimal_comma: m.decimal_comma,
        unit_id: None,
        current_sign: m.current_sign,
        volts: m.volts,
        amps: m.amps,
        temp_c: m.temp_c,
    };
    spec.resolve(&name.to_string())
}

/// Reads and checks the agent's file.
pub(crate) fn load(path: &std::path::Path) -> Result<(RigFile, Vec<Source>), UsageError> {
    let name = path.display();
    let text = std::fs::read_to_string(path).map_err(|e| UsageError(format!("{name}: {e}")))?;
    let file: RigFile = toml::from_str(&text).map_err(|e| UsageError(format!("{name}: {e}")))?;
    let mut sources = Vec::new();
    for (i, s) in file.source.iter().enumerate() {
        let at = format!("{name}: source[{i}]");
        if sources
            .iter()
            .any(|o: &Source| o.channel_id == s.channel_id)
        {
            return Err(UsageError(format!(
                "{at}.channel_id = {:?}: two sources feed it",
                s.channel_id
            )));
        }
        sources.push(s.resolve(&at)?);
    }
    if sources.is_empty() {
        return Err(UsageError(format!("{name}: no [[source]]")));
    }
    Ok((file, sources))
}

/// `rig check`: the file read and every source resolved as `rig run`
/// would, then one line per source.
pub(crate) fn check(path: &std::path::Path) -> anyhow::Result<()> {
    let (file, sources) = load(path)?;
    if let Some(age) = &file.max_spooled_age {
        super::parse_duration(age).map_err(|e| UsageError(format!("max_spooled_age: {e}")))?;
    }
    println!(
        "{}: ok ({} source{}, server {}, spool {})",
        path.display(),
        sources.len(),
        if sources.len() == 1 { "" } else { "s" },
        file.connect,
        file.spool.display()
    );
    for s in &sources {
        let kind = match s.kind {
            Kind::Scpi => "scpi",
            Kind::File(_) => "file",
            Kind::Modbus { .. } => "modbus",
        };
        println!(
            "  {}: {kind} {} every {:?}",
            s.channel_id, s.address, s.period
        );
    }
    Ok(())
}

/// `/metrics` for the agent (Prometheus text), and `/health`: 200 while
/// the spool takes writes, 503 naming the spool and why while it cannot.
async fn serve_metrics(listener: tokio::net::TcpListener, spool: Arc<spool::Spool>) {
    let for_health = spool.clone();
    let app = axum::Router::new()
        .route(
            "/metrics",
            axum::routing::get(move || {
                let page = spool.render_metrics();
                async move {
                    (
                        [(
                            axum::http::header::CONTENT_TYPE,
                            "text/plain; version=0.0.4",
                        )],
                        page,
                    )
                }
            }),
        )
        .route(
            "/health",
            axum::routing::get(move || {
                let answer = match for_health.fault() {
                    None => (axum::http::StatusCode::OK, "ok\n".to_string()),
                    Some(why) => (
                        axum::http::StatusCode::SERVICE_UNAVAILABLE,
                        format!("{why}\n"),
                    ),
                };
                async move { answer }
            }),
        );
    if let Err(e) = axum::serve(listener, app).await {
        tracing::error!(error = %e, "agent metrics endpoint stopped");
    }
}

/// Runs every source and its uplink until Ctrl-C or SIGTERM.
pub(crate) async fn run(config: &std::path::Path) -> anyhow::Result<()> {
    let (file, sources) = load(config)?;
    super::serve::init_logging();
    let max_age = file
        .max_spooled_age
        .as_deref()
        .map(|t| super::parse_duration(t).map_err(|e| UsageError(format!("max_spooled_age: {e}"))))
        .transpose()?;
    let spool = Arc::new(spool::Spool::open(&file.spool, file.max_spooled, max_age).await?);
    let mut tasks = Vec::new();
    for source in sources {
        let wake = Arc::new(tokio::sync::Notify::new());
        let known = Arc::new(tokio::sync::Notify::new());
        tasks.push(match &source.kind {
            Kind::Scpi | Kind::Modbus { .. } => tokio::spawn(scpi::sample(
                source.clone(),
                spool.clone(),
                wake.clone(),
                known.clone(),
            )),
            Kind::File(_) => tokio::spawn(file::follow(
                source.clone(),
                spool.clone(),
                wake.clone(),
                known.clone(),
            )),
        });
        tasks.push(tokio::spawn(uplink::run(
            file.connect.clone(),
            source.channel_id.clone(),
            spool.clone(),
            wake,
            known,
        )));
    }
    if let Some(addr) = &file.metrics_listen {
        let listener = tokio::net::TcpListener::bind(addr)
            .await
            .map_err(|e| UsageError(format!("metrics_listen {addr}: {e}")))?;
        tasks.push(tokio::spawn(serve_metrics(listener, spool.clone())));
    }
    tracing::info!(spool = %file.spool.display(), "rig agent running");
    super::serve::shutdown_signal().await;
    tracing::info!(spool = %file.spool.display(), "stopping on a signal: what is spooled stays for the next start");
    for t in tasks {
        t.abort();
    }
    spool.close().await;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn load_text(text: &str) -> Result<Vec<Source>, String> {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("rig.toml");
        std::fs::write(&path, text).unwrap();
        load(&path).map(|(_, s)| s).map_err(|e| e.0)
    }

    const HEAD: &str = "connect = \"127.0.0.1:50051\"\nspool = \"spool.db\"\n";

    fn source(extra: &str) -> String {
        format!(
            "{HEAD}[[source]]\nchannel_id = \"b3\"\nkind = \"scpi\"\naddress = \"10.0.0.5:5025\"\nperiod = \"100ms\"\n\
             volts = {{ query = \"MEAS:VOLT?\", unit = \"mV\" }}\n{extra}"
        )
    }

    #[test]
    fn units_become_factors_and_the_sign_a_multiplier() {
        let text = source(
            "current_sign = \"discharge_positive\"\namps = { query = \"MEAS:CURR?\", unit = \"mA\" }\n\
             temp_c = { query = \"MEAS:TEMP?\", unit = \"K\" }\n",
        );
        let s = &load_text(&text).unwrap()[0];
        assert_eq!(s.volts.1, 1e-3);
        assert_eq!(s.amps.as_ref().unwrap().1, 1e-3);
        assert_eq!(s.temp_c.as_ref().unwrap().2, -273.15);
        assert_eq!(s.to_charge_positive, -1.0);
        assert_eq!(s.period, Duration::from_millis(100));
    }

    #[test]
    fn a_bad_entry_is_named() {
        let bad_unit = load_text(&source(
            "amps = { query = \"MEAS:CURR?\", unit = \"uA\" }\n",
        ))
        .unwrap_err();
        assert!(
            bad_unit.contains("source[0].amps.unit = \"uA\""),
            "{bad_unit}"
        );
        let bad_sign = load_text(&source("current_sign = \"positive\"\n")).unwrap_err();
        assert!(bad_sign.contains("source[0].current_sign"), "{bad_sign}");
        let kind = |k: &str| {
            load_text(&source("").replace("kind = \"scpi\"", &format!("kind = \"{k}\"")))
                .unwrap_err()
        };
        assert!(kind("serial").contains("source[0].kind = \"serial\""));
        let modbus = kind("modbus");
        assert!(modbus.contains("source[0].volts.register"), "{modbus}");
        let twice = format!("{}{}", source(""), source("").trim_start_matches(HEAD));
        assert!(
            load_text(&twice)
                .unwrap_err()
                .contains("source[1].channel_id = \"b3\"")
        );
        assert!(load_text(HEAD).unwrap_err().contains("source"));
    }
}

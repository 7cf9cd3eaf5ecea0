//! `gibbsline alerts`: watch live (reconnecting and resuming by itself),
//! list stored alerts, acknowledge one.

use super::client;
use super::names::{event_name, kind_id, kind_label, severity_id, severity_label};
use super::output::{self, Col, Format, Row, RowStream};
use super::{DEFAULT_ADDR, Signed, UsageError};
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use serde::Serialize;
use std::time::Duration;
use tokio_stream::StreamExt;

#[derive(Debug, clap::Subcommand)]
pub(crate) enum AlertsCommand {
    /// Stream alerts as they happen; reconnects and resumes by itself.
    Watch {
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
        /// Resume after this event id (each watched line shows its event
        /// id; 0 replays everything stored).
        #[arg(long, default_value_t = 0)]
        after: u64,
        /// Only this channel (default: all).
        #[arg(long)]
        channel: Option<String>,
        /// The least severity shown.
        #[arg(long, value_enum, default_value_t = MinSeverity::Info)]
        min_severity: MinSeverity,
        /// Output: a table for people, CSV or JSON for programs.
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
    /// Acknowledge an alert.
    Ack {
        id: u64,
        #[command(flatten)]
        signed: Signed,
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
    },
    /// Where each alert event went (webhooks, MQTT) or is waiting to go.
    Deliveries {
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
        /// Only deliveries not yet made.
        #[arg(long)]
        pending: bool,
        /// Output: a table for people, CSV or JSON for programs.
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
    /// List stored alerts.
    List {
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
        /// Only this channel (default: all).
        #[arg(long)]
        channel: Option<String>,
        /// Only alerts still active (not cleared).
        #[arg(long)]
        active: bool,
        /// The least severity shown.
        #[arg(long, value_enum, default_value_t = MinSeverity::Info)]
        min_severity: MinSeverity,
        /// Output: a table for people, CSV or JSON for programs.
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub(crate) enum MinSeverity {
    Info,
    Warning,
    Critical,
}

impl MinSeverity {
    fn code(self) -> i32 {
        let severity = match self {
            MinSeverity::Info => pb::Severity::Info,
            MinSeverity::Warning => pb::Severity::Warning,
            MinSeverity::Critical => pb::Severity::Critical,
        };
        severity as i32
    }
}

/// One stored alert.
#[derive(Serialize)]
pub(crate) struct AlertOut {
    alert_id: u64,
    channel_id: String,
    kind: &'static str,
    severity: &'static str,
    raised_unix_ns: i64,
    raised_seq: u64,
    trigger_value: f64,
    threshold: f64,
    unit: String,
    message: String,
    seconds_to_target: Option<f64>,
    cleared_unix_ns: Option<i64>,
    acknowledged_by: Option<String>,
    run_id: u64,
    acknowledged_unix_ns: Option<i64>,
    acknowledge_note: Option<String>,
    raised_utc: String,
    /// Raised by an imported recording (never pushed).
    historical: bool,
    #[serde(skip)]
    codes: (i32, i32),
}

impl From<&pb::Alert> for AlertOut {
    fn from(a: &pb::Alert) -> AlertOut {
        AlertOut {
            alert_id: a.alert_id,
            channel_id: a.channel_id.clone(),
            kind: kind_id(a.kind),
            severity: severity_id(a.severity),
            raised_unix_ns: a.raised_unix_ns,
            raised_seq: a.raised_seq,
            trigger_value: a.trigger_value,
            threshold: a.threshold,
            unit: a.unit.clone(),
            message: a.message.clone(),
            seconds_to_target: a.seconds_to_target,
            cleared_unix_ns: a.cleared_unix_ns,
            acknowledged_by: a.acknowledged_by.clone(),
            run_id: a.run_id,
            acknowledged_unix_ns: a.acknowledged_unix_ns,
            acknowledge_note: a.acknowledge_note.clone(),
            raised_utc: super::time::iso_utc(a.raised_unix_ns),
            historical: a.historical,
            codes: (a.kind, a.severity),
        }
    }
}

const ALERT_HEADER: [&str; 18] = [
    "alert_id",
    "channel_id",
    "kind",
    "severity",
    "raised_unix_ns",
    "raised_seq",
    "trigger_value",
    "threshold",
    "unit",
    "message",
    "seconds_to_target",
    "cleared_unix_ns",
    "acknowledged_by",
    "run_id",
    "acknowledged_unix_ns",
    "acknowledge_note",
    "raised_utc",
    "historical",
];

const ALERT_COLUMNS: [Col; 7] = [
    Col::left("alert", 6),
    Col::left("raised", 29),
    Col::left("severity", 8),
    Col::left("channel", 14),
    Col::left("kind", 19),
    Col::right("seq", 8),
    Col::left("message", 0),
];

impl AlertOut {
    fn cells(&self) -> Vec<String> {
        let cleared = if self.cleared_unix_ns.is_some() {
            " [cleared]"
        } else {
            ""
        };
        let ack = self
            .acknowledged_by
            .as_ref()
            .map(|b| format!(" [acknowledged by {b}]"))
            .unwrap_or_default();
        vec![
            format!("#{}", self.alert_id),
            super::time::iso(self.raised_unix_ns),
            severity_label(self.codes.1),
            self.channel_id.clone(),
            kind_label(self.codes.0),
            self.raised_seq.to_string(),
            format!("{}{cleared}{ack}", self.message),
        ]
    }
}

impl Row for AlertOut {
    const CSV_HEADER: &'static [&'static str] = &ALERT_HEADER;
    const TABLE: &'static [Col] = &ALERT_COLUMNS;
    fn table_cells(&self) -> Vec<String> {
        self.cells()
    }
}

/// One watched event: what happened, its event id (what `--after`
/// resumes from) and the alert. CSV flattens the alert into the line.
#[derive(Serialize)]
pub(crate) struct EventOut {
    event: &'static str,
    event_id: u64,
    alert: AlertOut,
}

const EVENT_HEADER: [&str; 20] = output::concat(["event", "event_id"], ALERT_HEADER);

const EVENT_COLUMNS: [Col; 9] = output::concat(
    [Col::left("event", 12), Col::right("event_id", 8)],
    ALERT_COLUMNS,
);

impl Row for EventOut {
    const CSV_HEADER: &'static [&'static str] = &EVENT_HEADER;
    const TABLE: &'static [Col] = &EVENT_COLUMNS;
    fn table_cells(&self) -> Vec<String> {
        let mut cells = vec![self.event.to_string(), self.event_id.to_string()];
        cells.extend(self.alert.cells());
        cells
    }
}

pub(crate) async fn run(cmd: &AlertsCommand) -> anyhow::Result<()> {
    match cmd {
        AlertsCommand::Ack {
            id,
            signed,
            connect,
        } => acknowledge(connect, *id, &signed.by, &signed.note).await,
        AlertsCommand::List {
            connect,
            channel,
            active,
            min_severity,
            format,
        } => {
            list(
                connect,
                channel.clone().unwrap_or_default(),
                *active,
                *min_severity,
                *format,
            )
            .await
        }
        AlertsCommand::Deliveries {
            connect,
            pending,
            format,
        } => super::deliveries::run(connect, *pending, *format).await,
        AlertsCommand::Watch {
            connect,
            after,
            channel,
            min_severity,
            format,
        } => {
            let request = pb::WatchAlertsRequest {
                after_event_id: *after,
                channel_id: channel.clone().unwrap_or_default(),
                min_severity: min_severity.code(),
            };
            watch(connect, request, *format).await
        }
    }
}

async fn acknowledge(connect: &str, id: u64, by: &str, note: &str) -> anyhow::Result<()> {
    let mut c = AlertServiceClient::new(client::connect(connect).await?);
    let request = pb::AcknowledgeAlertRequest {
        alert_id: id,
        acknowledged_by: by.to_string(),
        note: note.to_string(),
    };
    let a = c
        .acknowledge_alert(request)
        .await
        .map_err(|s| UsageError(format!("alert {id}: {}", s.message())))?
        .into_inner()
        .alert
        .unwrap_or_default();
    output::print_all(&[AlertOut::from(&a)], Format::Table)
}

async fn list(
    connect: &str,
    channel_id: String,
    active: bool,
    min_severity: MinSeverity,
    format: Format,
) -> anyhow::Result<()> {
    let mut c = AlertServiceClient::new(client::connect(connect).await?);
    let mut rows = Vec::new();
    let mut after = 0;
    loop {
        let request = pb::ListAlertsRequest {
            channel_id: channel_id.clone(),
            active_only: active,
            after_alert_id: after,
            limit: 1000,
            min_severity: min_severity.code(),
        };
        let page = c
            .list_alerts(request)
            .await
            .map_err(client::status_error)?
            .into_inner();
        rows.extend(page.alerts.iter().map(AlertOut::from));
        if page.next_after_alert_id == 0 {
            return output::print_all(&rows, format);
        }
        after = page.next_after_alert_id;
    }
}

/// Follows the feed for good: on any break it reconnects and resumes
/// after the last event id it saw.
async fn watch(
    connect: &str,
    mut request: pb::WatchAlertsRequest,
    format: Format,
) -> anyhow::Result<()> {
    let mut out = RowStream::new(format);
    // On stderr: a program reading the stream's CSV or JSON gets only rows.
    eprintln!("{}", gibbsline::notify::NOTICE);
    loop {
        let conn = match client::connect(connect).await {
            Ok(c) => c,
            Err(e) => {
                eprintln!("{e}; retrying in 2 s");
                tokio::time::sleep(Duration::from_secs(2)).await;
                continue;
            }
        };
        let mut stream = match AlertServiceClient::new(conn)
            .watch_alerts(request.clone())
            .await
        {
            Ok(s) => s.into_inner(),
            Err(s) if s.code() == tonic::Code::NotFound => {
                return Err(UsageError(s.message().to_string()).into());
            }
            Err(s) => {
                eprintln!("watch: {}; retrying in 2 s", s.message());
                tokio::time::sleep(Duration::from_secs(2)).await;
                continue;
            }
        };
        while let Some(m) = stream.next().await {
            match m {
                Ok(m) => show_event(&mut out, &mut request.after_event_id, m, format)?,
                Err(s) => {
                    eprintln!(
                        "watch: {}; resuming after {}",
                        s.message(),
                        request.after_event_id
                    );
                    break;
                }
            }
        }
        tokio::time::sleep(Duration::from_secs(1)).await;
    }
}

fn show_event(
    out: &mut RowStream,
    last: &mut u64,
    m: pb::WatchAlertsResponse,
    format: Format,
) -> anyhow::Result<()> {
    if m.resume_after_event_id > 0 {
        *last = m.resume_after_event_id;
    }
    let event = event_name(m.event);
    match (event, m.alert) {
        ("live", _) if format == Format::Table => {
            eprintln!("-- live (resume point {last}) --");
        }
        ("raised" | "cleared" | "acknowledged", Some(a)) => out.row(&EventOut {
            event,
            event_id: m.resume_after_event_id,
            alert: AlertOut::from(&a),
        })?,
        _ => {}
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_headers_name_every_field_in_order() {
        let alert = AlertOut::from(&pb::Alert::default());
        assert_eq!(output::derived_csv_header(&alert), ALERT_HEADER);
        let columns = EVENT_COLUMNS.map(|c| c.heading);
        assert_eq!(&columns[..3], ["event", "event_id", "alert"]);
        assert_eq!(EVENT_HEADER[2..], ALERT_HEADER);
    }
}

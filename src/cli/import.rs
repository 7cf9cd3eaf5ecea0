//! `gibbsline import FILE --channel ID`: a recorded file into a channel's
//! history through the normal ingest path (validation, derivation,
//! cycles, rollups, alert rules). Today it reads what `gibbsline readings
//! --format csv` writes (columns by header name: `seq`, `time_unix_ns`,
//! `volts`, and `amps_charge_positive`, `temp_c` if present), so export →
//! import is a round trip; a seq already stored is a duplicate, so
//! importing the same file twice stores nothing the second time. Every
//! line ends read and stored, a duplicate, or rejected with its line
//! number and the reason.

use super::client;
use super::output::{self, Col, Row, TableOrJson};
use super::{DEFAULT_ADDR, UsageError};
use gibbsline::pb;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use serde::Serialize;
use std::io::IsTerminal;
use std::path::PathBuf;
use tokio_stream::StreamExt;

#[derive(Debug, clap::Args)]
pub(crate) struct ImportArgs {
    /// A CSV file as `gibbsline readings --format csv` writes it.
    pub file: PathBuf,
    /// The channel the readings go into (defined already).
    #[arg(long)]
    pub channel: String,
    /// The server, host:port.
    #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
    pub connect: String,
    /// Readings per batch.
    #[arg(long, default_value_t = 1000)]
    pub batch: usize,
    /// How a recorded file other than an export is laid out (a file
    /// source's keys: time, delimiter, decimal_comma, current_sign,
    /// volts, amps, temp_c). Its lines get seqs by line number.
    #[arg(long)]
    pub map: Option<PathBuf>,
    /// With --map: seqs are this plus the line number (the header is
    /// line 1); past what the channel holds already. The same file with
    /// the same --seq-from stores nothing twice.
    #[arg(long, default_value_t = 0)]
    pub seq_from: u64,
    /// Output: a table for people or JSON for programs.
    #[arg(long, value_enum, default_value_t = TableOrJson::Table)]
    pub format: TableOrJson,
}

/// A line left out, and why.
#[derive(Debug, Clone, Serialize)]
struct Refused {
    line: u64,
    field: String,
    reason: String,
}

/// What the import did.
#[derive(Debug, Default, Serialize)]
struct ImportSummary {
    file: String,
    channel_id: String,
    rows_read: u64,
    stored: u64,
    duplicates: u64,
    out_of_order: u64,
    rejected: u64,
    /// The first 100 refusals, by line.
    refusals: Vec<Refused>,
    #[serde(skip)]
    prose: Vec<String>,
}

impl Row for ImportSummary {
    const CSV_HEADER: &'static [&'static str] = &[];
    const TABLE: &'static [Col] = &[];
    fn table_cells(&self) -> Vec<String> {
        self.prose.clone()
    }
}

/// Where each wanted column is in the file's header.
struct Columns {
    seq: usize,
    time: usize,
    volts: usize,
    amps: Option<usize>,
    temp: Option<usize>,
}

impl Columns {
    fn of(header: &csv::StringRecord, file: &str) -> Result<Columns, UsageError> {
        let find = |name: &str| header.iter().position(|h| h == name);
        let need = |name: &str| {
            find(name).ok_or_else(|| {
                UsageError(format!(
                    "{file}: no column {name:?} (expected the header `gibbsline readings --format csv` writes)"
                ))
            })
        };
        Ok(Columns {
            seq: need("seq")?,
            time: need("time_unix_ns")?,
            volts: need("volts")?,
            amps: find("amps_charge_positive"),
            temp: find("temp_c"),
        })
    }

    /// One line as a reading in the channel's sign convention, or the
    /// field that is wrong.
    fn reading(
        &self,
        r: &csv::StringRecord,
        to_wire: f64,
    ) -> Result<pb::Reading, (String, String)> {
        fn parse<T: std::str::FromStr>(
            r: &csv::StringRecord,
            i: usize,
            name: &str,
        ) -> Result<T, (String, String)> {
            let text = r.get(i).unwrap_or("");
            text.trim().parse().map_err(|_| {
                let shown = crate::cli::excerpt(text);
                (name.to_string(), format!("{shown} is not a number"))
            })
        }
        let optional = |i: Option<usize>, name: &str| -> Result<Option<f64>, (String, String)> {
            match i.and_then(|i| r.get(i)).map(str::trim) {
                None | Some("") => Ok(None),
                Some(_) => parse(r, i.unwrap_or_default(), name).map(Some),
            }
        };
        Ok(pb::Reading {
            seq: parse(r, self.seq, "seq")?,
            time_unix_ns: parse(r, self.time, "time_unix_ns")?,
            volts: parse(r, self.volts, "volts")?,
            amps: optional(self.amps, "amps_charge_positive")?.map(|a| a * to_wire),
            temp_c: optional(self.temp, "temp_c")?,
        })
    }
}

pub(crate) async fn run(args: &ImportArgs) -> anyhow::Result<()> {
    let file = args.file.display().to_string();
    if args.batch == 0 || args.batch > 10_000 {
        return Err(UsageError(format!("--batch {}: must be from 1 to 10000", args.batch)).into());
    }
    let conn = client::connect(&args.connect).await?;
    let to_wire = sign_to_wire(&conn, &args.channel).await?;
    let lines = match &args.map {
        None => exported_lines(args, to_wire)?,
        Some(map) => mapped_lines(args, map, to_wire)?,
    };
    let mut summary = ImportSummary {
        file,
        channel_id: args.channel.clone(),
        ..Default::default()
    };
    let (tx, rx) = tokio::sync::mpsc::channel(4);
    let mut acks = IngestServiceClient::new(conn)
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await
        .map_err(client::status_error)?
        .into_inner();
    let mut out = Outbound {
        tx,
        channel_id: args.channel.clone(),
        batch_id: 0,
        pending: Vec::new(),
        batches: Default::default(),
    };
    let progress = std::io::stderr().is_terminal();
    for (line, reading) in lines {
        summary.rows_read += 1;
        match reading {
            Ok(reading) => out.pending.push((line, reading)),
            Err((field, reason)) => summary.refuse(line, field, reason),
        }
        if out.pending.len() == args.batch {
            out.send().await?;
            take_acks(&mut acks, &mut out.batches, &mut summary, 2).await?;
            if progress && summary.rows_read.is_multiple_of(100_000) {
                eprint!(
                    "\rread {} lines, stored {}",
                    summary.rows_read, summary.stored
                );
            }
        }
    }
    out.send().await?;
    let Outbound {
        tx, mut batches, ..
    } = out;
    drop(tx);
    take_acks(&mut acks, &mut batches, &mut summary, 0).await?;
    if progress {
        eprintln!();
    }
    summary.prose = summary.lines();
    output::print_all(&[summary], args.format.into())
}

/// Each line of the file and its reading: numbered (the header is line 1).
type Lines = Box<dyn Iterator<Item = (u64, Result<pb::Reading, (String, String)>)>>;

/// A file as `readings --format csv` writes it.
fn exported_lines(args: &ImportArgs, to_wire: f64) -> Result<Lines, UsageError> {
    let (csv, columns) = open_csv(args)?;
    Ok(Box::new(csv.into_records().enumerate().map(
        move |(i, record)| {
            let reading = record
                .map_err(|e| ("line".to_string(), e.to_string()))
                .and_then(|r| columns.reading(&r, to_wire));
            (i as u64 + 2, reading)
        },
    )))
}

/// A file laid out as `--map` says; seqs from `--seq-from` and the line number.
fn mapped_lines(
    args: &ImportArgs,
    map: &std::path::Path,
    to_wire: f64,
) -> Result<Lines, UsageError> {
    let file = args.file.display().to_string();
    let source = super::agent::recording_layout(map, &args.channel)?;
    let text =
        std::fs::read_to_string(&args.file).map_err(|e| UsageError(format!("{file}: {e}")))?;
    let lines = super::agent::file::read_recording(&text, &source)
        .map_err(|e| UsageError(format!("{file}: {e}")))?;
    let seq_from = args.seq_from;
    Ok(Box::new(lines.into_iter().map(move |(line, row)| {
        let reading = row
            .map(|(time_ns, volts, amps, temp_c)| pb::Reading {
                seq: seq_from + line,
                time_unix_ns: time_ns,
                volts,
                amps: amps.map(|a| a * to_wire),
                temp_c,
            })
            // The reason begins with the field it is about ("volts = …").
            .map_err(|reason| {
                let field = reason.split(" = ").next().filter(|f| !f.contains(' '));
                (field.unwrap_or("line").to_string(), reason)
            });
        (line, reading)
    })))
}

/// The file, with its header read and the wanted columns found.
fn open_csv(args: &ImportArgs) -> Result<(csv::Reader<std::fs::File>, Columns), UsageError> {
    let file = args.file.display().to_string();
    let mut csv = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .from_path(&args.file)
        .map_err(|e| UsageError(format!("{file}: {e}")))?;
    let header = csv
        .headers()
        .map_err(|e| UsageError(format!("{file}: {e}")))?;
    let columns = Columns::of(header, &file)?;
    Ok((csv, columns))
}

/// The factor from charge-positive amps (the file) to the channel's
/// instrument convention (the wire).
pub(crate) async fn sign_to_wire(conn: &client::Conn, channel_id: &str) -> anyhow::Result<f64> {
    let channel = ChannelServiceClient::new(conn.clone())
        .get_channel(pb::GetChannelRequest {
            channel_id: channel_id.to_string(),
        })
        .await
        .map_err(|s| UsageError(format!("--channel {channel_id}: {}", s.message())))?
        .into_inner()
        .channel
        .unwrap_or_default();
    Ok(
        if channel.current_sign == pb::CurrentSign::DischargePositive as i32 {
            -1.0
        } else {
            1.0
        },
    )
}

/// Readings on their way: the batch being filled (each reading with its
/// line) and, per batch sent, its lines, until its ack comes.
struct Outbound {
    tx: tokio::sync::mpsc::Sender<pb::StreamReadingsRequest>,
    channel_id: String,
    batch_id: u64,
    pending: Vec<(u64, pb::Reading)>,
    batches: std::collections::HashMap<u64, Vec<u64>>,
}

impl Outbound {
    /// Sends the batch being filled, if it holds anything.
    async fn send(&mut self) -> anyhow::Result<()> {
        if self.pending.is_empty() {
            return Ok(());
        }
        let (lines, readings): (Vec<u64>, Vec<pb::Reading>) = self.pending.drain(..).unzip();
        self.batch_id += 1;
        self.batches.insert(self.batch_id, lines);
        let batch = pb::ReadingBatch {
            historical: true,
            channel_id: self.channel_id.clone(),
            batch_id: self.batch_id,
            readings,
        };
        self.tx
            .send(pb::StreamReadingsRequest { batch: Some(batch) })
            .await
            .map_err(|_| anyhow::anyhow!("the server ended the stream"))
    }
}

/// Reads acks until at most `in_flight` batches are unanswered.
async fn take_acks(
    acks: &mut tonic::Streaming<pb::StreamReadingsResponse>,
    batches: &mut std::collections::HashMap<u64, Vec<u64>>,
    summary: &mut ImportSummary,
    in_flight: usize,
) -> anyhow::Result<()> {
    while batches.len() > in_flight {
        let Some(message) = acks.next().await else {
            anyhow::bail!(
                "the server ended the stream with {} batches unanswered",
                batches.len()
            );
        };
        let ack = message
            .map_err(client::status_error)?
            .ack
            .unwrap_or_default();
        let lines = batches.remove(&ack.batch_id).unwrap_or_default();
        summary.stored += u64::from(ack.accepted);
        summary.duplicates += u64::from(ack.duplicates);
        summary.out_of_order += u64::from(ack.out_of_order);
        for r in ack.rejected {
            let line = lines.get(r.index as usize).copied().unwrap_or(0);
            summary.refuse(line, r.field, r.reason);
        }
    }
    Ok(())
}

impl ImportSummary {
    fn refuse(&mut self, line: u64, field: String, reason: String) {
        self.rejected += 1;
        if self.refusals.len() < 100 {
            self.refusals.push(Refused {
                line,
                field,
                reason,
            });
        }
    }

    fn lines(&self) -> Vec<String> {
        let mut out = vec![format!(
            "{} → {}: {} lines read, {} stored ({} behind newer ones), {} already stored, {} rejected",
            self.file,
            self.channel_id,
            self.rows_read,
            self.stored,
            self.out_of_order,
            self.duplicates,
            self.rejected
        )];
        out.extend(
            self.refusals
                .iter()
                .map(|r| format!("  line {}: {}: {}", r.line, r.field, r.reason)),
        );
        if self.rejected > self.refusals.len() as u64 {
            out.push(format!(
                "  … and {} more",
                self.rejected - self.refusals.len() as u64
            ));
        }
        out
    }
}

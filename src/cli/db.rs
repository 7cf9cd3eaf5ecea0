//! `gibbsline db stats`: what the database holds and what it costs on
//! disk, read beside a running server or from a copy.

use super::UsageError;
use super::output::{self, Col, Format, Row, TableOrJson};
use super::time::iso;
use gibbsline::store::report::{ChannelUse, StorageReport, TableUse};
use std::path::PathBuf;

#[derive(Debug, clap::Subcommand)]
pub(crate) enum DbCommand {
    /// Rows and bytes per table, readings and time span per channel, file
    /// and WAL size.
    Stats {
        /// The database file [default: gibbsline.db].
        #[arg(long, default_value = gibbsline::config::DEFAULT_DB)]
        db: PathBuf,
        /// Output: a table for people or JSON for programs.
        #[arg(long, value_enum, default_value_t = TableOrJson::Table)]
        format: TableOrJson,
    },
}

pub(crate) async fn run(cmd: &DbCommand) -> anyhow::Result<()> {
    let DbCommand::Stats { db, format } = cmd;
    let text = db.display().to_string();
    if text.starts_with("postgres://") || text.starts_with("postgresql://") {
        return Err(UsageError(format!(
            "--db {}: db stats reads SQLite files; on PostgreSQL ask the database (pg_total_relation_size, pg_stat_user_tables)",
            gibbsline::store::redact_url(&text)
        ))
        .into());
    }
    if !db.exists() {
        return Err(UsageError(format!("--db {}: no such file", db.display())).into());
    }
    let report = gibbsline::store::report::storage_report(db).await?;
    match Format::from(*format) {
        Format::Json => output::print_one(&report),
        _ => print_tables(&report),
    }
}

fn print_tables(report: &StorageReport) -> anyhow::Result<()> {
    let readings: u64 = report.channels.iter().map(|c| c.readings).sum();
    let total = report.file_bytes + report.wal_bytes;
    let per_reading = (readings > 0).then(|| total as f64 / readings as f64);
    println!(
        "{}: {} in the file, {} in the WAL; {readings} readings{}",
        report.path,
        mib(report.file_bytes),
        mib(report.wal_bytes),
        per_reading
            .map(|b| format!(", {b:.0} B/reading in all"))
            .unwrap_or_default()
    );
    println!();
    output::print_all(
        &report.tables.iter().map(TableOut).collect::<Vec<_>>(),
        Format::Table,
    )?;
    println!();
    let channels: Vec<_> = report.channels.iter().map(ChannelOut).collect();
    output::print_all(&channels, Format::Table)
}

fn mib(bytes: u64) -> String {
    format!("{:.1} MiB", bytes as f64 / (1024.0 * 1024.0))
}

#[derive(serde::Serialize)]
struct TableOut<'a>(&'a TableUse);

impl Row for TableOut<'_> {
    const CSV_HEADER: &'static [&'static str] = &["table", "rows", "bytes"];
    const TABLE: &'static [Col] = &[
        Col::left("table", 18),
        Col::right("rows", 12),
        Col::right("MiB", 10),
    ];
    fn table_cells(&self) -> Vec<String> {
        vec![
            self.0.table.clone(),
            self.0.rows.to_string(),
            self.0
                .bytes
                .map(|b| format!("{:.2}", b as f64 / (1024.0 * 1024.0)))
                .unwrap_or_else(|| "-".into()),
        ]
    }
}

#[derive(serde::Serialize)]
struct ChannelOut<'a>(&'a ChannelUse);

impl Row for ChannelOut<'_> {
    const CSV_HEADER: &'static [&'static str] = &[
        "channel_id",
        "readings",
        "oldest_unix_ns",
        "newest_unix_ns",
        "raw_kept_from_unix_ns",
        "rollups_kept_from_unix_ns",
    ];
    const TABLE: &'static [Col] = &[
        Col::left("channel", 18),
        Col::right("readings", 12),
        Col::left("oldest", 29),
        Col::left("newest", 29),
        Col::left("raw kept from", 0),
    ];
    fn table_cells(&self) -> Vec<String> {
        let at = |t: Option<i64>| t.map(iso).unwrap_or_else(|| "-".into());
        vec![
            self.0.channel_id.clone(),
            self.0.readings.to_string(),
            at(self.0.oldest_unix_ns),
            at(self.0.newest_unix_ns),
            at(self.0.raw_kept_from_unix_ns),
        ]
    }
}

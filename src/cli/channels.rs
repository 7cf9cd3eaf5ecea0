//! `gibbsline channels`: define channels from a file, list and show them,
//! anchor a count at a known SOC, reset a garbled timeline.

use super::client;
use super::output::{self, Col, Format, Row};
use super::{DEFAULT_ADDR, Signed, UsageError};
use gibbsline::alerts::AlertRules;
use gibbsline::alerts::rules::RuleBasis;
use gibbsline::grpc::convert::{channel_to_pb, rules_to_pb};
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::chemistry_service_client::ChemistryServiceClient;
use serde::Serialize;
use std::path::{Path, PathBuf};

#[derive(Debug, clap::Subcommand)]
pub(crate) enum ChannelsCommand {
    /// Create or replace the channels of a TOML file ([[channel]] tables).
    Put {
        file: PathBuf,
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
    },
    List {
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
        /// Output: a table for people, CSV or JSON for programs.
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
    Get {
        id: String,
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
        /// Output: a table for people, CSV or JSON for programs.
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
    /// Anchor a channel's coulomb count at an SOC you know (operator role).
    SetSoc {
        id: String,
        /// 0–1.
        #[arg(long)]
        soc: f64,
        #[command(flatten)]
        signed: Signed,
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
    },
    /// Fit the cell's own OCV model (E°′, apparent n, SOC scale) to a
    /// run's settled rests and show it with its uncertainty; changes nothing.
    FitOcv {
        id: String,
        /// The run (default: the channel's current run).
        #[arg(long, default_value_t = 0)]
        run: u64,
        /// Fit the capacity too, instead of taking the channel's.
        #[arg(long)]
        fit_capacity: bool,
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
        /// Output: a table for people or JSON for programs.
        #[arg(long, value_enum, default_value_t = super::output::TableOrJson::Table)]
        format: super::output::TableOrJson,
    },
    /// Put a fitted OCV model on the channel (operator role); a new run starts.
    ApplyOcvFit {
        id: String,
        /// Formal potential at 298.15 K, V (from `fit-ocv`).
        #[arg(long)]
        e_formal_298_v: f64,
        /// Apparent electron number (from `fit-ocv`).
        #[arg(long)]
        n_apparent: f64,
        #[command(flatten)]
        signed: Signed,
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
    },
    /// Move a channel's front back to a stored reading after a garbled
    /// time or seq (operator role); nothing stored is deleted.
    ResetTimeline {
        id: String,
        /// Resume after this stored seq (default: the latest reading that
        /// was taken out of order).
        #[arg(long)]
        after_seq: Option<u64>,
        /// The server, host:port.
        #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
        connect: String,
    },
}

#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct ChannelsFile {
    channel: Vec<gibbsline::config::ChannelEntry>,
}

/// One channel definition as listed.
#[derive(Serialize)]
struct ChannelOut {
    channel_id: String,
    chemistry_id: String,
    cells_in_series: u32,
    capacity_ah: f64,
    plausible_min_cell_volts: f64,
    plausible_max_cell_volts: f64,
    run_id: u64,
    description: String,
    /// The channel's own retention; empty: the server's default.
    retention_raw_days: Option<f64>,
    retention_rollup_days: Option<f64>,
}

impl From<pb::Channel> for ChannelOut {
    fn from(c: pb::Channel) -> ChannelOut {
        ChannelOut {
            channel_id: c.channel_id,
            chemistry_id: c.chemistry_id,
            cells_in_series: c.cells_in_series,
            capacity_ah: c.capacity_ah,
            plausible_min_cell_volts: c.plausible_min_cell_volts,
            plausible_max_cell_volts: c.plausible_max_cell_volts,
            run_id: c.run_id,
            description: c.description,
            retention_raw_days: c.retention.and_then(|r| r.raw_days),
            retention_rollup_days: c.retention.and_then(|r| r.rollup_days),
        }
    }
}

impl Row for ChannelOut {
    const CSV_HEADER: &'static [&'static str] = &[
        "channel_id",
        "chemistry_id",
        "cells_in_series",
        "capacity_ah",
        "plausible_min_cell_volts",
        "plausible_max_cell_volts",
        "run_id",
        "description",
        "retention_raw_days",
        "retention_rollup_days",
    ];
    const TABLE: &'static [Col] = &[
        Col::left("channel", 16),
        Col::left("chemistry", 16),
        Col::right("cells", 5),
        Col::right("Ah", 8),
        Col::left("plausible V/cell", 16),
        Col::right("run", 5),
        Col::left("description", 0),
    ];
    fn table_cells(&self) -> Vec<String> {
        vec![
            self.channel_id.clone(),
            self.chemistry_id.clone(),
            self.cells_in_series.to_string(),
            format!("{:.2}", self.capacity_ah),
            format!(
                "{:.3}–{:.3}",
                self.plausible_min_cell_volts, self.plausible_max_cell_volts
            ),
            self.run_id.to_string(),
            self.description.clone(),
        ]
    }
}

pub(crate) async fn run(cmd: &ChannelsCommand) -> anyhow::Result<()> {
    match cmd {
        ChannelsCommand::Put { file, connect } => put(file, connect).await,
        ChannelsCommand::List { connect, format } => {
            let channels = client::all_channels(&client::connect(connect).await?).await?;
            let rows: Vec<ChannelOut> = channels.into_iter().map(ChannelOut::from).collect();
            output::print_all(&rows, *format)
        }
        ChannelsCommand::Get {
            id,
            connect,
            format,
        } => get(connect, id, *format).await,
        ChannelsCommand::SetSoc {
            id,
            soc,
            signed,
            connect,
        } => set_soc(connect, id, *soc, &signed.by, &signed.note).await,
        ChannelsCommand::ResetTimeline {
            id,
            after_seq,
            connect,
        } => reset_timeline(connect, id, *after_seq).await,
        ChannelsCommand::FitOcv {
            id,
            run,
            fit_capacity,
            connect,
            format,
        } => super::ocv_fit::fit(connect, id, *run, *fit_capacity, *format).await,
        ChannelsCommand::ApplyOcvFit {
            id,
            e_formal_298_v,
            n_apparent,
            signed,
            connect,
        } => {
            super::ocv_fit::apply(
                connect,
                id,
                *e_formal_298_v,
                *n_apparent,
                &signed.by,
                &signed.note,
            )
            .await
        }
    }
}

fn read_file(file: &Path) -> Result<ChannelsFile, UsageError> {
    let text = std::fs::read_to_string(file)
        .map_err(|e| UsageError(format!("{}: {e}", file.display())))?;
    toml::from_str(&text).map_err(|e| {
        UsageError(format!(
            "{}: {}",
            file.display(),
            e.to_string().replace('\n', " ")
        ))
    })
}

/// What each of the server's chemistries makes its default rules from:
/// rules in a channels file are written as differences from those.
async fn rule_bases(
    conn: &client::Conn,
) -> anyhow::Result<std::collections::BTreeMap<String, RuleBasis>> {
    let list = ChemistryServiceClient::new(conn.clone())
        .list_chemistries(pb::ListChemistriesRequest {})
        .await
        .map_err(client::status_error)?
        .into_inner();
    Ok(list
        .chemistries
        .into_iter()
        .map(|c| {
            let basis = RuleBasis {
                charge_cutoff_cell_volts: c.charge_cutoff_cell_volts,
                discharge_cutoff_cell_volts: c.discharge_cutoff_cell_volts,
                min_cell_volts: c.min_cell_volts,
                max_cell_volts: c.max_cell_volts,
                min_temp_c: c.min_temp_c,
                max_temp_c: c.max_temp_c,
                has_soc_model: c.soc_model_name != "none",
            };
            (c.chemistry_id, basis)
        })
        .collect())
}

async fn put(file: &Path, connect: &str) -> anyhow::Result<()> {
    let parsed = read_file(file)?;
    let conn = client::connect(connect).await?;
    let mut channels = ChannelServiceClient::new(conn.clone());
    let bases = rule_bases(&conn).await?;
    let mut alerts = AlertServiceClient::new(conn);
    for entry in parsed.channel {
        let id = entry.def.channel_id.clone();
        let refused = |what: &str, s: tonic::Status| {
            UsageError(format!(
                "{}: {what} {id:?}: {}",
                file.display(),
                s.message()
            ))
        };
        let request = pb::PutChannelRequest {
            channel: Some(channel_to_pb(&entry.def, 0)),
        };
        let r = channels
            .put_channel(request)
            .await
            .map_err(|s| refused("channel", s))?
            .into_inner();
        if let Some(patch) = entry.rules {
            let basis = bases.get(&entry.def.chemistry_id).ok_or_else(|| {
                UsageError(format!(
                    "{}: rules of {id:?}: the server knows no chemistry {:?}",
                    file.display(),
                    entry.def.chemistry_id
                ))
            })?;
            let rules = patch
                .over(&AlertRules::for_basis(basis))
                .map_err(|e| UsageError(format!("{}: rules of {id:?}: {e}", file.display())))?;
            let request = pb::PutAlertRulesRequest {
                channel_id: id.clone(),
                rules: Some(rules_to_pb(&rules)),
            };
            alerts
                .put_alert_rules(request)
                .await
                .map_err(|s| refused("rules of", s))?;
        }
        let verb = if r.new_run { "new run " } else { "updated " };
        println!("{verb} {id}");
    }
    Ok(())
}

async fn get(connect: &str, id: &str, format: Format) -> anyhow::Result<()> {
    let request = pb::GetChannelRequest {
        channel_id: id.to_string(),
    };
    let c = ChannelServiceClient::new(client::connect(connect).await?)
        .get_channel(request)
        .await
        .map_err(client::status_error)?
        .into_inner()
        .channel
        .unwrap_or_default();
    output::print_all(&[ChannelOut::from(c)], format)
}

async fn set_soc(connect: &str, id: &str, soc: f64, by: &str, note: &str) -> anyhow::Result<()> {
    let request = pb::SetChannelSocRequest {
        channel_id: id.to_string(),
        soc,
        set_by: by.to_string(),
        note: note.to_string(),
    };
    let r = ChannelServiceClient::new(client::connect(connect).await?)
        .set_channel_soc(request)
        .await
        .map_err(|s| UsageError(s.message().to_string()))?
        .into_inner();
    println!(
        "{id}: SOC {} from time_unix_ns {} on, counted from there",
        r.soc, r.time_unix_ns
    );
    Ok(())
}

async fn reset_timeline(connect: &str, id: &str, after_seq: Option<u64>) -> anyhow::Result<()> {
    let request = pb::ResetTimelineRequest {
        channel_id: id.to_string(),
        after_seq,
    };
    let r = ChannelServiceClient::new(client::connect(connect).await?)
        .reset_timeline(request)
        .await
        .map_err(|s| UsageError(s.message().to_string()))?
        .into_inner();
    println!(
        "{id}: readings after seq {} (time_unix_ns {}) count as fresh again",
        r.last_stored_seq, r.time_unix_ns
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_header_names_every_field_in_order() {
        let row = ChannelOut::from(pb::Channel::default());
        assert_eq!(output::derived_csv_header(&row), ChannelOut::CSV_HEADER);
    }
}

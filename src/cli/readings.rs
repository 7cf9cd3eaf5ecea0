//! `gibbsline readings`: a channel's stored readings, or buckets of them,
//! as a table, CSV or JSON.

use super::client;
use super::names::{mode_name, ocv_model_name, ocv_source_name, state_name};
use super::output::{self, Col, Format, Row, fixed, percent};
use super::time::{iso, iso_utc};
use super::{DEFAULT_ADDR, UsageError};
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use serde::Serialize;
use std::time::Duration;
use tokio_stream::StreamExt;

#[derive(Debug, clap::Args)]
pub(crate) struct ReadingsArgs {
    /// The server, host:port.
    #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
    pub connect: String,
    /// The channel id.
    #[arg(long)]
    pub channel: String,
    /// Start: a time as tables print it (2026-12-04T18:00:00Z; no offset:
    /// UTC), unix seconds, or an age such as 2h (two hours ago).
    #[arg(long)]
    pub since: Option<String>,
    /// End (exclusive), in the forms of --since.
    #[arg(long)]
    pub until: Option<String>,
    /// Downsample into buckets of this width, e.g. 1m, 10s.
    #[arg(long, value_parser = super::parse_duration)]
    pub bucket: Option<Duration>,
    /// Readings at most; the command says so when it stops there.
    #[arg(long, default_value_t = 100_000)]
    pub limit: u32,
    /// Output: a table for people, CSV or JSON for programs.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// A day, in ns: the default window of a bucket query.
const DAY_NS: i64 = 86_400_000_000_000;

/// Parses `--since`/`--until`: unix seconds (may be fractional) or an age.
pub(crate) fn parse_time(flag: &str, text: &str, now_ns: i64) -> Result<i64, UsageError> {
    if let Ok(secs) = text.parse::<f64>()
        && secs.is_finite()
        && secs >= 0.0
    {
        return Ok((secs * 1e9) as i64);
    }
    // The times every table prints (RFC 3339 / ISO 8601; no offset: UTC).
    if let Some(ns) = super::agent::file::parse_iso(text) {
        return Ok(ns);
    }
    super::parse_duration(text)
        .map(|age| now_ns - age.as_nanos() as i64)
        .map_err(|e| {
            UsageError(format!(
                "{flag} {text}: {e}; give a time like 2026-12-04T18:00:00Z, unix seconds or an age like 90m"
            ))
        })
}

/// One stored reading: the wire's names (`StoredReading`, `DerivedState`)
/// flattened, each with its unit in it; the same names in JSON and CSV.
#[derive(Serialize)]
pub(crate) struct ReadingOut {
    seq: u64,
    time_unix_ns: i64,
    volts: f64,
    amps_charge_positive: Option<f64>,
    temp_c: Option<f64>,
    equilibrium_cell_volts: f64,
    soc_from_model: Option<f64>,
    soc_fused: Option<f64>,
    delta_g_kj_per_mol: Option<f64>,
    ln_q: Option<f64>,
    log10_q: Option<f64>,
    log10_k: f64,
    affinity_ln_k_over_q: Option<f64>,
    state: &'static str,
    charge_ah: f64,
    energy_wh: f64,
    resting: bool,
    out_of_order: bool,
    operating_mode: &'static str,
    ocv_source: &'static str,
    driving_force_v: Option<f64>,
    time_utc: String,
    /// `chemistry`: SOC, ΔG and Q read off the chemistry's model,
    /// uncalibrated for this cell; `cell`: a model of this cell.
    ocv_model: &'static str,
}

impl From<pb::StoredReading> for ReadingOut {
    fn from(r: pb::StoredReading) -> ReadingOut {
        let d = r.derived.unwrap_or_default();
        ReadingOut {
            seq: r.seq,
            time_unix_ns: r.time_unix_ns,
            volts: r.volts,
            amps_charge_positive: r.amps_charge_positive,
            temp_c: r.temp_c,
            equilibrium_cell_volts: d.equilibrium_cell_volts,
            soc_from_model: d.soc_from_model,
            soc_fused: d.soc_fused,
            delta_g_kj_per_mol: d.delta_g_kj_per_mol,
            ln_q: d.ln_q,
            log10_q: d.log10_q,
            log10_k: d.log10_k,
            affinity_ln_k_over_q: d.affinity_ln_k_over_q,
            state: state_name(d.state),
            charge_ah: d.charge_ah,
            energy_wh: d.energy_wh,
            resting: d.resting,
            out_of_order: d.out_of_order,
            operating_mode: mode_name(d.operating_mode),
            ocv_source: ocv_source_name(d.ocv_source),
            driving_force_v: d.driving_force_v,
            time_utc: iso_utc(r.time_unix_ns),
            ocv_model: ocv_model_name(d.ocv_model_basis),
        }
    }
}

impl Row for ReadingOut {
    const CSV_HEADER: &'static [&'static str] = &[
        "seq",
        "time_unix_ns",
        "volts",
        "amps_charge_positive",
        "temp_c",
        "equilibrium_cell_volts",
        "soc_from_model",
        "soc_fused",
        "delta_g_kj_per_mol",
        "ln_q",
        "log10_q",
        "log10_k",
        "affinity_ln_k_over_q",
        "state",
        "charge_ah",
        "energy_wh",
        "resting",
        "out_of_order",
        "operating_mode",
        "ocv_source",
        "driving_force_v",
        "time_utc",
        "ocv_model",
    ];
    const TABLE: &'static [Col] = &[
        Col::right("seq", 8),
        Col::left("time", 29),
        Col::right("V", 9),
        Col::right("A (chg +)", 9),
        Col::right("°C", 7),
        Col::right("SOC %", 7),
        Col::right("ΔG kJ/mol", 11),
        Col::right("log10 Q", 9),
        Col::left("reaction", 11),
        Col::left("mode", 12),
        Col::right("η mV", 8),
    ];
    fn table_cells(&self) -> Vec<String> {
        vec![
            self.seq.to_string(),
            iso(self.time_unix_ns),
            format!("{:.4}", self.volts),
            fixed(self.amps_charge_positive, 3),
            fixed(self.temp_c, 2),
            percent(self.soc_fused, 2),
            fixed(self.delta_g_kj_per_mol, 3),
            fixed(self.log10_q, 3),
            self.state.into(),
            self.operating_mode.into(),
            fixed(self.driving_force_v.map(|v| v * 1e3), 3),
        ]
    }
}

/// One bucket of readings: each statistic named `<quantity>_<stat>`, the
/// quantity as the wire's `Bucket` names it, in the wire's order
/// (min, max, mean, last); empty where no reading in the bucket had it.
#[derive(Serialize)]
pub(crate) struct BucketOut {
    start_unix_ns: i64,
    count: u64,
    volts_min: f64,
    volts_max: f64,
    volts_mean: f64,
    volts_last: f64,
    soc_min: Option<f64>,
    soc_max: Option<f64>,
    soc_mean: Option<f64>,
    soc_last: Option<f64>,
    delta_g_kj_per_mol_min: Option<f64>,
    delta_g_kj_per_mol_max: Option<f64>,
    delta_g_kj_per_mol_mean: Option<f64>,
    delta_g_kj_per_mol_last: Option<f64>,
    equilibrium_cell_volts_min: Option<f64>,
    equilibrium_cell_volts_max: Option<f64>,
    equilibrium_cell_volts_mean: Option<f64>,
    equilibrium_cell_volts_last: Option<f64>,
    driving_force_v_min: Option<f64>,
    driving_force_v_max: Option<f64>,
    driving_force_v_mean: Option<f64>,
    driving_force_v_last: Option<f64>,
    charge_ah_last: f64,
    energy_wh_last: f64,
    charge_ah_delta: Option<f64>,
    energy_wh_delta: Option<f64>,
    run_id: u64,
    start_utc: String,
}

/// A statistic's four values, each none where the bucket has none (or
/// its last reading lacked the value: NaN on the wire).
fn four(s: Option<pb::Stats>) -> [Option<f64>; 4] {
    let finite = |v: f64| v.is_finite().then_some(v);
    match s {
        Some(s) => [s.min, s.max, s.mean, s.last].map(finite),
        None => [None; 4],
    }
}

impl From<&pb::Bucket> for BucketOut {
    fn from(b: &pb::Bucket) -> BucketOut {
        let v = b.volts.unwrap_or_default();
        let [soc_min, soc_max, soc_mean, soc_last] = four(b.soc);
        let [g_min, g_max, g_mean, g_last] = four(b.delta_g_kj_per_mol);
        let [e_min, e_max, e_mean, e_last] = four(b.equilibrium_cell_volts);
        let [d_min, d_max, d_mean, d_last] = four(b.driving_force_v);
        BucketOut {
            start_unix_ns: b.start_unix_ns,
            count: b.count,
            volts_min: v.min,
            volts_max: v.max,
            volts_mean: v.mean,
            volts_last: v.last,
            soc_min,
            soc_max,
            soc_mean,
            soc_last,
            delta_g_kj_per_mol_min: g_min,
            delta_g_kj_per_mol_max: g_max,
            delta_g_kj_per_mol_mean: g_mean,
            delta_g_kj_per_mol_last: g_last,
            equilibrium_cell_volts_min: e_min,
            equilibrium_cell_volts_max: e_max,
            equilibrium_cell_volts_mean: e_mean,
            equilibrium_cell_volts_last: e_last,
            driving_force_v_min: d_min,
            driving_force_v_max: d_max,
            driving_force_v_mean: d_mean,
            driving_force_v_last: d_last,
            charge_ah_last: b.charge_ah_last,
            energy_wh_last: b.energy_wh_last,
            charge_ah_delta: b.charge_ah_delta,
            energy_wh_delta: b.energy_wh_delta,
            run_id: b.run_id,
            start_utc: iso_utc(b.start_unix_ns),
        }
    }
}

impl Row for BucketOut {
    const CSV_HEADER: &'static [&'static str] = &[
        "start_unix_ns",
        "count",
        "volts_min",
        "volts_max",
        "volts_mean",
        "volts_last",
        "soc_min",
        "soc_max",
        "soc_mean",
        "soc_last",
        "delta_g_kj_per_mol_min",
        "delta_g_kj_per_mol_max",
        "delta_g_kj_per_mol_mean",
        "delta_g_kj_per_mol_last",
        "equilibrium_cell_volts_min",
        "equilibrium_cell_volts_max",
        "equilibrium_cell_volts_mean",
        "equilibrium_cell_volts_last",
        "driving_force_v_min",
        "driving_force_v_max",
        "driving_force_v_mean",
        "driving_force_v_last",
        "charge_ah_last",
        "energy_wh_last",
        "charge_ah_delta",
        "energy_wh_delta",
        "run_id",
        "start_utc",
    ];
    const TABLE: &'static [Col] = &[
        Col::left("start", 29),
        Col::right("count", 6),
        Col::right("V min", 9),
        Col::right("V max", 9),
        Col::right("V mean", 9),
        Col::right("SOC % mean", 10),
        Col::right("ΔG kJ/mol mean", 14),
        Col::right("η mV mean", 10),
        Col::right("ΔQ Ah", 10),
    ];
    fn table_cells(&self) -> Vec<String> {
        vec![
            iso(self.start_unix_ns),
            self.count.to_string(),
            format!("{:.4}", self.volts_min),
            format!("{:.4}", self.volts_max),
            format!("{:.4}", self.volts_mean),
            percent(self.soc_mean, 1),
            fixed(self.delta_g_kj_per_mol_mean, 3),
            fixed(self.driving_force_v_mean.map(|v| v * 1e3), 1),
            fixed(self.charge_ah_delta, 4),
        ]
    }
}

/// The asked window in ns; 0 means open at that end.
fn window(args: &ReadingsArgs, now: i64) -> Result<(i64, i64), UsageError> {
    let at = |flag, text: &Option<String>| {
        text.as_deref()
            .map(|s| parse_time(flag, s, now))
            .transpose()
            .map(|t| t.unwrap_or(0))
    };
    Ok((at("--since", &args.since)?, at("--until", &args.until)?))
}

pub(crate) async fn run(args: &ReadingsArgs) -> anyhow::Result<()> {
    let now = client::now_ns();
    let (start, end) = window(args, now)?;
    let mut history = HistoryServiceClient::new(client::connect(&args.connect).await?)
        .max_decoding_message_size(gibbsline::grpc::MAX_MESSAGE_BYTES);
    if let Some(width) = args.bucket {
        let request = pb::QueryBucketsRequest {
            channel_id: args.channel.clone(),
            start_unix_ns: if start == 0 && end == 0 {
                now - DAY_NS
            } else {
                start
            },
            end_unix_ns: if end == 0 { now + DAY_NS } else { end },
            bucket_width_ns: width.as_nanos() as i64,
        };
        let buckets = history
            .query_buckets(request)
            .await
            .map_err(client::status_error)?
            .into_inner()
            .buckets;
        let rows: Vec<BucketOut> = buckets.iter().map(BucketOut::from).collect();
        return output::print_all(&rows, args.format);
    }
    let request = pb::QueryReadingsRequest {
        channel_id: args.channel.clone(),
        start_unix_ns: start,
        end_unix_ns: end,
        // One more than asked: whether the answer stopped at the limit
        // or at the end of the window is then known, not guessed.
        limit: args.limit.saturating_add(1),
        layout: pb::ReadingLayout::Rows as i32,
    };
    let mut stream = history
        .query_readings(request)
        .await
        .map_err(client::status_error)?
        .into_inner();
    let mut rows = Vec::new();
    while let Some(page) = stream.next().await {
        rows.extend(page?.readings.into_iter().map(ReadingOut::from));
    }
    let cut = rows.len() > args.limit as usize;
    rows.truncate(args.limit as usize);
    output::print_all(&rows, args.format)?;
    if args.format == Format::Table {
        eprintln!("{} readings", rows.len());
    }
    if cut {
        // stderr, so a CSV or JSON export stays clean and the shell still
        // shows that it is not the whole window.
        eprintln!(
            "stopped at --limit {}: more readings follow in this window; raise --limit or narrow --since/--until",
            args.limit
        );
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cli::output::derived_csv_header;

    #[test]
    fn since_takes_printed_times_unix_seconds_and_ages() {
        let now = 1_800_000_000_000_000_000;
        // 2026-12-04T18:00:00Z is 1,796,407,200 s after the epoch
        // (GNU coreutils: `date -u -d @1796407200`).
        let want = 1_796_407_200_000_000_000;
        for text in [
            "2026-12-04T18:00:00Z",
            "2026-12-04T19:00:00+01:00",
            "2026-12-04T18:00:00",
            "2026-12-04 18:00:00.000",
            "1796407200",
        ] {
            assert_eq!(parse_time("--since", text, now).ok(), Some(want), "{text}");
        }
        assert_eq!(
            parse_time("--since", "2h", now).ok(),
            Some(now - 7_200_000_000_000)
        );
        let e = parse_time("--since", "yesterday", now).unwrap_err().0;
        assert!(
            e.contains("--since yesterday") && e.contains("2026-12-04T18:00:00Z"),
            "{e}"
        );
    }

    #[test]
    fn csv_headers_name_every_field_in_order() {
        let reading = ReadingOut::from(pb::StoredReading::default());
        assert_eq!(derived_csv_header(&reading), ReadingOut::CSV_HEADER);
        let bucket = BucketOut::from(&pb::Bucket::default());
        assert_eq!(derived_csv_header(&bucket), BucketOut::CSV_HEADER);
    }
}

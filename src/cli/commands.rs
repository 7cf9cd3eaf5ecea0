//! Client commands for people at the rigs: history to a table, CSV or
//! JSON; live state; alerts; channel definitions from a file; cycles; and
//! the simulated rig as its own process.

use super::demo::{kind_name, severity_name, state_name};
use super::{UsageError, client, rig};
use gibbsline::pb;
use gibbsline::pb::alert_service_client::AlertServiceClient;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use serde::Serialize;
use std::path::PathBuf;
use std::time::Duration;
use tokio_stream::StreamExt;

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    Table,
    Csv,
    Json,
}

const DEFAULT_ADDR: &str = "127.0.0.1:50051";

#[derive(Debug, clap::Args)]
pub struct ReadingsArgs {
    #[arg(long, default_value = DEFAULT_ADDR)]
    pub connect: String,
    #[arg(long)]
    pub channel: String,
    /// Start: a unix time in seconds, or an age such as 2h (two hours ago).
    #[arg(long)]
    pub since: Option<String>,
    /// End (exclusive), same forms as --since.
    #[arg(long)]
    pub until: Option<String>,
    /// Downsample into buckets of this width, e.g. 1m, 10s.
    #[arg(long, value_parser = super::parse_duration)]
    pub bucket: Option<Duration>,
    #[arg(long, default_value_t = 100_000)]
    pub limit: u32,
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// Parses `--since`/`--until`: unix seconds (may be fractional) or an age.
pub fn parse_time(flag: &str, text: &str, now_ns: i64) -> Result<i64, UsageError> {
    if let Ok(secs) = text.parse::<f64>()
        && secs.is_finite()
        && secs >= 0.0
    {
        return Ok((secs * 1e9) as i64);
    }
    super::parse_duration(text)
        .map(|age| now_ns - age.as_nanos() as i64)
        .map_err(|e| {
            UsageError(format!(
                "{flag} {text}: {e}; give unix seconds or an age like 90m"
            ))
        })
}

#[derive(Serialize)]
struct ReadingOut {
    seq: u64,
    time_unix_ns: i64,
    volts: f64,
    amps: Option<f64>,
    temp_c: Option<f64>,
    cell_volts_used: f64,
    soc_model: Option<f64>,
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
}

fn opt(v: Option<f64>) -> String {
    v.map(|x| x.to_string()).unwrap_or_default()
}

/// Columns are only ever added at the end: scripts index them.
pub const CSV_HEADER: &str = "seq,time_unix_ns,volts_v,amps_a,temp_c,cell_volts_used_v,soc_model,soc_fused,delta_g_kj_per_mol,ln_q,log10_q,log10_k,affinity_ln_k_over_q,state,charge_ah,energy_wh,resting,out_of_order,operating_mode,ocv_source,driving_force_v";

pub async fn readings(args: &ReadingsArgs) -> anyhow::Result<()> {
    let now = client::now_ns();
    let start = args
        .since
        .as_deref()
        .map(|s| parse_time("--since", s, now))
        .transpose()?
        .unwrap_or(0);
    let end = args
        .until
        .as_deref()
        .map(|s| parse_time("--until", s, now))
        .transpose()?
        .unwrap_or(0);
    let mut history = HistoryServiceClient::new(client::connect(&args.connect).await?)
        .max_decoding_message_size(gibbsline::grpc::MAX_MESSAGE_BYTES);
    if let Some(width) = args.bucket {
        let start = if start == 0 && end == 0 {
            now - 86_400_000_000_000
        } else {
            start
        };
        let r = history
            .query_buckets(pb::QueryBucketsRequest {
                channel_id: args.channel.clone(),
                start_unix_ns: start,
                end_unix_ns: if end == 0 {
                    now + 86_400_000_000_000
                } else {
                    end
                },
                bucket_width_ns: width.as_nanos() as i64,
            })
            .await?
            .into_inner();
        return print_buckets(&r.buckets, args.format);
    }
    let mut stream = history
        .query_readings(pb::QueryReadingsRequest {
            channel_id: args.channel.clone(),
            start_unix_ns: start,
            end_unix_ns: end,
            limit: args.limit,
        })
        .await?
        .into_inner();
    let mut rows = Vec::new();
    while let Some(page) = stream.next().await {
        for r in page?.readings {
            let d = r.derived.unwrap_or_default();
            rows.push(ReadingOut {
                seq: r.seq,
                time_unix_ns: r.time_unix_ns,
                volts: r.volts,
                amps: r.amps,
                temp_c: r.temp_c,
                cell_volts_used: d.cell_volts,
                soc_model: d.soc_model,
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
            });
        }
    }
    match args.format {
        Format::Json => println!("{}", serde_json::to_string(&rows)?),
        Format::Csv => {
            println!("{CSV_HEADER}");
            for r in &rows {
                println!(
                    "{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{}",
                    r.seq,
                    r.time_unix_ns,
                    r.volts,
                    opt(r.amps),
                    opt(r.temp_c),
                    r.cell_volts_used,
                    opt(r.soc_model),
                    opt(r.soc_fused),
                    opt(r.delta_g_kj_per_mol),
                    opt(r.ln_q),
                    opt(r.log10_q),
                    r.log10_k,
                    opt(r.affinity_ln_k_over_q),
                    r.state,
                    r.charge_ah,
                    r.energy_wh,
                    r.resting,
                    r.out_of_order,
                    r.operating_mode,
                    r.ocv_source,
                    opt(r.driving_force_v)
                );
            }
        }
        Format::Table => {
            println!(
                "{:>8} {:>19} {:>9} {:>8} {:>7} {:>7} {:>11} {:>9} {:<11} {:<12} {:>8}",
                "seq",
                "time_unix_ns",
                "volts",
                "amps",
                "°C",
                "SOC %",
                "ΔG kJ/mol",
                "log10 Q",
                "reaction",
                "mode",
                "η mV"
            );
            let shown = |v: Option<f64>, scale: f64| {
                v.map(|x| format!("{:.3}", x * scale))
                    .unwrap_or_else(|| "-".into())
            };
            for r in &rows {
                println!(
                    "{:>8} {:>19} {:>9.4} {:>8.3} {:>7.2} {:>7} {:>11} {:>9} {:<11} {:<12} {:>8}",
                    r.seq,
                    r.time_unix_ns,
                    r.volts,
                    r.amps.unwrap_or(f64::NAN),
                    r.temp_c.unwrap_or(f64::NAN),
                    r.soc_fused
                        .map(|s| format!("{:.2}", s * 100.0))
                        .unwrap_or_else(|| "-".into()),
                    shown(r.delta_g_kj_per_mol, 1.0),
                    shown(r.log10_q, 1.0),
                    r.state,
                    r.operating_mode,
                    shown(r.driving_force_v, 1e3)
                );
            }
            eprintln!("{} readings", rows.len());
        }
    }
    Ok(())
}

fn print_buckets(buckets: &[pb::Bucket], format: Format) -> anyhow::Result<()> {
    #[derive(Serialize)]
    struct B {
        start_unix_ns: i64,
        count: u64,
        volts_min: f64,
        volts_max: f64,
        volts_mean: f64,
        volts_last: f64,
        soc_mean: Option<f64>,
        soc_last: Option<f64>,
        delta_g_mean_kj_per_mol: f64,
    }
    let rows: Vec<B> = buckets
        .iter()
        .map(|b| {
            let v = b.volts.unwrap_or_default();
            B {
                start_unix_ns: b.start_unix_ns,
                count: b.count,
                volts_min: v.min,
                volts_max: v.max,
                volts_mean: v.mean,
                volts_last: v.last,
                soc_mean: b.soc.map(|s| s.mean),
                soc_last: b.soc.map(|s| s.last),
                delta_g_mean_kj_per_mol: b.delta_g_kj_per_mol.unwrap_or_default().mean,
            }
        })
        .collect();
    match format {
        Format::Json => println!("{}", serde_json::to_string(&rows)?),
        Format::Csv => {
            println!(
                "start_unix_ns,count,volts_min_v,volts_max_v,volts_mean_v,volts_last_v,soc_mean,soc_last,delta_g_mean_kj_per_mol"
            );
            for b in &rows {
                println!(
                    "{},{},{},{},{},{},{},{},{}",
                    b.start_unix_ns,
                    b.count,
                    b.volts_min,
                    b.volts_max,
                    b.volts_mean,
                    b.volts_last,
                    opt(b.soc_mean),
                    opt(b.soc_last),
                    b.delta_g_mean_kj_per_mol
                );
            }
        }
        Format::Table => {
            println!(
                "{:>19} {:>6} {:>9} {:>9} {:>9} {:>7} {:>11}",
                "start_unix_ns", "count", "V min", "V mean", "V max", "SOC %", "ΔG kJ/mol"
            );
            for b in &rows {
                println!(
                    "{:>19} {:>6} {:>9.4} {:>9.4} {:>9.4} {:>7} {:>11.3}",
                    b.start_unix_ns,
                    b.count,
                    b.volts_min,
                    b.volts_mean,
                    b.volts_max,
                    b.soc_mean
                        .map(|s| format!("{:.1}", s * 100.0))
                        .unwrap_or_else(|| "-".into()),
                    b.delta_g_mean_kj_per_mol
                );
            }
        }
    }
    Ok(())
}

#[derive(Debug, clap::Args)]
pub struct StateArgs {
    #[arg(long, default_value = DEFAULT_ADDR)]
    pub connect: String,
    /// One channel; all when omitted.
    #[arg(long)]
    pub channel: Option<String>,
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// Every channel, following ListChannels pages.
async fn all_channels(channel: &client::Conn) -> anyhow::Result<Vec<pb::Channel>> {
    let mut client = ChannelServiceClient::new(channel.clone());
    let mut out = Vec::new();
    let mut page_token = String::new();
    loop {
        let page = client
            .list_channels(pb::ListChannelsRequest {
                page_size: 0,
                page_token,
            })
            .await?
            .into_inner();
        out.extend(page.channels);
        if page.next_page_token.is_empty() {
            return Ok(out);
        }
        page_token = page.next_page_token;
    }
}

/// The operating mode's name, as JSON and tables show it.
pub fn mode_name(code: i32) -> &'static str {
    match pb::OperatingMode::try_from(code) {
        Ok(pb::OperatingMode::Charge) => "charge",
        Ok(pb::OperatingMode::Discharge) => "discharge",
        Ok(pb::OperatingMode::Rest) => "rest",
        Ok(pb::OperatingMode::Electrolysis) => "electrolysis",
        Ok(pb::OperatingMode::FuelCell) => "fuel_cell",
        Ok(pb::OperatingMode::OpenCircuit) => "open_circuit",
        _ => "no current",
    }
}

pub fn ocv_source_name(code: i32) -> &'static str {
    match pb::OcvSource::try_from(code) {
        Ok(pb::OcvSource::Terminal) => "terminal",
        Ok(pb::OcvSource::Rest) => "rest",
        Ok(pb::OcvSource::OhmicCompensated) => "ohmic_compensated",
        Ok(pb::OcvSource::CountedSoc) => "counted_soc",
        Ok(pb::OcvSource::Reversible) => "reversible",
        Ok(pb::OcvSource::None) => "none",
        _ => "unspecified",
    }
}

/// ΔG, Q and the driving force of one reading, or why they are absent.
fn thermo_text(d: &pb::DerivedState) -> String {
    let eta = d
        .driving_force_v
        .map(|v| format!("; driving force {:+.1} mV/cell", v * 1e3))
        .unwrap_or_default();
    match (d.delta_g_kj_per_mol, d.log10_q) {
        (Some(dg), Some(q)) => format!(
            "ΔG {dg:.3} kJ/mol at E_eq {:.4} V ({}); log10 Q {q:.3} vs log10 K {:.3}{eta}",
            d.cell_volts,
            ocv_source_name(d.ocv_source),
            d.log10_k
        ),
        _ => {
            format!("ΔG and Q unknown under current (no rest, resistance or anchored SOC yet){eta}")
        }
    }
}

fn breach_text(code: i32) -> &'static str {
    match pb::BoundBreach::try_from(code) {
        Ok(pb::BoundBreach::Reversible) => {
            " [IMPOSSIBLE: beyond the reversible voltage; check sign, cell count, voltage]"
        }
        Ok(pb::BoundBreach::Thermoneutral) => {
            " [below thermoneutral: HHV efficiency over 100 %, heat drawn in]"
        }
        _ => "",
    }
}

fn hydrogen_text(h: &pb::HydrogenFigures) -> String {
    let pct = |v: Option<f64>| {
        v.map(|x| format!("{:.1} %", x * 100.0))
            .unwrap_or_else(|| "-".into())
    };
    format!(
        "E_rev {:.4} V, E_tn {:.4} V (HHV) / {:.4} V (LHV), overpotential {:.3} V{}; efficiency {} HHV, {} LHV; H2 {:.4} NL/min ({:.3e} kg/h){}; heat {:.1} W{}",
        h.reversible_v,
        h.thermoneutral_hhv_v,
        h.thermoneutral_lhv_v,
        h.overpotential_v,
        h.overpotential_ir_free_v
            .map(|v| format!(" ({v:.3} V iR-free)"))
            .unwrap_or_default(),
        pct(h.voltage_efficiency_hhv),
        pct(h.voltage_efficiency_lhv),
        h.h2_rate_normal_litres_per_min,
        h.h2_rate_kg_per_h,
        h.specific_energy_kwh_per_kg
            .map(|k| format!(", {k:.1} kWh/kg"))
            .unwrap_or_default(),
        h.heat_w,
        breach_text(h.breach)
    )
}

fn hydrogen_json(h: &pb::HydrogenFigures) -> serde_json::Value {
    serde_json::json!({
        "reversible_v": h.reversible_v,
        "thermoneutral_hhv_v": h.thermoneutral_hhv_v,
        "thermoneutral_lhv_v": h.thermoneutral_lhv_v,
        "overpotential_v": h.overpotential_v,
        "overpotential_ir_free_v": h.overpotential_ir_free_v,
        "voltage_efficiency_hhv": h.voltage_efficiency_hhv,
        "voltage_efficiency_lhv": h.voltage_efficiency_lhv,
        "heat_w": h.heat_w,
        "h2_rate_mol_per_s": h.h2_rate_mol_per_s,
        "h2_rate_normal_litres_per_min": h.h2_rate_normal_litres_per_min,
        "h2_rate_kg_per_h": h.h2_rate_kg_per_h,
        "specific_energy_kwh_per_kg": h.specific_energy_kwh_per_kg,
        "current_density_a_per_cm2": h.current_density_a_per_cm2,
        "area_specific_resistance_ohm_cm2": h.area_specific_resistance_ohm_cm2,
        "breach": match pb::BoundBreach::try_from(h.breach) {
            Ok(pb::BoundBreach::Reversible) => Some("reversible"),
            Ok(pb::BoundBreach::Thermoneutral) => Some("thermoneutral"),
            _ => None,
        },
    })
}

pub async fn state(args: &StateArgs) -> anyhow::Result<()> {
    let channel = client::connect(&args.connect).await?;
    let ids = match &args.channel {
        Some(id) => vec![id.clone()],
        None => all_channels(&channel)
            .await?
            .into_iter()
            .map(|c| c.channel_id)
            .collect(),
    };
    let mut history = HistoryServiceClient::new(channel);
    let mut out = Vec::new();
    for id in ids {
        let s = history
            .get_channel_state(pb::GetChannelStateRequest {
                channel_id: id.clone(),
            })
            .await?
            .into_inner();
        out.push((id, s));
    }
    if args.format == Format::Json {
        let json: Vec<_> = out
            .iter()
            .map(|(id, s)| {
                let latest = s.latest.as_ref();
                let d = latest.and_then(|r| r.derived.as_ref());
                let e = s.estimator.as_ref();
                serde_json::json!({
                    "channel_id": id,
                    "chemistry_id": s.channel.as_ref().map(|c| c.chemistry_id.clone()),
                    "seq": latest.map(|r| r.seq),
                    "time_unix_ns": latest.map(|r| r.time_unix_ns),
                    "volts": latest.map(|r| r.volts),
                    "amps": latest.and_then(|r| r.amps),
                    "temp_c": latest.and_then(|r| r.temp_c),
                    "soc_fused": d.and_then(|d| d.soc_fused),
                    "soc_model": d.and_then(|d| d.soc_model),
                    "delta_g_kj_per_mol": d.and_then(|d| d.delta_g_kj_per_mol),
                    "log10_q": d.and_then(|d| d.log10_q),
                    "ocv_source": d.map(|d| ocv_source_name(d.ocv_source)),
                    "driving_force_v": d.and_then(|d| d.driving_force_v),
                    "hydrogen": d.and_then(|d| d.hydrogen.as_ref()).map(hydrogen_json),
                    "log10_k": d.map(|d| d.log10_k),
                    "state": d.map(|d| state_name(d.state)),
                    "operating_mode": d.map(|d| mode_name(d.operating_mode)),
                    "soc_counted_unclamped": d.and_then(|d| d.soc_counted_unclamped),
                    "charge_ah": d.map(|d| d.charge_ah),
                    "energy_wh": d.map(|d| d.energy_wh),
                    "resistance_ohm": e.and_then(|e| e.resistance_ohm),
                    "hydrogen_mol": e.and_then(|e| e.hydrogen_mol),
                })
            })
            .collect();
        println!("{}", serde_json::to_string_pretty(&json)?);
        return Ok(());
    }
    for (id, s) in out {
        let chem = s
            .channel
            .as_ref()
            .map(|c| c.chemistry_id.as_str())
            .unwrap_or("?");
        let Some(r) = s.latest else {
            println!("{id} ({chem}): no readings yet");
            continue;
        };
        let d = r.derived.unwrap_or_default();
        println!(
            "{id} ({chem}) seq {}: {}; {:.4} V, {} A, {} °C; SOC {}; {}; reaction {}",
            r.seq,
            mode_name(d.operating_mode),
            r.volts,
            r.amps
                .map(|a| format!("{a:.3}"))
                .unwrap_or_else(|| "-".into()),
            r.temp_c
                .map(|t| format!("{t:.2}"))
                .unwrap_or_else(|| "-".into()),
            d.soc_fused
                .map(|x| format!("{:.1} %", x * 100.0))
                .unwrap_or_else(|| "unknown".into()),
            thermo_text(&d),
            state_name(d.state)
        );
        if let Some(h) = &d.hydrogen {
            println!("    {}", hydrogen_text(h));
        }
        if let Some(e) = s.estimator {
            let r_text = e
                .resistance_ohm
                .map(|r| format!("{:.4} Ω ({})", r, e.resistance_source))
                .unwrap_or_else(|| "unknown".into());
            println!(
                "    charge {:.4} Ah, energy {:.4} Wh, R {r_text}, gaps {}",
                d.charge_ah, d.energy_wh, e.gaps
            );
            if let (Some(mol), Some(l)) = (e.hydrogen_mol, e.hydrogen_normal_litres) {
                println!(
                    "    hydrogen {:.5} mol ({:.3} NL){}",
                    mol,
                    l,
                    e.specific_energy_kwh_per_kg_h2
                        .map(|k| format!(", {k:.1} kWh/kg"))
                        .unwrap_or_default()
                );
            }
        }
    }
    Ok(())
}

#[derive(Debug, clap::Subcommand)]
pub enum AlertsCommand {
    /// Stream alerts as they happen; reconnects and resumes by itself.
    Watch {
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
        /// Resume after this event id (0 replays everything stored).
        #[arg(long, default_value_t = 0)]
        after: u64,
        #[arg(long)]
        channel: Option<String>,
        #[arg(long, value_enum, default_value_t = MinSeverity::Info)]
        min_severity: MinSeverity,
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
    /// Acknowledge an alert.
    Ack {
        id: u64,
        #[arg(long)]
        by: String,
        #[arg(long, default_value = "")]
        note: String,
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
    },
    /// List stored alerts.
    List {
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
        #[arg(long)]
        channel: Option<String>,
        #[arg(long)]
        active: bool,
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum MinSeverity {
    Info,
    Warning,
    Critical,
}

fn alert_line(a: &pb::Alert) -> String {
    format!(
        "#{:<5} {:<8} {:<14} {:<19} seq {:<8} {}{}{}",
        a.alert_id,
        severity_name(a.severity),
        a.channel_id,
        kind_name(a.kind),
        a.raised_seq,
        a.message,
        if a.cleared_unix_ns.is_some() {
            " [cleared]"
        } else {
            ""
        },
        a.acknowledged_by
            .as_ref()
            .map(|b| format!(" [ack: {b}]"))
            .unwrap_or_default()
    )
}

fn alert_json(a: &pb::Alert) -> serde_json::Value {
    serde_json::json!({
        "alert_id": a.alert_id, "channel_id": a.channel_id, "kind": kind_name(a.kind),
        "severity": severity_name(a.severity).to_lowercase(), "raised_unix_ns": a.raised_unix_ns,
        "raised_seq": a.raised_seq, "trigger_value": a.trigger_value, "threshold": a.threshold,
        "unit": a.unit, "message": a.message, "seconds_to_target": a.seconds_to_target,
        "cleared_unix_ns": a.cleared_unix_ns, "acknowledged_by": a.acknowledged_by,
    })
}

pub async fn alerts(cmd: &AlertsCommand) -> anyhow::Result<()> {
    match cmd {
        AlertsCommand::Ack {
            id,
            by,
            note,
            connect,
        } => {
            let mut c = AlertServiceClient::new(client::connect(connect).await?);
            let a = c
                .acknowledge_alert(pb::AcknowledgeAlertRequest {
                    alert_id: *id,
                    acknowledged_by: by.clone(),
                    note: note.clone(),
                })
                .await
                .map_err(|s| UsageError(format!("alert {id}: {}", s.message())))?
                .into_inner()
                .alert
                .unwrap_or_default();
            println!("{}", alert_line(&a));
            Ok(())
        }
        AlertsCommand::List {
            connect,
            channel,
            active,
            format,
        } => {
            let mut c = AlertServiceClient::new(client::connect(connect).await?);
            let mut after = 0;
            loop {
                let page = c
                    .list_alerts(pb::ListAlertsRequest {
                        channel_id: channel.clone().unwrap_or_default(),
                        active_only: *active,
                        after_id: after,
                        limit: 1000,
                        ..Default::default()
                    })
                    .await?
                    .into_inner();
                for a in &page.alerts {
                    match format {
                        Format::Json => println!("{}", alert_json(a)),
                        _ => println!("{}", alert_line(a)),
                    }
                }
                if page.next_after_id == 0 {
                    return Ok(());
                }
                after = page.next_after_id;
            }
        }
        AlertsCommand::Watch {
            connect,
            after,
            channel,
            min_severity,
            format,
        } => {
            let mut last = *after;
            let severity = match min_severity {
                MinSeverity::Info => pb::Severity::Info,
                MinSeverity::Warning => pb::Severity::Warning,
                MinSeverity::Critical => pb::Severity::Critical,
            } as i32;
            loop {
                let channel_conn = match client::connect(connect).await {
                    Ok(c) => c,
                    Err(e) => {
                        eprintln!("{e}; retrying in 2 s");
                        tokio::time::sleep(Duration::from_secs(2)).await;
                        continue;
                    }
                };
                let mut c = AlertServiceClient::new(channel_conn);
                let stream = c
                    .watch_alerts(pb::WatchAlertsRequest {
                        after_id: last,
                        channel_id: channel.clone().unwrap_or_default(),
                        min_severity: severity,
                    })
                    .await;
                let mut stream = match stream {
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
                        Ok(m) => {
                            if m.resume_after_id > 0 {
                                last = m.resume_after_id;
                            }
                            let verb = match pb::AlertEventKind::try_from(m.event) {
                                Ok(pb::AlertEventKind::Raised) => "raised",
                                Ok(pb::AlertEventKind::Cleared) => "cleared",
                                Ok(pb::AlertEventKind::Acknowledged) => "acknowledged",
                                Ok(pb::AlertEventKind::Live) => {
                                    if *format == Format::Table {
                                        eprintln!("-- live (resume point {last}) --");
                                    }
                                    continue;
                                }
                                _ => continue,
                            };
                            if let Some(a) = m.alert {
                                match format {
                                    Format::Json => {
                                        let mut v = alert_json(&a);
                                        v["event"] = verb.into();
                                        v["resume_after_id"] = m.resume_after_id.into();
                                        println!("{v}");
                                    }
                                    _ => println!("{verb:<12} {}", alert_line(&a)),
                                }
                            }
                        }
                        Err(s) => {
                            eprintln!("watch: {}; resuming after {last}", s.message());
                            break;
                        }
                    }
                }
                tokio::time::sleep(Duration::from_secs(1)).await;
            }
        }
    }
}

#[derive(Debug, clap::Subcommand)]
pub enum ChannelsCommand {
    /// Create or replace the channels of a TOML file ([[channel]] tables).
    Put {
        file: PathBuf,
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
    },
    List {
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
        #[arg(long, value_enum, default_value_t = Format::Table)]
        format: Format,
    },
    Get {
        id: String,
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
    },
    /// Anchor a channel's coulomb count at an SOC you know (operator role).
    SetSoc {
        id: String,
        /// 0–1.
        #[arg(long)]
        soc: f64,
        #[arg(long)]
        by: String,
        #[arg(long, default_value = "")]
        note: String,
        #[arg(long, default_value = DEFAULT_ADDR)]
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
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
    },
}

#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct ChannelsFile {
    channel: Vec<gibbsline::config::ChannelEntry>,
}

fn print_channel(c: &pb::Channel) {
    println!(
        "{:<16} {:<16} cells {:<3} {:>6.2} Ah  window {:.3}–{:.3} V/cell  run {}  {}",
        c.channel_id,
        c.chemistry_id,
        c.cells_in_series,
        c.capacity_ah,
        c.min_volts,
        c.max_volts,
        c.run_id,
        c.description
    );
}

pub async fn channels(cmd: &ChannelsCommand) -> anyhow::Result<()> {
    match cmd {
        ChannelsCommand::Put { file, connect } => {
            let text = std::fs::read_to_string(file)
                .map_err(|e| UsageError(format!("{}: {e}", file.display())))?;
            let parsed: ChannelsFile = toml::from_str(&text).map_err(|e| {
                UsageError(format!(
                    "{}: {}",
                    file.display(),
                    e.to_string().replace('\n', " ")
                ))
            })?;
            let conn = client::connect(connect).await?;
            let mut c = ChannelServiceClient::new(conn.clone());
            let mut alerts = AlertServiceClient::new(conn);
            for entry in parsed.channel {
                let r = c
                    .put_channel(pb::PutChannelRequest {
                        channel: Some(gibbsline::grpc::convert::channel_to_pb(&entry.def, 0)),
                    })
                    .await
                    .map_err(|s| {
                        UsageError(format!(
                            "{}: channel {:?}: {}",
                            file.display(),
                            entry.def.channel_id,
                            s.message()
                        ))
                    })?
                    .into_inner();
                if let Some(rules) = entry.rules {
                    let pb_rules = gibbsline::grpc::convert::rules_to_pb(&rules);
                    alerts
                        .put_alert_rules(pb::PutAlertRulesRequest {
                            channel_id: entry.def.channel_id.clone(),
                            rules: Some(pb_rules),
                        })
                        .await
                        .map_err(|s| {
                            UsageError(format!(
                                "{}: rules of {:?}: {}",
                                file.display(),
                                entry.def.channel_id,
                                s.message()
                            ))
                        })?;
                }
                let ch = r.channel.unwrap_or_default();
                println!(
                    "{} {}",
                    if r.new_run { "new run " } else { "updated " },
                    ch.channel_id
                );
            }
            Ok(())
        }
        ChannelsCommand::List { connect, format } => {
            let channels = all_channels(&client::connect(connect).await?).await?;
            for c in &channels {
                match format {
                    Format::Json => println!(
                        "{}",
                        serde_json::json!({"channel_id": c.channel_id, "chemistry_id": c.chemistry_id, "cells_in_series": c.cells_in_series, "capacity_ah": c.capacity_ah, "run_id": c.run_id})
                    ),
                    _ => print_channel(c),
                }
            }
            Ok(())
        }
        ChannelsCommand::Get { id, connect } => {
            let c = ChannelServiceClient::new(client::connect(connect).await?)
                .get_channel(pb::GetChannelRequest {
                    channel_id: id.clone(),
                })
                .await
                .map_err(|s| UsageError(s.message().to_string()))?
                .into_inner()
                .channel
                .unwrap_or_default();
            print_channel(&c);
            Ok(())
        }
        ChannelsCommand::SetSoc {
            id,
            soc,
            by,
            note,
            connect,
        } => {
            let r = ChannelServiceClient::new(client::connect(connect).await?)
                .set_channel_soc(pb::SetChannelSocRequest {
                    channel_id: id.clone(),
                    soc: *soc,
                    set_by: by.clone(),
                    note: note.clone(),
                })
                .await
                .map_err(|s| UsageError(s.message().to_string()))?
                .into_inner();
            println!(
                "{id}: SOC {} from time_unix_ns {} on, counted from there",
                r.soc, r.time_unix_ns
            );
            Ok(())
        }
        ChannelsCommand::ResetTimeline {
            id,
            after_seq,
            connect,
        } => {
            let r = ChannelServiceClient::new(client::connect(connect).await?)
                .reset_timeline(pb::ResetTimelineRequest {
                    channel_id: id.clone(),
                    after_seq: *after_seq,
                })
                .await
                .map_err(|s| UsageError(s.message().to_string()))?
                .into_inner();
            println!(
                "{id}: readings after seq {} (time_unix_ns {}) count as fresh again",
                r.last_stored_seq, r.time_unix_ns
            );
            Ok(())
        }
    }
}

#[derive(Debug, clap::Args)]
pub struct CyclesArgs {
    #[arg(long, default_value = DEFAULT_ADDR)]
    pub connect: String,
    #[arg(long)]
    pub channel: String,
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

pub async fn cycles(args: &CyclesArgs) -> anyhow::Result<()> {
    let r = HistoryServiceClient::new(client::connect(&args.connect).await?)
        .list_cycles(pb::ListCyclesRequest {
            channel_id: args.channel.clone(),
        })
        .await
        .map_err(|s| UsageError(s.message().to_string()))?
        .into_inner();
    let pct = |v: Option<f64>| {
        v.map(|x| format!("{:.1}", x * 100.0))
            .unwrap_or_else(|| "-".into())
    };
    if args.format == Format::Table {
        println!(
            "{:>5} {:>9} {:>9} {:>9} {:>9} {:>6} {:>6} {:>6}",
            "cycle", "Ah in", "Ah out", "Wh in", "Wh out", "CE %", "EE %", "VE %"
        );
    }
    for c in &r.cycles {
        match args.format {
            Format::Table => println!(
                "{:>5} {:>9.4} {:>9.4} {:>9.4} {:>9.4} {:>6} {:>6} {:>6}",
                c.index,
                c.charge_in_ah,
                c.charge_out_ah,
                c.energy_in_wh,
                c.energy_out_wh,
                pct(c.coulombic_efficiency),
                pct(c.energy_efficiency),
                pct(c.voltage_efficiency)
            ),
            _ => println!(
                "{}",
                serde_json::json!({"run_id": c.run_id, "index": c.index, "charge_in_ah": c.charge_in_ah, "charge_out_ah": c.charge_out_ah, "energy_in_wh": c.energy_in_wh, "energy_out_wh": c.energy_out_wh, "coulombic_efficiency": c.coulombic_efficiency, "energy_efficiency": c.energy_efficiency, "voltage_efficiency": c.voltage_efficiency})
            ),
        }
    }
    Ok(())
}

#[derive(Debug, clap::Subcommand)]
pub enum RigCommand {
    /// Stream the simulated bench to a server; resumes after restarts.
    Simulate {
        #[arg(long, default_value = DEFAULT_ADDR)]
        connect: String,
        /// How many simulated channels (the bench's four, repeated).
        #[arg(long, default_value_t = 4)]
        channels: usize,
        #[arg(long, default_value_t = 60.0)]
        speed: f64,
        /// Stop after this long (default: run until Ctrl-C).
        #[arg(long, value_parser = super::parse_duration)]
        duration: Option<Duration>,
    },
}

pub async fn rig_cmd(cmd: &RigCommand) -> anyhow::Result<()> {
    let RigCommand::Simulate {
        connect,
        channels,
        speed,
        duration,
    } = cmd;
    if *channels == 0 || *channels > 10_000 {
        return Err(UsageError(format!("--channels {channels}: must be from 1 to 10000")).into());
    }
    if !(speed.is_finite() && *speed > 0.0 && *speed <= 10_000.0) {
        return Err(UsageError(format!(
            "--speed {speed}: must be above 0 and at most 10000"
        ))
        .into());
    }
    let sim = rig::harbour_lane(*channels, 11);
    rig::define_channels(connect, &sim).await?;
    let stats = std::sync::Arc::new(rig::RigStats::default());
    let stop = stats.clone();
    tokio::spawn(async move {
        let _ = tokio::signal::ctrl_c().await;
        stop.stop.store(true, std::sync::atomic::Ordering::Relaxed);
    });
    let opts = rig::RigOptions {
        speed: *speed,
        readings_per_sim_s: 1.0,
        duration: *duration,
        quiet: false,
    };
    rig::run(connect.clone(), sim, opts, stats.clone()).await?;
    use std::sync::atomic::Ordering::Relaxed;
    println!(
        "rig: {} readings sent, {} acknowledged, {} reconnects",
        stats.sent.load(Relaxed),
        stats.acked.load(Relaxed),
        stats.reconnects.load(Relaxed)
    );
    Ok(())
}

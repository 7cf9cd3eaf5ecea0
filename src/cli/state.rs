//! `gibbsline state`: each channel's latest reading, what it means, and
//! the estimator's view, as prose or JSON.

use super::DEFAULT_ADDR;
use super::client;
use super::names::{breach_name, mode_name, ocv_model_name, ocv_source_name, state_name};
use super::output::{self, Col, Row, TableOrJson, percent};
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use serde::Serialize;

#[derive(Debug, clap::Args)]
pub(crate) struct StateArgs {
    /// The server, host:port.
    #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
    pub connect: String,
    /// One channel; all when omitted.
    #[arg(long)]
    pub channel: Option<String>,
    /// A state is prose with nested figures: a table or JSON, no CSV.
    #[arg(long, value_enum, default_value_t = TableOrJson::Table)]
    pub format: TableOrJson,
}

/// An electrolyser's or fuel cell's figures at its latest reading.
#[derive(Serialize)]
struct HydrogenOut {
    reversible_v: f64,
    thermoneutral_hhv_v: f64,
    thermoneutral_lhv_v: f64,
    overpotential_v: f64,
    overpotential_ir_free_v: Option<f64>,
    voltage_efficiency_hhv: Option<f64>,
    voltage_efficiency_lhv: Option<f64>,
    heat_w: f64,
    h2_rate_mol_per_s: f64,
    h2_rate_normal_litres_per_min: f64,
    h2_rate_kg_per_h: f64,
    specific_energy_kwh_per_kg: Option<f64>,
    current_density_a_per_cm2: Option<f64>,
    area_specific_resistance_ohm_cm2: Option<f64>,
    breach: Option<&'static str>,
}

impl From<&pb::HydrogenFigures> for HydrogenOut {
    fn from(h: &pb::HydrogenFigures) -> HydrogenOut {
        HydrogenOut {
            reversible_v: h.reversible_v,
            thermoneutral_hhv_v: h.thermoneutral_hhv_v,
            thermoneutral_lhv_v: h.thermoneutral_lhv_v,
            overpotential_v: h.overpotential_v,
            overpotential_ir_free_v: h.overpotential_ir_free_v,
            voltage_efficiency_hhv: h.voltage_efficiency_hhv,
            voltage_efficiency_lhv: h.voltage_efficiency_lhv,
            heat_w: h.heat_w,
            h2_rate_mol_per_s: h.h2_rate_mol_per_s,
            h2_rate_normal_litres_per_min: h.h2_rate_normal_litres_per_min,
            h2_rate_kg_per_h: h.h2_rate_kg_per_h,
            specific_energy_kwh_per_kg: h.specific_energy_kwh_per_kg,
            current_density_a_per_cm2: h.current_density_a_per_cm2,
            area_specific_resistance_ohm_cm2: h.area_specific_resistance_ohm_cm2,
            breach: breach_name(h.breach),
        }
    }
}

/// One channel's state. JSON is these fields; the table is prose.
#[derive(Serialize)]
struct StateOut {
    channel_id: String,
    chemistry_id: Option<String>,
    seq: Option<u64>,
    time_unix_ns: Option<i64>,
    volts: Option<f64>,
    amps_charge_positive: Option<f64>,
    temp_c: Option<f64>,
    soc_fused: Option<f64>,
    soc_from_model: Option<f64>,
    delta_g_kj_per_mol: Option<f64>,
    log10_q: Option<f64>,
    ocv_source: Option<&'static str>,
    driving_force_v: Option<f64>,
    hydrogen: Option<HydrogenOut>,
    log10_k: Option<f64>,
    state: Option<&'static str>,
    operating_mode: Option<&'static str>,
    soc_counted_unclamped: Option<f64>,
    charge_ah: Option<f64>,
    energy_wh: Option<f64>,
    resistance_ohm: Option<f64>,
    hydrogen_mol: Option<f64>,
    #[serde(skip)]
    prose: Vec<String>,
}

impl StateOut {
    fn new(channel_id: String, s: &pb::GetChannelStateResponse) -> StateOut {
        let latest = s.latest.as_ref();
        let d = latest.and_then(|r| r.derived.as_ref());
        let e = s.estimator.as_ref();
        StateOut {
            chemistry_id: s.channel.as_ref().map(|c| c.chemistry_id.clone()),
            seq: latest.map(|r| r.seq),
            time_unix_ns: latest.map(|r| r.time_unix_ns),
            volts: latest.map(|r| r.volts),
            amps_charge_positive: latest.and_then(|r| r.amps_charge_positive),
            temp_c: latest.and_then(|r| r.temp_c),
            soc_fused: d.and_then(|d| d.soc_fused),
            soc_from_model: d.and_then(|d| d.soc_from_model),
            delta_g_kj_per_mol: d.and_then(|d| d.delta_g_kj_per_mol),
            log10_q: d.and_then(|d| d.log10_q),
            ocv_source: d.map(|d| ocv_source_name(d.ocv_source)),
            driving_force_v: d.and_then(|d| d.driving_force_v),
            hydrogen: d.and_then(|d| d.hydrogen.as_ref()).map(HydrogenOut::from),
            log10_k: d.map(|d| d.log10_k),
            state: d.map(|d| state_name(d.state)),
            operating_mode: d.map(|d| mode_name(d.operating_mode)),
            soc_counted_unclamped: d.and_then(|d| d.soc_counted_unclamped),
            charge_ah: d.map(|d| d.charge_ah),
            energy_wh: d.map(|d| d.energy_wh),
            resistance_ohm: e.and_then(|e| e.resistance_ohm),
            hydrogen_mol: e.and_then(|e| e.hydrogen_mol),
            prose: prose(&channel_id, s),
            channel_id,
        }
    }
}

impl Row for StateOut {
    const CSV_HEADER: &'static [&'static str] = &[];
    const TABLE: &'static [Col] = &[];
    fn table_cells(&self) -> Vec<String> {
        self.prose.clone()
    }
}

/// The state for people: a headline, then indented detail lines.
fn prose(id: &str, s: &pb::GetChannelStateResponse) -> Vec<String> {
    let chem = s
        .channel
        .as_ref()
        .map(|c| c.chemistry_id.as_str())
        .unwrap_or("?");
    let Some(r) = &s.latest else {
        return vec![format!("{id} ({chem}): no readings yet")];
    };
    let d = r.derived.clone().unwrap_or_default();
    let mut lines = vec![format!(
        "{id} ({chem}) seq {} at {}: {}; {:.4} V, {} A, {} °C; SOC {}; {}; reaction {}",
        r.seq,
        super::time::iso(r.time_unix_ns),
        mode_name(d.operating_mode),
        r.volts,
        output::fixed(r.amps_charge_positive, 3),
        output::fixed(r.temp_c, 2),
        d.soc_fused
            .map(|_| format!("{} %{}", percent(d.soc_fused, 1), uncalibrated(&d)))
            .unwrap_or_else(|| "unknown".into()),
        thermo_text(&d),
        state_name(d.state)
    )];
    if let Some(h) = &d.hydrogen {
        lines.push(format!("    {}", hydrogen_text(h)));
    }
    if let Some(e) = &s.estimator {
        lines.extend(estimator_lines(&d, e));
    }
    lines
}

fn estimator_lines(d: &pb::DerivedState, e: &pb::EstimatorState) -> Vec<String> {
    let r_text = e
        .resistance_ohm
        .map(|r| {
            format!(
                "{:.4} Ω ({})",
                r,
                resistance_source_text(&e.resistance_source)
            )
        })
        .unwrap_or_else(|| "unknown".into());
    let mut lines = vec![format!(
        "    charge {:.4} Ah, energy {:.4} Wh, R {r_text}, gaps {}",
        d.charge_ah, d.energy_wh, e.gaps
    )];
    if let (Some(mol), Some(l)) = (e.hydrogen_mol, e.hydrogen_normal_litres) {
        lines.push(format!(
            "    hydrogen {:.5} mol ({:.3} NL){}",
            mol,
            l,
            e.specific_energy_kwh_per_kg_h2
                .map(|k| format!(", {k:.1} kWh/kg"))
                .unwrap_or_default()
        ));
    }
    lines
}

/// Where the resistance in use came from, in words.
fn resistance_source_text(source: &str) -> &str {
    match source {
        "current_step" => "measured from current steps",
        "configured" => "configured",
        other => other,
    }
}

/// Said beside SOC read off a chemistry's model that was not fitted to the
/// cell: built-in models are tens of mV off real cells.
fn uncalibrated(d: &pb::DerivedState) -> &'static str {
    if ocv_model_name(d.ocv_model_basis) == "chemistry" {
        " (uncalibrated: the chemistry's OCV model; `channels fit-ocv`)"
    } else {
        ""
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
            d.equilibrium_cell_volts,
            ocv_source_name(d.ocv_source),
            d.log10_k
        ),
        _ => {
            format!("ΔG and Q unknown under current (no rest, resistance or anchored SOC yet){eta}")
        }
    }
}

fn breach_text(code: i32) -> &'static str {
    match breach_name(code) {
        Some("reversible") => {
            " [IMPOSSIBLE: beyond the reversible voltage; check sign, cell count, voltage]"
        }
        Some(_) => " [below thermoneutral: HHV efficiency over 100 %, heat drawn in]",
        None => "",
    }
}

fn hydrogen_text(h: &pb::HydrogenFigures) -> String {
    let pct = |v: Option<f64>| format!("{} %", percent(v, 1));
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

pub(crate) async fn run(args: &StateArgs) -> anyhow::Result<()> {
    let conn = client::connect(&args.connect).await?;
    let ids = match &args.channel {
        Some(id) => vec![id.clone()],
        None => client::all_channels(&conn)
            .await?
            .into_iter()
            .map(|c| c.channel_id)
            .collect(),
    };
    let mut history = HistoryServiceClient::new(conn);
    let mut rows = Vec::new();
    for id in ids {
        let request = pb::GetChannelStateRequest {
            channel_id: id.clone(),
        };
        let s = history
            .get_channel_state(request)
            .await
            .map_err(client::status_error)?
            .into_inner();
        rows.push(StateOut::new(id, &s));
    }
    output::print_all(&rows, args.format.into())
}

//! `gibbsline cycles`: a channel's charge–discharge cycles with their
//! coulombic, energy and voltage efficiencies.

use super::DEFAULT_ADDR;
use super::client;
use super::output::{self, Col, Format, Row, fixed, percent};
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use serde::Serialize;

#[derive(Debug, clap::Args)]
pub struct CyclesArgs {
    #[arg(long, default_value = DEFAULT_ADDR)]
    pub connect: String,
    #[arg(long)]
    pub channel: String,
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

#[derive(Serialize)]
struct CycleOut {
    run_id: u64,
    index: u64,
    charge_in_ah: f64,
    charge_out_ah: f64,
    energy_in_wh: f64,
    energy_out_wh: f64,
    coulombic_efficiency: Option<f64>,
    energy_efficiency: Option<f64>,
    voltage_efficiency: Option<f64>,
    open: bool,
    partial: bool,
    discharge_only: bool,
}

impl From<&pb::Cycle> for CycleOut {
    fn from(c: &pb::Cycle) -> CycleOut {
        CycleOut {
            run_id: c.run_id,
            index: u64::from(c.index),
            charge_in_ah: c.charge_in_ah,
            charge_out_ah: c.charge_out_ah,
            energy_in_wh: c.energy_in_wh,
            energy_out_wh: c.energy_out_wh,
            coulombic_efficiency: c.coulombic_efficiency,
            energy_efficiency: c.energy_efficiency,
            voltage_efficiency: c.voltage_efficiency,
            open: c.open,
            partial: c.partial,
            discharge_only: c.discharge_only,
        }
    }
}

impl Row for CycleOut {
    const CSV_HEADER: &'static [&'static str] = &[
        "run_id",
        "index",
        "charge_in_ah",
        "charge_out_ah",
        "energy_in_wh",
        "energy_out_wh",
        "coulombic_efficiency",
        "energy_efficiency",
        "voltage_efficiency",
        "open",
        "partial",
        "discharge_only",
    ];
    const TABLE: &'static [Col] = &[
        Col::right("cycle", 5),
        Col::right("Ah in", 9),
        Col::right("Ah out", 9),
        Col::right("Wh in", 9),
        Col::right("Wh out", 9),
        Col::right("CE %", 6),
        Col::right("EE %", 6),
        Col::right("VE %", 6),
        Col::left("note", 0),
    ];
    fn table_cells(&self) -> Vec<String> {
        let note = [
            (self.open, "running"),
            (self.partial, "partial"),
            (self.discharge_only, "discharge only"),
        ]
        .iter()
        .filter(|(set, _)| *set)
        .map(|(_, n)| *n)
        .collect::<Vec<_>>()
        .join(", ");
        vec![
            self.index.to_string(),
            fixed(Some(self.charge_in_ah), 4),
            fixed(Some(self.charge_out_ah), 4),
            fixed(Some(self.energy_in_wh), 4),
            fixed(Some(self.energy_out_wh), 4),
            percent(self.coulombic_efficiency, 1),
            percent(self.energy_efficiency, 1),
            percent(self.voltage_efficiency, 1),
            note,
        ]
    }
}

pub async fn run(args: &CyclesArgs) -> anyhow::Result<()> {
    let request = pb::ListCyclesRequest {
        channel_id: args.channel.clone(),
    };
    let r = HistoryServiceClient::new(client::connect(&args.connect).await?)
        .list_cycles(request)
        .await
        .map_err(client::status_error)?
        .into_inner();
    let rows: Vec<CycleOut> = r.cycles.iter().map(CycleOut::from).collect();
    output::print_all(&rows, args.format)
}

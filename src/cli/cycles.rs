//! `gibbsline cycles`: a channel's charge–discharge cycles with their
//! coulombic, energy and voltage efficiencies.

use super::DEFAULT_ADDR;
use super::client;
use super::output::{self, Col, Format, Row, fixed, percent};
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;

#[derive(Debug, clap::Args)]
pub(crate) struct CyclesArgs {
    /// The server, host:port.
    #[arg(long, env = "GIBBSLINE_CONNECT", default_value = DEFAULT_ADDR)]
    pub connect: String,
    /// The channel id.
    #[arg(long)]
    pub channel: String,
    /// Output: a table for people, CSV or JSON for programs.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// Cycles print as the wire has them: one name for each quantity in
/// gRPC, JSON and CSV.
impl Row for pb::Cycle {
    const CSV_HEADER: &'static [&'static str] = &[
        "run_id",
        "index",
        "start_unix_ns",
        "end_unix_ns",
        "charge_in_ah",
        "charge_out_ah",
        "energy_in_wh",
        "energy_out_wh",
        "coulombic_efficiency",
        "energy_efficiency",
        "voltage_efficiency",
        "mean_delta_g_charge_kj_per_mol",
        "mean_delta_g_discharge_kj_per_mol",
        "start_soc",
        "end_soc",
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

pub(crate) async fn run(args: &CyclesArgs) -> anyhow::Result<()> {
    let request = pb::ListCyclesRequest {
        channel_id: args.channel.clone(),
    };
    let r = HistoryServiceClient::new(client::connect(&args.connect).await?)
        .list_cycles(request)
        .await
        .map_err(client::status_error)?
        .into_inner();
    output::print_all(&r.cycles, args.format)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_header_names_every_field_in_order() {
        assert_eq!(
            output::derived_csv_header(&pb::Cycle::default()),
            <pb::Cycle as Row>::CSV_HEADER
        );
    }
}

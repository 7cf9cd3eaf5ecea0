//! `gibbsline channels fit-ocv` and `channels apply-ocv-fit`: a cell's own
//! Nernst model from its settled rests, shown with its σ, and put on the
//! channel when an operator agrees.

use super::UsageError;
use super::client;
use super::output::{self, TableOrJson};
use gibbsline::pb;
use gibbsline::pb::channel_service_client::ChannelServiceClient;

/// Prints the proposal: parameters ± σ, the rests and their residuals,
/// and the command that applies it.
pub(crate) async fn fit(
    connect: &str,
    id: &str,
    run_id: u64,
    fit_capacity: bool,
    format: TableOrJson,
) -> anyhow::Result<()> {
    let request = pb::FitOcvModelRequest {
        channel_id: id.to_string(),
        run_id,
        fit_capacity,
    };
    let r = ChannelServiceClient::new(client::connect(connect).await?)
        .fit_ocv_model(request)
        .await
        .map_err(|s| UsageError(format!("{id}: {}", s.message())))?
        .into_inner();
    if format == TableOrJson::Json {
        return output::print_one(&r);
    }
    let f = r.fit.unwrap_or_default();
    print_summary(id, r.run_id, &f);
    print_rests(&f);
    println!(
        "to use it: gibbsline channels apply-ocv-fit {id} --e-formal-298-v {:.5} --n-apparent {:.4} --by NAME [--note TEXT]",
        f.e_formal_298_v, f.n_apparent
    );
    Ok(())
}

fn print_summary(id: &str, run_id: u64, f: &pb::OcvFit) {
    let anchored = if f.anchored {
        "SOC scale from the operator's SOC entry"
    } else {
        "SOC at the first rest fitted"
    };
    println!(
        "{id} run {run_id}: {} settled rests, {anchored} (a proposal: nothing changed)",
        f.rests_used
    );
    println!(
        "  E°′ at 298.15 K   {:.4} ± {:.4} V   ({:+.1} mV from the chemistry's E°)",
        f.e_formal_298_v, f.e_formal_298_sigma_v, f.offset_from_chemistry_mv
    );
    println!(
        "  n apparent        {:.3} ± {:.3}",
        f.n_apparent, f.n_apparent_sigma
    );
    println!(
        "  SOC at 1st rest   {:.3} ± {:.3}",
        f.soc_at_first_rest, f.soc_at_first_rest_sigma
    );
    let capacity = if f.capacity_sigma_ah > 0.0 {
        format!("{:.3} ± {:.3} Ah", f.capacity_ah, f.capacity_sigma_ah)
    } else {
        format!("{:.3} Ah (the channel's, taken as known)", f.capacity_ah)
    };
    println!("  capacity          {capacity}");
    println!(
        "  residual RMS      {:.2} mV per cell on {} degrees of freedom; ± σ is 1σ, a 95 % interval is ± {:.3} σ",
        f.residual_rms_mv, f.degrees_of_freedom, f.t_95
    );
    if f.correlation_e_soc.abs() > 0.98 {
        println!(
            "  caution: E°′ and the SOC scale are {:.3} correlated: the rests span too little SOC to tell them apart",
            f.correlation_e_soc
        );
    }
}

fn print_rests(f: &pb::OcvFit) {
    println!(
        "  {:>6}  {:>9}  {:>6}  {:>9}  {:>6}  {:>9}",
        "seq", "V/cell", "°C", "Ah", "SOC", "resid mV"
    );
    for r in &f.rests {
        println!(
            "  {:>6}  {:>9.5}  {:>6.1}  {:>9.4}  {:>6.3}  {:>9.2}",
            r.seq, r.cell_volts, r.temp_c, r.charge_ah, r.soc, r.residual_mv
        );
    }
}

/// Puts a fit on the channel (operator role): a new run starts.
pub(crate) async fn apply(
    connect: &str,
    id: &str,
    e_formal_298_v: f64,
    n_apparent: f64,
    by: &str,
    note: &str,
) -> anyhow::Result<()> {
    let request = pb::ApplyOcvFitRequest {
        channel_id: id.to_string(),
        e_formal_298_v,
        n_apparent,
        applied_by: by.to_string(),
        note: note.to_string(),
    };
    let r = ChannelServiceClient::new(client::connect(connect).await?)
        .apply_ocv_fit(request)
        .await
        .map_err(|s| UsageError(format!("{id}: {}", s.message())))?
        .into_inner();
    let run = r.channel.map_or(0, |c| c.run_id);
    println!(
        "{id}: E°′ {e_formal_298_v} V and n apparent {n_apparent} in use from run {run}{}",
        if r.new_run { " (a new run)" } else { "" }
    );
    Ok(())
}

//! `gibbsline eval` and `gibbsline chemistries`: the core on the command line.

use super::{ChemistriesArgs, EvalArgs, UsageError};
use gibbsline::electrochem::chemistry::read_chemistry_specs;
use gibbsline::electrochem::constants::ZERO_CELSIUS_K;
use gibbsline::electrochem::report::EvalReport;
use gibbsline::electrochem::{self, EvalRequest, Registry};

/// Built-ins plus the chemistries of `--chemistry-file` files.
pub(crate) fn load_registry(files: &[std::path::PathBuf]) -> anyhow::Result<Registry> {
    let mut specs = Vec::new();
    let mut labels = Vec::new();
    for path in files {
        let label = path.display().to_string();
        let text = std::fs::read_to_string(path)
            .map_err(|e| UsageError(format!("--chemistry-file {label}: {e}")))?;
        let file_specs = read_chemistry_specs(&label, &text)
            .map_err(|e| UsageError(format!("--chemistry-file {e}")))?;
        labels.extend((0..file_specs.len()).map(|i| format!("{label}: chemistry[{i}]")));
        specs.extend(file_specs);
    }
    Ok(Registry::assemble([], &specs).map_err(|(i, e)| {
        UsageError(format!(
            "--chemistry-file {} ({:?}): {e}",
            labels[i], specs[i].id
        ))
    })?)
}

pub(crate) fn temp_k_from_flag(temp_c: f64) -> Result<f64, UsageError> {
    if temp_c.is_finite() && temp_c > -ZERO_CELSIUS_K {
        Ok(temp_c + ZERO_CELSIUS_K)
    } else {
        Err(UsageError(format!(
            "--temp-c {temp_c}: must be a finite temperature above -273.15 °C"
        )))
    }
}

pub(crate) fn run_eval(args: &EvalArgs) -> anyhow::Result<()> {
    let registry = load_registry(&args.chemistry_file)?;
    let chem = registry.get(&args.chemistry).map_err(|_| {
        UsageError(format!(
            "--chemistry {:?}: unknown id (see `gibbsline chemistries`)",
            args.chemistry
        ))
    })?;
    let chem = match args.e_standard_298_v {
        Some(e) if e.is_finite() => std::sync::Arc::new(chem.with_e_standard_override(e)),
        Some(e) => {
            return Err(
                UsageError(format!("--e-standard-298-v {e}: must be a finite number")).into(),
            );
        }
        None => chem,
    };
    let temp_k = temp_k_from_flag(args.temp_c)?;
    if args.cells == 0 {
        return Err(UsageError("--cells 0: must be at least 1".into()).into());
    }
    let tolerance = args.equilibrium_tolerance_mv / 1e3;
    if !(tolerance.is_finite() && tolerance >= 0.0) {
        return Err(UsageError(format!(
            "--equilibrium-tolerance-mv {}: must be finite and not negative",
            args.equilibrium_tolerance_mv
        ))
        .into());
    }
    let evaluation = match (args.volts, args.soc) {
        (Some(volts), None) => {
            if !volts.is_finite() {
                return Err(UsageError(format!("--volts {volts}: must be a finite number")).into());
            }
            electrochem::evaluate(
                &chem,
                EvalRequest {
                    stack_volts: volts,
                    cells_in_series: args.cells,
                    temp_k,
                    equilibrium_tolerance_volts: tolerance,
                },
            )
        }
        (None, Some(soc)) => {
            if !(soc.is_finite() && (0.0..=1.0).contains(&soc)) {
                return Err(
                    UsageError(format!("--soc {soc}: must be a number from 0 to 1")).into(),
                );
            }
            electrochem::evaluate_at_soc(&chem, soc, args.cells, temp_k, tolerance)
        }
        _ => return Err(UsageError("give exactly one of --volts or --soc".into()).into()),
    }
    .map_err(|e| UsageError(format!("--chemistry {}: {e}", chem.id)))?;
    let report = EvalReport::new(&chem, &evaluation);
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print_report(&chem, &report);
    }
    Ok(())
}

fn print_report(chem: &electrochem::Chemistry, r: &EvalReport) {
    println!("{} — {}", r.chemistry_id, chem.name);
    println!("  reaction             {}", chem.reaction);
    println!(
        "  temperature          {:.2} K ({:.2} °C)",
        r.temp_k,
        r.temp_k - ZERO_CELSIUS_K
    );
    println!("  cells in series      {}", r.cells_in_series);
    println!(
        "  voltage              {:.6} V per cell ({:.6} V stack)",
        r.equilibrium_cell_volts, r.stack_volts
    );
    println!("  E° at 298.15 K       {:.6} V", r.e_standard_298_v);
    println!("  E° at temperature    {:.6} V", r.e_standard_at_temp_v);
    if let Some(tn) = r.thermoneutral_v {
        println!("  thermoneutral        {tn:.4} V");
    }
    println!(
        "  ΔG                   {:.3} kJ/mol (n = {})",
        r.delta_g_kj_per_mol, r.n_electrons
    );
    println!(
        "  ΔG°                  {:.3} kJ/mol",
        r.delta_g_standard_kj_per_mol
    );
    println!("  log10 Q              {:.4}", r.log10_q);
    println!("  log10 K              {:.4}", r.log10_k);
    println!("  ln(K/Q)              {:.4}", r.affinity_ln_k_over_q);
    println!("  state                {}", r.state);
    match r.soc_from_model {
        Some(soc) => println!(
            "  SOC                  {:.2} % ({}{})",
            soc * 100.0,
            r.soc_model_name,
            if r.soc_clamped {
                ", clamped: voltage outside the model's range"
            } else {
                ""
            }
        ),
        None => println!("  SOC                  none (model: {})", r.soc_model_name),
    }
}

pub(crate) fn run_chemistries(args: &ChemistriesArgs) -> anyhow::Result<()> {
    let registry = load_registry(&args.chemistry_file)?;
    if args.json {
        // The wire's ChemistryInfo: the same names and units as
        // ListChemistries (dE°/dT in mV/K).
        let all: Vec<_> = registry
            .iter()
            .map(|c| gibbsline::grpc::convert::chemistry_to_pb(c))
            .collect();
        println!("{}", serde_json::to_string_pretty(&all)?);
        return Ok(());
    }
    println!(
        "{:<18} {:>2} {:>9} {:>11} {:>15}  {:<10} name",
        "id", "n", "E°/V", "dE°/dT", "window/V", "soc model"
    );
    for c in registry.iter() {
        println!(
            "{:<18} {:>2} {:>9.4} {:>6.3} mV/K {:>7.3}–{:<7.3}  {:<10} {}{}",
            c.id,
            c.n_electrons,
            c.e_standard_298_volts,
            c.de_dt_volts_per_k * 1e3,
            c.min_cell_volts,
            c.max_cell_volts,
            c.soc_model.name(),
            c.name,
            if c.builtin { "" } else { " (user)" }
        );
    }
    Ok(())
}

//! Stored readings with their recomputed figures, and cycles.

use crate::channel::ChannelDef;
use crate::electrochem;
use crate::electrochem::builtin::WATER_CELL_ID;
use crate::electrochem::hydrogen::{self};
use crate::estimator::{CycleRecord, OcvSource};
use crate::pb;
use crate::store::{ReadingRow, RunRow, flags};

/// Spontaneous, driven or at equilibrium, as the wire's enum code.
pub fn state_to_pb(s: electrochem::ReactionState) -> i32 {
    match s {
        electrochem::ReactionState::Spontaneous => pb::ReactionState::Spontaneous as i32,
        electrochem::ReactionState::Driven => pb::ReactionState::Driven as i32,
        electrochem::ReactionState::Equilibrium => pb::ReactionState::Equilibrium as i32,
    }
}

/// The operating mode stored with a reading, named for its chemistry.
fn mode_to_pb(row: &ReadingRow, run: &RunRow) -> i32 {
    use crate::estimator::OperatingMode as M;
    let mode = M::of(
        row.flags & flags::CHARGING != 0,
        row.flags & flags::DISCHARGING != 0,
        row.amps.is_some(),
        run.chemistry_id == crate::electrochem::builtin::WATER_CELL_ID,
    );
    (match mode {
        None => pb::OperatingMode::Unspecified,
        Some(M::Charge) => pb::OperatingMode::Charge,
        Some(M::Discharge) => pb::OperatingMode::Discharge,
        Some(M::Rest) => pb::OperatingMode::Rest,
        Some(M::Electrolysis) => pb::OperatingMode::Electrolysis,
        Some(M::FuelCell) => pb::OperatingMode::FuelCell,
        Some(M::OpenCircuit) => pb::OperatingMode::OpenCircuit,
    }) as i32
}

fn ocv_source_to_pb(source: OcvSource) -> i32 {
    (match source {
        OcvSource::Terminal => pb::OcvSource::Terminal,
        OcvSource::Rest => pb::OcvSource::Rest,
        OcvSource::OhmicCompensated => pb::OcvSource::OhmicCompensated,
        OcvSource::CountedSoc => pb::OcvSource::CountedSoc,
        OcvSource::Reversible => pb::OcvSource::Reversible,
        OcvSource::None => pb::OcvSource::None,
    }) as i32
}

/// The channel definition a run was computed with (runs before it was
/// stored: none, and the figures that need it use defaults).
fn run_definition(run: &RunRow) -> Option<ChannelDef> {
    serde_json::from_str(run.definition_json.as_deref()?).ok()
}

/// An electrolyser's or fuel cell's figures for a stored reading.
pub fn hydrogen_to_pb(row: &ReadingRow, run: &RunRow, temp_k: f64) -> Option<pb::HydrogenFigures> {
    if run.chemistry_id != WATER_CELL_ID {
        return None;
    }
    let def = run_definition(run);
    let facts = hydrogen::StackFacts {
        gas: def.as_ref().map(ChannelDef::water_gas).unwrap_or_default(),
        resistance_ohm: def.as_ref().and_then(|d| d.resistance_ohm),
        faradaic_efficiency: def.as_ref().map_or(1.0, |d| d.faradaic_efficiency),
        active_area_cm2: def.as_ref().and_then(|d| d.active_area_cm2),
    };
    let rest_amps = def
        .as_ref()
        .map_or(1e-3, |d| d.estimator_config().rest_current_amps);
    let f = hydrogen::figures(
        hydrogen::StackReading {
            stack_volts: row.volts,
            amps: row.amps.unwrap_or(0.0),
            cells_in_series: run.cells_in_series,
            temp_k,
        },
        &facts,
        rest_amps,
    );
    Some(pb::HydrogenFigures {
        reversible_v: f.reversible_volts,
        thermoneutral_hhv_v: f.thermoneutral_hhv_volts,
        thermoneutral_lhv_v: f.thermoneutral_lhv_volts,
        overpotential_v: f.overpotential_volts,
        overpotential_ir_free_v: f.overpotential_ir_free_volts,
        voltage_efficiency_hhv: f.voltage_efficiency_hhv,
        voltage_efficiency_lhv: f.voltage_efficiency_lhv,
        heat_w: f.heat_w,
        h2_rate_mol_per_s: f.h2_rate_mol_per_s,
        h2_rate_normal_litres_per_min: f.h2_rate_normal_litres_per_min,
        h2_rate_kg_per_h: f.h2_rate_kg_per_h,
        specific_energy_kwh_per_kg: f.specific_energy_kwh_per_kg,
        current_density_a_per_cm2: f.current_density_a_per_cm2,
        area_specific_resistance_ohm_cm2: f.area_specific_resistance_ohm_cm2,
        breach: (match f.breach {
            None => pb::BoundBreach::Unspecified,
            Some(hydrogen::BoundBreach::Reversible) => pb::BoundBreach::Reversible,
            Some(hydrogen::BoundBreach::Thermoneutral) => pb::BoundBreach::Thermoneutral,
        }) as i32,
    })
}

/// Recomputes the cheap derived values from a stored row and its run.
pub fn stored_to_pb(row: &ReadingRow, run: Option<&RunRow>) -> pb::StoredReading {
    let derived = run.map(|run| {
        let temp_k = row.temp_c.unwrap_or(run.default_temp_c) + 273.15;
        let t = electrochem::thermo::thermo_state(
            run.n_electrons,
            electrochem::thermo::StandardPotential {
                e_standard_298_volts: run.e_standard_298_v,
                de_dt_volts_per_k: run.de_dt_v_per_k,
            },
            row.cell_volts_used,
            temp_k,
            run.equilibrium_tolerance_v,
        );
        let source = flags::ocv_source(row.flags);
        let known = source.known();
        let cell_terminal = row.volts / f64::from(run.cells_in_series.max(1));
        // At rest the terminal voltage is its own estimate: η is not known.
        let driving_force_v = matches!(
            source,
            OcvSource::OhmicCompensated | OcvSource::CountedSoc | OcvSource::Reversible
        )
        .then(|| cell_terminal - row.cell_volts_used);
        pb::DerivedState {
            equilibrium_cell_volts: row.cell_volts_used,
            ohmic_compensated: !matches!(
                source,
                OcvSource::Terminal | OcvSource::Rest | OcvSource::None
            ),
            temp_k,
            e_standard_at_temp_v: t.e_standard_volts,
            delta_g_kj_per_mol: known.then_some(t.delta_g_kj_per_mol),
            delta_g_standard_kj_per_mol: t.delta_g_standard_kj_per_mol,
            ln_q: known.then_some(t.ln_q),
            log10_q: known.then(|| t.log10_q()),
            log10_k: t.log10_k(),
            affinity_ln_k_over_q: known.then_some(t.affinity_ln_k_over_q),
            state: if known {
                state_to_pb(t.state)
            } else {
                pb::ReactionState::Unspecified as i32
            },
            soc_from_model: row.soc_model,
            soc_clamped: row.flags & flags::SOC_CLAMPED != 0,
            soc_fused: row.soc_fused,
            charge_ah: row.charge_ah,
            energy_wh: row.energy_wh,
            operating_mode: mode_to_pb(row, run),
            soc_counted_unclamped: row.soc_counted_unclamped,
            soc_count_clamped: row.flags & flags::COUNT_CLAMPED != 0,
            resting: row.flags & flags::RESTING != 0,
            rest_settled: row.flags & flags::REST_SETTLED != 0,
            out_of_order: row.flags & flags::OUT_OF_ORDER != 0,
            soc_model_name: run.soc_model.clone(),
            ocv_source: ocv_source_to_pb(source),
            driving_force_v,
            driving_force_kj_per_mol: driving_force_v.map(|eta| {
                f64::from(run.n_electrons) * electrochem::constants::FARADAY_C_PER_MOL * eta / 1e3
            }),
            hydrogen: hydrogen_to_pb(row, run, temp_k),
        }
    });
    pb::StoredReading {
        seq: row.seq,
        time_unix_ns: row.time_ns,
        volts: row.volts,
        amps_charge_positive: row.amps,
        temp_c: row.temp_c,
        run_id: row.run_id as u64,
        derived,
    }
}

/// Stored readings as columns (READING_LAYOUT_COLUMNS): the stored values
/// only, NaN where a reading lacks one.
pub fn columns_of(rows: &[ReadingRow]) -> pb::ReadingColumns {
    let n = rows.len();
    let mut c = pb::ReadingColumns {
        seq: Vec::with_capacity(n),
        time_unix_ns: Vec::with_capacity(n),
        volts: Vec::with_capacity(n),
        amps_charge_positive: Vec::with_capacity(n),
        temp_c: Vec::with_capacity(n),
        run_id: Vec::with_capacity(n),
        equilibrium_cell_volts: Vec::with_capacity(n),
        ocv_source: Vec::with_capacity(n),
        soc_from_model: Vec::with_capacity(n),
        soc_fused: Vec::with_capacity(n),
        charge_ah: Vec::with_capacity(n),
        energy_wh: Vec::with_capacity(n),
    };
    for r in rows {
        c.seq.push(r.seq);
        c.time_unix_ns.push(r.time_ns);
        c.volts.push(r.volts);
        c.amps_charge_positive.push(r.amps.unwrap_or(f64::NAN));
        c.temp_c.push(r.temp_c.unwrap_or(f64::NAN));
        c.run_id.push(r.run_id as u64);
        c.equilibrium_cell_volts.push(r.cell_volts_used);
        c.ocv_source
            .push(ocv_source_to_pb(flags::ocv_source(r.flags)));
        c.soc_from_model.push(r.soc_model.unwrap_or(f64::NAN));
        c.soc_fused.push(r.soc_fused.unwrap_or(f64::NAN));
        c.charge_ah.push(r.charge_ah);
        c.energy_wh.push(r.energy_wh);
    }
    c
}

/// One charge–discharge cycle of run `run_id` as the wire has it.
pub fn cycle_to_pb(run_id: i64, c: &CycleRecord) -> pb::Cycle {
    pb::Cycle {
        run_id: run_id as u64,
        index: c.index,
        start_unix_ns: c.start_ns,
        end_unix_ns: c.end_ns,
        charge_in_ah: c.charge_in_ah,
        charge_out_ah: c.charge_out_ah,
        energy_in_wh: c.energy_in_wh,
        energy_out_wh: c.energy_out_wh,
        coulombic_efficiency: c.coulombic_efficiency,
        energy_efficiency: c.energy_efficiency,
        voltage_efficiency: c.voltage_efficiency,
        mean_delta_g_charge_kj_per_mol: c.mean_delta_g_charge_kj_per_mol,
        mean_delta_g_discharge_kj_per_mol: c.mean_delta_g_discharge_kj_per_mol,
        start_soc: c.start_soc,
        end_soc: c.end_soc,
        open: c.open,
        partial: c.partial,
        discharge_only: c.discharge_only,
    }
}

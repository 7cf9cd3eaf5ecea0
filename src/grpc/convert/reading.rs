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

/// A water cell's stack facts and rest threshold from its run's definition.
fn water_facts(run: &RunRow) -> (hydrogen::StackFacts, f64) {
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
    (facts, rest_amps)
}

thread_local! {
    /// The last definition read by [`water_facts_cached`] on this thread
    /// and what it gave: the readings of a page share one run, and parsing
    /// its JSON for each of them cost more than all the rest of the
    /// conversion. Keyed by the text itself, so a hit is always right.
    static LAST_WATER_FACTS: std::cell::RefCell<Option<(Option<String>, hydrogen::StackFacts, f64)>> =
        const { std::cell::RefCell::new(None) };
}

fn water_facts_cached(run: &RunRow) -> (hydrogen::StackFacts, f64) {
    LAST_WATER_FACTS.with(|last| {
        let mut last = last.borrow_mut();
        if let Some((json, facts, rest_amps)) = last.as_ref()
            && *json == run.definition_json
        {
            return (*facts, *rest_amps);
        }
        let (facts, rest_amps) = water_facts(run);
        *last = Some((run.definition_json.clone(), facts, rest_amps));
        (facts, rest_amps)
    })
}

/// An electrolyser's or fuel cell's figures for a stored reading.
pub fn hydrogen_to_pb(row: &ReadingRow, run: &RunRow, temp_k: f64) -> Option<pb::HydrogenFigures> {
    if run.chemistry_id != WATER_CELL_ID {
        return None;
    }
    let (facts, rest_amps) = water_facts_cached(run);
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
            ocv_model_basis: (match (run.soc_model.as_str(), run.ocv_model_of_cell) {
                ("none", _) => pb::OcvModelBasis::Unspecified,
                (_, true) => pb::OcvModelBasis::Cell,
                (_, false) => pb::OcvModelBasis::Chemistry,
            }) as i32,
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

#[cfg(test)]
mod tests {
    use super::*;

    fn water_run(run_id: i64, resistance_ohm: Option<f64>) -> RunRow {
        let chem = crate::electrochem::Registry::builtin()
            .get(WATER_CELL_ID)
            .expect("built in");
        let def = ChannelDef {
            resistance_ohm,
            ..ChannelDef::of_chemistry("stack", &chem)
        };
        RunRow {
            run_id,
            channel_key: 1,
            chemistry_id: WATER_CELL_ID.into(),
            n_electrons: chem.n_electrons,
            // The built-in chemistry's own E° and dE°/dT (its sources are
            // in its file), not numbers of this test's.
            e_standard_298_v: chem.standard_potential().e_standard_298_volts,
            de_dt_v_per_k: chem.standard_potential().de_dt_volts_per_k,
            cells_in_series: 1,
            default_temp_c: 60.0,
            equilibrium_tolerance_v: 1e-3,
            soc_model: "none".into(),
            definition_json: Some(serde_json::to_string(&def).expect("serializes")),
            ocv_model_of_cell: false,
        }
    }

    #[test]
    fn each_run_gets_its_own_definition_whatever_was_converted_before() {
        let row = ReadingRow {
            channel_key: 1,
            seq: 1,
            run_id: 1,
            time_ns: 1_800_000_000_000_000_000,
            volts: 1.9,
            amps: Some(10.0),
            temp_c: Some(60.0),
            cell_volts_used: 1.2,
            soc_model: None,
            soc_fused: None,
            charge_ah: 0.0,
            energy_wh: 0.0,
            flags: 0,
            soc_counted_unclamped: None,
        };
        let (with_r, without_r) = (water_run(1, Some(0.01)), water_run(2, None));
        let ir_free = |run: &RunRow| {
            hydrogen_to_pb(&row, run, 333.15)
                .expect("a water cell")
                .overpotential_ir_free_v
        };
        let first = ir_free(&with_r);
        let other = ir_free(&without_r);
        // The definition read for one run must not answer for another.
        assert_eq!(ir_free(&with_r), first);
        assert_ne!(
            first, other,
            "a resistance changes the iR-free overpotential"
        );
        let (facts, _) = water_facts(&with_r);
        assert_eq!(facts.resistance_ohm, Some(0.01));
    }
}

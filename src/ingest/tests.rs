//! The pure ingest path on constructed runs with known truth.

use super::*;
use crate::alerts::{AlertChange, AlertKind};
use crate::channel::ChannelDef;
use crate::electrochem::Registry;
use crate::estimator;
use crate::sim::{SimCell, SimCellParams};
use crate::store::flags;

const S: i64 = 1_000_000_000;
/// 2026-01-01T00:00:00Z: inside the timeline checks' window.
const T0: i64 = 1_767_225_600 * S;

fn runtime(chemistry_id: &str, capacity_ah: f64, resistance_ohm: Option<f64>) -> ChannelRuntime {
    let registry = Registry::builtin();
    let chemistry = registry.get(chemistry_id).unwrap();
    let def = ChannelDef {
        capacity_ah,
        resistance_ohm,
        ..ChannelDef::of_chemistry("truth", &chemistry)
    };
    let chemistry = def.validate(&registry).unwrap();
    ChannelRuntime::fresh(1, def, chemistry, 1)
}

fn raised(changes: &[AlertChange], kind: AlertKind) -> Vec<u64> {
    changes
        .iter()
        .filter_map(|c| match c {
            AlertChange::Raise(a) if a.kind == kind => Some(a.seq),
            _ => None,
        })
        .collect()
}

/// A vanadium cell charged at constant current to 1.50 V, then held there
/// while the current decays (constant-voltage taper), then rested. The
/// simulated cell has only an ohmic resistance, which the channel knows,
/// so the truth is η = I·R exactly.
#[test]
fn a_constant_voltage_taper_raises_one_driving_force_alert() {
    let r_ohm = 0.05;
    let mut rt = runtime("vanadium-redox", 1.0, Some(r_ohm));
    let mut cell = SimCell::new(
        SimCellParams {
            cells_in_series: 1,
            capacity_ah: 1.0,
            resistance_ohm: r_ohm,
            polarisation_ohm: 0.0,
            polarisation_tau_s: 0.0,
            noise_volts: 0.0,
            temp_k: 298.15,
            temp_swing_k: 0.0,
            temp_period_s: 0.0,
            tafel_volts: 0.0,
            exchange_amps: 0.0,
        },
        0.3,
        7,
    );
    let chemistry = rt.chemistry.clone();
    let cv_volts = 1.50;
    let mut readings = Vec::new();
    let mut amps = 0.5;
    let mut taper_started = None;
    for k in 0..20_000u64 {
        let ocv = cell.ocv_stack_volts(&chemistry);
        if ocv + amps * r_ohm >= cv_volts {
            // Constant voltage: the current the cell takes at 1.50 V.
            amps = ((cv_volts - ocv) / r_ohm).max(0.0);
            taper_started.get_or_insert(k);
        }
        if taper_started.is_some() && amps < 0.005 {
            amps = 0.0;
        }
        let sample = cell.step(&chemistry, amps, 1.0);
        readings.push(RawReading {
            seq: k + 1,
            time_unix_ns: T0 + k as i64 * S,
            volts: sample.stack_volts,
            amps: Some(amps),
            temp_c: Some(25.0),
        });
        if amps == 0.0 && readings.len() > 600 && readings[readings.len() - 600].amps == Some(0.0) {
            break;
        }
    }
    assert!(
        taper_started.is_some(),
        "the charge reached the CV setpoint"
    );
    let mut changes = Vec::new();
    let mut etas = Vec::new();
    for batch in readings.chunks(500) {
        let wall_now_ns = batch.last().unwrap().time_unix_ns;
        let (derived, rejected) = derive_batch(&mut rt, batch, wall_now_ns);
        assert!(
            rejected.is_empty(),
            "{} rejected: {:?}",
            rejected.len(),
            rejected.first()
        );
        for row in &derived.rows {
            if row.amps.is_some_and(|i| i >= 0.05) {
                etas.push((row.amps.unwrap(), row.volts - row.cell_volts_used));
            }
        }
        changes.extend(derived.changes);
    }
    // η = I·R under current (counted SOC anchored by V − I·R at the start).
    for (i, eta) in &etas {
        assert!((eta - i * r_ohm).abs() < 2e-3, "η {eta} at {i} A");
    }
    let alerts = raised(&changes, AlertKind::DrivingForceSpent);
    assert_eq!(alerts.len(), 1, "{alerts:?}");
    // Raised in the taper, once |η| = I·R stayed under 10 mV for 10 s.
    let at = readings[alerts[0] as usize - 1];
    let i = at.amps.unwrap();
    assert!(i * r_ohm <= 0.010 && i > 0.0, "raised at {i} A");
    // The reaction itself is far from equilibrium (|ΔG| ≈ 150 kJ/mol):
    // that rarer alert stays quiet.
    assert!(raised(&changes, AlertKind::EquilibriumApproach).is_empty());
}

/// Under load without a resistance or an anchored count, the terminal
/// voltage says nothing about composition: ΔG and model SOC are absent,
/// and they come back with the first reading at rest.
#[test]
fn thermodynamics_under_load_need_an_open_circuit_estimate() {
    let mut rt = runtime("vanadium-redox", 1.0, None);
    let reading = |seq: u64, amps: f64| RawReading {
        seq,
        time_unix_ns: T0 + seq as i64 * S,
        volts: 1.45,
        amps: Some(amps),
        temp_c: Some(25.0),
    };
    let (derived, _) = derive_batch(&mut rt, &[reading(1, 0.5), reading(2, 0.5)], T0);
    for row in &derived.rows {
        assert_eq!(flags::ocv_source(row.flags), estimator::OcvSource::None);
        assert_eq!(row.soc_model, None);
        assert_eq!(row.soc_fused, None);
    }
    let (derived, _) = derive_batch(&mut rt, &[reading(3, 0.0)], T0);
    let row = &derived.rows[0];
    assert_eq!(flags::ocv_source(row.flags), estimator::OcvSource::Rest);
    assert!(row.soc_model.is_some());
}

/// A hydrogen–oxygen cell's equilibrium voltage comes from its temperature
/// and gases, never from the terminal voltage of a driven cell.
#[test]
fn an_electrolyser_uses_its_reversible_voltage() {
    let mut rt = runtime("hydrogen-oxygen", 0.0, None);
    let (derived, _) = derive_batch(
        &mut rt,
        &[RawReading {
            seq: 1,
            time_unix_ns: T0,
            volts: 1.75,
            amps: Some(20.0),
            temp_c: Some(80.0),
        }],
        T0,
    );
    let row = &derived.rows[0];
    assert_eq!(
        flags::ocv_source(row.flags),
        estimator::OcvSource::Reversible
    );
    // Cantera 3.2, dry gases at 1 atm, 80 °C: 1.1832 V
    // (tests/reference/water_cell_cantera.py).
    assert!(
        (row.cell_volts_used - 1.1832).abs() < 1e-3,
        "{}",
        row.cell_volts_used
    );
    assert!(row.flags & flags::CHARGING != 0);
}

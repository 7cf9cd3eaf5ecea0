use super::*;
use crate::electrochem::Registry;
use crate::sim::{CycleSchedule, SimCell, SimCellParams};

const S: i64 = 1_000_000_000;

fn chem(id: &str) -> std::sync::Arc<Chemistry> {
    Registry::builtin().get(id).unwrap()
}

fn feed(
    chemistry: &Chemistry,
    config: &EstimatorConfig,
    inputs: &[EstimatorInput],
) -> (EstimatorState, Vec<Estimate>) {
    let mut state = EstimatorState::default();
    let out = inputs
        .iter()
        .map(|i| step(chemistry, config, &mut state, *i).unwrap())
        .collect();
    (state, out)
}

fn constant(amps: Option<f64>, volts: f64, seconds: i64, every_s: i64) -> Vec<EstimatorInput> {
    (0..=seconds / every_s)
        .map(|k| EstimatorInput {
            time_ns: k * every_s * S,
            stack_volts: volts,
            amps,
            temp_k: None,
        })
        .collect()
}

#[test]
fn constant_current_counts_exactly() {
    // Analytic: Q = I·t. 2.5 A for 2 h = 5 Ah; E = V·I·t = 1.1·2.5·2 = 5.5 Wh.
    let c = chem("daniell");
    let cfg = EstimatorConfig::for_channel(1, 10.0, 298.15);
    let (state, _) = feed(&c, &cfg, &constant(Some(2.5), 1.1, 7200, 1));
    assert!((state.charge_ah - 5.0).abs() < 1e-9, "{}", state.charge_ah);
    assert!((state.energy_wh - 5.5).abs() < 1e-9);
}

#[test]
fn faraday_hydrogen_one_amp_hour() {
    // Faraday's law n = I·t/(zF): 1 A · 3600 s / (2 · 96485.33212 C/mol)
    // = 0.0186553 mol H2 (computed by hand with the SI 2019 F).
    let c = chem("hydrogen-oxygen");
    let cfg = EstimatorConfig::for_channel(1, 0.0, 333.15);
    let (state, _) = feed(&c, &cfg, &constant(Some(1.0), 1.8, 3600, 1));
    let h2 = hydrogen_account(&state, &cfg);
    assert!(
        (h2.hydrogen_mol - 0.018655).abs() < 1e-6,
        "{}",
        h2.hydrogen_mol
    );
    // Ideal gas at 0 °C, 1 atm: 22.414 L/mol → 0.41813 L.
    assert!((h2.hydrogen_normal_litres - 0.41813).abs() < 1e-4);
    assert!((h2.oxygen_mol - 0.0093277).abs() < 1e-6);
    // 1.8 Wh for 0.037606 g → 47.86 kWh/kg (by hand: 1.8e-3 / 3.7606e-5).
    assert!((h2.specific_energy_kwh_per_kg.unwrap() - 47.86).abs() < 0.02);
    // Voltage efficiency against the thermoneutral voltage: 1.481 / 1.8.
    let eff = driven_voltage_efficiency(c.thermoneutral_volts().unwrap(), 1.8).unwrap();
    assert!((eff - 0.8229).abs() < 1e-3);
    // A stack of 10 cells makes ten times the hydrogen for the same current.
    let cfg10 = EstimatorConfig {
        cells_in_series: 10,
        ..cfg.clone()
    };
    assert!((hydrogen_account(&state, &cfg10).hydrogen_mol - 0.18655).abs() < 1e-5);
}

#[test]
fn linear_ramp_energy_closed_form() {
    // V(t) = 1.0 + 0.5·t/T at constant 2 A for T = 1 h: E = I·(V0+V1)/2·T = 2.5 Wh.
    // The trapezoid rule is exact for a linear integrand.
    let c = chem("daniell");
    let cfg = EstimatorConfig::for_channel(1, 10.0, 298.15);
    let inputs: Vec<_> = (0..=3600)
        .map(|k| EstimatorInput {
            time_ns: k * S,
            stack_volts: 1.0 + 0.5 * k as f64 / 3600.0,
            amps: Some(2.0),
            temp_k: None,
        })
        .collect();
    let (state, _) = feed(&c, &cfg, &inputs);
    assert!((state.energy_wh - 2.5).abs() < 1e-9);
}

#[test]
fn constructed_cycle_efficiencies_are_exact() {
    // 1 h charge at 2 A, 1.2 V; 1 h discharge at 1.8 A, 1.0 V; then a charge
    // starts and closes the cycle. CE = 1.8/2 = 0.9, EE = 1.8/2.4 = 0.75,
    // VE = 1.0/1.2.
    let c = chem("daniell");
    let cfg = EstimatorConfig {
        gap_limit_s: 10.0,
        ..EstimatorConfig::for_channel(1, 10.0, 298.15)
    };
    // A test starts from rest (1 ns before the charge: nothing counted);
    // a run whose first reading is under current is a partial cycle.
    let mut inputs = vec![EstimatorInput {
        time_ns: -1,
        stack_volts: 1.1,
        amps: Some(0.0),
        temp_k: None,
    }];
    for k in 0..=3600 {
        inputs.push(EstimatorInput {
            time_ns: k * S,
            stack_volts: 1.2,
            amps: Some(2.0),
            temp_k: None,
        });
    }
    // The current changes between two readings; the trapezoid across that
    // step would mix both segments, so the step is taken 1 ns wide.
    let t1 = 3600 * S + 1;
    for k in 0..=3600 {
        inputs.push(EstimatorInput {
            time_ns: t1 + k * S,
            stack_volts: 1.0,
            amps: Some(-1.8),
            temp_k: None,
        });
    }
    let t2 = t1 + 3600 * S + 1;
    inputs.push(EstimatorInput {
        time_ns: t2,
        stack_volts: 1.2,
        amps: Some(2.0),
        temp_k: None,
    });
    let (_, out) = feed(&c, &cfg, &inputs);
    let cycle = out
        .last()
        .unwrap()
        .cycle_closed
        .clone()
        .expect("cycle closed");
    assert!((cycle.coulombic_efficiency.unwrap() - 0.9).abs() < 1e-6);
    assert!((cycle.energy_efficiency.unwrap() - 0.75).abs() < 1e-6);
    assert!((cycle.voltage_efficiency.unwrap() - 1.0 / 1.2).abs() < 1e-9);
    assert_eq!(cycle.index, 1);
}

#[test]
fn current_sign_conventions_give_identical_outputs() {
    let c = chem("vanadium-redox");
    let cfg = EstimatorConfig::for_channel(1, 5.0, 298.15);
    let physical: Vec<_> = (0..600)
        .map(|k| {
            (
                k * S,
                1.35 + 1e-4 * k as f64,
                if k < 300 { 2.0 } else { -1.5 },
            )
        })
        .collect();
    let run = |sign: CurrentSign| {
        let inputs: Vec<_> = physical
            .iter()
            .map(|&(t, v, i_charge)| {
                let instrument = match sign {
                    CurrentSign::ChargePositive => i_charge,
                    CurrentSign::DischargePositive => -i_charge,
                };
                EstimatorInput {
                    time_ns: t,
                    stack_volts: v,
                    amps: Some(sign.to_charge_positive(instrument)),
                    temp_k: None,
                }
            })
            .collect();
        feed(&c, &cfg, &inputs).1
    };
    assert_eq!(
        run(CurrentSign::ChargePositive),
        run(CurrentSign::DischargePositive)
    );
}

#[test]
fn gaps_are_reported_not_integrated() {
    let c = chem("daniell");
    let cfg = EstimatorConfig {
        gap_limit_s: 60.0,
        ..EstimatorConfig::for_channel(1, 10.0, 298.15)
    };
    let inputs = [
        EstimatorInput {
            time_ns: 0,
            stack_volts: 1.1,
            amps: Some(1.0),
            temp_k: None,
        },
        EstimatorInput {
            time_ns: 10 * S,
            stack_volts: 1.1,
            amps: Some(1.0),
            temp_k: None,
        },
        EstimatorInput {
            time_ns: 1000 * S,
            stack_volts: 1.1,
            amps: Some(1.0),
            temp_k: None,
        },
    ];
    let (state, out) = feed(&c, &cfg, &inputs);
    assert!(out[2].gap && !out[1].gap);
    assert_eq!(state.gaps, 1);
    assert!((state.charge_ah - 10.0 / 3600.0).abs() < 1e-12);
}

#[test]
fn first_reading_step_zero_capacity_and_missing_current() {
    let c = chem("daniell");
    // A large current at the very first reading: nothing to difference, no R.
    let cfg = EstimatorConfig::for_channel(1, 10.0, 298.15);
    let mut state = EstimatorState::default();
    let first = step(
        &c,
        &cfg,
        &mut state,
        EstimatorInput {
            time_ns: 0,
            stack_volts: 1.2,
            amps: Some(5.0),
            temp_k: None,
        },
    )
    .unwrap();
    assert_eq!(first.resistance_ohm, None);
    // Under 5 A with no known resistance the voltage is no OCV: ΔG, Q and
    // SOC are unknown, not read off the terminal voltage.
    assert_eq!(first.ocv_source, OcvSource::None);
    assert_eq!(first.delta_g_kj_per_mol(), None);
    assert_eq!(first.soc_model, None);
    assert_eq!(first.driving_force_volts, None);
    assert_eq!(first.soc_method, SocMethod::Unanchored);
    assert_eq!(first.soc_fused, None);
    // Zero capacity: counting still runs, but no counted SOC; under 1 A
    // with no resistance there is no OCV to read SOC from, at rest there is.
    let cfg0 = EstimatorConfig::for_channel(1, 0.0, 298.15);
    let (_, out) = feed(&c, &cfg0, &constant(Some(1.0), 1.05, 60, 1));
    assert!(out.iter().all(|e| e.soc_counted.is_none()
        && e.soc_fused.is_none()
        && e.soc_method == SocMethod::None));
    let (_, out) = feed(&c, &cfg0, &constant(Some(0.0), 1.05, 60, 1));
    assert!(out.iter().all(|e| e.soc_method == SocMethod::Model
        && e.soc_fused.is_some_and(f64::is_finite)
        && e.ocv_source == OcvSource::Rest));
    // Missing current: model SOC only, nothing counted, never NaN.
    let (state, out) = feed(&c, &cfg, &constant(None, 1.05, 60, 1));
    assert_eq!(state.charge_ah, 0.0);
    assert!(out.iter().all(|e| !e.resting
        && e.soc_method == SocMethod::Model
        && e.soc_fused.unwrap().is_finite()));
}

/// A 10-cycle simulated run of a vanadium cell with rests: known R,
/// first-order polarisation, noise.
#[test]
fn simulated_run_tracks_truth() {
    let c = chem("vanadium-redox");
    let params = SimCellParams {
        cells_in_series: 1,
        capacity_ah: 2.0,
        resistance_ohm: 0.05,
        polarisation_ohm: 0.02,
        polarisation_tau_s: 30.0,
        noise_volts: 0.0005,
        temp_k: 298.15,
        temp_swing_k: 0.0,
        temp_period_s: 0.0,
        tafel_volts: 0.0,
        exchange_amps: 0.0,
    };
    let mut cell = SimCell::new(params.clone(), 0.5, 7);
    let mut schedule = CycleSchedule::new(2.0, 2.0, 0.15, 0.85, 900.0);
    let cfg = EstimatorConfig::for_channel(1, params.capacity_ah, params.temp_k);
    let mut state = EstimatorState::default();
    let dt_s = 1.0;
    let mut worst_soc_error: f64 = 0.0;
    let mut worst_dg_compensated: f64 = 0.0;
    let mut worst_dg_raw_under_current: f64 = 0.0;
    let mut cycles = 0;
    let mut t_ns = 0i64;
    let mut anchored = false;
    while cycles < 10 {
        let amps = schedule.amps(cell.soc, dt_s);
        let sample = cell.step(&c, amps, dt_s);
        t_ns += S;
        let est = step(
            &c,
            &cfg,
            &mut state,
            EstimatorInput {
                time_ns: t_ns,
                stack_volts: sample.stack_volts,
                amps: Some(sample.amps),
                temp_k: Some(sample.temp_k),
            },
        )
        .unwrap();
        if est.cycle_closed.is_some() {
            cycles += 1;
        }
        anchored |= est.rest_settled;
        if anchored {
            worst_soc_error = worst_soc_error.max((est.soc_fused.unwrap() - sample.true_soc).abs());
        }
        let truth_dg = crate::sim::true_delta_g_kj_per_mol(&c, &sample, 1);
        if amps != 0.0 && state.resistance.is_some_and(|r| r.samples >= 2) {
            worst_dg_compensated = worst_dg_compensated
                .max((est.evaluation.thermo.delta_g_kj_per_mol - truth_dg).abs());
            let raw_dg = electrochem::thermo::delta_g_kj_per_mol(c.n_electrons, sample.stack_volts);
            worst_dg_raw_under_current = worst_dg_raw_under_current.max((raw_dg - truth_dg).abs());
        }
    }
    let r = state.resistance.expect("resistance estimated");
    // Estimated R within 5 % of the true ohmic resistance.
    assert!(
        (r.ohm - 0.05).abs() / 0.05 < 0.05,
        "R = {} ± {}",
        r.ohm,
        r.uncertainty_ohm
    );
    // Fused SOC within 2 percentage points throughout (after the first settled rest).
    assert!(worst_soc_error < 0.02, "worst SOC error {worst_soc_error}");
    // Compensated ΔG within 0.5 kJ/mol of the truth while current flows...
    assert!(
        worst_dg_compensated < 0.5,
        "compensated ΔG error {worst_dg_compensated}"
    );
    // ...where the raw terminal voltage is visibly off (2 A · 70 mΩ · F ≈ 13.5 kJ/mol).
    assert!(
        worst_dg_raw_under_current > 5.0,
        "raw ΔG error {worst_dg_raw_under_current}"
    );
}

#[test]
fn rest_window_stays_bounded() {
    let c = chem("daniell");
    let cfg = EstimatorConfig::for_channel(1, 1.0, 298.15);
    let mut state = EstimatorState::default();
    for k in 0..100_000i64 {
        step(
            &c,
            &cfg,
            &mut state,
            EstimatorInput {
                time_ns: k * 1_000_000,
                stack_volts: 1.1,
                amps: Some(0.0),
                temp_k: None,
            },
        )
        .unwrap();
    }
    assert!(state.rest_window.len() <= REST_WINDOW_MAX_POINTS + 1);
}

/// A known truth: vanadium at SOC 0.30 (OCV from its own Nernst model),
/// charged at 1 A with 50 mV of overpotential, then rested at the OCV.
#[test]
fn soc_is_unknown_under_load_until_a_settled_rest_anchors_it() {
    let c = chem("vanadium-redox");
    let cfg = EstimatorConfig::for_channel(1, 2.0, 298.15);
    let ctx = electrochem::NernstContext {
        n_electrons: c.n_electrons,
        e_standard_volts: c.standard_potential().e_standard_298_volts,
        temp_k: 298.15,
    };
    let ocv = c.soc_model.ocv_volts(0.30, ctx).unwrap();
    let mut inputs = constant(Some(1.0), ocv + 0.05, 30, 1);
    // 1 A for 30 s into 2 Ah: +0.4167 SOC points during the load.
    let ocv_after = c
        .soc_model
        .ocv_volts(0.30 + 30.0 / 3600.0 / 2.0, ctx)
        .unwrap();
    inputs.extend(
        constant(Some(0.0), ocv_after, 120, 1)
            .into_iter()
            .map(|mut i| {
                i.time_ns += 31 * S;
                i
            }),
    );
    let (_, out) = feed(&c, &cfg, &inputs);
    for e in &out[..31] {
        assert_eq!((e.soc_fused, e.soc_method), (None, SocMethod::Unanchored));
    }
    let first_settled = out
        .iter()
        .position(|e| e.rest_settled)
        .expect("the rest settles");
    let anchored = &out[first_settled];
    let truth = 0.30 + 30.0 / 3600.0 / 2.0;
    assert!(
        (anchored.soc_fused.unwrap() - truth).abs() < 0.01,
        "{anchored:?}"
    );
}

#[test]
fn a_known_resistance_or_an_operator_anchors_under_load_and_the_count_shows_its_overrun() {
    let c = chem("vanadium-redox");
    let mut cfg = EstimatorConfig::for_channel(1, 1.0, 298.15);
    cfg.resistance_ohm = Some(0.05);
    // With R configured, V − I·R anchors at once.
    let (_, out) = feed(&c, &cfg, &constant(Some(1.0), 1.45, 10, 1));
    assert_eq!(out[0].soc_method, SocMethod::Anchored);
    // An operator's 0.99, then an hour at 1 A into 1 Ah: the count runs past 1.
    cfg.resistance_ohm = None;
    let mut state = EstimatorState::default();
    anchor_at(&mut state, 0.99, 0);
    let mut last = None;
    for input in constant(Some(1.0), 1.5, 3600, 10) {
        last = Some(step(&c, &cfg, &mut state, input).unwrap());
    }
    let last = last.unwrap();
    assert_eq!(last.soc_fused, Some(1.0));
    // 0.99 + 1 Ah / 1 Ah = 1.99 (coulombic efficiency 1).
    assert!(
        (last.soc_counted_unclamped.unwrap() - 1.99).abs() < 1e-6,
        "{last:?}"
    );
}

#[test]
fn operating_mode_follows_current_and_chemistry() {
    use OperatingMode as M;
    let cases = [
        ((true, false, true, false), Some(M::Charge)),
        ((false, true, true, false), Some(M::Discharge)),
        ((false, false, true, false), Some(M::Rest)),
        ((true, false, true, true), Some(M::Electrolysis)),
        ((false, true, true, true), Some(M::FuelCell)),
        ((false, false, true, true), Some(M::OpenCircuit)),
        ((false, false, false, true), None),
    ];
    for ((charging, discharging, has_current, water), want) in cases {
        assert_eq!(
            OperatingMode::of(charging, discharging, has_current, water),
            want
        );
    }
}

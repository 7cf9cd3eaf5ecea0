use super::*;
use crate::sim::Rng;

const S: i64 = 1_000_000_000;

fn rules() -> AlertRules {
    AlertRules::defaults_for(1.0, 1.65)
}

fn quiet(time_s: i64) -> RuleInput {
    RuleInput {
        delta_g_kj_per_mol: Some(-125.0),
        soc: Some(0.5),
        ..RuleInput::reading_only(time_s * S, time_s as u64, 1.3, Some(0.0), Some(25.0))
    }
}

/// Raised by a settled rest 20 mV off the model, kept between rests (no
/// input), cleared by a rest that agrees to 5 mV.
#[test]
fn an_ocv_model_gap_raises_once_and_clears_at_an_agreeing_rest() {
    let rules = AlertRules::defaults_for(1.0, 1.6);
    let at = |t: i64, gap: Option<f64>| RuleInput {
        ocv_model_gap_volts: gap,
        ..quiet(t)
    };
    let changes = run(
        &rules,
        &[
            at(1, Some(0.012)),
            at(2, Some(-0.020)),
            at(3, None),
            at(4, Some(0.005)),
        ],
    );
    let kinds: Vec<_> = changes
        .iter()
        .filter_map(|c| match c {
            AlertChange::Raise(a) if a.kind == AlertKind::OcvModelMismatch => {
                Some(("raise", a.time_ns / S, a.trigger_value))
            }
            AlertChange::Clear { kind, time_ns } if *kind == AlertKind::OcvModelMismatch => {
                Some(("clear", time_ns / S, 0.0))
            }
            _ => None,
        })
        .collect();
    assert_eq!(kinds, [("raise", 2, -0.020), ("clear", 4, 0.0)]);
}

fn run(rules: &AlertRules, inputs: &[RuleInput]) -> Vec<AlertChange> {
    let mut state = ChannelRuleState::default();
    inputs
        .iter()
        .flat_map(|i| evaluate(rules, &mut state, i))
        .collect()
}

fn raised(changes: &[AlertChange], kind: AlertKind) -> Vec<&RaisedAlert> {
    changes
        .iter()
        .filter_map(|c| match c {
            AlertChange::Raise(r) if r.kind == kind => Some(r),
            _ => None,
        })
        .collect()
}

fn cleared(changes: &[AlertChange], kind: AlertKind) -> usize {
    changes
        .iter()
        .filter(|c| matches!(c, AlertChange::Clear { kind: k, .. } if *k == kind))
        .count()
}

#[test]
fn noisy_charge_raises_once_and_clears_once() {
    // SOC rises through 0.95 with ±1 % noise, then the cell discharges.
    let r = rules();
    let mut rng = Rng::new(3);
    let mut inputs = Vec::new();
    for k in 0..2000 {
        let true_soc = (0.80 + 0.0001 * k as f64).min(0.97);
        let mut i = quiet(k);
        i.soc = Some(true_soc + 0.01 * (rng.uniform() - 0.5) * 2.0);
        i.charging = true;
        i.amps = Some(1.0);
        inputs.push(i);
    }
    for k in 2000..4000 {
        let mut i = quiet(k);
        i.soc = Some(0.97 - 0.0001 * (k - 2000) as f64 + 0.01 * (rng.uniform() - 0.5) * 2.0);
        i.discharging = true;
        i.amps = Some(-1.0);
        inputs.push(i);
    }
    let changes = run(&r, &inputs);
    assert_eq!(raised(&changes, AlertKind::EndOfCharge).len(), 1);
    assert_eq!(cleared(&changes, AlertKind::EndOfCharge), 1);
}

#[test]
fn hysteresis_alone_prevents_chatter() {
    let mut r = rules();
    r.end_of_charge_soc = Threshold::new(0.95, 0.90, 0.0);
    // Oscillates between 0.96 and 0.92: past raise, never past clear.
    let inputs: Vec<_> = (0..100)
        .map(|k| {
            let mut i = quiet(k);
            i.charging = true;
            i.soc = Some(if k % 2 == 0 { 0.96 } else { 0.92 });
            i
        })
        .collect();
    let changes = run(&r, &inputs);
    assert_eq!(raised(&changes, AlertKind::EndOfCharge).len(), 1);
    assert_eq!(cleared(&changes, AlertKind::EndOfCharge), 0);
    // Without hysteresis (clear = raise) the same signal chatters.
    r.end_of_charge_soc = Threshold::new(0.95, 0.95, 0.0);
    let changes = run(&r, &inputs);
    assert!(raised(&changes, AlertKind::EndOfCharge).len() > 10);
}

#[test]
fn hold_time_alone_debounces() {
    let mut r = rules();
    r.end_of_charge_soc = Threshold::new(0.95, 0.95, 5.0);
    let spike = |len: i64| -> Vec<RuleInput> {
        (0..20)
            .map(|k| {
                let mut i = quiet(k);
                i.charging = true;
                i.soc = Some(if (5..5 + len).contains(&k) {
                    0.96
                } else {
                    0.90
                });
                i
            })
            .collect()
    };
    // Past the threshold for 4 s (readings at 5..=8): shorter than the hold.
    assert!(raised(&run(&r, &spike(4)), AlertKind::EndOfCharge).is_empty());
    // For 6 s: raised once, at the reading 5 s after the first.
    let long = run(&r, &spike(7));
    let alerts = raised(&long, AlertKind::EndOfCharge);
    assert_eq!(alerts.len(), 1);
    assert_eq!(alerts[0].seq, 10);
}

#[test]
fn end_of_charge_lead_time() {
    let mut r = rules();
    r.end_of_charge_lead_s = 600.0;
    r.end_of_charge_soc.hold_s = 0.0;
    // SOC 0.90 rising at 1e-4/s: 500 s to 0.95 → inside the 600 s lead.
    let mut i = quiet(0);
    i.charging = true;
    i.soc = Some(0.90);
    i.soc_rate_per_s = Some(1e-4);
    let changes = run(&r, &[i]);
    let a = raised(&changes, AlertKind::EndOfCharge);
    assert_eq!(a.len(), 1);
    assert!((a[0].seconds_to_target.unwrap() - 500.0).abs() < 1e-6);
    // SOC is reported in percent, in the fields and in the words.
    assert_eq!(a[0].unit, "%");
    assert!((a[0].trigger_value - 90.0).abs() < 1e-9 && (a[0].threshold - 95.0).abs() < 1e-9);
    assert_eq!(
        a[0].message,
        "end of charge in about 500 s (SOC 90.0 %, target 95.0 %)"
    );
}

#[test]
fn every_kind_from_a_constructed_sequence() {
    let r = rules();
    // Equilibrium: |ΔG| 0.5 kJ/mol for 10 s (hold 10 s) → raised at t = 10.
    let eq: Vec<_> = (0..=10)
        .map(|k| RuleInput {
            delta_g_kj_per_mol: Some(-0.5),
            ..quiet(k)
        })
        .collect();
    let c = run(&r, &eq);
    assert_eq!(raised(&c, AlertKind::EquilibriumApproach).len(), 1);
    assert_eq!(raised(&c, AlertKind::EquilibriumApproach)[0].seq, 10);

    // End of charge by voltage cutoff (1.65 V, hold 2 s), no SOC.
    let eoc: Vec<_> = (0..=3)
        .map(|k| RuleInput {
            cell_volts_terminal: 1.66,
            soc: None,
            charging: true,
            ..quiet(k)
        })
        .collect();
    let c = run(&r, &eoc);
    assert_eq!(raised(&c, AlertKind::EndOfCharge)[0].seq, 2);

    // End of discharge by SOC 0.04 (floor 0.05, hold 5 s).
    let eod: Vec<_> = (0..=5)
        .map(|k| RuleInput {
            soc: Some(0.04),
            discharging: true,
            ..quiet(k)
        })
        .collect();
    assert_eq!(raised(&run(&r, &eod), AlertKind::EndOfDischarge)[0].seq, 5);

    // Rest settled: 0.5 mV/min for 60 s of rest.
    let rest: Vec<_> = (0..=60)
        .map(|k| RuleInput {
            resting: true,
            dv_dt_mv_per_min: Some(0.5),
            ..quiet(k)
        })
        .collect();
    assert_eq!(raised(&run(&r, &rest), AlertKind::RestSettled)[0].seq, 60);

    // Limits: raised at the first reading outside, critical.
    let over = [RuleInput {
        cell_volts_terminal: 1.71,
        ..quiet(0)
    }];
    let c = run(&r, &over);
    let v = raised(&c, AlertKind::VoltageLimit);
    assert_eq!((v.len(), v[0].severity), (1, Severity::Critical));
    let hot = [RuleInput {
        temp_c: Some(75.0),
        ..quiet(0)
    }];
    assert_eq!(raised(&run(&r, &hot), AlertKind::TemperatureLimit).len(), 1);
    let mut r_amps = r;
    r_amps.max_abs_amps = 10.0;
    let surge = [RuleInput {
        amps: Some(-12.0),
        ..quiet(0)
    }];
    assert_eq!(
        raised(&run(&r_amps, &surge), AlertKind::CurrentLimit).len(),
        1
    );

    // Silent rig: usual interval 1 s, multiple 10, minimum 30 s.
    assert!(!is_silent(0, 29 * S, 1.0, &r));
    assert!(is_silent(0, 31 * S, 1.0, &r));
    let mut state = ChannelRuleState::default();
    assert!(raise_silent(&mut state, 0, 31 * S, 7).is_some());
    assert!(raise_silent(&mut state, 0, 32 * S, 7).is_none());
    let back = evaluate(&r, &mut state, &quiet(40));
    assert_eq!(cleared(&back, AlertKind::SilentRig), 1);
}

#[test]
fn restored_state_does_not_raise_again() {
    let r = rules();
    let mut state = ChannelRuleState::with_active([AlertKind::VoltageLimit]);
    let c = evaluate(
        &r,
        &mut state,
        &RuleInput {
            cell_volts_terminal: 1.75,
            ..quiet(0)
        },
    );
    assert!(raised(&c, AlertKind::VoltageLimit).is_empty());
}

#[test]
fn rules_validate_names_field() {
    let mut r = rules();
    r.end_of_charge_soc.clear_at = 0.99;
    assert!(
        r.validate()
            .unwrap_err()
            .to_string()
            .contains("end_of_charge_soc.clear_at = 0.99")
    );
    let mut r = rules();
    r.max_temp_c = f64::NAN;
    assert!(
        r.validate()
            .unwrap_err()
            .to_string()
            .contains("max_temp_c = NaN")
    );
}

#[test]
fn distinct_shows_enough_digits_to_tell_a_value_from_its_limit() {
    assert_eq!(distinct(70.004, 70.0, 1), "70.004");
    assert_eq!(distinct(70.0, 70.004, 1), "70.000");
    assert_eq!(distinct(71.5, 70.0, 1), "71.5");
    assert_eq!(distinct(-20.0, 71.5, 1), "-20.0");
}

#[test]
fn every_kind_has_its_own_rule_state_slot() {
    for (i, kind) in AlertKind::ALL.into_iter().enumerate() {
        assert_eq!(kind as usize, i, "{kind:?}");
    }
    let mut state = ChannelRuleState::with_active([AlertKind::Timeline]);
    assert!(state.is_active(AlertKind::Timeline));
    assert!(!state.is_active(AlertKind::SilentRig));
    state
        .rules
        .insert(AlertKind::Timeline, RuleState::default());
    assert!(AlertKind::ALL.into_iter().all(|k| !state.is_active(k)));
}

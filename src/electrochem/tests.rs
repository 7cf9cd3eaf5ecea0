//! Reference checks of the built-ins and property tests of the whole core.

use super::*;
use proptest::prelude::*;

fn chem(id: &str) -> Arc<Chemistry> {
    Registry::builtin().get(id).unwrap()
}

fn at(id: &str, volts: f64, temp_k: f64) -> Evaluation {
    evaluate(
        &chem(id),
        EvalRequest {
            stack_volts: volts,
            cells_in_series: 1,
            temp_k,
            equilibrium_tolerance_volts: 1e-3,
        },
    )
    .unwrap()
}

#[test]
fn every_builtin_validates_and_is_listed() {
    let reg = Registry::builtin();
    assert_eq!(reg.iter().count(), builtin::BUILTIN_IDS.len());
    for id in builtin::BUILTIN_IDS {
        let c = reg.get(id).unwrap();
        assert!(!c.sources.is_empty(), "{id} names no source");
    }
}

/// E° of each built-in against the CRC Handbook electrochemical series
/// (standard reduction potentials at 298.15 K; the half-cell values are
/// typed from memory of that table, tolerance 2 mV).
#[test]
fn standard_potentials_against_crc_series() {
    let rows: [(&str, f64, &str); 5] = [
        (
            "daniell",
            0.3419 - (-0.7618),
            "CRC: Cu2+/Cu 0.3419, Zn2+/Zn -0.7618",
        ),
        (
            "vanadium-redox",
            0.991 - (-0.255),
            "CRC: VO2+/VO2+ 0.991, V3+/V2+ -0.255",
        ),
        (
            "iron-chromium",
            0.771 - (-0.407),
            "CRC: Fe3+/Fe2+ 0.771, Cr3+/Cr2+ -0.407",
        ),
        (
            "zinc-bromine",
            1.0873 - (-0.7618),
            "CRC: Br2(aq)/Br- 1.0873, Zn2+/Zn -0.7618",
        ),
        ("hydrogen-oxygen", 1.229, "CRC: O2/H2O 1.229, H+/H2 0"),
    ];
    for (id, expected, source) in rows {
        let e = chem(id).e_standard_298_volts;
        assert!(
            (e - expected).abs() < 2e-3,
            "{id}: {e} vs {expected} ({source})"
        );
    }
}

#[test]
fn daniell_equilibrium_constant() {
    // Textbook worked example: log10 K ≈ 37.3 for Zn + Cu2+ at 298.15 K.
    let ev = at("daniell", 1.10, 298.15);
    assert!(
        (ev.thermo.log10_k() - 37.3).abs() < 0.05,
        "{}",
        ev.thermo.log10_k()
    );
    assert_eq!(ev.thermo.state, ReactionState::Spontaneous);
}

#[test]
fn hydrogen_oxygen_temperature_and_thermoneutral() {
    let c = chem("hydrogen-oxygen");
    // CODATA key values (see builtin.rs): dE°/dT = ΔS°/2F ≈ −0.846 mV/K,
    // thermoneutral −ΔH°/2F = 1.481 V.
    assert!((c.de_dt_volts_per_k * 1e3 + 0.846).abs() < 0.002);
    assert!((c.thermoneutral_volts().unwrap() - 1.481).abs() < 1e-3);
    // At 80 °C the reversible voltage is ≈1.18 V (electrolyser texts, from memory).
    let hot = at("hydrogen-oxygen", 1.8, 353.15);
    assert!((hot.thermo.e_standard_volts - 1.183).abs() < 2e-3);
    assert_eq!(hot.soc, None);
    assert_eq!(hot.soc_model, "none");
}

#[test]
fn vanadium_proton_term_matters() {
    let c = chem("vanadium-redox");
    let mid = evaluate_at_soc(&c, 0.5, 1, 298.15, 1e-3).unwrap();
    // Hand computation: E = 1.246 + (RT/F)[2 ln(0.816/0.816)... ] with
    // V(V)=V(II)=0.816, V(IV)=V(III)=0.816, H+ = 4.8 mol/L:
    // E = 1.246 + 2·0.025693·ln 4.8 = 1.3266 V.
    assert!(
        (mid.thermo.cell_volts - 1.3266).abs() < 5e-4,
        "{}",
        mid.thermo.cell_volts
    );
    // The ideal form without protons, E = E° + 2(RT/F) ln(s/(1−s)), reads
    // that voltage as s = 1/(1 + exp(−ΔE/(2RT/F))) ≈ 0.83.
    let thermal = constants::thermal_volts(298.15);
    let ideal_soc = 1.0 / (1.0 + (-(mid.thermo.cell_volts - 1.246) / (2.0 * thermal)).exp());
    assert!((ideal_soc - 0.83).abs() < 0.01, "{ideal_soc}");
}

/// E° and ΔS° must describe one written reaction. From the NBS tables
/// (Wagman 1982, values from memory): the bisulfate form gives E° and
/// ΔS° both; the sulfate form's E° (the CRC series) pairs with a ΔS°
/// six times larger, so mixing the two forms is caught here.
#[test]
fn lead_acid_potential_and_entropy_belong_to_one_reaction() {
    let f = crate::electrochem::constants::FARADAY_C_PER_MOL;
    // ΔfG°, kJ/mol: PbSO4 −813.14, H2O(l) −237.13, PbO2 −217.33, HSO4− −755.91.
    let dg_bisulfate = 2.0 * -813.14 + 2.0 * -237.13 - (-217.33 + 2.0 * -755.91);
    // S°, J/(mol K): PbSO4 148.5, H2O(l) 69.91, Pb 64.81, PbO2 68.6, HSO4− 131.8.
    let ds_bisulfate = 2.0 * 148.5 + 2.0 * 69.91 - (64.81 + 68.6 + 2.0 * 131.8);
    let c = chem("lead-acid");
    assert!(c.reaction.contains("HSO4-"));
    assert!((c.e_standard_298_volts - (-dg_bisulfate * 1e3 / (2.0 * f))).abs() < 1e-3);
    assert!((c.de_dt_volts_per_k - ds_bisulfate / (2.0 * f)).abs() < 1e-6);
    // The sulfate form (CRC: PbO2/PbSO4 1.6913, PbSO4/Pb −0.3588 V) is a
    // different reaction: 125 mV higher.
    assert!(((1.6913 + 0.3588) - c.e_standard_298_volts - 0.1255).abs() < 2e-3);
}

#[test]
fn lead_acid_specific_gravity_rule() {
    // Rule of thumb (common practice): OCV ≈ 0.84 + SG; full SG 1.28 → 2.12 V.
    let c = chem("lead-acid");
    let full = evaluate_at_soc(&c, 1.0, 6, 298.15, 1e-3).unwrap();
    assert!((full.thermo.cell_volts - 2.12).abs() < 1e-9);
    // A 12 V battery is six cells: 12.72 V at rest when full.
    let ev = evaluate(
        &c,
        EvalRequest {
            stack_volts: 12.72,
            cells_in_series: 6,
            temp_k: 298.15,
            equilibrium_tolerance_volts: 1e-3,
        },
    )
    .unwrap();
    assert!((ev.soc.unwrap() - 1.0).abs() < 1e-9 && !ev.soc_clamped);
}

#[test]
fn stack_voltage_is_divided_per_cell() {
    let c = chem("hydrogen-oxygen");
    let one = evaluate(
        &c,
        EvalRequest {
            stack_volts: 1.9,
            cells_in_series: 1,
            temp_k: 330.0,
            equilibrium_tolerance_volts: 1e-3,
        },
    )
    .unwrap();
    let ten = evaluate(
        &c,
        EvalRequest {
            stack_volts: 19.0,
            cells_in_series: 10,
            temp_k: 330.0,
            equilibrium_tolerance_volts: 1e-3,
        },
    )
    .unwrap();
    assert_eq!(one.thermo, ten.thermo);
}

#[test]
fn out_of_range_voltage_clamps_with_flag() {
    let high = at("daniell", 5.0, 298.15);
    assert_eq!(high.soc, Some(1.0));
    assert!(high.soc_clamped);
    let low = at("daniell", 0.2, 298.15);
    assert_eq!(low.soc, Some(0.0));
    assert!(low.soc_clamped);
}

#[test]
fn bad_inputs_are_specific_errors() {
    let c = chem("daniell");
    let req = EvalRequest {
        stack_volts: 1.1,
        cells_in_series: 1,
        temp_k: 298.15,
        equilibrium_tolerance_volts: 1e-3,
    };
    let cases: [(EvalRequest, &str); 6] = [
        (
            EvalRequest {
                stack_volts: f64::NAN,
                ..req
            },
            "volts = NaN",
        ),
        (
            EvalRequest {
                stack_volts: f64::INFINITY,
                ..req
            },
            "volts = inf",
        ),
        (
            EvalRequest {
                stack_volts: f64::NEG_INFINITY,
                ..req
            },
            "volts = -inf",
        ),
        (EvalRequest { temp_k: 0.0, ..req }, "temp_k = 0"),
        (
            EvalRequest {
                temp_k: -5.0,
                ..req
            },
            "temp_k = -5",
        ),
        (
            EvalRequest {
                cells_in_series: 0,
                ..req
            },
            "cells_in_series = 0",
        ),
    ];
    for (bad, expected) in cases {
        let err = evaluate(&c, bad).unwrap_err().to_string();
        assert!(err.contains(expected), "{err} should contain {expected}");
    }
    let err = evaluate_at_soc(&c, 1.5, 1, 298.15, 1e-3)
        .unwrap_err()
        .to_string();
    assert!(err.contains("soc = 1.5"), "{err}");
    let err = evaluate_at_soc(&chem("hydrogen-oxygen"), 0.5, 1, 298.15, 1e-3)
        .unwrap_err()
        .to_string();
    assert!(err.contains("no SOC model"), "{err}");
    let err = Registry::builtin()
        .get("unobtainium")
        .unwrap_err()
        .to_string();
    assert!(err.contains("unobtainium"), "{err}");
}

#[test]
fn n_zero_is_refused() {
    let mut spec = builtin::builtin_specs().remove(0);
    spec.n_electrons = 0;
    assert!(
        spec.validate(false)
            .unwrap_err()
            .to_string()
            .contains("n_electrons = 0")
    );
}

#[test]
fn builtin_ids_cannot_be_replaced() {
    let mut reg = Registry::builtin();
    let daniell = (*reg.get("daniell").unwrap()).clone();
    let mut user = daniell.clone();
    user.builtin = false;
    assert!(matches!(
        reg.insert_user(user),
        Err(ChemistryError::DuplicateChemistry(_))
    ));
}

fn soc_model_ids() -> Vec<&'static str> {
    builtin::BUILTIN_IDS
        .into_iter()
        .filter(|id| !matches!(chem(id).soc_model, SocModel::None))
        .collect()
}

#[test]
fn ocv_rises_strictly_with_soc() {
    for id in soc_model_ids() {
        let c = chem(id);
        for temp_k in [273.15, 298.15, 353.15] {
            let mut previous = f64::MIN;
            for k in 0..=1000 {
                let ev = evaluate_at_soc(&c, k as f64 / 1000.0, 1, temp_k, 1e-3).unwrap();
                assert!(
                    ev.thermo.cell_volts > previous,
                    "{id} at {temp_k} K, soc {}",
                    k as f64 / 1000.0
                );
                previous = ev.thermo.cell_volts;
            }
        }
    }
}

proptest! {
    // SOC → E → SOC for every built-in with an SOC model.
    #[test]
    fn soc_round_trip(index in 0usize..5, soc in 0.01f64..0.99, temp_k in 273.15f64..353.15, cells in 1u32..200) {
        let ids = soc_model_ids();
        let c = chem(ids[index % ids.len()]);
        let forward = evaluate_at_soc(&c, soc, cells, temp_k, 1e-3).unwrap();
        let back = evaluate(&c, EvalRequest {
            stack_volts: forward.thermo.cell_volts * f64::from(cells),
            cells_in_series: cells,
            temp_k,
            equilibrium_tolerance_volts: 1e-3,
        }).unwrap();
        prop_assert!(!back.soc_clamped);
        prop_assert!((back.soc.unwrap() - soc).abs() < 1e-9, "{} {} -> {:?}", c.id, soc, back.soc);
    }

    // No finite input produces NaN anywhere in the output.
    #[test]
    fn never_nan(index in 0usize..7, volts in -1e6f64..1e6, temp_k in 1.0f64..5000.0, cells in 1u32..1000) {
        let c = chem(builtin::BUILTIN_IDS[index]);
        let ev = evaluate(&c, EvalRequest { stack_volts: volts, cells_in_series: cells, temp_k, equilibrium_tolerance_volts: 1e-3 }).unwrap();
        let t = ev.thermo;
        for x in [t.e_standard_volts, t.delta_g_kj_per_mol, t.delta_g_standard_kj_per_mol, t.ln_q, t.ln_k, t.affinity_ln_k_over_q] {
            prop_assert!(x.is_finite());
        }
        if let Some(soc) = ev.soc {
            prop_assert!((0.0..=1.0).contains(&soc));
        }
    }
}

use super::*;
use proptest::prelude::*;

const C25: f64 = 298.15;
const C60: f64 = 333.15;
const C80: f64 = 353.15;

fn one_atm(saturated: bool) -> GasConditions {
    GasConditions {
        saturated,
        ..GasConditions::default()
    }
}

#[test]
fn saturation_pressure_follows_iapws_if97() {
    // iapws 1.5 (IAPWS97(T, x=0).P), printed by tests/reference/water_cell_cantera.py.
    for (t, bar) in [(C25, 0.031697), (C60, 0.199458), (C80, 0.474147)] {
        let p = water_saturation_pressure_bar(t);
        assert!((p - bar).abs() / bar < 2e-5, "{t} K: {p} bar vs {bar}");
    }
    // IAPWS-IF97 verification table (region 4): 300 K → 0.353658941e-2 MPa.
    assert!((water_saturation_pressure_bar(300.0) - 0.0353658941).abs() < 1e-9);
}

#[test]
fn reversible_voltage_against_cantera() {
    // Cantera 3.2 (gri30 gases at 1 atm, real water for the liquid), from
    // tests/reference/water_cell_cantera.py.
    for (t, dry, saturated) in [
        (C25, 1.2291, 1.2285),
        (C60, 1.1997, 1.1950),
        (C80, 1.1832, 1.1688),
    ] {
        let e_dry = reversible_cell_volts(t, &one_atm(false));
        let e_sat = reversible_cell_volts(t, &one_atm(true));
        assert!((e_dry - dry).abs() < 1e-3, "{t} K dry: {e_dry} vs {dry}");
        assert!(
            (e_sat - saturated).abs() < 1e-3,
            "{t} K saturated: {e_sat} vs {saturated}"
        );
    }
}

#[test]
fn thermoneutral_voltage_varies_with_temperature() {
    // Cantera 3.2 as above: HHV 1.4812 / 1.4752 / 1.4716 V, LHV 1.2532 / 1.2550 / 1.2560 V.
    for (t, hhv, lhv) in [
        (C25, 1.4812, 1.2532),
        (C60, 1.4752, 1.2550),
        (C80, 1.4716, 1.2560),
    ] {
        assert!(
            (thermoneutral_hhv_volts(t) - hhv).abs() < 1e-3,
            "{t} K HHV {}",
            thermoneutral_hhv_volts(t)
        );
        assert!(
            (thermoneutral_lhv_volts(t) - lhv).abs() < 1e-3,
            "{t} K LHV {}",
            thermoneutral_lhv_volts(t)
        );
    }
}

#[test]
fn standard_potential_matches_the_builtin_table() {
    // The built-in chemistry's E° (1.229 V) and ΔS° (−163.3 J/(mol K)) come
    // from the same CODATA values: both forms agree at 25 °C.
    assert!((standard_cell_volts(C25) - 1.229).abs() < 5e-4);
    assert!((delta_s_liquid_j_per_mol_k(C25) - (-163.3)).abs() < 0.1);
}

#[test]
fn specific_energy_bounds() {
    // 39.4 kWh/kg (HHV) and 33.3 kWh/kg (LHV) are the usual bounds quoted
    // for water electrolysis (e.g. IRENA, Green hydrogen cost reduction, 2020).
    let hhv = specific_energy_kwh_per_kg(thermoneutral_hhv_volts(C25), 1.0);
    let lhv = specific_energy_kwh_per_kg(thermoneutral_lhv_volts(C25), 1.0);
    assert!((hhv - 39.4).abs() < 0.05, "{hhv}");
    assert!((lhv - 33.3).abs() < 0.05, "{lhv}");
}

fn pem(stack_volts: f64, amps: f64) -> HydrogenFigures {
    figures(
        StackReading {
            stack_volts,
            amps,
            cells_in_series: 2,
            temp_k: C60,
        },
        &StackFacts {
            gas: one_atm(true),
            resistance_ohm: Some(0.012),
            faradaic_efficiency: 1.0,
            active_area_cm2: Some(25.0),
        },
        0.05,
    )
}

#[test]
fn faradays_law_for_the_hydrogen_rate() {
    // 20 A through 2 cells: 2·20/(2F) = 2.07285e-4 mol/s (Faraday's law);
    // · 22.414 L/mol · 60 = 0.27877 NL/min; · 2.01588 g/mol · 3.6 = 1.50430e-3 kg/h.
    let f = pem(3.4, 20.0);
    assert!(
        (f.h2_rate_mol_per_s - 2.07285e-4).abs() < 1e-9,
        "{}",
        f.h2_rate_mol_per_s
    );
    assert!((f.h2_rate_normal_litres_per_min - 0.27877).abs() < 1e-5);
    assert!((f.h2_rate_kg_per_h - 1.50430e-3).abs() < 1e-8);
    // 1.7 V per cell: 1.4755/1.7 = 0.868 on HHV; heat 20·(3.4 − 2·1.4755) W.
    assert!((f.voltage_efficiency_hhv.unwrap() - 1.4755 / 1.7).abs() < 1e-3);
    assert!((f.heat_w - 20.0 * (3.4 - 2.0 * 1.4755)).abs() < 0.02);
    assert!((f.current_density_a_per_cm2.unwrap() - 0.8).abs() < 1e-12);
    // ASR: 0.006 Ω per cell × 25 cm².
    assert!((f.area_specific_resistance_ohm_cm2.unwrap() - 0.15).abs() < 1e-12);
    // iR-free overpotential removes 20 A · 0.006 Ω per cell.
    let ir_free = f.overpotential_ir_free_volts.unwrap();
    assert!((f.overpotential_volts - ir_free - 0.12).abs() < 1e-12);
    assert_eq!(f.breach, None);
}

#[test]
fn impossible_figures_are_flagged() {
    // Electrolysis at 1.0 V per cell is below E_rev: a wrong sign or cell count.
    assert_eq!(pem(2.0, 20.0).breach, Some(BoundBreach::Reversible));
    // Between E_rev and E_tn the HHV efficiency passes 100 %: flagged.
    let f = pem(2.8, 20.0);
    assert_eq!(f.breach, Some(BoundBreach::Thermoneutral));
    assert!(f.voltage_efficiency_hhv.unwrap() > 1.0);
    // A fuel cell above its reversible voltage cannot be.
    assert_eq!(pem(2.6, -5.0).breach, Some(BoundBreach::Reversible));
    assert_eq!(pem(1.4, -5.0).breach, None);
    // At open circuit nothing is made.
    let oc = pem(1.9, 0.0);
    assert_eq!(oc.h2_rate_mol_per_s, 0.0);
    assert_eq!(oc.voltage_efficiency_hhv, None);
}

proptest! {
    #[test]
    fn pressure_raises_the_reversible_voltage(t in 280.0..360.0f64, bar in 1.0..50.0f64) {
        let low = reversible_cell_volts(t, &GasConditions::default());
        let high = reversible_cell_volts(t, &GasConditions {
            h2_side_bar_abs: bar * 1.01325,
            o2_side_bar_abs: bar * 1.01325,
            ..GasConditions::default()
        });
        // Nernst: +1.5·RT/2F·ln(bar) exactly.
        let expect = 1.5 * GAS_CONSTANT_J_PER_MOL_K * t / (2.0 * FARADAY_C_PER_MOL) * bar.ln();
        prop_assert!((high - low - expect).abs() < 1e-12);
    }

    #[test]
    fn reversible_below_thermoneutral(t in 273.15..373.15f64, saturated: bool) {
        let gas = GasConditions { saturated, ..GasConditions::default() };
        prop_assert!(reversible_cell_volts(t, &gas) < thermoneutral_lhv_volts(t));
        prop_assert!(thermoneutral_lhv_volts(t) < thermoneutral_hhv_volts(t));
    }
}

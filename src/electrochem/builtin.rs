//! The built-in chemistries. Their ids are a public contract (clients and
//! stored channels refer to them); never rename one.
//!
//! Every number carries its source. Where we typed a value from memory of a
//! table rather than from the table in front of us, the source says so.
//! Standard potentials differ between tables: the CRC Handbook's
//! electrochemical series (Haynes ed., "Electrochemical Series", CRC
//! Handbook of Chemistry and Physics) and potentials derived from the NBS
//! Tables of Chemical Thermodynamic Properties (Wagman et al., J. Phys.
//! Chem. Ref. Data 11, Suppl. 2, 1982) disagree by 10–130 mV for Cr³⁺/Cr²⁺,
//! Br₂/Br⁻ and the lead–acid cell. Channels may override E° for that reason.

use super::chemistry::{ChemistrySpec, SocModelSpec, SpeciesSpec};
use super::soc::Interpolation;

fn fixed(name: &str, nu: f64, activity: f64) -> SpeciesSpec {
    SpeciesSpec {
        name: name.into(),
        nu,
        activity: Some(activity),
        per_soc: None,
        at_zero_soc: None,
    }
}

fn linear(name: &str, nu: f64, per_soc: f64, at_zero_soc: f64) -> SpeciesSpec {
    SpeciesSpec {
        name: name.into(),
        nu,
        activity: None,
        per_soc: Some(per_soc),
        at_zero_soc: Some(at_zero_soc),
    }
}

fn strings(items: &[&str]) -> Vec<String> {
    items.iter().map(|s| s.to_string()).collect()
}

/// The water cell (fuel cell / electrolyser): current into it splits water,
/// so its modes are named electrolysis / fuel cell / open circuit.
pub const WATER_CELL_ID: &str = "hydrogen-oxygen";

/// Ids of the built-ins, in listing order.
pub const BUILTIN_IDS: [&str; 7] = [
    "daniell",
    "vanadium-redox",
    "iron-chromium",
    "zinc-bromine",
    "lead-acid",
    "hydrogen-oxygen",
    "ocv-table-demo",
];

pub fn builtin_specs() -> Vec<ChemistrySpec> {
    vec![
        ChemistrySpec {
            id: "daniell".into(),
            name: "Daniell cell (zinc–copper)".into(),
            reaction: "Zn(s) + Cu2+(aq) -> Zn2+(aq) + Cu(s)".into(),
            n_electrons: 2,
            e_standard_v: 1.1037,
            delta_s_j_per_mol_k: Some(-20.98),
            de_dt_mv_per_k: None,
            delta_h_kj_per_mol: Some(-218.66),
            min_cell_volts: 0.9,
            max_cell_volts: 1.25,
            min_temp_c: Some(0.0),
            max_temp_c: Some(60.0),
            charge_cutoff_cell_volts: None,
            discharge_cutoff_cell_volts: None,
            soc_model: SocModelSpec::Nernst {
                species: vec![
                    linear("Cu2+", -1.0, 0.98, 0.01),
                    linear("Zn2+", 1.0, -0.98, 0.99),
                    fixed("Zn(s)", -1.0, 1.0),
                    fixed("Cu(s)", 1.0, 1.0),
                ],
            },
            sources: strings(&[
                "temperatures 0–60 °C: an aqueous teaching cell, our own choice",
                "E°: CRC Handbook electrochemical series, Cu2+/Cu +0.3419 V, Zn2+/Zn −0.7618 V",
                "ΔS°, ΔH°: NBS tables (Wagman 1982), S° Zn2+ −112.1, Cu2+ −99.6, Zn 41.63, Cu 33.15 J/(mol K); ΔfH° Zn2+ −153.89, Cu2+ 64.77 kJ/mol (from memory)",
                "SOC model: illustrative 1 mol/L total of each ion pair, ideal solution (our own choice)",
            ]),
            notes: "Teaching cell. SOC 1 = copper sulfate side full, zinc sulfate side nearly empty.".into(),
        },
        ChemistrySpec {
            id: "vanadium-redox".into(),
            name: "All-vanadium redox flow cell".into(),
            reaction: "VO2+ + 2H+ + V2+ -> VO2+ + V3+ + H2O  (first VO2+ is V(V) dioxovanadium, second V(IV) vanadyl)".into(),
            n_electrons: 1,
            e_standard_v: 1.246,
            delta_s_j_per_mol_k: Some(-121.6),
            de_dt_mv_per_k: None,
            delta_h_kj_per_mol: None,
            min_cell_volts: 1.0,
            max_cell_volts: 1.65,
            charge_cutoff_cell_volts: None,
            discharge_cutoff_cell_volts: Some(1.0),
            min_temp_c: Some(10.0),
            max_temp_c: Some(40.0),
            soc_model: SocModelSpec::Nernst {
                species: vec![
                    linear("VO2+ (V5+)", -1.0, 1.6, 0.016),
                    linear("V2+", -1.0, 1.6, 0.016),
                    linear("VO2+ (V4+)", 1.0, -1.6, 1.616),
                    linear("V3+", 1.0, -1.6, 1.616),
                    linear("H+ (positive side)", -2.0, 1.6, 4.0),
                    fixed("H2O(l)", 1.0, 1.0),
                ],
            },
            sources: strings(&[
                "discharge cutoff 1.0 V and 10–40 °C: common practice (V(V) precipitates above about 40 °C, V(II)/V(III) salts below about 10 °C; from memory)",
                "E°: CRC Handbook electrochemical series, VO2+/VO2+ +0.991 V, V3+/V2+ −0.255 V",
                "ΔS°: from NBS S° values (from memory; uncertain: published VRB entropy coefficients differ in size and sign)",
                "SOC model: 1.6 mol/L vanadium, protons 4.0 mol/L at SOC 0 rising by 1.6 mol/L (typical electrolyte, from memory), ideal solution",
                "max cell volts 1.65: common practice charge cutoff for VRB cells",
            ]),
            notes: "The proton term matters: without it a cell at 50 % SOC (≈1.33 V here) reads as ≈83 %. For a real cell fit a formal potential E°′ to a measured OCV curve and set it as the channel's E° override.".into(),
        },
        ChemistrySpec {
            id: "iron-chromium".into(),
            name: "Iron–chromium redox flow cell".into(),
            reaction: "Fe3+ + Cr2+ -> Fe2+ + Cr3+".into(),
            n_electrons: 1,
            e_standard_v: 1.178,
            delta_s_j_per_mol_k: None,
            de_dt_mv_per_k: Some(0.0),
            delta_h_kj_per_mol: None,
            min_cell_volts: 0.7,
            max_cell_volts: 1.3,
            charge_cutoff_cell_volts: Some(1.40),
            discharge_cutoff_cell_volts: Some(0.80),
            min_temp_c: Some(20.0),
            max_temp_c: Some(75.0),
            soc_model: SocModelSpec::Nernst {
                species: vec![
                    linear("Fe3+", -1.0, 0.98, 0.01),
                    linear("Cr2+", -1.0, 0.98, 0.01),
                    linear("Fe2+", 1.0, -0.98, 0.99),
                    linear("Cr3+", 1.0, -0.98, 0.99),
                ],
            },
            sources: strings(&[
                "cutoffs 1.40 V charge / 0.80 V discharge under current and 20–75 °C: our own choice for this illustrative model (its OCV at 95 % SOC and 65 °C is 1.34 V, plus typical ohmic drop); Fe–Cr cells run warm, about 65 °C (from memory)",
                "E°: CRC Handbook electrochemical series, Fe3+/Fe2+ +0.771 V, Cr3+/Cr2+ −0.407 V (other tables give −0.41 to −0.42 V)",
                "dE°/dT: not set (0); the coefficients we could recall disagree, set de_dt_mv_per_k in a user chemistry",
                "SOC model: illustrative 1 mol/L of each couple, ideal solution (our own choice)",
            ]),
            notes: "Real Fe–Cr cells run warm (about 65 °C) and with mixed electrolytes; fit E°′ per channel.".into(),
        },
        ChemistrySpec {
            id: "zinc-bromine".into(),
            name: "Zinc–bromine cell".into(),
            reaction: "Zn(s) + Br2(aq) -> Zn2+(aq) + 2Br-(aq)".into(),
            n_electrons: 2,
            e_standard_v: 1.8491,
            delta_s_j_per_mol_k: Some(-119.4),
            de_dt_mv_per_k: None,
            delta_h_kj_per_mol: Some(-394.4),
            min_cell_volts: 1.2,
            max_cell_volts: 2.05,
            min_temp_c: Some(10.0),
            max_temp_c: Some(50.0),
            charge_cutoff_cell_volts: None,
            discharge_cutoff_cell_volts: None,
            soc_model: SocModelSpec::Nernst {
                species: vec![
                    linear("Br2(aq)", -1.0, 1.0, 0.01),
                    linear("Zn2+", 1.0, -1.0, 2.0),
                    linear("Br-", 2.0, -2.0, 4.0),
                    fixed("Zn(s)", -1.0, 1.0),
                ],
            },
            sources: strings(&[
                "temperatures 10–50 °C: common practice for aqueous bromine electrolytes (from memory)",
                "E°: CRC Handbook electrochemical series, Br2(aq)/Br− +1.0873 V, Zn2+/Zn −0.7618 V (with Br2(l), +1.066 V, the cell is 1.828 V)",
                "ΔS°, ΔH°: NBS tables S° Zn2+ −112.1, Br− 82.4, Br2(aq) 130.5, Zn 41.63 J/(mol K); ΔfH° Zn2+ −153.89, Br− −121.55, Br2(aq) −2.59 kJ/mol (from memory; they imply E° ≈ 1.859 V, 10 mV above the CRC series)",
                "SOC model: illustrative 2 mol/L ZnBr2 at SOC 0, bromine free (not complexed), ideal solution",
            ]),
            notes: "Real cells complex bromine with quaternary ammonium salts, which lowers its activity; fit E°′.".into(),
        },
        ChemistrySpec {
            id: "lead-acid".into(),
            name: "Lead–acid cell".into(),
            reaction: "Pb(s) + PbO2(s) + 2H+ + 2HSO4- -> 2PbSO4(s) + 2H2O(l)".into(),
            n_electrons: 2,
            e_standard_v: 1.9246,
            delta_s_j_per_mol_k: Some(39.8),
            de_dt_mv_per_k: None,
            delta_h_kj_per_mol: None,
            min_cell_volts: 1.75,
            max_cell_volts: 2.4,
            min_temp_c: Some(-20.0),
            max_temp_c: Some(50.0),
            charge_cutoff_cell_volts: None,
            discharge_cutoff_cell_volts: None,
            soc_model: SocModelSpec::OcvTable {
                reference_temp_c: 25.0,
                interpolation: Interpolation::Linear,
                points: vec![[0.0, 1.94], [1.0, 2.12]],
                entropic_mv_per_k: vec![0.2, 0.2],
            },
            sources: strings(&[
                "temperatures −20–50 °C: common practice for flooded lead–acid (from memory)",
                "written with bisulfate, the form that dominates battery-strength acid: E° = −ΔG°/2F from NBS tables (Wagman 1982) ΔfG° PbSO4 −813.14, H2O(l) −237.13, PbO2 −217.33, HSO4− −755.91 kJ/mol gives 1.9246 V (from memory); the sulfate form in the CRC series (PbO2/PbSO4 +1.6913 V, PbSO4/Pb −0.3588 V) is 2.0501 V",
                "ΔS° of the same bisulfate reaction from NBS S° PbSO4 148.5, H2O(l) 69.91, Pb 64.81, PbO2 68.6, HSO4− 131.8 J/(mol K): +39.8 J/(mol K), dE°/dT = +0.206 mV/K (from memory); the sulfate form's ΔS° is +263 J/(mol K)",
                "SOC table: rule of thumb OCV ≈ 0.84 V + specific gravity, SG 1.10 flat to 1.28 full (common practice)",
                "cutoffs 1.75 V and 2.40 V per cell: common practice",
            ]),
            notes: "Ideal-solution Nernst misreads sulfuric acid badly, so SOC comes from the specific-gravity rule; load a measured table for a real battery.".into(),
        },
        ChemistrySpec {
            id: "hydrogen-oxygen".into(),
            name: "Hydrogen–oxygen (fuel cell or water electrolyser)".into(),
            reaction: "H2(g) + 1/2 O2(g) -> H2O(l)".into(),
            n_electrons: 2,
            e_standard_v: 1.229,
            delta_s_j_per_mol_k: Some(-163.3),
            de_dt_mv_per_k: None,
            delta_h_kj_per_mol: Some(-285.83),
            min_cell_volts: 0.0,
            max_cell_volts: 2.5,
            min_temp_c: Some(5.0),
            max_temp_c: Some(90.0),
            charge_cutoff_cell_volts: None,
            discharge_cutoff_cell_volts: None,
            soc_model: SocModelSpec::None,
            sources: strings(&[
                "5–90 °C: common practice for PEM stacks with liquid water (from memory); no SOC, so no end of charge or discharge",
                "CODATA Key Values for Thermodynamics (Cox, Wagman, Medvedev 1989): ΔfH°(H2O, l) −285.830 kJ/mol; S° H2O(l) 69.95, H2 130.680, O2 205.152 J/(mol K)",
                "E° = −ΔG°/2F = 1.229 V; thermoneutral −ΔH°/2F = 1.481 V; dE°/dT = ΔS°/2F ≈ −0.846 mV/K",
            ]),
            notes: "No SOC. As an electrolyser the cell is driven: compare the cell voltage with the reversible and thermoneutral voltages.".into(),
        },
        ChemistrySpec {
            id: "ocv-table-demo".into(),
            name: "Illustrative LFP-like OCV curve (invented)".into(),
            reaction: "LiC6 + FePO4 -> C6 + LiFePO4 (illustrative)".into(),
            n_electrons: 1,
            e_standard_v: 3.30,
            delta_s_j_per_mol_k: None,
            de_dt_mv_per_k: None,
            delta_h_kj_per_mol: None,
            min_cell_volts: 2.5,
            max_cell_volts: 3.65,
            min_temp_c: Some(0.0),
            max_temp_c: Some(45.0),
            charge_cutoff_cell_volts: None,
            discharge_cutoff_cell_volts: None,
            soc_model: SocModelSpec::OcvTable {
                reference_temp_c: 25.0,
                interpolation: Interpolation::Pchip,
                points: vec![
                    [0.00, 2.800],
                    [0.02, 3.000],
                    [0.05, 3.150],
                    [0.10, 3.210],
                    [0.20, 3.250],
                    [0.30, 3.270],
                    [0.40, 3.285],
                    [0.50, 3.295],
                    [0.60, 3.305],
                    [0.70, 3.320],
                    [0.80, 3.330],
                    [0.90, 3.340],
                    [0.95, 3.360],
                    [0.98, 3.400],
                    [1.00, 3.500],
                ],
                entropic_mv_per_k: vec![
                    -0.30, -0.20, -0.10, -0.05, 0.00, 0.02, 0.03, 0.03, 0.02, 0.00, -0.02, -0.05, -0.08,
                    -0.10, -0.10,
                ],
            },
            sources: strings(&[
                "0–45 °C: common practice for charging lithium-ion cells (from memory)",
                "invented for demonstrations: shaped like a lithium-iron-phosphate curve, not any real cell's or product's data",
                "E° 3.30 V: the curve's mid plateau, illustrative",
            ]),
            notes: "Illustrative only. Load a measured table for real cells.".into(),
        },
    ]
}

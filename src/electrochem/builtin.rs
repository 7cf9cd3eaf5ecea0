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

use super::chemistry::{ChemistrySpec, read_chemistry_specs};

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

/// The built-in definitions, one TOML file each under `builtin/`, in
/// listing order: the same format (and loader) as a user's file.
const FILES: [(&str, &str); 7] = [
    ("daniell", include_str!("builtin/daniell.toml")),
    (
        "vanadium-redox",
        include_str!("builtin/vanadium-redox.toml"),
    ),
    ("iron-chromium", include_str!("builtin/iron-chromium.toml")),
    ("zinc-bromine", include_str!("builtin/zinc-bromine.toml")),
    ("lead-acid", include_str!("builtin/lead-acid.toml")),
    (
        "hydrogen-oxygen",
        include_str!("builtin/hydrogen-oxygen.toml"),
    ),
    (
        "ocv-table-demo",
        include_str!("builtin/ocv-table-demo.toml"),
    ),
];

/// The built-in files as text, by id (fuzz seeds are copies of them).
pub fn builtin_files() -> impl Iterator<Item = (&'static str, &'static str)> {
    FILES.into_iter()
}

/// Every built-in chemistry as written in its file, not yet validated.
pub fn builtin_specs() -> Vec<ChemistrySpec> {
    FILES
        .iter()
        .flat_map(|(id, text)| {
            read_chemistry_specs(&format!("builtin/{id}.toml"), text)
                .unwrap_or_else(|e| panic!("built-in chemistry file {id}: {e}"))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_file_holds_the_chemistry_it_is_named_for() {
        let ids: Vec<String> = builtin_specs().into_iter().map(|s| s.id).collect();
        assert_eq!(ids, BUILTIN_IDS);
        assert!(FILES.iter().zip(BUILTIN_IDS).all(|((f, _), id)| *f == id));
    }
}

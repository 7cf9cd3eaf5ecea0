//! Cell definitions: what a chemistry is, how one is written in TOML, and
//! how a written one is checked before it is used.
//!
//! Built-ins (see [`super::builtin`]) are written in the same [`ChemistrySpec`]
//! form as user files and pass through the same validation, so a built-in
//! can never hold a value a user file would be refused for.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use super::error::ChemistryError;
use super::soc::{Activity, Interpolation, NernstModel, OcvTable, SocModel, Species};
use super::thermo::{self, StandardPotential};
use serde::{Deserialize, Serialize};

/// A validated chemistry.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Chemistry {
    pub id: String,
    pub name: String,
    pub reaction: String,
    pub n_electrons: u32,
    pub e_standard_298_volts: f64,
    pub de_dt_volts_per_k: f64,
    pub delta_h_kj_per_mol: Option<f64>,
    /// The model's per-cell open-circuit window.
    pub min_cell_volts: f64,
    pub max_cell_volts: f64,
    /// Terminal voltage per cell, under current, that ends a charge or a
    /// discharge (the constant-current / constant-voltage practice).
    pub charge_cutoff_cell_volts: f64,
    pub discharge_cutoff_cell_volts: f64,
    /// Operating temperatures, °C.
    pub min_temp_c: f64,
    pub max_temp_c: f64,
    pub soc_model: SocModel,
    /// Where each parameter comes from.
    pub sources: Vec<String>,
    pub notes: String,
    pub builtin: bool,
}

impl Chemistry {
    pub fn standard_potential(&self) -> StandardPotential {
        StandardPotential {
            e_standard_298_volts: self.e_standard_298_volts,
            de_dt_volts_per_k: self.de_dt_volts_per_k,
        }
    }

    pub fn thermoneutral_volts(&self) -> Option<f64> {
        self.delta_h_kj_per_mol
            .map(|h| thermo::thermoneutral_volts(h, self.n_electrons))
    }

    /// The same chemistry with E°(298.15 K) replaced, e.g. by a formal
    /// potential E°′ fitted to a real cell's OCV curve.
    pub fn with_e_standard_override(&self, e_standard_298_volts: f64) -> Chemistry {
        let mut c = self.clone();
        c.e_standard_298_volts = e_standard_298_volts;
        c
    }

    /// The same chemistry with its OCV curve following an apparent
    /// electron number: E = E° − (RT/(n_app·F))·ln Q. Written as every
    /// exponent ν scaled by n/n_app, so the reaction quotient is the
    /// apparent one consistent with the measured voltage and ΔG = −nFE
    /// keeps the reaction's n.
    pub fn with_apparent_electrons(&self, n_apparent: f64) -> Result<Chemistry, String> {
        let SocModel::Nernst(model) = &self.soc_model else {
            return Err(format!(
                "applies to a Nernst chemistry only; {} uses {}",
                self.id,
                self.soc_model.name()
            ));
        };
        let k = f64::from(self.n_electrons) / n_apparent;
        let species = model
            .species
            .iter()
            .map(|s| Species {
                nu: s.nu * k,
                ..s.clone()
            })
            .collect();
        let mut c = self.clone();
        c.soc_model = SocModel::Nernst(NernstModel::new(species));
        Ok(c)
    }
}

/// A file of chemistries: `[[chemistry]]` tables.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChemistryFile {
    #[serde(default)]
    pub chemistry: Vec<ChemistrySpec>,
}

/// A chemistry as written by a user (TOML) or as stored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChemistrySpec {
    pub id: String,
    pub name: String,
    pub reaction: String,
    pub n_electrons: i64,
    /// E° at 298.15 K (or a fitted formal potential E°′), volts
    /// (`e_standard_v` is read for one release).
    #[serde(alias = "e_standard_v")]
    pub e_standard_298_v: f64,
    /// ΔS° of the reaction, J/(mol·K); gives dE°/dT = ΔS°/nF.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub delta_s_j_per_mol_k: Option<f64>,
    /// dE°/dT directly, mV/K (alternative to ΔS°).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub de_dt_mv_per_k: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub delta_h_kj_per_mol: Option<f64>,
    pub min_cell_volts: f64,
    pub max_cell_volts: f64,
    /// Per-cell terminal voltage that ends a charge under current; default
    /// `max_cell_volts`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub charge_cutoff_cell_volts: Option<f64>,
    /// The same for a discharge; default `min_cell_volts`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub discharge_cutoff_cell_volts: Option<f64>,
    /// Operating temperature window, °C; default −20 to 60 °C.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub min_temp_c: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub max_temp_c: Option<f64>,
    #[serde(default)]
    pub soc_model: SocModelSpec,
    #[serde(default)]
    pub sources: Vec<String>,
    #[serde(default)]
    pub notes: String,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum SocModelSpec {
    Nernst {
        species: Vec<SpeciesSpec>,
    },
    OcvTable {
        #[serde(default = "default_reference_temp_c")]
        reference_temp_c: f64,
        #[serde(default)]
        interpolation: Interpolation,
        /// `[soc, ocv_volts]` pairs, SOC rising.
        points: Vec<[f64; 2]>,
        /// dOCV/dT per point, mV/K; empty means not measured (zero).
        #[serde(default)]
        entropic_mv_per_k: Vec<f64>,
    },
    #[default]
    None,
}

fn default_reference_temp_c() -> f64 {
    25.0
}

/// A species: `activity` for a fixed one, or `per_soc` + `at_zero_soc`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SpeciesSpec {
    pub name: String,
    pub nu: f64,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub activity: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub per_soc: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub at_zero_soc: Option<f64>,
}

/// Operating window when a chemistry names none, °C (our own choice:
/// wide enough for most aqueous and lithium cells, set per chemistry).
const DEFAULT_MIN_TEMP_C: f64 = -20.0;
const DEFAULT_MAX_TEMP_C: f64 = 60.0;

/// Two finite values, the second above the first.
fn ordered_pair(low: (&str, f64), high: (&str, f64)) -> Result<(f64, f64), ChemistryError> {
    let (lo, hi) = (finite(low.0, low.1)?, finite(high.0, high.1)?);
    if lo >= hi {
        return Err(ChemistryError::invalid(
            high.0,
            hi,
            format!("must be above {} ({lo})", low.0),
        ));
    }
    Ok((lo, hi))
}

fn finite(field: &str, value: f64) -> Result<f64, ChemistryError> {
    if value.is_finite() {
        Ok(value)
    } else {
        Err(ChemistryError::invalid(
            field,
            value,
            "must be a finite number",
        ))
    }
}

/// Ids travel in URLs, file names and SQL: keep them to a safe alphabet.
pub fn validate_id(field: &str, id: &str) -> Result<(), ChemistryError> {
    let ok = !id.is_empty()
        && id.len() <= 64
        && id.bytes().all(|b| {
            b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'-' || b == b'_' || b == b'.'
        });
    if ok {
        Ok(())
    } else {
        Err(ChemistryError::invalid(
            field,
            format!("{:?}", id.chars().take(80).collect::<String>()),
            "must be 1–64 characters of a–z, 0–9, '-', '_' or '.'",
        ))
    }
}

impl ChemistrySpec {
    pub fn validate(&self, builtin: bool) -> Result<Chemistry, ChemistryError> {
        validate_id("id", &self.id)?;
        if self.n_electrons < 1 || self.n_electrons > 1000 {
            return Err(ChemistryError::invalid(
                "n_electrons",
                self.n_electrons,
                "must be a whole number from 1 to 1000",
            ));
        }
        let n_electrons = self.n_electrons as u32;
        let e_standard = finite("e_standard_298_v", self.e_standard_298_v)?;
        let de_dt_volts_per_k = match (self.delta_s_j_per_mol_k, self.de_dt_mv_per_k) {
            (Some(_), Some(_)) => {
                return Err(ChemistryError::invalid(
                    "de_dt_mv_per_k",
                    self.de_dt_mv_per_k.unwrap_or_default(),
                    "give either delta_s_j_per_mol_k or de_dt_mv_per_k, not both",
                ));
            }
            (Some(ds), None) => {
                thermo::de_dt_from_delta_s(finite("delta_s_j_per_mol_k", ds)?, n_electrons)
            }
            (None, Some(mv)) => finite("de_dt_mv_per_k", mv)? / 1e3,
            (None, None) => 0.0,
        };
        let delta_h = self
            .delta_h_kj_per_mol
            .map(|h| finite("delta_h_kj_per_mol", h))
            .transpose()?;
        let min_v = finite("min_cell_volts", self.min_cell_volts)?;
        let max_v = finite("max_cell_volts", self.max_cell_volts)?;
        if min_v >= max_v {
            return Err(ChemistryError::invalid(
                "max_cell_volts",
                max_v,
                format!("must be above min_cell_volts ({min_v})"),
            ));
        }
        let (discharge_cutoff, charge_cutoff) = ordered_pair(
            (
                "discharge_cutoff_cell_volts",
                self.discharge_cutoff_cell_volts.unwrap_or(min_v),
            ),
            (
                "charge_cutoff_cell_volts",
                self.charge_cutoff_cell_volts.unwrap_or(max_v),
            ),
        )?;
        let (min_temp_c, max_temp_c) = ordered_pair(
            ("min_temp_c", self.min_temp_c.unwrap_or(DEFAULT_MIN_TEMP_C)),
            ("max_temp_c", self.max_temp_c.unwrap_or(DEFAULT_MAX_TEMP_C)),
        )?;
        let soc_model = self.soc_model.validate()?;
        Ok(Chemistry {
            id: self.id.clone(),
            name: self.name.clone(),
            reaction: self.reaction.clone(),
            n_electrons,
            e_standard_298_volts: e_standard,
            de_dt_volts_per_k,
            delta_h_kj_per_mol: delta_h,
            min_cell_volts: min_v,
            max_cell_volts: max_v,
            charge_cutoff_cell_volts: charge_cutoff,
            discharge_cutoff_cell_volts: discharge_cutoff,
            min_temp_c,
            max_temp_c,
            soc_model,
            sources: self.sources.clone(),
            notes: self.notes.clone(),
            builtin,
        })
    }
}

impl SocModelSpec {
    fn validate(&self) -> Result<SocModel, ChemistryError> {
        match self {
            SocModelSpec::None => Ok(SocModel::None),
            SocModelSpec::Nernst { species } => {
                let species = species
                    .iter()
                    .enumerate()
                    .map(|(i, s)| s.validate(i))
                    .collect::<Result<Vec<_>, _>>()?;
                let model = NernstModel::new(species);
                model.validate()?;
                Ok(SocModel::Nernst(model))
            }
            SocModelSpec::OcvTable {
                reference_temp_c,
                interpolation,
                points,
                entropic_mv_per_k,
            } => {
                let entropic = if entropic_mv_per_k.is_empty() {
                    vec![0.0; points.len()]
                } else {
                    entropic_mv_per_k.iter().map(|mv| mv / 1e3).collect()
                };
                let table = OcvTable {
                    reference_temp_k: finite("soc_model.reference_temp_c", *reference_temp_c)?
                        + 273.15,
                    interpolation: *interpolation,
                    soc: points.iter().map(|p| p[0]).collect(),
                    ocv_volts: points.iter().map(|p| p[1]).collect(),
                    entropic_volts_per_k: entropic,
                };
                table.validate()?;
                Ok(SocModel::OcvTable(table))
            }
        }
    }
}

impl SpeciesSpec {
    fn validate(&self, index: usize) -> Result<Species, ChemistryError> {
        let field = format!("soc_model.species[{index}]");
        let activity = match (self.activity, self.per_soc, self.at_zero_soc) {
            (Some(a), None, None) => Activity::Fixed {
                activity: finite(&format!("{field}.activity"), a)?,
            },
            (None, Some(per_soc), Some(at_zero)) => Activity::Linear {
                per_soc: finite(&format!("{field}.per_soc"), per_soc)?,
                at_zero_soc: finite(&format!("{field}.at_zero_soc"), at_zero)?,
            },
            _ => {
                return Err(ChemistryError::invalid(
                    format!("{field}.activity"),
                    &self.name,
                    "give either `activity` (fixed) or both `per_soc` and `at_zero_soc` (linear in SOC)",
                ));
            }
        };
        Ok(Species {
            name: self.name.clone(),
            nu: self.nu,
            activity,
        })
    }
}

/// Reads a chemistry file's definitions, not yet validated. `path` only
/// labels errors.
pub fn read_chemistry_specs(path: &str, text: &str) -> Result<Vec<ChemistrySpec>, ChemistryError> {
    let file: ChemistryFile = toml::from_str(text).map_err(|e| ChemistryError::File {
        path: path.to_string(),
        message: e.to_string().trim_end().replace('\n', " "),
    })?;
    Ok(file.chemistry)
}

/// Parses and validates a chemistry file. `path` only labels errors.
pub fn parse_chemistry_file(path: &str, text: &str) -> Result<Vec<Chemistry>, ChemistryError> {
    read_chemistry_specs(path, text)?
        .iter()
        .enumerate()
        .map(|(i, spec)| {
            spec.validate(false).map_err(|e| ChemistryError::File {
                path: path.to_string(),
                message: format!("chemistry[{i}] ({:?}): {e}", spec.id),
            })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
[[chemistry]]
id = "teaching-fe"
name = "Teaching iron cell"
reaction = "Fe3+ + Ag -> Fe2+ + Ag+"
n_electrons = 1
e_standard_v = -0.028
de_dt_mv_per_k = 0.5
min_cell_volts = -0.5
max_cell_volts = 0.5
[chemistry.soc_model]
kind = "nernst"
species = [
  { name = "Fe3+", nu = -1, per_soc = 0.98, at_zero_soc = 0.01 },
  { name = "Fe2+", nu = 1, per_soc = -0.98, at_zero_soc = 0.99 },
  { name = "Ag+", nu = 1, activity = 0.1 },
]
"#;

    #[test]
    fn parses_a_user_file() {
        let chems = parse_chemistry_file("lab.toml", GOOD).unwrap();
        assert_eq!(chems.len(), 1);
        assert_eq!(chems[0].n_electrons, 1);
        assert!((chems[0].de_dt_volts_per_k - 0.0005).abs() < 1e-15);
    }

    fn error_for(from: &str, to: &str) -> String {
        let text = GOOD.replace(from, to);
        assert_ne!(text, GOOD, "replacement {from:?} did not apply");
        parse_chemistry_file("lab.toml", &text)
            .unwrap_err()
            .to_string()
    }

    #[test]
    fn errors_name_file_field_and_value() {
        let e = error_for("n_electrons = 1", "n_electrons = 0");
        assert!(
            e.contains("lab.toml") && e.contains("n_electrons = 0"),
            "{e}"
        );
        // GOOD spells E° the old way (`e_standard_v`): still read, and the
        // error names the field as it is now called.
        let e = error_for("e_standard_v = -0.028", "e_standard_v = nan");
        assert!(e.contains("e_standard_298_v = NaN"), "{e}");
        let e = error_for("id = \"teaching-fe\"", "id = \"Bad Id\"");
        assert!(e.contains("id = \"Bad Id\""), "{e}");
        let e = error_for("at_zero_soc = 0.01", "at_zero_soc = -0.01");
        assert!(e.contains("species[0].activity"), "{e}");
        let e = error_for("max_cell_volts = 0.5", "max_cell_volts = -0.6");
        assert!(e.contains("max_cell_volts = -0.6"), "{e}");
        // Unknown field: serde names it, with the line.
        let e = error_for("reaction =", "colour = \"red\"\nreaction =");
        assert!(e.contains("colour") && e.contains("line"), "{e}");
    }

    #[test]
    fn rejects_empty_and_non_monotone_tables() {
        let base = r#"
[[chemistry]]
id = "t"
name = "t"
reaction = "t"
n_electrons = 1
e_standard_v = 3.3
min_cell_volts = 2.0
max_cell_volts = 3.7
[chemistry.soc_model]
kind = "ocv_table"
points = POINTS
"#;
        let empty = base.replace("POINTS", "[]");
        assert!(
            parse_chemistry_file("f", &empty)
                .unwrap_err()
                .to_string()
                .contains("at least two points")
        );
        let bumpy = base.replace("POINTS", "[[0.0, 3.0], [0.5, 3.3], [0.6, 3.2], [1.0, 3.5]]");
        let e = parse_chemistry_file("f", &bumpy).unwrap_err().to_string();
        assert!(e.contains("points 1 and 2"), "{e}");
    }
}

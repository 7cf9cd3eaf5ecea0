//! The electrochemistry core: pure functions from a reading to its meaning.
//!
//! Owns the physical constants, the thermodynamic relations, chemistry
//! definitions and SOC models. It performs no I/O, holds no clock and never
//! touches async code; the server, the store and the CLI all call in here so
//! that one reading gives the same answer everywhere.
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

pub mod builtin;
pub mod chemistry;
pub mod constants;
pub mod error;
pub mod hydrogen;
pub mod report;
pub mod soc;
pub mod thermo;

use std::collections::BTreeMap;
use std::sync::Arc;

pub use chemistry::{Chemistry, ChemistrySpec};
pub use error::ChemistryError;
pub use soc::{NernstContext, SocModel};
pub use thermo::{ReactionState, ThermoState};

/// Lowest temperature accepted anywhere in the core, K. Above absolute zero
/// by a margin so RT/F cannot underflow; rigs are checked far tighter.
const MIN_TEMP_K: f64 = 1.0;

/// What a caller asks the core to evaluate.
#[derive(Debug, Clone, Copy)]
pub struct EvalRequest {
    /// The stack's terminal (or compensated open-circuit) voltage.
    pub stack_volts: f64,
    pub cells_in_series: u32,
    pub temp_k: f64,
    pub equilibrium_tolerance_volts: f64,
}

/// The full evaluation of one reading.
#[derive(Debug, Clone, PartialEq)]
pub struct Evaluation {
    pub n_electrons: u32,
    pub cells_in_series: u32,
    pub thermo: ThermoState,
    pub soc: Option<f64>,
    pub soc_model: &'static str,
    pub soc_clamped: bool,
    pub thermoneutral_volts: Option<f64>,
}

fn check_common(
    cells_in_series: u32,
    temp_k: f64,
    tolerance_volts: f64,
) -> Result<(), ChemistryError> {
    if cells_in_series == 0 {
        return Err(ChemistryError::invalid(
            "cells_in_series",
            0,
            "must be at least 1",
        ));
    }
    if !(temp_k.is_finite() && temp_k >= MIN_TEMP_K) {
        return Err(ChemistryError::invalid(
            "temp_k",
            temp_k,
            "must be a finite temperature above absolute zero",
        ));
    }
    if !(tolerance_volts.is_finite() && tolerance_volts >= 0.0) {
        return Err(ChemistryError::invalid(
            "equilibrium_tolerance_volts",
            tolerance_volts,
            "must be finite and not negative",
        ));
    }
    Ok(())
}

/// State of a cell reaction from a measured stack voltage.
pub fn evaluate(chemistry: &Chemistry, request: EvalRequest) -> Result<Evaluation, ChemistryError> {
    check_common(
        request.cells_in_series,
        request.temp_k,
        request.equilibrium_tolerance_volts,
    )?;
    if !request.stack_volts.is_finite() {
        return Err(ChemistryError::invalid(
            "volts",
            request.stack_volts,
            "must be a finite number",
        ));
    }
    let cell_volts = request.stack_volts / f64::from(request.cells_in_series);
    let thermo = thermo::thermo_state(
        chemistry.n_electrons,
        chemistry.standard_potential(),
        cell_volts,
        request.temp_k,
        request.equilibrium_tolerance_volts,
    );
    let ctx = NernstContext {
        n_electrons: chemistry.n_electrons,
        e_standard_volts: thermo.e_standard_volts,
        temp_k: request.temp_k,
    };
    let estimate = chemistry.soc_model.soc_from_volts(cell_volts, ctx);
    Ok(Evaluation {
        n_electrons: chemistry.n_electrons,
        cells_in_series: request.cells_in_series,
        thermo,
        soc: estimate.map(|e| e.soc),
        soc_model: chemistry.soc_model.name(),
        soc_clamped: estimate.is_some_and(|e| e.clamped),
        thermoneutral_volts: chemistry.thermoneutral_volts(),
    })
}

/// The open-circuit stack voltage a chemistry should show at `soc`, with the
/// state that follows from it.
pub fn evaluate_at_soc(
    chemistry: &Chemistry,
    soc: f64,
    cells_in_series: u32,
    temp_k: f64,
    equilibrium_tolerance_volts: f64,
) -> Result<Evaluation, ChemistryError> {
    check_common(cells_in_series, temp_k, equilibrium_tolerance_volts)?;
    if !(soc.is_finite() && (0.0..=1.0).contains(&soc)) {
        return Err(ChemistryError::invalid(
            "soc",
            soc,
            "must be a number from 0 to 1",
        ));
    }
    let ctx = NernstContext {
        n_electrons: chemistry.n_electrons,
        e_standard_volts: chemistry.standard_potential().at(temp_k),
        temp_k,
    };
    let Some(cell_volts) = chemistry.soc_model.ocv_volts(soc, ctx) else {
        return Err(ChemistryError::invalid(
            "soc",
            soc,
            format!(
                "chemistry {:?} has no SOC model; give a voltage instead",
                chemistry.id
            ),
        ));
    };
    evaluate(
        chemistry,
        EvalRequest {
            stack_volts: cell_volts * f64::from(cells_in_series),
            cells_in_series,
            temp_k,
            equilibrium_tolerance_volts,
        },
    )
}

/// The chemistries known to a process: built-ins plus user definitions.
/// Cheap to clone; entries are shared.
#[derive(Debug, Clone)]
pub struct Registry {
    by_id: BTreeMap<String, Arc<Chemistry>>,
}

impl Registry {
    /// Built-ins only. They are validated like user files; a failure here is
    /// a bug in the table, caught by the unit tests.
    pub fn builtin() -> Registry {
        let by_id = builtin::builtin_specs()
            .into_iter()
            .map(|spec| {
                let chem = spec
                    .validate(true)
                    .unwrap_or_else(|e| panic!("built-in chemistry {:?} is invalid: {e}", spec.id));
                (chem.id.clone(), Arc::new(chem))
            })
            .collect();
        Registry { by_id }
    }

    /// The one way a process's registry is put together: the built-ins,
    /// then chemistries an earlier run stored (one that no longer
    /// validates is passed over: a stricter server must still start on an
    /// old database), then the user's own, which must validate and must
    /// not take a built-in's id. A user error names the spec's index in
    /// `user`, so the caller can say which file and line it came from.
    pub fn assemble<'a>(
        stored: impl IntoIterator<Item = ChemistrySpec>,
        user: impl IntoIterator<Item = &'a ChemistrySpec>,
    ) -> Result<Registry, (usize, ChemistryError)> {
        let mut registry = Registry::builtin();
        for spec in stored {
            if let Ok(chem) = spec.validate(false) {
                let _ = registry.insert_user(chem);
            }
        }
        for (i, spec) in user.into_iter().enumerate() {
            let chem = spec.validate(false).map_err(|e| (i, e))?;
            registry.insert_user(chem).map_err(|e| (i, e))?;
        }
        Ok(registry)
    }

    /// Adds a user chemistry. Built-in ids cannot be replaced (stored data
    /// refers to them); a user id can be replaced by a new definition.
    pub fn insert_user(&mut self, chemistry: Chemistry) -> Result<(), ChemistryError> {
        if self.by_id.get(&chemistry.id).is_some_and(|c| c.builtin) {
            return Err(ChemistryError::DuplicateChemistry(chemistry.id));
        }
        self.by_id.insert(chemistry.id.clone(), Arc::new(chemistry));
        Ok(())
    }

    pub fn get(&self, id: &str) -> Result<Arc<Chemistry>, ChemistryError> {
        self.by_id
            .get(id)
            .cloned()
            .ok_or_else(|| ChemistryError::UnknownChemistry(id.chars().take(80).collect()))
    }

    pub fn iter(&self) -> impl Iterator<Item = &Arc<Chemistry>> {
        self.by_id.values()
    }
}

#[cfg(test)]
mod tests;

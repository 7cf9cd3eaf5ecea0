//! The flat, serialisable form of an evaluation: the JSON contract of
//! `gibbsline eval --json` (field names are binding for outside clients).
// Item docs here are still being written (DEVELOPERS.md, "Documentation").
#![allow(missing_docs)]

use super::{Chemistry, Evaluation};
use serde::Serialize;

#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct EvalReport {
    pub chemistry_id: String,
    pub n_electrons: u32,
    pub temp_k: f64,
    pub cells_in_series: u32,
    pub stack_volts: f64,
    pub cell_volts: f64,
    /// E° at `temp_k`.
    pub e_standard_v: f64,
    pub delta_g_kj_per_mol: f64,
    pub delta_g_standard_kj_per_mol: f64,
    pub ln_q: f64,
    pub log10_q: f64,
    pub ln_k: f64,
    pub log10_k: f64,
    pub affinity_ln_k_over_q: f64,
    pub state: &'static str,
    pub soc: Option<f64>,
    pub soc_model: &'static str,
    pub soc_clamped: bool,
    pub thermoneutral_v: Option<f64>,
}

impl EvalReport {
    pub fn new(chemistry: &Chemistry, ev: &Evaluation) -> EvalReport {
        let t = &ev.thermo;
        EvalReport {
            chemistry_id: chemistry.id.clone(),
            n_electrons: ev.n_electrons,
            temp_k: t.temp_k,
            cells_in_series: ev.cells_in_series,
            stack_volts: t.cell_volts * f64::from(ev.cells_in_series),
            cell_volts: t.cell_volts,
            e_standard_v: t.e_standard_volts,
            delta_g_kj_per_mol: t.delta_g_kj_per_mol,
            delta_g_standard_kj_per_mol: t.delta_g_standard_kj_per_mol,
            ln_q: t.ln_q,
            log10_q: t.log10_q(),
            ln_k: t.ln_k,
            log10_k: t.log10_k(),
            affinity_ln_k_over_q: t.affinity_ln_k_over_q,
            state: t.state.as_str(),
            soc: ev.soc,
            soc_model: ev.soc_model,
            soc_clamped: ev.soc_clamped,
            thermoneutral_v: ev.thermoneutral_volts,
        }
    }
}

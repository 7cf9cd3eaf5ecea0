//! The flat, serialisable form of an evaluation: the JSON contract of
//! `gibbsline eval --json` (field names are binding for outside clients).

use super::{Chemistry, Evaluation};
use serde::Serialize;

/// One evaluation, flat; every quantity has its unit in its name.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct EvalReport {
    /// The chemistry evaluated.
    pub chemistry_id: String,
    /// Electrons per formula unit of the reaction as written.
    pub n_electrons: u32,
    /// Temperature, K.
    pub temp_k: f64,
    /// Cells in series the stack voltage is shared by.
    pub cells_in_series: u32,
    /// The stack voltage evaluated, V.
    pub stack_volts: f64,
    /// Per-cell voltage, taken as the equilibrium voltage, V.
    pub equilibrium_cell_volts: f64,
    /// E° at 298.15 K (with any override), V.
    pub e_standard_298_v: f64,
    /// E° at `temp_k`, V.
    pub e_standard_at_temp_v: f64,
    /// ΔG = −nFE of the reaction as written, kJ/mol.
    pub delta_g_kj_per_mol: f64,
    /// ΔG° = −nFE° at `temp_k`, kJ/mol.
    pub delta_g_standard_kj_per_mol: f64,
    /// ln Q from the Nernst relation.
    pub ln_q: f64,
    /// log10 Q.
    pub log10_q: f64,
    /// ln K = −ΔG°/RT.
    pub ln_k: f64,
    /// log10 K.
    pub log10_k: f64,
    /// ln(K/Q) = −ΔG/RT: positive while the reaction runs forward.
    pub affinity_ln_k_over_q: f64,
    /// `spontaneous`, `driven` or `equilibrium`.
    pub state: &'static str,
    /// SOC the chemistry's model gives this voltage, 0–1.
    pub soc_from_model: Option<f64>,
    /// Which model (`nernst`, `ocv_table`, `none`).
    pub soc_model_name: &'static str,
    /// The voltage lay outside the model's range and SOC was clamped.
    pub soc_clamped: bool,
    /// Thermoneutral voltage per cell at `temp_k` (HHV), V, where known.
    pub thermoneutral_v: Option<f64>,
}

impl EvalReport {
    /// The report of `ev`, an evaluation of `chemistry`.
    pub fn new(chemistry: &Chemistry, ev: &Evaluation) -> EvalReport {
        let t = &ev.thermo;
        EvalReport {
            chemistry_id: chemistry.id.clone(),
            n_electrons: ev.n_electrons,
            temp_k: t.temp_k,
            cells_in_series: ev.cells_in_series,
            stack_volts: t.cell_volts * f64::from(ev.cells_in_series),
            equilibrium_cell_volts: t.cell_volts,
            e_standard_298_v: chemistry.e_standard_298_volts,
            e_standard_at_temp_v: t.e_standard_volts,
            delta_g_kj_per_mol: t.delta_g_kj_per_mol,
            delta_g_standard_kj_per_mol: t.delta_g_standard_kj_per_mol,
            ln_q: t.ln_q,
            log10_q: t.log10_q(),
            ln_k: t.ln_k,
            log10_k: t.log10_k(),
            affinity_ln_k_over_q: t.affinity_ln_k_over_q,
            state: t.state.as_str(),
            soc_from_model: ev.soc,
            soc_model_name: ev.soc_model,
            soc_clamped: ev.soc_clamped,
            thermoneutral_v: ev.thermoneutral_volts,
        }
    }
}

//! `ChemistryService`: the chemistries known, and one-off evaluations.

use super::convert::{chemistry_to_pb, state_to_pb};
use super::status::invalid;
use crate::electrochem::{self, EvalRequest};
use crate::ingest::Hub;
use crate::pb;
use std::sync::Arc;
use tonic::{Request, Response, Status};

/// `ChemistryService`: the chemistries this server knows, and one-off evaluation.
pub struct ChemistryApi {
    pub(super) hub: Arc<Hub>,
}

#[tonic::async_trait]
impl pb::chemistry_service_server::ChemistryService for ChemistryApi {
    async fn list_chemistries(
        &self,
        _request: Request<pb::ListChemistriesRequest>,
    ) -> Result<Response<pb::ListChemistriesResponse>, Status> {
        let registry = self.hub.registry();
        let chemistries = registry.iter().map(|c| chemistry_to_pb(c)).collect();
        Ok(Response::new(pb::ListChemistriesResponse { chemistries }))
    }

    async fn evaluate(
        &self,
        request: Request<pb::EvaluateRequest>,
    ) -> Result<Response<pb::EvaluateResponse>, Status> {
        let q = request.into_inner();
        let registry = self.hub.registry();
        let chem = registry
            .get(&q.chemistry_id)
            .map_err(|e| Status::not_found(format!("chemistry_id: {e}")))?;
        let chem = match q.e_standard_298_override_v {
            Some(e) if e.is_finite() => Arc::new(chem.with_e_standard_override(e)),
            Some(e) => return Err(invalid("e_standard_298_override_v", e, "must be finite")),
            None => chem,
        };
        let temp_c = q.temp_c.unwrap_or(25.0);
        if !(temp_c.is_finite() && temp_c > -273.15) {
            return Err(invalid(
                "temp_c",
                temp_c,
                "must be a finite temperature above -273.15 °C",
            ));
        }
        let temp_k = temp_c + 273.15;
        let cells = q.cells_in_series.max(1);
        let tolerance = if q.equilibrium_tolerance_mv == 0.0 {
            1e-3
        } else {
            q.equilibrium_tolerance_mv / 1e3
        };
        let ev = match q.input {
            Some(pb::evaluate_request::Input::Volts(v)) => electrochem::evaluate(
                &chem,
                EvalRequest {
                    stack_volts: v,
                    cells_in_series: cells,
                    temp_k,
                    equilibrium_tolerance_volts: tolerance,
                },
            ),
            Some(pb::evaluate_request::Input::Soc(s)) => {
                electrochem::evaluate_at_soc(&chem, s, cells, temp_k, tolerance)
            }
            None => return Err(invalid("input", "unset", "give volts or soc")),
        }
        .map_err(|e| Status::invalid_argument(e.to_string()))?;
        let r = electrochem::report::EvalReport::new(&chem, &ev);
        Ok(Response::new(pb::EvaluateResponse {
            chemistry_id: r.chemistry_id,
            n_electrons: r.n_electrons,
            temp_k: r.temp_k,
            equilibrium_cell_volts: r.equilibrium_cell_volts,
            e_standard_at_temp_v: r.e_standard_at_temp_v,
            delta_g_kj_per_mol: r.delta_g_kj_per_mol,
            delta_g_standard_kj_per_mol: r.delta_g_standard_kj_per_mol,
            ln_q: r.ln_q,
            log10_q: r.log10_q,
            log10_k: r.log10_k,
            affinity_ln_k_over_q: r.affinity_ln_k_over_q,
            state: state_to_pb(ev.thermo.state),
            soc_from_model: r.soc_from_model,
            soc_model_name: r.soc_model_name.into(),
            soc_clamped: r.soc_clamped,
            thermoneutral_v: r.thermoneutral_v,
        }))
    }
}

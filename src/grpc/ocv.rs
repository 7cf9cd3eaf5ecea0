//! The shell of `FitOcvModel` and `ApplyOcvFit`: a run's settled rests
//! read from the store, fitted by the pure core (`estimator::ocv_fit`),
//! and a fit put on the channel.

use super::status::invalid;
use crate::electrochem::soc::SocModel;
use crate::estimator::ocv_fit::{
    self, FitSetup, NernstFit, RestCollector, RestPoint, SocAnchorPoint,
};
use crate::ingest::Hub;
use crate::pb;
use crate::store::{self, flags};
use tonic::Status;

/// Store pages read while gathering rests.
const PAGE: u32 = 8_192;

/// What a fit is made from: the run's rests and its latest operator anchor.
pub(super) struct Gathered {
    pub run_id: i64,
    pub chemistry_id: String,
    pub capacity_ah: f64,
    pub rests: Vec<(u64, RestPoint)>,
    pub anchor: Option<SocAnchorPoint>,
}

/// The latest `set_soc` of the run: (SOC, the reading time it applies from).
async fn latest_anchor(
    reader: &store::Pool,
    key: i64,
    run: i64,
) -> Result<Option<(f64, i64)>, Status> {
    let events = store::operator_events(reader, key, run, "set_soc").await?;
    Ok(events.last().and_then(|(_, detail)| {
        let v: serde_json::Value = serde_json::from_str(detail).ok()?;
        Some((v["soc"].as_f64()?, v["applies_from_ns"].as_i64()?))
    }))
}

/// Reads the run's readings in time order, keeping one point per settled
/// rest (readings taken out of order are left out).
pub(super) async fn gather(hub: &Hub, channel_id: &str, run_id: u64) -> Result<Gathered, Status> {
    let (key, current_run, def) = {
        let rt = hub.channel(channel_id)?;
        let g = rt.lock().expect("channel state poisoned");
        (g.key, g.run_id, g.def.clone())
    };
    let run = if run_id == 0 {
        current_run
    } else {
        run_id as i64
    };
    let reader = &hub.store().reader;
    let runs = store::get_runs(reader, key).await?;
    let info = runs
        .iter()
        .find(|r| r.run_id == run)
        .ok_or_else(|| invalid("run_id", run_id, "no such run of this channel"))?;
    let anchor = latest_anchor(reader, key, run).await?;
    let mut rests = RestCollector::default();
    let mut after = (0i64, -1i64);
    loop {
        let rows = store::query_readings_page(reader, key, 0, i64::MAX, after, PAGE).await?;
        for r in rows.iter().filter(|r| r.run_id == run) {
            if anchor.is_some_and(|(_, at)| r.time_ns <= at) {
                rests.note_anchor_charge(r.charge_ah);
            }
            let point = RestPoint {
                time_ns: r.time_ns,
                cell_volts: r.volts / f64::from(info.cells_in_series.max(1)),
                temp_k: r.temp_c.unwrap_or(info.default_temp_c) + 273.15,
                charge_ah: r.charge_ah,
            };
            let settled = r.flags & flags::REST_SETTLED != 0 && r.flags & flags::OUT_OF_ORDER == 0;
            rests.push(r.seq, point, settled);
        }
        match rows.last() {
            Some(last) if rows.len() as u32 == PAGE => after = (last.time_ns, last.seq as i64),
            _ => break,
        }
    }
    let anchor = anchor.map(|(soc, _)| SocAnchorPoint {
        soc,
        charge_ah: rests.anchor_charge().unwrap_or(0.0),
    });
    Ok(Gathered {
        run_id: run,
        chemistry_id: info.chemistry_id.clone(),
        capacity_ah: def.capacity_ah,
        rests: rests.finish(),
        anchor,
    })
}

/// Fits the gathered rests with the run's chemistry.
pub(super) fn fit(hub: &Hub, g: &Gathered, fit_capacity: bool) -> Result<pb::OcvFit, Status> {
    let chemistry = hub
        .registry()
        .get(&g.chemistry_id)
        .map_err(|e| Status::failed_precondition(e.to_string()))?;
    let SocModel::Nernst(model) = &chemistry.soc_model else {
        return Err(Status::failed_precondition(format!(
            "chemistry {} has a {} SOC model: FitOcvModel fits Nernst chemistries (a table chemistry's curve is measured, not fitted here)",
            chemistry.id,
            chemistry.soc_model.name()
        )));
    };
    if g.capacity_ah <= 0.0 {
        return Err(Status::failed_precondition(
            "capacity_ah is 0: the charge between rests cannot place them on an SOC scale; set the channel's capacity_ah",
        ));
    }
    let setup = FitSetup {
        model,
        n_electrons: chemistry.n_electrons,
        e_standard_298_volts: chemistry.e_standard_298_volts,
        de_dt_volts_per_k: chemistry.de_dt_volts_per_k,
        capacity_ah: g.capacity_ah,
        fit_capacity,
        anchor: g.anchor,
    };
    let points: Vec<RestPoint> = g.rests.iter().map(|(_, p)| *p).collect();
    let fit = ocv_fit::fit_nernst(&points, &setup)
        .map_err(|e| Status::failed_precondition(e.to_string()))?;
    Ok(to_pb(&fit, g, chemistry.e_standard_298_volts))
}

fn to_pb(fit: &NernstFit, g: &Gathered, e_chemistry_298_v: f64) -> pb::OcvFit {
    let rests = g
        .rests
        .iter()
        .zip(fit.soc_at_rests.iter().zip(&fit.residuals_volts))
        .map(|((seq, p), (soc, residual))| pb::OcvFitRest {
            time_unix_ns: p.time_ns,
            seq: *seq,
            cell_volts: p.cell_volts,
            temp_c: p.temp_k - 273.15,
            charge_ah: p.charge_ah,
            soc: *soc,
            residual_mv: residual * 1e3,
        })
        .collect();
    pb::OcvFit {
        e_formal_298_v: fit.e_formal_298_volts.value,
        e_formal_298_sigma_v: fit.e_formal_298_volts.sigma,
        n_apparent: fit.n_apparent.value,
        n_apparent_sigma: fit.n_apparent.sigma,
        soc_at_first_rest: fit.soc_at_first_rest.value,
        soc_at_first_rest_sigma: fit.soc_at_first_rest.sigma,
        capacity_ah: fit.capacity_ah.value,
        capacity_sigma_ah: fit.capacity_ah.sigma,
        residual_rms_mv: fit.residual_rms_volts * 1e3,
        rests_used: fit.rests_used as u32,
        degrees_of_freedom: fit.degrees_of_freedom as u32,
        correlation_e_soc: fit.correlation_e_soc0,
        offset_from_chemistry_mv: (fit.e_formal_298_volts.value - e_chemistry_298_v) * 1e3,
        anchored: g.anchor.is_some(),
        rests,
        t_95: ocv_fit::t_95(fit.degrees_of_freedom),
    }
}

/// Puts E°′ and n_app on the channel (a new run) and records who did.
pub(super) async fn apply(
    hub: &Hub,
    q: &pb::ApplyOcvFitRequest,
) -> Result<pb::ApplyOcvFitResponse, Status> {
    if !q.e_formal_298_v.is_finite() || !(0.0..5.0).contains(&q.e_formal_298_v.abs()) {
        return Err(invalid(
            "e_formal_298_v",
            q.e_formal_298_v,
            "must be a finite potential within ±5 V",
        ));
    }
    let mut def = {
        let rt = hub.channel(&q.channel_id)?;
        let g = rt.lock().expect("channel state poisoned");
        g.def.clone()
    };
    def.e_standard_298_override_v = Some(q.e_formal_298_v);
    def.n_apparent = Some(q.n_apparent);
    let (run_id, new_run) = hub.put_channel(def.clone()).await?;
    let detail = serde_json::json!({
        "e_formal_298_v": q.e_formal_298_v,
        "n_apparent": q.n_apparent,
        "note": q.note,
    });
    hub.note_operator_event(
        &q.channel_id,
        "apply_ocv_fit",
        &q.applied_by,
        detail.to_string(),
    )
    .await?;
    tracing::info!(channel_id = %q.channel_id, e = q.e_formal_298_v, n = q.n_apparent, by = %q.applied_by, run_id, "OCV fit applied");
    Ok(pb::ApplyOcvFitResponse {
        channel: Some(super::convert::channel_to_pb(&def, run_id)),
        new_run,
    })
}

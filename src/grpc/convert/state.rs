//! A channel's state now, and history buckets.

use crate::estimator;
use crate::ingest::ChannelRuntime;
use crate::pb;
use crate::store::{BucketRow, CountsBefore, ReadingRow, RunRow};
use std::collections::HashMap;

/// The estimator's view of a channel now, beside its latest reading.
pub fn estimator_to_pb(
    g: &ChannelRuntime,
    latest: Option<&ReadingRow>,
    latest_pb: Option<&pb::StoredReading>,
) -> pb::EstimatorState {
    let (resistance_ohm, resistance_source, uncertainty, age) =
        match (g.def.resistance_ohm, g.est.resistance) {
            (Some(r), _) => (Some(r), "configured", None, None),
            (None, Some(e)) => (
                Some(e.ohm),
                "current_step",
                Some(e.uncertainty_ohm),
                Some((g.last_time_ns - e.last_sample_ns) as f64 / 1e9),
            ),
            _ => (None, "none", None, None),
        };
    let latest_soc_model = latest.and_then(|r| r.soc_model);
    let soc_counted = latest
        .and_then(|r| r.soc_fused)
        .filter(|_| g.def.capacity_ah > 0.0);
    let is_h2 = g.chemistry.id == crate::electrochem::builtin::WATER_CELL_ID;
    let h2 = is_h2.then(|| estimator::hydrogen_account(&g.est, &g.est_config));
    // On the HHV basis at the reading's temperature.
    let voltage_efficiency = latest_pb
        .and_then(|r| {
            r.derived
                .as_ref()?
                .hydrogen
                .as_ref()?
                .voltage_efficiency_hhv
        })
        .filter(|_| latest.is_some_and(|r| r.amps.is_some_and(|i| i > 0.0)));
    pb::EstimatorState {
        resistance_ohm,
        resistance_uncertainty_ohm: uncertainty,
        resistance_age_s: age,
        resistance_source: resistance_source.into(),
        soc_counted,
        soc_disagreement: match (soc_counted, latest_soc_model) {
            (Some(c), Some(m)) => Some(c - m),
            _ => None,
        },
        soc_method: if g.def.capacity_ah > 0.0 {
            "anchored_count"
        } else {
            "model"
        }
        .into(),
        gaps: g.est.gaps,
        reaction_extent_mol: estimator::reaction_extent_mol(&g.est, g.chemistry.n_electrons),
        hydrogen_mol: h2.map(|h| h.hydrogen_mol),
        hydrogen_g: h2.map(|h| h.hydrogen_g),
        hydrogen_normal_litres: h2.map(|h| h.hydrogen_normal_litres),
        oxygen_mol: h2.map(|h| h.oxygen_mol),
        voltage_efficiency,
        specific_energy_kwh_per_kg_h2: h2.and_then(|h| h.specific_energy_kwh_per_kg),
    }
}

/// A query's buckets in order. ΔG = −nFE is linear in E, so its min, max
/// and mean follow from E's (with the run of the bucket's last reading).
/// Charge and energy passed per bucket are differences of consecutive
/// `last` counts, the first from `before` (the last stored reading before
/// the window); a bucket whose run differs from the one before counts
/// from zero, as a new run does.
pub fn buckets_to_pb(
    rows: &[BucketRow],
    before: Option<CountsBefore>,
    start_unix_ns: i64,
    width_ns: i64,
    runs: &HashMap<i64, RunRow>,
) -> Vec<pb::Bucket> {
    let mut previous = before.map(|b| (b.run_id, b.charge_ah, b.energy_wh));
    rows.iter()
        .map(|b| {
            let delta = |last: f64, prev: Option<(i64, f64)>| match prev {
                Some((run, before)) if run == b.last_run_id => Some(last - before),
                Some(_) => Some(last),
                None => None,
            };
            let charge_ah_delta = delta(b.charge_ah_last, previous.map(|p| (p.0, p.1)));
            let energy_wh_delta = delta(b.energy_wh_last, previous.map(|p| (p.0, p.2)));
            previous = Some((b.last_run_id, b.charge_ah_last, b.energy_wh_last));
            pb::Bucket {
                charge_ah_delta,
                energy_wh_delta,
                ..bucket_to_pb(b, start_unix_ns, width_ns, runs)
            }
        })
        .collect()
}

/// One bucket without the deltas (see [`buckets_to_pb`]).
fn bucket_to_pb(
    b: &BucketRow,
    start_unix_ns: i64,
    width_ns: i64,
    runs: &HashMap<i64, RunRow>,
) -> pb::Bucket {
    let n = runs.get(&b.last_run_id).map(|r| r.n_electrons).unwrap_or(1);
    let dg = |e: f64| crate::electrochem::thermo::delta_g_kj_per_mol(n, e);
    let stats = |s: [f64; 4]| pb::Stats {
        min: s[0],
        max: s[1],
        mean: s[2],
        last: s[3],
    };
    pb::Bucket {
        start_unix_ns: start_unix_ns + b.bucket * width_ns,
        count: b.count,
        volts: Some(stats(b.volts)),
        soc: b.soc.map(stats),
        delta_g_kj_per_mol: b
            .equilibrium_cell_volts
            .map(|[e_min, e_max, e_mean, e_last]| pb::Stats {
                min: dg(e_max),
                max: dg(e_min),
                mean: dg(e_mean),
                last: dg(e_last),
            }),
        equilibrium_cell_volts: b.equilibrium_cell_volts.map(stats),
        driving_force_v: b.driving_force_v.map(stats),
        charge_ah_last: b.charge_ah_last,
        energy_wh_last: b.energy_wh_last,
        charge_ah_delta: None,
        energy_wh_delta: None,
        run_id: b.last_run_id.max(0) as u64,
    }
}

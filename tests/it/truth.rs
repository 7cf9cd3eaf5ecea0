//! What the service says about cells under current, through the real API:
//! open and half cycles, an electrolyser's figures. Outside references are
//! named beside each value.

use crate::harness::*;
use gibbsline::pb;
use gibbsline::pb::history_service_client::HistoryServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;

const S: i64 = 1_000_000_000;

fn steps(
    channel: &str,
    t0: i64,
    seqs: std::ops::Range<u64>,
    volts: f64,
    amps: f64,
) -> pb::ReadingBatch {
    pb::ReadingBatch {
        historical: false,
        channel_id: channel.into(),
        batch_id: seqs.start,
        readings: seqs
            .map(|s| reading(s, t0 + s as i64 * S, volts, Some(amps)))
            .collect(),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn cycles_list_the_open_cycle_and_half_cycles() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    put_channel(&ch, channel_def("cyc-1", "vanadium-redox")).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 1_000 * S;
    // The run begins mid-discharge (a resumed test), then charges 100 s at
    // 1 A, then discharges 50 s at 1 A and is still discharging.
    send_batches(
        &mut ingest,
        vec![
            steps("cyc-1", t0, 1..51, 1.30, -1.0),
            steps("cyc-1", t0, 51..151, 1.45, 1.0),
            steps("cyc-1", t0, 151..201, 1.30, -1.0),
        ],
    )
    .await;
    let cycles = HistoryServiceClient::new(ch.clone())
        .list_cycles(pb::ListCyclesRequest {
            channel_id: "cyc-1".into(),
        })
        .await
        .unwrap()
        .into_inner()
        .cycles;
    assert_eq!(cycles.len(), 2, "{cycles:?}");
    let half = &cycles[0];
    assert!(
        half.discharge_only && half.partial && !half.open,
        "{half:?}"
    );
    assert_eq!(half.charge_in_ah, 0.0);
    assert_eq!(half.coulombic_efficiency, None);
    let open = &cycles[1];
    assert!(
        open.open && !open.partial && !open.discharge_only,
        "{open:?}"
    );
    // Trapezoid rule over 1 s steps: 99 intervals at 1 A from seq 51 to
    // 150; the steps across a sign change (−1 A to +1 A) net to zero.
    let charge_ah = 99.0 / 3600.0;
    assert!(
        (open.charge_in_ah - charge_ah).abs() < 1e-9,
        "{}",
        open.charge_in_ah
    );
    assert!(open.charge_out_ah > 0.0);
    // An open cycle's efficiencies are what they are so far.
    assert!(open.coulombic_efficiency.unwrap() < 1.0);
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_electrolyser_reports_its_reversible_voltage_efficiency_and_hydrogen_rate() {
    let (_dir, db) = temp_db();
    let server = Server::start(&db).await;
    let ch = server.channel().await;
    let mut def = channel_def("pem-1", "hydrogen-oxygen");
    def.cells_in_series = 2;
    def.capacity_ah = 0.0;
    def.default_temp_c = 60.0;
    def.resistance_ohm = Some(0.012);
    def.active_area_cm2 = Some(25.0);
    def.gas = Some(pb::GasConditions {
        saturated: true,
        ..Default::default()
    });
    put_channel(&ch, def).await;
    let mut ingest = IngestServiceClient::new(ch.clone());
    let t0 = now_ns() - 100 * S;
    let mut batch = steps("pem-1", t0, 1..11, 3.4, 20.0);
    for r in &mut batch.readings {
        r.temp_c = Some(60.0);
    }
    send_batches(&mut ingest, vec![batch]).await;
    let state = HistoryServiceClient::new(ch.clone())
        .get_channel_state(pb::GetChannelStateRequest {
            channel_id: "pem-1".into(),
        })
        .await
        .unwrap()
        .into_inner();
    let d = state.latest.unwrap().derived.unwrap();
    assert_eq!(d.ocv_source, pb::OcvSource::Reversible as i32);
    assert_eq!(d.operating_mode, pb::OperatingMode::Electrolysis as i32);
    let h = d.hydrogen.unwrap();
    // Cantera 3.2, saturated gases at 1 atm, 60 °C: E_rev 1.1950 V, E_tn
    // (HHV) 1.4752 V (tests/reference/water_cell_cantera.py).
    assert!((h.reversible_v - 1.1950).abs() < 1e-3, "{}", h.reversible_v);
    assert!((d.equilibrium_cell_volts - h.reversible_v).abs() < 1e-12);
    assert!((h.thermoneutral_hhv_v - 1.4752).abs() < 1e-3);
    assert!((d.driving_force_v.unwrap() - (1.7 - h.reversible_v)).abs() < 1e-9);
    // Faraday's law: 2 cells · 20 A / (2F) = 2.07285e-4 mol/s.
    assert!((h.h2_rate_mol_per_s - 2.07285e-4).abs() < 1e-9);
    assert!((h.current_density_a_per_cm2.unwrap() - 0.8).abs() < 1e-12);
    assert!((h.voltage_efficiency_hhv.unwrap() - h.thermoneutral_hhv_v / 1.7).abs() < 1e-12);
    assert_eq!(h.breach, pb::BoundBreach::Unspecified as i32);
    // Specific energy: 1.7 V · 26.59 kWh/(kg·V) ≈ 45.2 kWh/kg, above the
    // 39.4 kWh/kg HHV bound.
    let kwh = h.specific_energy_kwh_per_kg.unwrap();
    assert!(kwh > 39.4 && (kwh - 45.2).abs() < 0.1, "{kwh}");
    let e = state.estimator.unwrap();
    assert_eq!(e.voltage_efficiency, h.voltage_efficiency_hhv);
    server.stop().await;
}

/// Rollups against the readings they summarise: batches out of order,
/// late readings, resends and a restart; every tier's buckets must equal
/// the same buckets computed here from the stored readings.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn rollups_equal_a_recomputation_from_the_readings() {
    use gibbsline::pb::history_service_client::HistoryServiceClient;
    use gibbsline::pb::ingest_service_client::IngestServiceClient;
    let (_dir, db) = temp_db();
    let mut server = Server::start(&db).await;
    put_channel(
        &server.channel().await,
        channel_def("roll-1", "vanadium-redox"),
    )
    .await;
    // Three hours back, at whatever offset now has: not on a bucket edge.
    let t0 = now_ns() - 3 * 3_600_000_000_000;
    let at = |s: u64| t0 + (s as i64) * 700_000_000;
    let volts = |s: u64| 1.30 + 0.1 * ((s as f64) * 0.37).sin().abs();
    // Charge and discharge with a rest at the end of each half cycle: some
    // readings have an open-circuit estimate, some a driving force, some
    // neither, and buckets mix them.
    let amps = |s: u64| {
        Some(if s % 500 >= 400 {
            0.0
        } else if (s / 500).is_multiple_of(2) {
            1.5
        } else {
            -1.5
        })
    };
    // Seqs in order except a gap filled later (late readings), then resent.
    let mut order: Vec<u64> = (1..=6000).filter(|s| !(2000..2100).contains(s)).collect();
    order.extend(2000..2100);
    order.extend(1..=50);
    for (i, chunk) in order.chunks(700).enumerate() {
        if i == 5 {
            server.stop().await;
            server = Server::start(&db).await;
        }
        let mut ingest = IngestServiceClient::new(server.channel().await);
        let batch = pb::ReadingBatch {
            historical: false,
            channel_id: "roll-1".into(),
            batch_id: i as u64 + 1,
            readings: chunk
                .iter()
                .map(|&s| reading(s, at(s), volts(s), amps(s)))
                .collect(),
        };
        send_batches(&mut ingest, vec![batch]).await;
    }
    let ch = server.channel().await;
    let stored = stored_readings(&mut HistoryServiceClient::new(ch.clone()), "roll-1").await;
    assert_eq!(stored.len(), 6000);
    // 3 s and 7 s are finer than every tier: raw readings answer them.
    let mixed = buckets_match_readings(
        &ch,
        "roll-1",
        (t0, t0 + 6_000 * 700_000_000 + 1),
        &[3, 7, 10, 60, 120, 3600],
    )
    .await;
    assert!(
        mixed[0] > 0 && mixed[1] > 0,
        "buckets mixing readings with and without an estimate: {mixed:?}"
    );
    server.stop().await;
}

/// Asserts that `QueryBuckets` over `window` at each width (s) equals a
/// recomputation from the channel's stored readings: counts, volts, the
/// equilibrium voltage and driving force over the readings that have them,
/// ΔG's presence, last counts and charge passed. Returns how many buckets
/// mixed readings with and without an equilibrium estimate, and with and
/// without a driving force.
pub(crate) async fn buckets_match_readings(
    ch: &tonic::transport::Channel,
    channel: &str,
    window: (i64, i64),
    widths_s: &[i64],
) -> [usize; 2] {
    use gibbsline::pb::history_service_client::HistoryServiceClient;
    let stored = stored_readings(&mut HistoryServiceClient::new(ch.clone()), channel).await;
    let mut mixed = [0usize; 2];
    for &width_s in widths_s {
        let width = width_s * 1_000_000_000;
        let got = HistoryServiceClient::new(ch.clone())
            .query_buckets(pb::QueryBucketsRequest {
                channel_id: channel.into(),
                start_unix_ns: window.0,
                end_unix_ns: window.1,
                bucket_width_ns: width,
            })
            .await
            .unwrap()
            .into_inner()
            .buckets;
        let start = window.0.div_euclid(width) * width;
        let mut expected: std::collections::BTreeMap<i64, Vec<&pb::StoredReading>> =
            Default::default();
        for r in stored
            .iter()
            .filter(|r| r.time_unix_ns >= start && r.time_unix_ns < window.1)
        {
            expected
                .entry(r.time_unix_ns.div_euclid(width) * width)
                .or_default()
                .push(r);
        }
        assert_eq!(got.len(), expected.len(), "width {width_s} s");
        let mut previous_charge: Option<f64> = stored
            .iter()
            .filter(|r| r.time_unix_ns < start)
            .max_by_key(|r| (r.time_unix_ns, r.seq))
            .map(|r| r.derived.clone().unwrap().charge_ah);
        for (b, (start, rows)) in got.iter().zip(&expected) {
            assert_eq!(b.start_unix_ns, *start);
            assert_eq!(b.count, rows.len() as u64);
            let v = b.volts.unwrap();
            let vs: Vec<f64> = rows.iter().map(|r| r.volts).collect();
            let mean = vs.iter().sum::<f64>() / vs.len() as f64;
            assert_eq!(v.min, vs.iter().cloned().fold(f64::INFINITY, f64::min));
            assert_eq!(v.max, vs.iter().cloned().fold(f64::NEG_INFINITY, f64::max));
            assert!(
                (v.mean - mean).abs() <= mean_tolerance(&vs),
                "{} vs {mean} over {} readings",
                v.mean,
                vs.len()
            );
            let last = rows.iter().max_by_key(|r| (r.time_unix_ns, r.seq)).unwrap();
            assert_eq!(v.last, last.volts, "width {width_s} s, bucket {start}");
            let derived = |r: &&pb::StoredReading| r.derived.clone().unwrap();
            let known: Vec<f64> = rows
                .iter()
                .map(derived)
                .filter(|d| d.ocv_source != pb::OcvSource::None as i32)
                .map(|d| d.equilibrium_cell_volts)
                .collect();
            let pushed: Vec<f64> = rows
                .iter()
                .filter_map(|r| derived(r).driving_force_v)
                .collect();
            mixed[0] += usize::from(!known.is_empty() && known.len() < rows.len());
            mixed[1] += usize::from(!pushed.is_empty() && pushed.len() < rows.len());
            same_stats(b.equilibrium_cell_volts, &known, "equilibrium");
            same_stats(b.driving_force_v, &pushed, "driving force");
            assert_eq!(b.delta_g_kj_per_mol.is_some(), !known.is_empty());
            let last_charge = derived(last).charge_ah;
            assert_eq!(b.charge_ah_last, last_charge);
            // Nothing stored before the first bucket: no delta; then differences.
            match previous_charge {
                None => assert_eq!(b.charge_ah_delta, None),
                Some(before) => {
                    let delta = b.charge_ah_delta.unwrap();
                    assert!((delta - (last_charge - before)).abs() < 1e-12);
                }
            }
            previous_charge = Some(last_charge);
        }
    }
    mixed
}

/// How far two means of the same values may differ when their sums were
/// added in different orders (the rollups add per-tier partial sums): the
/// recursive-summation bound (n−1)·u·Σ|x| for each sum (Higham, Accuracy
/// and Stability of Numerical Algorithms, §4.2; from memory), with
/// ε = 2u, taken for both sums; never below 1e-12.
fn mean_tolerance(values: &[f64]) -> f64 {
    let n = values.len().max(1) as f64;
    let mean_abs = values.iter().map(|v| v.abs()).sum::<f64>() / n;
    (2.0 * n * f64::EPSILON * mean_abs).max(1e-12)
}

/// A bucket's statistic of a value some readings lack, against the values
/// of the readings that have it.
fn same_stats(got: Option<pb::Stats>, values: &[f64], what: &str) {
    let Some(s) = got else {
        assert!(
            values.is_empty(),
            "{what}: absent, but {} readings have it",
            values.len()
        );
        return;
    };
    assert!(!values.is_empty(), "{what}: present, but no reading has it");
    assert_eq!(
        s.min,
        values.iter().cloned().fold(f64::INFINITY, f64::min),
        "{what}"
    );
    assert_eq!(
        s.max,
        values.iter().cloned().fold(f64::NEG_INFINITY, f64::max),
        "{what}"
    );
    let mean = values.iter().sum::<f64>() / values.len() as f64;
    assert!(
        (s.mean - mean).abs() <= mean_tolerance(values),
        "{what}: {} vs {mean}",
        s.mean
    );
}

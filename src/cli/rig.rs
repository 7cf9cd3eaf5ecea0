//! A simulated rig: the demo scenario's cells streamed to a server over
//! real gRPC, resuming from the server's last stored seq after any
//! disconnect, so a restart loses nothing and doubles nothing.

use super::client;
use gibbsline::electrochem::builtin::WATER_CELL_ID;
use gibbsline::electrochem::{Chemistry, Registry};
use gibbsline::pb;
use gibbsline::pb::channel_service_client::ChannelServiceClient;
use gibbsline::pb::ingest_service_client::IngestServiceClient;
use gibbsline::sim::{CycleSchedule, SimCell, SimCellParams};
use std::collections::{HashMap, VecDeque};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::Duration;
use tokio_stream::StreamExt;

/// How a simulated channel is driven.
#[derive(Debug, Clone)]
pub(crate) enum Drive {
    Cycling(CycleSchedule),
    /// Constant charge-positive current (an electrolyser held at load).
    Constant(f64),
}

pub(crate) struct SimChannel {
    pub def: pb::Channel,
    pub chemistry: Arc<Chemistry>,
    pub cell: SimCell,
    pub drive: Drive,
    /// Instrument convention: multiply charge-positive amps by this.
    pub sign: f64,
    pub next_seq: u64,
    pub pending: VecDeque<pb::Reading>,
}

/// The Harbour Lane bench: an invented teaching-and-test bench with three
/// flow and battery cells and a two-cell electrolyser stack.
pub(crate) fn harbour_lane(count: usize, seed: u64) -> Vec<SimChannel> {
    let registry = Registry::builtin();
    harbour_lane_specs()
        .into_iter()
        .cycle()
        .take(count)
        .enumerate()
        .map(
            |(i, (id, chem_id, params, soc, drive, sign, description))| {
                // Repeats of the four get a suffix: hl-vrb-1-1, hl-vrb-1-2, …
                let channel_id = if i < 4 {
                    id.to_string()
                } else {
                    format!("{id}-{}", i / 4)
                };
                let def = sim_channel_def(channel_id, chem_id, &params, sign, description);
                SimChannel {
                    def,
                    chemistry: registry.get(chem_id).expect("scenario uses built-ins"),
                    cell: SimCell::new(params, soc, seed + i as u64),
                    drive,
                    sign: if sign == pb::CurrentSign::DischargePositive as i32 {
                        -1.0
                    } else {
                        1.0
                    },
                    next_seq: 1,
                    pending: VecDeque::new(),
                }
            },
        )
        .collect()
}

/// One simulated channel: id, chemistry, cell, starting SOC, drive, the
/// instrument's current sign, description.
type SimSpec = (
    &'static str,
    &'static str,
    SimCellParams,
    f64,
    Drive,
    i32,
    &'static str,
);

/// The bench's four cells (invented for the demo).
fn harbour_lane_specs() -> Vec<SimSpec> {
    let base = |cells, capacity_ah, r, rp, temp_c: f64, swing, period| SimCellParams {
        cells_in_series: cells,
        capacity_ah,
        resistance_ohm: r,
        polarisation_ohm: rp,
        polarisation_tau_s: 30.0,
        noise_volts: 0.0004 * f64::from(cells),
        temp_k: temp_c + 273.15,
        temp_swing_k: swing,
        temp_period_s: period,
        tafel_volts: 0.0,
        exchange_amps: 0.0,
    };
    vec![
        (
            "hl-vrb-1",
            "vanadium-redox",
            base(1, 2.0, 0.05, 0.02, 30.0, 1.0, 3600.0),
            0.80,
            Drive::Cycling(CycleSchedule::new(2.0, 2.0, 0.04, 0.96, 600.0).resting_first()),
            pb::CurrentSign::ChargePositive as i32,
            "vanadium flow cell, 25 cm² felt electrodes",
        ),
        (
            "hl-fecr-2",
            "iron-chromium",
            base(1, 3.0, 0.03, 0.01, 45.0, 1.5, 2400.0),
            0.30,
            Drive::Cycling(CycleSchedule::new(2.5, 2.5, 0.10, 0.90, 600.0).resting_first()),
            pb::CurrentSign::DischargePositive as i32,
            "iron–chromium flow cell; this instrument signs discharge positive",
        ),
        (
            "hl-lfp-3",
            "ocv-table-demo",
            base(4, 5.0, 0.02, 0.01, 25.0, 0.5, 3600.0),
            0.60,
            Drive::Cycling(CycleSchedule::new(5.0, 5.0, 0.08, 0.96, 600.0).resting_first()),
            pb::CurrentSign::ChargePositive as i32,
            "four-cell module with the illustrative OCV table",
        ),
        (
            "hl-pem-stack",
            "hydrogen-oxygen",
            // 25 cm² cells at 0.8 A/cm²: activation b = 60 mV, i0 = 0.05 A
            // (0.36 V), ASR 0.15 Ω·cm² (0.12 V): about 1.7 V per cell at
            // 65 °C, inside the 1.6–1.9 V of PEM practice.
            SimCellParams {
                tafel_volts: 0.060,
                exchange_amps: 0.05,
                ..base(2, 0.0, 0.012, 0.003, 65.0, 5.0, 3600.0)
            },
            0.5,
            Drive::Constant(20.0),
            pb::CurrentSign::ChargePositive as i32,
            "two-cell water electrolyser stack held at 20 A",
        ),
    ]
}

/// A simulated channel's definition as the server is told it.
fn sim_channel_def(
    channel_id: String,
    chem_id: &str,
    params: &SimCellParams,
    sign: i32,
    description: &str,
) -> pb::Channel {
    let water = chem_id == WATER_CELL_ID;
    pb::Channel {
        channel_id,
        chemistry_id: chem_id.into(),
        cells_in_series: params.cells_in_series,
        capacity_ah: params.capacity_ah,
        current_sign: sign,
        default_temp_c: params.temp_k - 273.15,
        description: description.into(),
        // The electrolyser: saturated product gases, known ohmic
        // resistance and area for iR-free figures.
        gas: water.then(|| pb::GasConditions {
            saturated: true,
            ..Default::default()
        }),
        active_area_cm2: water.then_some(25.0),
        resistance_ohm: water.then_some(0.012),
        ..Default::default()
    }
}

/// Unacknowledged readings kept per channel at most; past it the simulated
/// clock of that channel pauses, so a long outage makes no gap.
const MAX_PENDING: usize = 200_000;

pub(crate) struct RigOptions {
    pub speed: f64,
    pub readings_per_sim_s: f64,
    /// Stop after this much wall time.
    pub duration: Option<Duration>,
    pub quiet: bool,
}

/// Counters the caller can watch.
#[derive(Default)]
pub(crate) struct RigStats {
    pub sent: AtomicU64,
    pub acked: AtomicU64,
    pub reconnects: AtomicU64,
    pub stop: AtomicBool,
}

pub(crate) async fn define_channels(addr: &str, channels: &[SimChannel]) -> anyhow::Result<()> {
    let mut client = ChannelServiceClient::new(client::connect(addr).await?);
    for ch in channels {
        client
            .put_channel(pb::PutChannelRequest {
                channel: Some(ch.def.clone()),
            })
            .await?;
    }
    Ok(())
}

/// Streams until the duration passes or `stats.stop` is set.
pub(crate) async fn run(
    addr: String,
    mut channels: Vec<SimChannel>,
    opts: RigOptions,
    stats: Arc<RigStats>,
) -> anyhow::Result<()> {
    let start_wall = tokio::time::Instant::now();
    let done = || {
        stats.stop.load(Ordering::Relaxed)
            || opts.duration.is_some_and(|d| start_wall.elapsed() >= d)
    };
    // Simulated time ends near "now" for a bounded run; open-ended runs start
    // a day back so their clock stays behind the server's future limit longer.
    let span_ns = match opts.duration {
        Some(d) => (d.as_secs_f64() * opts.speed * 1e9) as i64,
        None => 86_400 * 1_000_000_000,
    };
    let mut sim_ns = client::now_ns() - span_ns;
    let mut first_connect = true;
    while !done() {
        let conn = match client::connect(&addr).await {
            Ok(c) => c,
            Err(e) => {
                if !opts.quiet {
                    eprintln!("rig: {e}; retrying in 1 s");
                }
                tokio::time::sleep(Duration::from_secs(1)).await;
                continue;
            }
        };
        if !first_connect {
            stats.reconnects.fetch_add(1, Ordering::Relaxed);
        }
        if !resume(&conn, &mut channels, first_connect, &mut sim_ns).await {
            tokio::time::sleep(Duration::from_secs(1)).await;
            continue;
        }
        first_connect = false;
        let finished = stream(&conn, &mut channels, &opts, &stats, &mut sim_ns, &done).await;
        if finished {
            break;
        }
        tokio::time::sleep(Duration::from_millis(500)).await;
    }
    Ok(())
}

/// Drops what the server already has, so the rest is resent; on the first
/// connection the simulated clock continues after the stored readings.
/// False when the server could not say.
async fn resume(
    conn: &client::Conn,
    channels: &mut [SimChannel],
    first_connect: bool,
    sim_ns: &mut i64,
) -> bool {
    let mut ingest = IngestServiceClient::new(conn.clone());
    let mut history = pb::history_service_client::HistoryServiceClient::new(conn.clone());
    for ch in channels.iter_mut() {
        let channel_id = ch.def.channel_id.clone();
        let Ok(point) = ingest
            .get_resume_point(pb::GetResumePointRequest {
                channel_id: channel_id.clone(),
            })
            .await
        else {
            return false;
        };
        let point = point.into_inner();
        if !point.any_stored {
            continue;
        }
        ch.pending.retain(|r| r.seq > point.last_stored_seq);
        ch.next_seq = ch.next_seq.max(point.last_stored_seq + 1);
        if first_connect
            && let Ok(state) = history
                .get_channel_state(pb::GetChannelStateRequest { channel_id })
                .await
        {
            *sim_ns = (*sim_ns).max(state.into_inner().last_seen_unix_ns + 1_000_000_000);
        }
    }
    true
}

/// Batches sent and not yet acknowledged: batch id → (channel index, last seq).
type InFlight = HashMap<u64, (usize, u64)>;

/// One ingest stream: simulate, send, settle acks. True once the run is
/// over (acks drained), false when the stream broke and should be retried.
async fn stream(
    conn: &client::Conn,
    channels: &mut [SimChannel],
    opts: &RigOptions,
    stats: &RigStats,
    sim_ns: &mut i64,
    done: &impl Fn() -> bool,
) -> bool {
    let tick = Duration::from_millis(250);
    let dt_sim_s = 1.0 / opts.readings_per_sim_s;
    let per_tick = ((opts.speed * opts.readings_per_sim_s) * tick.as_secs_f64()).max(1.0) as usize;
    let (tx, rx) = tokio::sync::mpsc::channel::<pb::StreamReadingsRequest>(8);
    let response = IngestServiceClient::new(conn.clone())
        .stream_readings(tokio_stream::wrappers::ReceiverStream::new(rx))
        .await;
    let Ok(response) = response else {
        return false;
    };
    let mut acks = response.into_inner();
    let mut batch_id = 0u64;
    let mut in_flight = InFlight::new();
    let mut interval = tokio::time::interval(tick);
    loop {
        if done() {
            drain(&mut acks, channels, &mut in_flight, stats).await;
            return true;
        }
        tokio::select! {
            _ = interval.tick() => {
                for _ in 0..per_tick {
                    *sim_ns += (dt_sim_s * 1e9) as i64;
                    simulate(channels, dt_sim_s, *sim_ns);
                }
                if !send_pending(channels, &mut in_flight, &mut batch_id, &tx, stats).await {
                    return false;
                }
            }
            m = acks.next() => match m {
                Some(Ok(m)) => {
                    if let Some(ack) = m.ack {
                        settle(channels, &mut in_flight, &ack, stats);
                    }
                }
                other => {
                    if !opts.quiet {
                        let why = match other {
                            Some(Err(s)) => s.message().to_string(),
                            _ => "stream closed".into(),
                        };
                        eprintln!("rig: stream ended ({why}); reconnecting");
                    }
                    return false;
                }
            },
        }
    }
}

/// One simulated reading per channel (unless its backlog is full).
fn simulate(channels: &mut [SimChannel], dt_sim_s: f64, sim_ns: i64) {
    for ch in channels.iter_mut() {
        if ch.pending.len() >= MAX_PENDING {
            continue;
        }
        let amps = match &mut ch.drive {
            Drive::Cycling(s) => s.amps(ch.cell.soc, dt_sim_s),
            Drive::Constant(a) => *a,
        };
        let sample = ch.cell.step(&ch.chemistry, amps, dt_sim_s);
        ch.pending.push_back(pb::Reading {
            seq: ch.next_seq,
            time_unix_ns: sim_ns,
            volts: sample.stack_volts,
            amps: Some(sample.amps * ch.sign),
            temp_c: Some(sample.temp_k - 273.15),
        });
        ch.next_seq += 1;
    }
}

/// Sends each channel's readings not yet in flight; false if the stream is gone.
async fn send_pending(
    channels: &[SimChannel],
    in_flight: &mut InFlight,
    batch_id: &mut u64,
    tx: &tokio::sync::mpsc::Sender<pb::StreamReadingsRequest>,
    stats: &RigStats,
) -> bool {
    for (index, ch) in channels.iter().enumerate() {
        let sent_hi = in_flight
            .values()
            .filter(|(i, _)| *i == index)
            .map(|(_, hi)| *hi)
            .max()
            .unwrap_or(0);
        let readings: Vec<_> = ch
            .pending
            .iter()
            .filter(|r| r.seq > sent_hi)
            .take(10_000)
            .cloned()
            .collect();
        let Some(last) = readings.last() else {
            continue;
        };
        in_flight.insert(*batch_id, (index, last.seq));
        stats
            .sent
            .fetch_add(readings.len() as u64, Ordering::Relaxed);
        let batch = pb::ReadingBatch {
            historical: false,
            channel_id: ch.def.channel_id.clone(),
            batch_id: *batch_id,
            readings,
        };
        *batch_id += 1;
        if tx
            .send(pb::StreamReadingsRequest { batch: Some(batch) })
            .await
            .is_err()
        {
            return false;
        }
    }
    true
}

/// Waits briefly for outstanding acks at the end of a run.
async fn drain(
    acks: &mut tonic::Streaming<pb::StreamReadingsResponse>,
    channels: &mut [SimChannel],
    in_flight: &mut InFlight,
    stats: &RigStats,
) {
    let deadline = tokio::time::Instant::now() + Duration::from_secs(5);
    while !in_flight.is_empty() {
        match tokio::time::timeout_at(deadline, acks.next()).await {
            Ok(Some(Ok(m))) => {
                if let Some(ack) = m.ack {
                    settle(channels, in_flight, &ack, stats);
                }
            }
            _ => break,
        }
    }
}

fn settle(
    channels: &mut [SimChannel],
    in_flight: &mut HashMap<u64, (usize, u64)>,
    ack: &pb::BatchAck,
    stats: &RigStats,
) {
    if !ack.rejected.is_empty() {
        tracing::warn!(channel_id = %ack.channel_id, rejected = ack.rejected.len(), first = %ack.rejected[0].reason, "readings rejected");
    }
    if let Some((index, hi)) = in_flight.remove(&ack.batch_id) {
        let ch = &mut channels[index];
        // The ack comes after the whole batch was committed: every reading
        // in it is stored (or rejected, and would be rejected again).
        let before = ch.pending.len();
        ch.pending.retain(|r| r.seq > hi);
        stats
            .acked
            .fetch_add((before - ch.pending.len()) as u64, Ordering::Relaxed);
    }
}

//! Fuzz-target bodies. Each takes arbitrary bytes, feeds them to one of the
//! parsers or validators that face untrusted input, and panics when a
//! property that must hold for *every* input is broken: no panic inside the
//! code under test, an error that names where the problem is, and on the
//! ingest path every reading accounted for exactly once.
//!
//! The cargo-fuzz targets in `tests/fuzz/` call these (nightly, libFuzzer);
//! the unit tests below replay the committed seeds and random mutations of
//! them on stable, so `cargo test` keeps the properties true between fuzz
//! runs. Pure: no I/O, no clock (the batch target runs at a fixed "now").

use crate::alerts::AlertChange;
use crate::channel::ChannelDef;
use crate::electrochem::chemistry::parse_chemistry_file;
use crate::electrochem::{self, EvalRequest, Registry};
use crate::estimator::{CurrentSign, EstimatorState};
use crate::ingest::{self, ChannelRuntime, RawReading};
use crate::pb;
use crate::store::{ReadingRow, ResumeState};
use prost::Message;
use std::collections::{BTreeMap, HashSet};

/// The fuzz targets, by the names `cargo fuzz run` takes.
pub const TARGETS: [&str; 4] = [
    "chemistry_file",
    "config_file",
    "ingest_batch",
    "ingest_restart",
];

/// The server's clock for the batch target: 2026-06-01T00:00:00Z.
pub const FUZZ_NOW_NS: i64 = 1_780_272_000 * 1_000_000_000;

/// Runs the body of target `name` on `data`.
pub fn run(name: &str, data: &[u8]) {
    match name {
        "chemistry_file" => chemistry_file(data),
        "config_file" => config_file(data),
        "ingest_batch" => ingest_batch(data),
        "ingest_restart" => ingest_restart(data),
        other => panic!("no fuzz target named {other:?}"),
    }
}

/// A chemistry file (TOML) as a user would pass with `--chemistry-file`.
/// Every chemistry that validates must evaluate to finite thermodynamics
/// across its own voltage window, with SOC in [0, 1] and an OCV that does
/// not fall as SOC rises.
pub fn chemistry_file(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    match parse_chemistry_file("fuzz.toml", text) {
        Err(e) => {
            let message = e.to_string();
            assert!(
                message.starts_with("fuzz.toml"),
                "error does not name the file: {message}"
            );
        }
        Ok(chemistries) => {
            for chemistry in &chemistries {
                check_chemistry(chemistry);
            }
        }
    }
}

fn check_chemistry(chemistry: &electrochem::Chemistry) {
    let (lo, hi) = (chemistry.min_cell_volts, chemistry.max_cell_volts);
    for temp_k in [253.15, 298.15, 343.15] {
        for step in 0..=8 {
            let cell_volts = lo + (hi - lo) * f64::from(step) / 8.0;
            let request = EvalRequest {
                stack_volts: cell_volts,
                cells_in_series: 1,
                temp_k,
                equilibrium_tolerance_volts: 1e-3,
            };
            let ev = electrochem::evaluate(chemistry, request).unwrap_or_else(|e| {
                panic!(
                    "{}: a valid chemistry fails at {cell_volts} V, {temp_k} K: {e}",
                    chemistry.id
                )
            });
            let t = &ev.thermo;
            for (what, v) in [
                ("delta_g_kj_per_mol", t.delta_g_kj_per_mol),
                ("ln_q", t.ln_q),
                ("ln_k", t.ln_k),
                ("e_standard_volts", t.e_standard_volts),
            ] {
                assert!(
                    v.is_finite(),
                    "{}: {what} = {v} at {cell_volts} V, {temp_k} K",
                    chemistry.id
                );
            }
            if let Some(soc) = ev.soc {
                assert!(
                    (0.0..=1.0).contains(&soc),
                    "{}: soc = {soc} at {cell_volts} V",
                    chemistry.id
                );
            }
        }
        let ocv_at = |soc: f64| {
            electrochem::evaluate_at_soc(chemistry, soc, 1, temp_k, 1e-3)
                .ok()
                .map(|ev| ev.thermo.cell_volts)
        };
        let mut previous: Option<f64> = None;
        for step in 1..=9 {
            let soc = f64::from(step) / 10.0;
            let Some(volts) = ocv_at(soc) else { break };
            assert!(
                volts.is_finite(),
                "{}: OCV at soc {soc} = {volts}",
                chemistry.id
            );
            if let Some(p) = previous {
                // Tolerance for rounding in the table interpolation only.
                assert!(
                    volts >= p - 1e-9 * p.abs().max(1.0),
                    "{}: OCV falls from {p} V to {volts} V as soc rises to {soc}",
                    chemistry.id
                );
            }
            previous = Some(volts);
        }
    }
}

/// A server config file (TOML), without environment overrides. An error
/// names the file and a line inside it; a config that loads prints (as
/// `--print-config` does) to text that loads back to the same config.
pub fn config_file(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let no_env = BTreeMap::new();
    match crate::config::load("fuzz.toml", text, &no_env) {
        Err(e) => {
            assert_eq!(e.path, "fuzz.toml");
            if let Some(line) = e.line {
                let lines = text.lines().count().max(1);
                assert!(
                    (1..=lines + 1).contains(&line),
                    "line {line} outside a {lines}-line file: {e}"
                );
            }
            assert!(!e.message.is_empty(), "empty config error message");
        }
        Ok(config) => {
            let _ = config.check_exposure();
            let printed = toml::to_string(&config)
                .unwrap_or_else(|e| panic!("a loaded config does not print: {e}"));
            let reloaded = crate::config::load("printed.toml", &printed, &no_env)
                .unwrap_or_else(|e| panic!("printed config does not load: {e}\n{printed}"));
            assert!(
                reloaded == config,
                "printed config loads differently:\n{printed}"
            );
        }
    }
}

/// Built once per process: validating the built-in table on every input
/// would dominate a fuzz run.
fn builtins() -> &'static Registry {
    static REGISTRY: std::sync::OnceLock<Registry> = std::sync::OnceLock::new();
    REGISTRY.get_or_init(Registry::builtin)
}

/// Channels the batch target runs every input against: single cells and
/// stacks, both sign conventions, Nernst, table and no SOC model, with and
/// without a capacity and a fixed resistance.
fn fuzz_channels(registry: &Registry) -> Vec<ChannelRuntime> {
    let setups: [(&str, u32, CurrentSign, f64, Option<f64>); 4] = [
        ("vanadium-redox", 1, CurrentSign::ChargePositive, 2.0, None),
        ("lead-acid", 6, CurrentSign::DischargePositive, 50.0, None),
        (
            "hydrogen-oxygen",
            10,
            CurrentSign::ChargePositive,
            0.0,
            None,
        ),
        (
            "ocv-table-demo",
            4,
            CurrentSign::ChargePositive,
            1.0,
            Some(0.01),
        ),
    ];
    setups
        .iter()
        .enumerate()
        .map(
            |(i, &(chemistry_id, cells, sign, capacity_ah, resistance))| {
                let chemistry = registry
                    .get(chemistry_id)
                    .unwrap_or_else(|e| panic!("fuzz channel {chemistry_id}: {e}"));
                let def = ChannelDef {
                    cells_in_series: cells,
                    capacity_ah,
                    current_sign: sign,
                    resistance_ohm: resistance,
                    ..ChannelDef::of_chemistry(format!("fuzz-{i}"), &chemistry)
                };
                let chemistry = def
                    .validate(registry)
                    .unwrap_or_else(|e| panic!("fuzz channel {chemistry_id}: {e}"));
                ChannelRuntime::fresh(i as i64 + 1, def, chemistry, 1)
            },
        )
        .collect()
}

/// One `StreamReadingsRequest` as it comes off the wire, through the same
/// conversion and validation the server runs, then sent a second time as a
/// rig resending after a lost ack would.
pub fn ingest_batch(data: &[u8]) {
    let Ok(request) = pb::StreamReadingsRequest::decode(data) else {
        return;
    };
    let Some(batch) = request.batch else { return };
    let readings: Vec<RawReading> = batch.readings.iter().map(RawReading::from).collect();
    if let Err(e) = ingest::check_batch_size(&readings) {
        assert!(e.to_string().contains("readings"), "{e}");
        return;
    }
    for mut rt in fuzz_channels(builtins()) {
        let (_, first_rejected) = check_derived(&mut rt, &readings);
        let (again, again_rejected) = check_derived(&mut rt, &readings);
        assert!(
            again.rows.is_empty(),
            "{}: a resent batch advanced the channel again",
            rt.def.channel_id
        );
        assert!(
            again_rejected.len() >= first_rejected.len(),
            "{}: a resend was rejected less often than the first send",
            rt.def.channel_id
        );
    }
}

/// Bytes per reading in an `ingest_restart` program.
const STEP_BYTES: usize = 5;

/// A rig's session as a compact program, so the fuzzer explores long runs
/// of charge, rest and discharge rather than protobuf framing. Byte 0
/// picks the channel; then each reading takes five bytes:
///
/// | byte | meaning |
/// |---|---|
/// | 0 | seconds since the previous reading (0 repeats its timestamp) |
/// | 1 | current: low 4 bits index a table of amps (or none); bit 7 repeats the previous seq |
/// | 2–3 | per-cell volts: an i16 offset across 1.2× the chemistry's window |
/// | 4 | bit 0 ends the batch; bit 1 also restarts the server after it; bit 2 carries a temperature, bits 3–7 its offset (°C) |
pub fn restart_program(data: &[u8]) -> Option<(ChannelRuntime, Vec<Vec<RawReading>>, Vec<bool>)> {
    const AMPS: [Option<f64>; 16] = [
        None,
        Some(0.0),
        Some(0.005),
        Some(-0.005),
        Some(0.2),
        Some(-0.2),
        Some(1.0),
        Some(-1.0),
        Some(2.0),
        Some(-2.0),
        Some(5.0),
        Some(-5.0),
        Some(40.0),
        Some(-40.0),
        Some(0.05),
        Some(-0.05),
    ];
    let (&setup, steps) = data.split_first()?;
    let mut channels = fuzz_channels(builtins());
    let channel = channels.swap_remove(usize::from(setup) % channels.len());
    let (lo, hi) = (
        channel.chemistry.min_cell_volts,
        channel.chemistry.max_cell_volts,
    );
    let cells = f64::from(channel.def.cells_in_series);
    let mut batches = vec![Vec::new()];
    let mut restarts = vec![false];
    let mut seq = 0u64;
    let mut time_ns = FUZZ_NOW_NS - 30 * 86_400 * 1_000_000_000;
    for step in steps.chunks_exact(STEP_BYTES) {
        let [dt_s, amps_code, v_hi, v_lo, control] = [step[0], step[1], step[2], step[3], step[4]];
        time_ns += i64::from(dt_s) * 1_000_000_000;
        if amps_code & 0x80 == 0 || seq == 0 {
            seq += 1;
        }
        let offset = f64::from(i16::from_be_bytes([v_hi, v_lo])) / 32768.0;
        let cell_volts = (lo + hi) / 2.0 + offset * 0.6 * (hi - lo);
        let temp_c = (control & 0b100 != 0).then(|| 25.0 + f64::from(control >> 3) - 16.0);
        let batch = batches.last_mut().expect("one batch at least");
        batch.push(RawReading {
            seq,
            time_unix_ns: time_ns,
            volts: cell_volts * cells,
            amps: AMPS[usize::from(amps_code & 0x0f)],
            temp_c,
        });
        if control & 1 != 0 {
            *restarts.last_mut().expect("one flag per batch") = control & 0b10 != 0;
            batches.push(Vec::new());
            restarts.push(false);
        }
    }
    if batches.last().is_some_and(Vec::is_empty) {
        batches.pop();
        restarts.pop();
    }
    Some((channel, batches, restarts))
}

/// A session run twice: once by a server that never stops, once by one
/// restarted from its store after the marked batches (the estimator
/// snapshot read back from JSON, the highest stored seq, the active
/// alerts). Every stored reading must come out the same: a restart may not
/// change a channel's SOC, charge, energy or flags.
pub fn ingest_restart(data: &[u8]) {
    let Some((mut steady, batches, restarts)) = restart_program(data) else {
        return;
    };
    let mut restarted = steady.clone();
    // What the restarted server's store holds.
    let mut stored_max_seq: Option<u64> = None;
    let mut snapshot: Option<ingest::writer::EstimatorSnapshot> = None;
    let mut active = std::collections::BTreeSet::new();
    for (number, (batch, restart_after)) in batches.iter().zip(restarts).enumerate() {
        let (a, _) = ingest::derive_batch(&mut steady, batch, FUZZ_NOW_NS);
        let (b, _) = check_derived(&mut restarted, batch);
        let key = |rows: &[ReadingRow]| -> Vec<_> {
            rows.iter()
                .map(|r| {
                    (
                        r.seq,
                        r.time_ns,
                        r.cell_volts_used,
                        r.soc_model,
                        r.soc_fused,
                        r.charge_ah,
                        r.energy_wh,
                        r.flags,
                    )
                })
                .collect()
        };
        assert_eq!(
            (key(&a.rows), key(&a.maybe_dup)),
            (key(&b.rows), key(&b.maybe_dup)),
            "batch {number}: a restarted server derived other values"
        );
        stored_max_seq = stored_max_seq.max(b.rows.iter().chain(&b.maybe_dup).map(|r| r.seq).max());
        if b.estimator.is_some() {
            snapshot = b.estimator;
        }
        for change in &b.changes {
            match change {
                AlertChange::Raise(alert) => active.insert(alert.kind),
                AlertChange::Clear { kind, .. } => active.remove(kind),
            };
        }
        if restart_after {
            let run_id = restarted.run_id;
            restarted = ingest::restore_runtime(
                restarted.key,
                restarted.def.clone(),
                restarted.chemistry.clone(),
                run_id,
                restarted.rules,
                ResumeState {
                    // The front is the snapshot's, as load_resume_state reads it.
                    max_seq: snapshot.as_ref().map(|s| s.last_seq).or(stored_max_seq),
                    estimator: snapshot.as_ref().map(|s| {
                        (
                            run_id,
                            s.last_time_ns,
                            s.usual_interval_s,
                            s.state_json.clone(),
                        )
                    }),
                    active_kinds: active.iter().copied().collect(),
                    marks: restarted.retention,
                },
            );
        }
    }
}

fn check_derived(
    rt: &mut ChannelRuntime,
    readings: &[RawReading],
) -> (ingest::DerivedBatch, Vec<ingest::Rejection>) {
    let id = rt.def.channel_id.clone();
    let max_seq_before = rt.max_seq;
    let (derived, rejected) = ingest::derive_batch(rt, readings, FUZZ_NOW_NS);
    assert_eq!(
        derived.rows.len() + derived.maybe_dup.len() + rejected.len(),
        readings.len(),
        "{id}: every reading must be stored, a possible duplicate or rejected"
    );
    check_rejections(&id, readings, &rejected);
    check_rows(&id, max_seq_before, &derived);
    check_alerts_name_stored_seqs(&id, rt, &derived);
    if let Some(snapshot) = &derived.estimator {
        // The snapshot is what a restart resumes from: it must read back
        // as the state the channel holds now.
        let restored: EstimatorState = serde_json::from_str(&snapshot.state_json)
            .unwrap_or_else(|e| panic!("{id}: estimator snapshot does not read back: {e}"));
        assert!(
            restored == rt.est,
            "{id}: estimator snapshot reads back differently:\n{:?}\n{:?}",
            restored,
            rt.est
        );
    }
    (derived, rejected)
}

/// Each rejection names a reading of the batch once, its seq and its field.
fn check_rejections(id: &str, readings: &[RawReading], rejected: &[ingest::Rejection]) {
    let mut indices = HashSet::new();
    for r in rejected {
        let i = r.index as usize;
        assert!(i < readings.len() && indices.insert(i), "{id}: index {i}");
        assert_eq!(r.seq, readings[i].seq, "{id}: rejection {i} names seq");
        assert!(
            r.reason.contains(r.field),
            "{id}: rejection of {} does not name its field: {}",
            r.field,
            r.reason
        );
    }
}

/// Fresh rows rise in seq and time and hold finite values, SOC in [0, 1].
fn check_rows(id: &str, max_seq_before: Option<u64>, derived: &ingest::DerivedBatch) {
    let mut last: Option<(u64, i64)> = max_seq_before.map(|s| (s, i64::MIN));
    for row in &derived.rows {
        if let Some((seq, time_ns)) = last {
            assert!(
                row.seq > seq && row.time_ns > time_ns,
                "{id}: fresh rows must rise in seq and time"
            );
        }
        last = Some((row.seq, row.time_ns));
        assert!(row.seq <= i64::MAX as u64, "{id}: seq {} stored", row.seq);
        assert!(row.volts.is_finite(), "{id}: volts {} stored", row.volts);
        for (what, v) in [
            ("cell_volts_used", row.cell_volts_used),
            ("charge_ah", row.charge_ah),
            ("energy_wh", row.energy_wh),
        ] {
            assert!(v.is_finite(), "{id}: seq {}: {what} = {v}", row.seq);
        }
        for soc in [row.soc_model, row.soc_fused].into_iter().flatten() {
            assert!(
                (0.0..=1.0).contains(&soc),
                "{id}: seq {}: soc {soc}",
                row.seq
            );
        }
    }
}

/// Every raised alert names a seq this batch stored (the timeline alert:
/// the channel's front).
fn check_alerts_name_stored_seqs(id: &str, rt: &ChannelRuntime, derived: &ingest::DerivedBatch) {
    let fresh_seqs: HashSet<u64> = derived.rows.iter().map(|r| r.seq).collect();
    // Limit rules also judge readings out of the channel's order, kept
    // (stored unless already stored) among the possible duplicates.
    let late_seqs: HashSet<u64> = derived.maybe_dup.iter().map(|r| r.seq).collect();
    for change in &derived.changes {
        if let crate::alerts::AlertChange::Raise(a) = change {
            // The timeline alert is raised for readings the rules did not
            // see; it names the channel's front, stored in this batch or before.
            let named = if a.kind == crate::alerts::AlertKind::Timeline {
                rt.max_seq.is_some_and(|front| a.seq <= front)
            } else if a.severity == crate::alerts::Severity::Critical {
                fresh_seqs.contains(&a.seq) || late_seqs.contains(&a.seq)
            } else {
                fresh_seqs.contains(&a.seq)
            };
            assert!(
                named,
                "{id}: alert {:?} names seq {} that this batch did not store",
                a.kind, a.seq
            );
        }
    }
}

#[cfg(test)]
mod tests;

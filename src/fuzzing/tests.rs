//! Replays the committed seeds (and regressions found by fuzzing) through
//! the fuzz-target bodies, and random inputs and mutations of the seeds on
//! stable, so `cargo test` holds the fuzzed properties between fuzz runs.

use super::*;
use proptest::prelude::*;
use std::path::PathBuf;

fn seed_dir(target: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fuzz/seeds")
        .join(target)
}

fn seeds(target: &str) -> Vec<(String, Vec<u8>)> {
    let dir = seed_dir(target);
    let mut out: Vec<(String, Vec<u8>)> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|entry| {
            let path = entry.expect("seed dir entry").path();
            let bytes = std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
            (path.display().to_string(), bytes)
        })
        .collect();
    out.sort();
    out
}

#[test]
fn every_committed_seed_holds_the_properties() {
    for target in TARGETS {
        let seeds = seeds(target);
        assert!(seeds.len() >= 2, "{target}: only {} seeds", seeds.len());
        for (path, bytes) in seeds {
            let outcome = std::panic::catch_unwind(|| run(target, &bytes));
            assert!(outcome.is_ok(), "{target} fails on {path}");
        }
    }
}

/// The chemistry seeds start from the built-in files themselves: a
/// built-in edited without its seed (or the other way) fails here.
#[test]
fn chemistry_seeds_are_the_builtin_files() {
    for (id, text) in crate::electrochem::builtin::builtin_files() {
        let path = seed_dir("chemistry_file").join(format!("builtin-{id}.toml"));
        let seed =
            std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
        assert_eq!(
            seed,
            text,
            "{} differs from src/electrochem/builtin/{id}.toml",
            path.display()
        );
    }
}

/// The batch seeds must stay real batches (a proto change could turn them
/// into noise the fuzzer starts from), and the simulated ones must reach
/// the estimator rather than stop at validation.
#[test]
fn batch_seeds_reach_the_estimator() {
    let registry = Registry::builtin();
    let mut deep = 0;
    for (path, bytes) in seeds("ingest_batch") {
        let request = pb::StreamReadingsRequest::decode(bytes.as_slice())
            .unwrap_or_else(|e| panic!("{path}: {e}"));
        let batch = request.batch.unwrap_or_else(|| panic!("{path}: no batch"));
        assert!(!batch.readings.is_empty(), "{path}: no readings");
        let readings: Vec<RawReading> = batch.readings.iter().map(RawReading::from).collect();
        let mut rt = fuzz_channels(&registry).remove(0);
        let (derived, _) = ingest::derive_batch(&mut rt, &readings, FUZZ_NOW_NS);
        if derived.rows.len() >= 100 {
            deep += 1;
        }
    }
    assert!(deep >= 3, "only {deep} batch seeds reach the estimator");
}

/// The restart seeds must restart, and the stored rows must show the
/// estimator's deeper states (rests settled, SOC counted) on both sides.
#[test]
fn restart_seeds_restart_mid_cycle() {
    use crate::store::flags;
    // Regression seeds are minimal on purpose; the session seeds must reach deep.
    let sessions = seeds("ingest_restart")
        .into_iter()
        .filter(|(path, _)| !path.contains("regression-"));
    for (path, bytes) in sessions {
        let (mut rt, batches, restarts) =
            restart_program(&bytes).unwrap_or_else(|| panic!("{path}: empty"));
        assert!(restarts.iter().filter(|r| **r).count() >= 3, "{path}");
        let has_soc_model = rt.chemistry.soc_model.name() != "none";
        let mut seen = 0;
        for batch in &batches {
            let (derived, _) = ingest::derive_batch(&mut rt, batch, FUZZ_NOW_NS);
            for row in &derived.rows {
                seen |= row.flags & (flags::REST_SETTLED | flags::OCV_COUNTED | flags::OCV_OHMIC);
            }
        }
        assert_ne!(seen & flags::REST_SETTLED, 0, "{path}: no rest settled");
        if has_soc_model {
            assert_ne!(
                seen & (flags::OCV_COUNTED | flags::OCV_OHMIC),
                0,
                "{path}: never compensated"
            );
        }
    }
}

#[test]
fn unknown_target_is_refused() {
    assert!(std::panic::catch_unwind(|| run("no-such-target", b"")).is_err());
}

/// A value that is sometimes plausible for the fuzz channels and sometimes
/// a special float, so random batches reach the estimator as well as the
/// checks.
fn awkward_f64(plausible: std::ops::Range<f64>) -> impl Strategy<Value = f64> {
    prop_oneof![
        6 => plausible,
        1 => prop::num::f64::ANY,
        1 => Just(f64::NAN),
        1 => Just(f64::INFINITY),
        1 => Just(0.0),
    ]
}

fn reading() -> impl Strategy<Value = pb::Reading> {
    (
        prop_oneof![8 => 1u64..50, 1 => Just(u64::MAX), 1 => any::<u64>()],
        prop_oneof![8 => -100i64..100, 1 => any::<i64>().prop_map(|t| t / 1_000_000_000)],
        awkward_f64(0.0..25.0),
        prop::option::of(awkward_f64(-20.0..20.0)),
        prop::option::of(awkward_f64(-30.0..90.0)),
    )
        .prop_map(|(seq, dt_s, volts, amps, temp_c)| pb::Reading {
            seq,
            time_unix_ns: FUZZ_NOW_NS.saturating_add(dt_s.saturating_mul(1_000_000_000)),
            volts,
            amps,
            temp_c,
        })
}

fn mutated(seed: Vec<u8>) -> impl Strategy<Value = Vec<u8>> {
    let len = seed.len().max(1);
    prop::collection::vec((0..len, any::<u8>(), 0u8..3), 1..8).prop_map(move |edits| {
        let mut bytes = seed.clone();
        for (at, byte, how) in edits {
            let at = at.min(bytes.len());
            match how {
                0 if at < bytes.len() => bytes[at] = byte,
                1 => bytes.insert(at, byte),
                _ => bytes.truncate(at.max(1)),
            }
        }
        bytes
    })
}

fn seed_mutations(target: &'static str) -> impl Strategy<Value = Vec<u8>> {
    let all: Vec<Vec<u8>> = seeds(target).into_iter().map(|(_, b)| b).collect();
    prop::sample::select(all).prop_flat_map(mutated)
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 200, ..ProptestConfig::default() })]

    #[test]
    fn random_batches_hold_the_ingest_properties(
        readings in prop::collection::vec(reading(), 1..40),
    ) {
        let request = pb::StreamReadingsRequest {
            batch: Some(pb::ReadingBatch {
                historical: false,
                channel_id: "fuzz".into(),
                readings,
                batch_id: 1,
            }),
        };
        ingest_batch(&request.encode_to_vec());
    }

    #[test]
    fn mutated_batches_hold_the_ingest_properties(bytes in seed_mutations("ingest_batch")) {
        ingest_batch(&bytes);
    }

    #[test]
    fn random_sessions_derive_the_same_across_restarts(
        program in prop::collection::vec(any::<u8>(), 1..(1 + 200 * STEP_BYTES)),
    ) {
        ingest_restart(&program);
    }

    #[test]
    fn mutated_sessions_derive_the_same_across_restarts(bytes in seed_mutations("ingest_restart")) {
        ingest_restart(&bytes);
    }

    #[test]
    fn mutated_chemistry_files_hold_their_properties(bytes in seed_mutations("chemistry_file")) {
        chemistry_file(&bytes);
    }

    #[test]
    fn mutated_configs_hold_their_properties(bytes in seed_mutations("config_file")) {
        config_file(&bytes);
    }
}

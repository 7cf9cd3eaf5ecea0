#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| gibbsline::fuzzing::ingest_restart(data));

#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| gibbsline::fuzzing::config_file(data));

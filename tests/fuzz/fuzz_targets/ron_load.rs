//! Fuzz target: `harness::ron_load` on each input.

#![no_main]

#[path = "../harness.rs"]
mod harness;

libfuzzer_sys::fuzz_target!(|data: &[u8]| harness::ron_load(data));

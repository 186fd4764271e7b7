//! Fuzz target: `harness::sidecar_load` on each input.

#![no_main]

#[path = "../harness.rs"]
mod harness;

libfuzzer_sys::fuzz_target!(|data: &[u8]| harness::sidecar_load(data));

//! Opening big traces: a recorded 10⁶-node scalar trace from JSON (target
//! under 3 s) and a binary-backed trace of 10⁴ tensor nodes holding 5·10⁷
//! elements (target under 1 s).

#[path = "support/fixtures.rs"]
mod fixtures;

use std::path::PathBuf;
use std::sync::OnceLock;

fn main() {
    divan::main();
}

fn fixture_dir() -> &'static tempfile::TempDir {
    static DIR: OnceLock<tempfile::TempDir> = OnceLock::new();
    DIR.get_or_init(|| tempfile::tempdir().expect("a temporary directory"))
}

fn chain() -> &'static PathBuf {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| fixtures::scalar_chain_json(fixture_dir().path(), 1_000_000))
}

fn wide() -> &'static PathBuf {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| fixtures::wide_tape(fixture_dir().path(), 10_000, 5_000))
}

#[divan::bench(sample_count = 3, sample_size = 1)]
fn scalar_chain_1e6_nodes_from_json(bencher: divan::Bencher) {
    let path = chain();
    bencher.bench_local(|| ebb::trace::load(path).expect("the fixture loads"));
}

#[divan::bench(sample_count = 5, sample_size = 1)]
fn binary_1e4_tensors_5e7_elements(bencher: divan::Bencher) {
    let path = wide();
    bencher.bench_local(|| ebb::trace::load(path).expect("the fixture loads"));
}

/// Opening and summarising every tensor (what a first frame listing all nodes needs).
#[divan::bench(sample_count = 5, sample_size = 1)]
fn binary_1e4_tensors_open_and_summarise(bencher: divan::Bencher) {
    let path = wide();
    bencher.bench_local(|| {
        let trace = ebb::trace::load(path).expect("the fixture loads");
        trace
            .nodes()
            .iter()
            .map(|node| node.value.summary(trace.dtype()).nan)
            .sum::<usize>()
    });
}

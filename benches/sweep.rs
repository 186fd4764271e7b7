//! Load and full-sweep benchmarks on generated scalar traces (10⁴, 10⁵, 10⁶
//! nodes of two inputs each), beside a flat-array loop doing the same
//! accumulation: the floor any sweep engine is measured against.
//!
//! Run with `cargo bench --bench sweep`.

use ebb::dtype::Dtype;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::{Encoding, NodeFile, NodeId, TraceFile, ValueRepr, load_str, to_text, validate};
use std::path::Path;
use std::sync::OnceLock;

fn main() {
    divan::main();
}

const SIZES: [usize; 3] = [10_000, 100_000, 1_000_000];

/// A trace of `nodes` scalar nodes: two leaves, then multiply nodes whose
/// inputs are picked among the 16 most recent nodes.
///
/// Every recorded value is 0.5 (synthetic: the engine reads recorded values
/// and never recomputes them, so the work measured is the sweep's own). Each
/// partial is then 0.5 and each node has two consumers on average, so the
/// adjoints stay near 1: no overflow, no subnormals, no flags, which would
/// otherwise dominate what is measured.
fn generated(nodes: usize) -> TraceFile {
    let mut state = 0x2545_F491_4F6C_DD1Du64;
    let mut next = move || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    let node = |id: String, op: &str, inputs: Vec<NodeId>| NodeFile {
        id: NodeId(id),
        dtype: None,
        op: op.into(),
        inputs,
        group: String::new(),
        site: None,
        value: ValueRepr::Scalar(0.5),
        attrs: Default::default(),
        partials: vec![],
        reported: None,
    };
    let mut file_nodes = vec![
        node("a".into(), "param", vec![]),
        node("b".into(), "param", vec![]),
    ];
    for index in 2..nodes {
        let window = index.min(16) as u64;
        let (i, j) = (
            index - 1 - (next() % window) as usize,
            index - 1 - (next() % window) as usize,
        );
        let inputs = vec![file_nodes[i].id.clone(), file_nodes[j].id.clone()];
        file_nodes.push(node(format!("n{index}"), "mul", inputs));
    }
    TraceFile {
        format: 1,
        accumulate: None,
        sidecar: None,
        title: format!("generated {nodes}"),
        description: String::new(),
        dtype: Dtype::F64,
        output: file_nodes.last().unwrap().id.clone(),
        seed: None,
        nodes: file_nodes,
    }
}

/// Generated traces, built once per size for the whole run.
fn trace(nodes: usize) -> &'static ebb::trace::Trace {
    static CACHE: OnceLock<Vec<(usize, ebb::trace::Trace)>> = OnceLock::new();
    let cache = CACHE.get_or_init(|| {
        SIZES
            .iter()
            .map(|&n| {
                let trace = validate(generated(n)).expect("valid");
                let mut sweep = Sweep::new(&trace, LedgerMode::Off);
                sweep.run_to_end();
                assert!(
                    sweep.flags().is_empty(),
                    "the benchmark trace must sweep without flags"
                );
                drop(sweep);
                (n, trace)
            })
            .collect()
    });
    &cache
        .iter()
        .find(|(n, _)| *n == nodes)
        .expect("a benchmarked size")
        .1
}

fn json(nodes: usize) -> &'static str {
    static CACHE: OnceLock<Vec<(usize, String)>> = OnceLock::new();
    let cache = CACHE.get_or_init(|| {
        SIZES
            .iter()
            .map(|&n| (n, to_text(&generated(n), Encoding::Json)))
            .collect()
    });
    &cache
        .iter()
        .find(|(n, _)| *n == nodes)
        .expect("a benchmarked size")
        .1
}

/// Parse and validate from JSON text (the file read itself is excluded).
#[divan::bench(args = SIZES, sample_count = 5, sample_size = 1)]
fn load_json(bencher: divan::Bencher, nodes: usize) {
    let text = json(nodes);
    bencher.bench(|| load_str(text, Encoding::Json, Path::new("generated.json")).expect("loads"));
}

/// Full sweep with the ledger off.
#[divan::bench(args = SIZES, sample_count = 10, sample_size = 1)]
fn sweep_ledger_off(bencher: divan::Bencher, nodes: usize) {
    let trace = trace(nodes);
    bencher
        .with_inputs(|| Sweep::new(trace, LedgerMode::Off))
        .bench_local_values(|mut sweep| {
            sweep.run_to_end();
            sweep
        });
}

/// Full sweep keeping every contribution in the ledger.
#[divan::bench(args = SIZES, sample_count = 10, sample_size = 1)]
fn sweep_ledger_on(bencher: divan::Bencher, nodes: usize) {
    let trace = trace(nodes);
    bencher
        .with_inputs(|| Sweep::new(trace, LedgerMode::On))
        .bench_local_values(|mut sweep| {
            sweep.run_to_end();
            sweep
        });
}

/// The local partial on one edge, from the op table (the only place a
/// derivative is written).
fn edge_partial(trace: &ebb::trace::Trace, node: usize, slot: usize) -> f64 {
    let recorded = trace.node(node);
    let inputs: Vec<f64> = recorded
        .inputs
        .iter()
        .map(|&i| trace.node(i).value.as_scalar().unwrap())
        .collect();
    let output = recorded.value.as_scalar().unwrap();
    ebb::ops::scalar_partial(
        recorded.op,
        slot,
        &inputs,
        output,
        &recorded.attrs,
        trace.dtype(),
    )
    .expect("elementwise")
}

/// The floor: the same accumulation over flat arrays of (receiver, sender,
/// partial) in sweep order, partials precomputed.
#[divan::bench(args = SIZES, sample_count = 10, sample_size = 1)]
fn flat_loop(bencher: divan::Bencher, nodes: usize) {
    let trace = trace(nodes);
    let mut edges: Vec<(u32, u32, f64)> = Vec::with_capacity(2 * nodes);
    for &node in trace.sweep_order() {
        let recorded = trace.node(node);
        for (slot, &input) in recorded.inputs.iter().enumerate() {
            edges.push((input as u32, node as u32, edge_partial(trace, node, slot)));
        }
    }
    let output = trace.output();
    bencher
        .with_inputs(|| vec![0.0f64; nodes])
        .bench_local_values(|mut adjoints| {
            adjoints[output] = 1.0;
            for &(input, node, partial) in &edges {
                adjoints[input as usize] += adjoints[node as usize] * partial;
            }
            adjoints
        });
}

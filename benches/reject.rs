//! Rejecting bad traces: parsing, validating and rendering the error of a
//! JSON trace where every node has a problem (a repeated id, or an input
//! that is unknown or recorded later), at 10⁴, 10⁵ and 10⁶ problems, beside
//! loading a good trace of the same shape. Time should grow linearly with
//! the file: positions come from one pass over the text, and only the first
//! problems are rendered in full.

use ebb::trace::{Encoding, load_str};
use std::fmt::Write as _;
use std::path::Path;
use std::sync::Mutex;

fn main() {
    divan::main();
}

const SIZES: [usize; 3] = [10_000, 100_000, 1_000_000];

/// What every node after the first does wrong.
#[derive(Clone, Copy)]
enum Fault {
    /// Nothing: a valid chain of `neg`s.
    None,
    /// Repeats the first node's id.
    DuplicateId,
    /// Reads an unknown id (odd nodes) or the next node (even nodes).
    BadInput,
}

/// A JSON trace of `nodes` scalar nodes, one a line.
fn text(nodes: usize, fault: Fault) -> String {
    let mut text = String::from(
        "{\"format\": 1, \"title\": \"rejection\", \"dtype\": \"f64\", \"output\": \"n0\", \"nodes\": [\n",
    );
    for k in 0..nodes {
        let id = match fault {
            Fault::DuplicateId if k > 0 => "n0".to_string(),
            _ => format!("n{k}"),
        };
        let input = match fault {
            _ if k == 0 => None,
            Fault::BadInput if k % 2 == 1 => Some(format!("missing{k}")),
            Fault::BadInput => Some(format!("n{}", k + 1)),
            Fault::None | Fault::DuplicateId => Some(format!("n{}", k - 1)),
        };
        let comma = if k + 1 < nodes { "," } else { "" };
        let _ = match input {
            None => writeln!(
                text,
                "  {{\"id\": \"{id}\", \"op\": \"param\", \"value\": 0.5}}{comma}"
            ),
            Some(input) => writeln!(
                text,
                "  {{\"id\": \"{id}\", \"op\": \"neg\", \"inputs\": [\"{input}\"], \"value\": -0.5}}{comma}"
            ),
        };
    }
    text.push_str("]}\n");
    text
}

/// A generated text, kept for the whole run.
struct Fixture {
    nodes: usize,
    fault: Fault,
    text: &'static str,
}

fn fixture(nodes: usize, fault: Fault) -> &'static str {
    static CACHE: Mutex<Vec<Fixture>> = Mutex::new(Vec::new());
    let mut cache = CACHE.lock().expect("the cache lock");
    if let Some(found) = cache
        .iter()
        .find(|found| found.nodes == nodes && found.fault as u8 == fault as u8)
    {
        return found.text;
    }
    let text: &'static str = Box::leak(text(nodes, fault).into_boxed_str());
    cache.push(Fixture { nodes, fault, text });
    text
}

fn reject(bencher: divan::Bencher, nodes: usize, fault: Fault) {
    let text = fixture(nodes, fault);
    bencher.bench_local(|| {
        let error = load_str(text, Encoding::Json, Path::new("bad.json"))
            .expect_err("the fixture is rejected");
        error.to_string().len()
    });
}

#[divan::bench(args = SIZES, sample_count = 5, sample_size = 1)]
fn duplicate_ids(bencher: divan::Bencher, nodes: usize) {
    reject(bencher, nodes, Fault::DuplicateId);
}

#[divan::bench(args = SIZES, sample_count = 5, sample_size = 1)]
fn unknown_and_forward_inputs(bencher: divan::Bencher, nodes: usize) {
    reject(bencher, nodes, Fault::BadInput);
}

/// The same file with nothing wrong: parsing and building the trace.
#[divan::bench(args = SIZES, sample_count = 5, sample_size = 1)]
fn valid_for_comparison(bencher: divan::Bencher, nodes: usize) {
    let text = fixture(nodes, Fault::None);
    bencher.bench_local(|| {
        load_str(text, Encoding::Json, Path::new("good.json"))
            .expect("the fixture loads")
            .nodes()
            .len()
    });
}

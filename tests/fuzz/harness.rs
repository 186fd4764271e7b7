//! What each fuzz target does with its input, shared by the fuzz targets
//! (`tests/fuzz/fuzz_targets/`, run with cargo-fuzz on nightly) and by
//! `tests/fuzz_regressions.rs`, which replays every input that once failed
//! on stable as part of `cargo test`. Each function panics when a property
//! of Ebb fails; a rejected input is not a failure.

#![allow(dead_code)]

use ebb::diagnose::{Settings, diagnose};
use ebb::report::Report;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::{
    Encoding, LoadError, SyntaxError, Trace, TraceFile, load_str, one_line, parse, to_text,
};
use std::path::{Path, PathBuf};

/// Loads RON text: never a panic; a rejection is one short error naming the
/// file; what parses writes back to text that reads again the same.
pub fn ron_load(data: &[u8]) {
    load_text(data, Encoding::Ron, "fuzz.ron");
}

/// [`ron_load`] for JSON.
pub fn json_load(data: &[u8]) {
    load_text(data, Encoding::Json, "fuzz.json");
}

fn load_text(data: &[u8], encoding: Encoding, name: &str) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let parsed = parse(text, encoding);
    if let Ok(file) = &parsed {
        round_trips(file, encoding);
    }
    let loaded = load_str(text, encoding, Path::new(name));
    same_syntax_error(&parsed, &loaded);
    match loaded {
        Ok(trace) => assert!(trace.output() < trace.nodes().len()),
        Err(error) => check_error(&error, name),
    }
}

/// The loader reads node by node (src/trace/stream.rs) with a reader of its
/// own for the file's fields; `parse` reads the whole file with the types'
/// derived readers. Both must find the same syntax errors, at the same line
/// and column, with the same message.
fn same_syntax_error(parsed: &Result<TraceFile, SyntaxError>, loaded: &Result<Trace, LoadError>) {
    let streamed = match loaded {
        Err(LoadError::Syntax {
            line,
            column,
            message,
            ..
        }) => Some((*line, *column, message.clone())),
        _ => None,
    };
    // The loader keeps an error on one line; compare what it prints.
    let whole = parsed.as_ref().err().map(|error| {
        (
            error.line,
            error.column,
            one_line(&error.message).into_owned(),
        )
    });
    assert_eq!(
        streamed, whole,
        "the node-by-node reader and the whole parse disagree"
    );
}

/// A rejection is at most 21 lines (20 problems and a count), each naming
/// the file.
fn check_error(error: &LoadError, name: &str) {
    let message = error.to_string();
    assert!(!message.is_empty());
    let lines: Vec<&str> = message.lines().collect();
    assert!(lines.len() <= 21, "{} lines", lines.len());
    for line in lines {
        assert!(line.starts_with(name), "a line without the file: {line}");
    }
}

/// Writing a parsed file and reading it back gives the same text, in both
/// encodings and across them: nothing is lost, NaN and ±inf included.
fn round_trips(file: &TraceFile, encoding: Encoding) {
    let text = to_text(file, encoding);
    let again = parse(&text, encoding)
        .unwrap_or_else(|error| panic!("Ebb cannot read what it wrote: {error:?}\n{text}"));
    assert_eq!(
        to_text(&again, encoding),
        text,
        "a second round trip differs"
    );
    let other = match encoding {
        Encoding::Ron => Encoding::Json,
        Encoding::Json => Encoding::Ron,
    };
    let crossed = to_text(file, other);
    let back = parse(&crossed, other)
        .unwrap_or_else(|error| panic!("Ebb cannot read its {other:?}: {error:?}\n{crossed}"));
    assert_eq!(
        to_text(&back, encoding),
        text,
        "the other encoding loses something"
    );
}

/// Loads a trace (JSON if it starts with `{`, else RON), then what
/// `ebb check` does: sweep, diagnose, report in text and JSON; then undoes
/// every step and sweeps again, which must give the same bits.
pub fn pipeline(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let encoding = Encoding::sniff(text);
    let Ok(trace) = load_str(text, encoding, Path::new("fuzz")) else {
        return;
    };
    check_pipeline(&trace);
}

/// The trace the sidecar target reads: three tensors and a scalar loss.
/// `tests/fuzz/run` writes its seed, the sidecar of the same trace with
/// data inline (`tests/fuzz/sidecar_seed.ron`).
const SIDECAR_HEADER: &str = r#"(format: 2, title: "fuzz", dtype: f32, sidecar: "t.safetensors", output: "loss", nodes: [
  (id: "a", op: "param", value: (tensor: "value/a")),
  (id: "b", op: "input", value: (tensor: "value/b")),
  (id: "y", op: "mul", inputs: ["a", "b"], value: (tensor: "value/y")),
  (id: "loss", op: "sum", inputs: ["y"], value: 0.5),
])"#;

/// Loads a fixed trace whose safetensors sidecar is the input: never a
/// panic; a rejection is one short error naming the trace; what loads goes
/// through the whole pipeline.
pub fn sidecar_load(data: &[u8]) {
    SIDECAR.with(|place| {
        match place.load(data) {
            Ok(trace) => check_pipeline(&trace),
            Err(error) => check_error(&error, &place.label),
        }
        ebb::trace::check_sidecars_unchanged().expect("nothing changed the sidecar");
    });
}

/// The fixed trace loaded with `data` as its sidecar.
pub fn load_sidecar(data: &[u8]) -> Result<Trace, LoadError> {
    SIDECAR.with(|place| place.load(data))
}

/// Where this thread's sidecar target works: a temporary directory (under
/// TMPDIR: `tests/fuzz/run` puts it on tmpfs) holding the fixed header
/// `t.tape`, written once, and the sidecar `t.safetensors`, rewritten for
/// every input. One per thread: `cargo test` replays inputs in parallel.
struct SidecarPlace {
    _dir: tempfile::TempDir,
    tape: PathBuf,
    sidecar: PathBuf,
    /// The trace's path as errors name it.
    label: String,
}

impl SidecarPlace {
    fn new() -> SidecarPlace {
        let dir = tempfile::tempdir().expect("a temporary directory");
        let tape = dir.path().join("t.tape");
        std::fs::write(&tape, SIDECAR_HEADER).expect("the header writes");
        SidecarPlace {
            sidecar: dir.path().join("t.safetensors"),
            label: tape.display().to_string(),
            tape,
            _dir: dir,
        }
    }

    /// Writes `data` as the sidecar, a real file, so the loader's file
    /// checks run on it; then loads the trace from its path.
    fn load(&self, data: &[u8]) -> Result<Trace, LoadError> {
        std::fs::write(&self.sidecar, data).expect("the sidecar writes");
        ebb::trace::load(&self.tape)
    }
}

thread_local! {
    static SIDECAR: SidecarPlace = SidecarPlace::new();
}

/// What `ebb check` does with a loaded trace, then undo and sweep again.
fn check_pipeline(trace: &Trace) {
    let settings = Settings::default();
    let own = settings.swept_trace(trace);
    let mut plain = Sweep::new(&own, LedgerMode::Off);
    plain.run_to_end();
    let diagnosis = diagnose(trace, &settings);
    let report = Report::new("fuzz", &plain).with_diagnosis(trace, &diagnosis);
    assert!(!report.to_text().is_empty());
    assert!(!report.to_json().is_empty());

    let mut sweep = Sweep::new(trace, LedgerMode::On);
    let start = adjoint_bits(&sweep);
    sweep.run_to_end();
    let end = adjoint_bits(&sweep);
    let flags = sweep.flags().len();
    assert_eq!(end, adjoint_bits(&plain), "ledger on and off agree");
    while sweep.back() {}
    assert_eq!(sweep.cursor(), 0);
    assert_eq!(adjoint_bits(&sweep), start, "undo returns to the seed");
    sweep.run_to_end();
    assert_eq!(
        adjoint_bits(&sweep),
        end,
        "a second sweep gives the same bits"
    );
    assert_eq!(sweep.flags().len(), flags);
}

/// Every node's adjoint as bits (`None` before its first contribution).
fn adjoint_bits(sweep: &Sweep) -> Vec<Option<Vec<u64>>> {
    (0..sweep.trace().nodes().len())
        .map(|node| {
            sweep
                .adjoint(node)
                .map(|value| value.to_f64().iter().map(|x| x.to_bits()).collect())
        })
        .collect()
}

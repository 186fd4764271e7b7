//! `ebb convert` stopped by a signal while it writes: the temporary files it
//! was writing are removed, its input is untouched, nothing is left at the
//! output, and a stale `.ebb-*.tmp` of another process is neither removed
//! nor used.

#![cfg(unix)]

use ebb::dtype::Dtype;
use ebb::trace::{self, FORMAT_VERSION, NodeFile, NodeId, TraceFile, ValueRepr};
use std::os::unix::process::ExitStatusExt;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// The names of the temporary files in `dir`.
fn temporaries(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir)
        .expect("the directory lists")
        .map(|entry| {
            entry
                .expect("an entry")
                .file_name()
                .to_string_lossy()
                .into_owned()
        })
        .filter(|name| name.starts_with(".ebb-") && name.ends_with(".tmp"))
        .collect();
    names.sort();
    names
}

/// A trace with one tensor of `elements` f64 numbers (not exact in f32, so
/// the sidecar stores 8 bytes each), big enough that writing it takes a
/// while.
fn big_trace(elements: usize) -> TraceFile {
    TraceFile {
        format: FORMAT_VERSION,
        accumulate: None,
        sidecar: None,
        title: "big".into(),
        description: String::new(),
        dtype: Dtype::F64,
        output: NodeId("w".into()),
        seed: None,
        nodes: vec![NodeFile {
            id: NodeId("w".into()),
            dtype: None,
            op: "param".into(),
            inputs: vec![],
            group: String::new(),
            site: None,
            value: ValueRepr::Tensor {
                shape: vec![elements],
                data: (0..elements).map(|k| k as f64 / 3.0).collect(),
            },
            attrs: Default::default(),
            partials: vec![],
            reported: None,
        }],
    }
}

/// The stale temporary file a killed process might have left.
const STALE: &str = ".ebb-stale01.tmp";

fn interrupted_conversion(signal: libc::c_int) {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let input = dir.path().join("in.tape");
    trace::save(&big_trace(8_000_000), &input).expect("the input saves");
    let input_files: Vec<(std::path::PathBuf, Vec<u8>)> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|entry| {
            let path = entry.unwrap().path();
            let bytes = std::fs::read(&path).unwrap();
            (path, bytes)
        })
        .collect();
    std::fs::write(dir.path().join(STALE), b"another process's").unwrap();
    let output = dir.path().join("out.tape");
    let mut child = Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(["convert", input.to_str().unwrap(), output.to_str().unwrap()])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("the binary runs");
    let pid = child.id() as libc::pid_t;
    // Wait until it writes a temporary file of its own, then freeze it so the
    // signal arrives while that file is half written.
    let deadline = Instant::now() + Duration::from_secs(120);
    loop {
        if temporaries(dir.path()).len() > 1 {
            // SAFETY: signalling our own child process.
            unsafe { libc::kill(pid, libc::SIGSTOP) };
            break;
        }
        if let Some(status) = child.try_wait().unwrap() {
            panic!("convert finished ({status}) before a temporary file was seen");
        }
        assert!(Instant::now() < deadline, "no temporary file appeared");
        std::thread::sleep(Duration::from_micros(500));
    }
    assert!(temporaries(dir.path()).len() > 1, "it is writing");
    // SAFETY: as above.
    unsafe {
        libc::kill(pid, signal);
        libc::kill(pid, libc::SIGCONT);
    }
    let status = child.wait().unwrap();
    assert_eq!(
        status.signal(),
        Some(signal),
        "ended by the signal: {status}"
    );
    assert_eq!(temporaries(dir.path()), vec![STALE.to_string()]);
    assert_eq!(
        std::fs::read(dir.path().join(STALE)).unwrap(),
        b"another process's"
    );
    assert!(!output.exists(), "no output header");
    for (path, bytes) in input_files {
        assert!(
            std::fs::read(&path).unwrap() == bytes,
            "{} unchanged",
            path.display()
        );
    }
    let names: Vec<String> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|entry| entry.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|name| name.starts_with("out"))
        .collect();
    assert!(names.is_empty(), "nothing at the output: {names:?}");
}

#[test]
fn sigterm_removes_the_temporary_files() {
    interrupted_conversion(libc::SIGTERM);
}

#[test]
fn sigint_removes_the_temporary_files() {
    interrupted_conversion(libc::SIGINT);
}

#[test]
fn a_stale_temporary_file_is_left_alone() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let stale = dir.path().join(STALE);
    std::fs::write(&stale, b"(format: 1, not a trace").unwrap();
    let output = dir.path().join("teaching.json");
    let status = Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args([
            "convert",
            concat!(env!("CARGO_MANIFEST_DIR"), "/traces/teaching.ron"),
            output.to_str().unwrap(),
        ])
        .stdout(Stdio::null())
        .status()
        .expect("the binary runs");
    assert!(status.success());
    assert_eq!(std::fs::read(&stale).unwrap(), b"(format: 1, not a trace");
    assert_eq!(temporaries(dir.path()), vec![STALE.to_string()]);
    let converted = trace::load(&output).expect("the output loads");
    let original = trace::load(Path::new(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/traces/teaching.ron"
    )))
    .unwrap();
    assert_eq!(converted.nodes().len(), original.nodes().len());
}

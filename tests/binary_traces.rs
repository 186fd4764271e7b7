//! Traces saved in every form read back identically (NaN and ±inf included),
//! and a truncated or lying binary sidecar gives the documented one-line
//! error (traces/FORMAT.md, "Binary-backed traces"), never a crash.

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{self, LoadError, Trace, TraceFile, binary};
use std::path::{Path, PathBuf};
use std::process::Command;

/// A small trace whose values, reported gradients and seed hold NaN and ±inf.
fn special_trace(dtype: Dtype) -> TraceFile {
    let mut tape = Tape::new("special numbers", dtype);
    let x = tape.input(
        "x",
        Value::from_parts(
            vec![2, 3],
            vec![1.0, f64::NAN, f64::NEG_INFINITY, -0.0, 0.1, f64::INFINITY],
        ),
    );
    let s = tape.param("s", 0.5);
    let y = tape.mul(x, s);
    tape.report(
        y,
        Value::from_parts(
            vec![2, 3],
            vec![f64::NAN, 1.0, 2.0, f64::INFINITY, 3.0, -1.5],
        ),
    );
    tape.report(s, f64::NEG_INFINITY);
    let seed = Value::from_parts(
        vec![2, 3],
        vec![1.0, 2.0, f64::NAN, 0.25, f64::INFINITY, 1e-30],
    );
    tape.finish_seeded(y, seed)
}

/// Everything a trace holds, as text in which NaN equals NaN and −0 differs from 0.
fn fingerprint(trace: &Trace) -> String {
    let bits = |value: &Value| {
        value
            .to_f64()
            .iter()
            .map(|x| format!("{:x}", if x.is_nan() { 0x7ff8 } else { x.to_bits() }))
            .collect::<Vec<_>>()
    };
    let nodes: Vec<String> = trace
        .nodes()
        .iter()
        .map(|node| {
            format!(
                "{} {} {:?} {:?} {:?}",
                node.id,
                node.op_name,
                node.value.shape(),
                bits(&node.value),
                node.reported.as_ref().map(bits)
            )
        })
        .collect();
    format!(
        "{} {} {:?} {:?}",
        trace.title(),
        trace.dtype(),
        bits(trace.seed()),
        nodes
    )
}

#[test]
fn every_form_reads_back_identically_with_nan_and_infinities() {
    let dir = tempfile::tempdir().unwrap();
    for dtype in [Dtype::F64, Dtype::F32, Dtype::F16] {
        let file = special_trace(dtype);
        let reference = fingerprint(&trace::validate(file.clone()).unwrap());
        for name in ["t.ron", "t.json", "t.tape"] {
            let path = dir.path().join(format!("{dtype}-{name}"));
            trace::save(&file, &path).unwrap();
            let loaded = trace::load(&path).unwrap_or_else(|e| panic!("{e}"));
            assert_eq!(fingerprint(&loaded), reference, "{dtype} {name}");
            let reread = trace::read_file(&path, &mut trace::Silent).unwrap();
            assert_eq!(
                fingerprint(&trace::validate(reread).unwrap()),
                reference,
                "{dtype} {name} read whole"
            );
        }
    }
}

#[test]
fn narrow_runs_store_f32_and_wide_runs_f64() {
    let dir = tempfile::tempdir().unwrap();
    for (dtype, element, width) in [
        (Dtype::F32, "element: f32", 4u32),
        (Dtype::F64, "element: f64", 8),
    ] {
        let path = dir.path().join(format!("{dtype}.tape"));
        trace::save(&special_trace(dtype), &path).unwrap();
        assert!(std::fs::read_to_string(&path).unwrap().contains(element));
        let sidecar = std::fs::read(binary::sidecar_path(&path)).unwrap();
        assert_eq!(&sidecar[..8], binary::MAGIC);
        assert_eq!(
            u32::from_le_bytes(sidecar[12..16].try_into().unwrap()),
            width
        );
    }
}

#[test]
fn mapped_tensors_summarise_without_widening_and_agree_with_owned_ones() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("s.tape");
    let file = special_trace(Dtype::F32);
    trace::save(&file, &path).unwrap();
    let mapped = trace::load(&path).unwrap();
    let owned = trace::validate(file).unwrap();
    let Value::Tensor(tensor) = &mapped.node(0).value else {
        panic!("x is a tensor")
    };
    assert!(tensor.is_mapped());
    let from_map = tensor.summary(Dtype::F32);
    let from_memory = owned.node(0).value.summary(Dtype::F32);
    assert_eq!(format!("{from_map:?}"), format!("{from_memory:?}"));
    assert_eq!(
        (
            from_map.nan,
            from_map.pos_inf,
            from_map.neg_inf,
            from_map.zeros
        ),
        (1, 1, 1, 1)
    );
}

/// Opening must not read the elements: a binary-backed f32 trace stays
/// narrow and in the map until something asks for its values.
#[test]
fn opening_a_binary_trace_widens_no_tensor() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("s.tape");
    trace::save(&special_trace(Dtype::F32), &path).unwrap();
    let opened = trace::load(&path).unwrap();
    let mapped: Vec<_> = opened
        .nodes()
        .iter()
        .filter_map(|node| match &node.value {
            Value::Tensor(tensor) if tensor.is_mapped() => Some(tensor),
            _ => None,
        })
        .collect();
    assert!(!mapped.is_empty());
    // f32 elements are read in place, 4 bytes each: never widened to f64.
    assert!(
        mapped
            .iter()
            .all(|tensor| tensor.elements().dtype() == Dtype::F32)
    );
}

/// Copies the shipped medium demo into a fresh directory.
fn medium_copy(dir: &Path) -> PathBuf {
    let traces = Path::new(env!("CARGO_MANIFEST_DIR")).join("traces");
    std::fs::copy(traces.join("medium.tape"), dir.join("medium.tape")).unwrap();
    std::fs::copy(traces.join("medium.bin"), dir.join("medium.bin")).unwrap();
    dir.join("medium.tape")
}

fn sidecar_error(path: &Path) -> String {
    match trace::load(path) {
        Err(error @ LoadError::Sidecar { .. }) => error.to_string(),
        Err(other) => panic!("expected a sidecar error, got: {other}"),
        Ok(_) => panic!("a broken sidecar loaded"),
    }
}

#[test]
fn a_truncated_sidecar_names_the_first_node_cut_off() {
    let dir = tempfile::tempdir().unwrap();
    let header = medium_copy(dir.path());
    let sidecar = dir.path().join("medium.bin");
    let file = std::fs::OpenOptions::new()
        .write(true)
        .open(&sidecar)
        .unwrap();
    file.set_len(600_000).unwrap();
    let message = sidecar_error(&header);
    assert!(
        message.starts_with(&format!(
            "{}: node 'layer2.xw': sidecar medium.bin is truncated",
            header.display()
        )),
        "{message}"
    );
    assert!(
        message.contains("hint:") && !message.contains('\n'),
        "{message}"
    );
}

/// Rewrites the first occurrence of `from` in the header.
fn edit_header(header: &Path, from: &str, to: &str) {
    let text = std::fs::read_to_string(header).unwrap();
    assert!(text.contains(from), "{from} not in the header");
    std::fs::write(header, text.replacen(from, to, 1)).unwrap();
}

#[test]
fn lying_headers_give_one_clear_line() {
    let cases: [(&str, &str, &str); 6] = [
        (
            "offset: 16400,",
            "offset: 1214400,",
            "node 'layer1.w': data of shape [64, 256] at bytes 1214400..1279936 lies past the end",
        ),
        (
            "shape: [64, 256],\n        offset: 16400,",
            "shape: [4000000000, 4000000000],\n        offset: 16400,",
            "node 'layer1.w': shape [4000000000, 4000000000] is too large",
        ),
        (
            "offset: 16400,",
            "offset: 16402,",
            "node 'layer1.w': offset 16402 is not a multiple of the 4-byte element width",
        ),
        (
            "offset: 16,",
            "offset: 4,",
            "node 'spectra': offset 4 lies inside the 16-byte preamble",
        ),
        (
            "element: f32,",
            "element: f64,",
            "stores 4-byte elements but the header declares f64",
        ),
        (
            "file: \"medium.bin\",",
            "file: \"../medium.bin\",",
            "sidecar name `../medium.bin` is not a plain file name",
        ),
    ];
    for (from, to, expected) in cases {
        let dir = tempfile::tempdir().unwrap();
        let header = medium_copy(dir.path());
        edit_header(&header, from, to);
        let message = sidecar_error(&header);
        assert!(message.contains(expected), "{to}: {message}");
        assert!(
            message.starts_with(&header.display().to_string())
                && message.contains("hint:")
                && !message.contains('\n'),
            "{message}"
        );
    }
}

#[test]
fn a_sidecar_of_another_length_or_kind_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let header = medium_copy(dir.path());
    let sidecar = dir.path().join("medium.bin");
    let mut bytes = std::fs::read(&sidecar).unwrap();
    bytes.extend_from_slice(&[0; 8]);
    std::fs::write(&sidecar, &bytes).unwrap();
    assert!(sidecar_error(&header).contains("is 1214528 bytes, but the header declares 1214520"));
    bytes.truncate(bytes.len() - 8);
    bytes[..8].copy_from_slice(b"notebbsd");
    std::fs::write(&sidecar, &bytes).unwrap();
    assert!(sidecar_error(&header).contains("is not an Ebb sidecar"));
    std::fs::remove_file(&sidecar).unwrap();
    assert!(sidecar_error(&header).contains("cannot open its sidecar"));
}

fn ebb(args: &[&str]) -> (i32, String, String) {
    let output = Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .output()
        .unwrap();
    (
        output.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&output.stdout).into_owned(),
        String::from_utf8_lossy(&output.stderr).into_owned(),
    )
}

#[test]
fn the_cli_reports_a_broken_sidecar_with_exit_status_2() {
    let dir = tempfile::tempdir().unwrap();
    let header = medium_copy(dir.path());
    std::fs::OpenOptions::new()
        .write(true)
        .open(dir.path().join("medium.bin"))
        .unwrap()
        .set_len(1000)
        .unwrap();
    let (status, stdout, stderr) = ebb(&["check", header.to_str().unwrap()]);
    assert_eq!(status, 2);
    assert!(stdout.is_empty());
    assert_eq!(stderr.lines().count(), 1, "{stderr}");
    assert!(
        stderr.contains("node 'spectra'") || stderr.contains("node 'layer1.w'"),
        "{stderr}"
    );
}

#[test]
fn convert_round_trips_and_never_overwrites_its_input() {
    let dir = tempfile::tempdir().unwrap();
    let header = medium_copy(dir.path());
    let json = dir.path().join("m.json");
    let ron = dir.path().join("m.ron");
    let back = dir.path().join("back.tape");
    for (from, to) in [(&header, &json), (&json, &ron), (&ron, &back)] {
        let (status, stdout, stderr) =
            ebb(&["convert", from.to_str().unwrap(), to.to_str().unwrap()]);
        assert_eq!(status, 0, "{stderr}");
        assert!(stdout.starts_with("converted "), "{stdout}");
    }
    let original = std::fs::read(dir.path().join("medium.bin")).unwrap();
    assert!(
        original == std::fs::read(dir.path().join("back.bin")).unwrap(),
        "sidecar bytes survive text round trips"
    );
    let before = std::fs::read(&json).unwrap();
    let (status, _, stderr) = ebb(&["convert", json.to_str().unwrap(), json.to_str().unwrap()]);
    assert_eq!(status, 2);
    assert!(stderr.contains("would overwrite the input"), "{stderr}");
    // A .tape output next to a .bin input of the same name would overwrite the sidecar.
    let (status, _, stderr) = ebb(&[
        "convert",
        header.to_str().unwrap(),
        dir.path().join("medium.tape").to_str().unwrap(),
    ]);
    assert_eq!(status, 2, "{stderr}");
    assert_eq!(std::fs::read(&json).unwrap(), before);
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().ends_with(".tmp"))
        .collect();
    assert!(leftovers.is_empty(), "no temporary files are left behind");
    let (status, _, stderr) = ebb(&[
        "convert",
        json.to_str().unwrap(),
        dir.path().join("m.txt").to_str().unwrap(),
    ]);
    assert_eq!(status, 2);
    assert!(stderr.contains("unknown trace extension"), "{stderr}");
}

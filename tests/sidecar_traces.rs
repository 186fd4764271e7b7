//! Traces saved in every form read back identically (NaN and ±inf included),
//! tensors are stored in their node's dtype in a safetensors sidecar, and a
//! damaged sidecar or a reference that does not fit gives one clear line
//! (traces/FORMAT.md, "Sidecars"), never a crash.

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{self, LoadError, Trace, TraceFile, sidecar};
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

/// The safetensors entries of a sidecar: name, dtype, shape.
fn entries(path: &Path) -> Vec<(String, safetensors::Dtype, Vec<usize>)> {
    let bytes = std::fs::read(path).unwrap();
    let parsed = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let mut entries: Vec<_> = parsed
        .iter()
        .map(|(name, view)| (name.to_string(), view.dtype(), view.shape().to_vec()))
        .collect();
    entries.sort_by(|a, b| a.0.cmp(&b.0));
    entries
}

#[test]
fn every_tensor_is_stored_in_its_nodes_dtype() {
    let dir = tempfile::tempdir().unwrap();
    for (dtype, stored) in [
        (Dtype::F64, safetensors::Dtype::F64),
        (Dtype::F32, safetensors::Dtype::F32),
        (Dtype::F16, safetensors::Dtype::F16),
        (Dtype::Bf16, safetensors::Dtype::BF16),
    ] {
        let path = dir.path().join(format!("{dtype}.tape"));
        trace::save(&special_trace(dtype), &path).unwrap();
        let header = std::fs::read_to_string(&path).unwrap();
        assert!(
            header.contains(&format!("sidecar: \"{dtype}.safetensors\"")),
            "{header}"
        );
        let found = entries(&sidecar::sidecar_path(&path));
        let names: Vec<&str> = found.iter().map(|(name, _, _)| name.as_str()).collect();
        assert_eq!(names, ["reported/mul_2", "seed", "value/mul_2", "value/x"]);
        assert!(
            found
                .iter()
                .all(|(_, d, shape)| *d == stored && shape == &[2, 3])
        );
    }
}

#[test]
fn a_mixed_precision_trace_keeps_each_nodes_dtype() {
    let dir = tempfile::tempdir().unwrap();
    let mut tape = Tape::new("mixed", Dtype::F32);
    let w = tape.param(
        "w",
        Value::from_parts(vec![2, 2], vec![0.5, -1.0, 0.25, 2.0]),
    );
    let x = tape.input_in(
        "x",
        Value::from_parts(vec![1, 2], vec![0.1, 0.2]),
        Dtype::F16,
    );
    let w16 = tape.cast(w, Dtype::F16);
    let h = tape.matmul(x, w16);
    let h32 = tape.cast(h, Dtype::F32);
    let loss = tape.sum(h32);
    let file = tape.finish(loss);
    let path = dir.path().join("mixed.tape");
    trace::save(&file, &path).unwrap();
    let loaded = trace::load(&path).unwrap();
    let dtypes: Vec<Dtype> = (0..loaded.nodes().len())
        .map(|n| loaded.node_dtype(n))
        .collect();
    assert_eq!(
        dtypes,
        [
            Dtype::F32,
            Dtype::F16,
            Dtype::F16,
            Dtype::F16,
            Dtype::F32,
            Dtype::F32
        ]
    );
    assert_eq!(loaded.node(1).value.storage_dtype(), Dtype::F16);
    let stored: Vec<_> = entries(&sidecar::sidecar_path(&path))
        .into_iter()
        .map(|(name, dtype, _)| (name, dtype))
        .collect();
    assert!(stored.contains(&("value/w".to_string(), safetensors::Dtype::F32)));
    assert!(stored.contains(&("value/x".to_string(), safetensors::Dtype::F16)));
}

#[test]
fn mapped_tensors_summarise_in_place_and_agree_with_owned_ones() {
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
    // f32 elements are read in place, 4 bytes each: never widened to f64.
    assert_eq!(tensor.elements().dtype(), Dtype::F32);
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

/// What traces/FORMAT.md's Python example does (numpy + safetensors + json),
/// done here with the safetensors crate: a JSON trace naming its sidecar.
#[test]
fn a_trace_written_by_another_program_loads() {
    let dir = tempfile::tempdir().unwrap();
    let w: Vec<f32> = vec![0.5, -1.0, 0.25, 2.0];
    let x: Vec<half::f16> = [1.0f32, 2.0]
        .iter()
        .map(|&v| half::f16::from_f32(v))
        .collect();
    let labels: Vec<i64> = vec![1];
    let bytes_of = |v: &[u8]| v.to_vec();
    let w_bytes = bytes_of(&w.iter().flat_map(|v| v.to_le_bytes()).collect::<Vec<_>>());
    let x_bytes = bytes_of(&x.iter().flat_map(|v| v.to_le_bytes()).collect::<Vec<_>>());
    let l_bytes = bytes_of(
        &labels
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect::<Vec<_>>(),
    );
    let views = vec![
        (
            "w",
            safetensors::tensor::TensorView::new(safetensors::Dtype::F32, vec![2, 2], &w_bytes)
                .unwrap(),
        ),
        (
            "x",
            safetensors::tensor::TensorView::new(safetensors::Dtype::F16, vec![1, 2], &x_bytes)
                .unwrap(),
        ),
        (
            "labels",
            safetensors::tensor::TensorView::new(safetensors::Dtype::I64, vec![1], &l_bytes)
                .unwrap(),
        ),
    ];
    safetensors::serialize_to_file(views, None, &dir.path().join("step.safetensors")).unwrap();
    let header = r#"{
  "format": 2, "title": "written elsewhere", "dtype": "f32", "sidecar": "step.safetensors",
  "output": "loss",
  "nodes": [
    {"id": "w", "op": "param", "value": {"tensor": "w", "shape": [2, 2]}},
    {"id": "x", "op": "input", "dtype": "f16", "value": {"tensor": "x"}},
    {"id": "labels", "op": "input", "dtype": "f64", "value": {"tensor": "labels"}},
    {"id": "x32", "op": "cast", "inputs": ["x"], "value": {"shape": [1, 2], "data": [1.0, 2.0]}},
    {"id": "h", "op": "matmul", "inputs": ["x32", "w"], "value": {"shape": [1, 2], "data": [1.0, 3.0]}},
    {"id": "loss", "op": "sum", "inputs": ["h"], "value": 4.0}
  ]
}"#;
    let path = dir.path().join("step.tape");
    std::fs::write(&path, header).unwrap();
    let loaded = trace::load(&path).unwrap_or_else(|e| panic!("{e}"));
    assert_eq!(*loaded.node(0).value.to_f64(), [0.5, -1.0, 0.25, 2.0]);
    assert_eq!(loaded.node(1).value.storage_dtype(), Dtype::F16);
    assert_eq!(*loaded.node(2).value.to_f64(), [1.0]);
    let mut sweep = ebb::sweep::Sweep::new(&loaded, ebb::sweep::LedgerMode::On);
    sweep.run_to_end();
    // d sum(x W) / dW = xᵀ 1 = [[1, 1], [2, 2]] (closed form).
    assert_eq!(*sweep.adjoint(0).unwrap().to_f64(), [1.0, 1.0, 2.0, 2.0]);
    // The cast's contribution reaches x rounded into f16.
    assert_eq!(sweep.adjoint(1).unwrap().storage_dtype(), Dtype::F16);
}

/// Copies the shipped medium demo into a fresh directory.
fn medium_copy(dir: &Path) -> PathBuf {
    let traces = Path::new(env!("CARGO_MANIFEST_DIR")).join("traces");
    for name in ["medium.tape", "medium.safetensors"] {
        std::fs::copy(traces.join(name), dir.join(name)).unwrap();
    }
    dir.join("medium.tape")
}

fn sidecar_error(path: &Path) -> String {
    match trace::load(path) {
        Err(error @ LoadError::Sidecar { .. }) => error.to_string(),
        Err(error @ LoadError::Invalid { .. }) => error.to_string(),
        Err(other) => panic!("expected a sidecar error, got: {other}"),
        Ok(_) => panic!("a broken sidecar loaded"),
    }
}

fn one_clear_line(path: &Path, message: &str) {
    assert!(
        message.starts_with(&path.display().to_string())
            && message.contains("hint:")
            && !message.contains('\n'),
        "{message}"
    );
}

#[test]
fn a_truncated_or_extended_sidecar_is_refused_before_anything_is_read() {
    let dir = tempfile::tempdir().unwrap();
    let header = medium_copy(dir.path());
    let sidecar = dir.path().join("medium.safetensors");
    let bytes = std::fs::read(&sidecar).unwrap();
    std::fs::write(&sidecar, &bytes[..600_000]).unwrap();
    let message = sidecar_error(&header);
    assert!(
        message.contains("medium.safetensors is not a valid safetensors file"),
        "{message}"
    );
    one_clear_line(&header, &message);
    let mut longer = bytes.clone();
    longer.extend_from_slice(&[0; 8]);
    std::fs::write(&sidecar, &longer).unwrap();
    assert!(sidecar_error(&header).contains("is not a valid safetensors file"));
    std::fs::write(&sidecar, b"not a safetensors file").unwrap();
    assert!(sidecar_error(&header).contains("is not a valid safetensors file"));
    std::fs::remove_file(&sidecar).unwrap();
    assert!(sidecar_error(&header).contains("cannot open its sidecar"));
    std::fs::create_dir(&sidecar).unwrap();
    assert!(sidecar_error(&header).contains("is a directory, not a regular file"));
}

/// Rewrites the first occurrence of `from` in the header.
fn edit_header(header: &Path, from: &str, to: &str) {
    let text = std::fs::read_to_string(header).unwrap();
    assert!(text.contains(from), "{from} not in the header");
    std::fs::write(header, text.replacen(from, to, 1)).unwrap();
}

#[test]
fn references_that_do_not_fit_the_sidecar_give_one_clear_line() {
    let cases: [(&str, &str, &str); 4] = [
        (
            "tensor: \"value/layer1.w\"",
            "tensor: \"value/nowhere\"",
            "node 'layer1.w': value: tensor 'value/nowhere' is not in the sidecar medium.safetensors",
        ),
        (
            "tensor: \"value/layer1.w\"",
            "tensor: \"value/layer1.w\", shape: [256, 64]",
            "node 'layer1.w': value: tensor 'value/layer1.w' has shape [64, 256] in medium.safetensors but the trace declares [256, 64]",
        ),
        (
            "id: \"layer1.w\",",
            "id: \"layer1.w\", dtype: f16,",
            "node 'layer1.w': value: tensor 'value/layer1.w' is stored as f32 but the node's dtype is f16",
        ),
        (
            "sidecar: \"medium.safetensors\"",
            "sidecar: \"../medium.safetensors\"",
            "sidecar name `../medium.safetensors` is not a plain file name",
        ),
    ];
    for (from, to, expected) in cases {
        let dir = tempfile::tempdir().unwrap();
        let header = medium_copy(dir.path());
        edit_header(&header, from, to);
        let message = sidecar_error(&header);
        assert!(message.contains(expected), "{to}: {message}");
        assert_eq!(message.lines().count(), 1, "{message}");
        assert!(
            message.starts_with(&header.display().to_string()),
            "{message}"
        );
    }
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
        .open(dir.path().join("medium.safetensors"))
        .unwrap()
        .set_len(1000)
        .unwrap();
    let (status, stdout, stderr) = ebb(&["check", header.to_str().unwrap()]);
    assert_eq!(status, 2);
    assert!(stdout.is_empty());
    assert_eq!(stderr.lines().count(), 1, "{stderr}");
    assert!(
        stderr.contains("medium.safetensors is not a valid safetensors file"),
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
    let original = std::fs::read(dir.path().join("medium.safetensors")).unwrap();
    assert!(
        original == std::fs::read(dir.path().join("back.safetensors")).unwrap(),
        "sidecar bytes survive text round trips"
    );
    let before = std::fs::read(&json).unwrap();
    let (status, _, stderr) = ebb(&["convert", json.to_str().unwrap(), json.to_str().unwrap()]);
    assert_eq!(status, 2);
    assert!(stderr.contains("would overwrite the input"), "{stderr}");
    // A .tape output of the input's own name would overwrite the input and its sidecar.
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

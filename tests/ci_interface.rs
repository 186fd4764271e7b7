//! The command line for CI: `--fail-on`, `ebb gradients` (JSON and
//! safetensors, bit for bit), `check --brief`, chains and paths fitted to a
//! width, `ebb sweep --from/--node/--json` with previews that show the first
//! non-finite element, and help that names every trace form.

use ebb::sweep::{LedgerMode, Sweep};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn ebb(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .env_remove("COLUMNS")
        .output()
        .expect("the binary runs")
}

fn stdout(output: &Output) -> String {
    String::from_utf8(output.stdout.clone()).unwrap()
}

fn demo(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("traces")
        .join(name)
}

fn arg(path: &Path) -> &str {
    path.to_str().unwrap()
}

#[test]
fn fail_on_chooses_the_rules_that_fail_the_check() {
    let nan = demo("nan_hunt.ron");
    let status = |extra: &[&str]| {
        let mut args = vec!["check", arg(&nan), "--brief"];
        args.extend_from_slice(extra);
        ebb(&args).status.code()
    };
    assert_eq!(status(&[]), Some(1), "any rule by default");
    assert_eq!(status(&["--fail-on", "exploding,vanishing"]), Some(0));
    assert_eq!(status(&["--fail-on", "non_finite"]), Some(1));
    assert_eq!(status(&["--fail-on", "saturated"]), Some(1));
    assert_eq!(status(&["--fail-on", "none"]), Some(0));
    assert_eq!(status(&["--fail-on", "any"]), Some(1));
    let output = ebb(&["check", arg(&nan), "--fail-on", "nonfinite"]);
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains("no rule is called `nonfinite`"));
    let output = ebb(&["check", arg(&nan), "--json", "--fail-on", "exploding"]);
    assert_eq!(output.status.code(), Some(0));
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(json["failed"], false);
    assert_eq!(json["clean"], false, "clean keeps its meaning");
    assert_eq!(json["fail_on"], serde_json::json!(["exploding"]));
}

/// The gradients of the trace at `path` as the library sweeps them.
fn swept_gradients(path: &Path) -> Vec<(String, Vec<f64>)> {
    let trace = ebb::trace::load(path).unwrap();
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    sweep.run_to_end();
    trace
        .params()
        .map(|param| {
            (
                trace.node(param).id.clone(),
                sweep.adjoint(param).unwrap().to_f64().into_owned(),
            )
        })
        .collect()
}

#[test]
fn gradients_as_json_hold_every_bit() {
    let path = demo("medium.tape");
    let output = ebb(&["gradients", arg(&path)]);
    assert_eq!(output.status.code(), Some(0));
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let expected = swept_gradients(&path);
    let params = json["params"].as_array().unwrap();
    assert_eq!(params.len(), expected.len());
    for (param, (id, data)) in params.iter().zip(&expected) {
        assert_eq!(param["id"], id.as_str());
        assert_eq!(param["dtype"], "f32");
        let written: Vec<f64> = param["data"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect();
        assert_eq!(written.len(), data.len());
        assert!(
            written
                .iter()
                .zip(data)
                .all(|(a, b)| a.to_bits() == b.to_bits()),
            "{id}: every element reads back to the same bits"
        );
    }
}

#[test]
fn gradients_as_safetensors_hold_every_bit_in_their_dtype() {
    let path = demo("medium.tape");
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("grads.safetensors");
    let output = ebb(&["gradients", arg(&path), "-o", arg(&out)]);
    assert_eq!(
        output.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    assert!(output.stdout.is_empty());
    let bytes = std::fs::read(&out).unwrap();
    let file = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let (_, metadata) = safetensors::SafeTensors::read_metadata(&bytes).unwrap();
    let metadata = metadata.metadata().clone().unwrap();
    assert_eq!(metadata["format"], "ebb-gradients");
    for (id, data) in swept_gradients(&path) {
        let tensor = file.tensor(&id).unwrap();
        assert_eq!(tensor.dtype(), safetensors::Dtype::F32);
        let read: Vec<f64> = tensor
            .data()
            .chunks_exact(4)
            .map(|chunk| f32::from_le_bytes(chunk.try_into().unwrap()) as f64)
            .collect();
        assert_eq!(read, data, "{id}");
    }
    let left: Vec<_> = std::fs::read_dir(dir.path()).unwrap().collect();
    assert_eq!(left.len(), 1, "no temporary file is left behind");
    // Never over the trace it reads, nor its sidecar.
    let copy = dir.path().join("t.ron");
    std::fs::copy(demo("teaching.ron"), &copy).unwrap();
    let before = std::fs::read(&copy).unwrap();
    let output = ebb(&["gradients", arg(&copy), "-o", arg(&copy)]);
    assert_eq!(output.status.code(), Some(2));
    assert_eq!(std::fs::read(&copy).unwrap(), before);
    let output = ebb(&[
        "gradients",
        arg(&copy),
        "-o",
        arg(&dir.path().join("g.txt")),
    ]);
    assert_eq!(output.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&output.stderr).contains(".safetensors or .json"));
}

// binary16 keeps the bits of an f16 gradient (IEEE 754-2019 table 3.5):
// the file holds f16, two bytes an element.
#[test]
fn an_f16_trace_writes_f16_gradients() {
    let path = demo("underflow_f16.ron");
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("g.safetensors");
    assert_eq!(
        ebb(&["gradients", arg(&path), "-o", arg(&out)])
            .status
            .code(),
        Some(0)
    );
    let bytes = std::fs::read(&out).unwrap();
    let file = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    for (id, data) in swept_gradients(&path) {
        let tensor = file.tensor(&id).unwrap();
        assert_eq!(tensor.dtype(), safetensors::Dtype::F16);
        let read: Vec<f64> = tensor
            .data()
            .chunks_exact(2)
            .map(|chunk| half::f16::from_le_bytes(chunk.try_into().unwrap()).to_f64())
            .collect();
        assert_eq!(read, data, "{id}");
    }
}

#[test]
fn brief_prints_the_diagnosis_and_the_gradient_table_only() {
    let text = stdout(&ebb(&["check", arg(&demo("nan_hunt.ron")), "--brief"]));
    assert!(text.starts_with("diagnosis  origin (a)"), "{text}");
    assert!(text.contains("\ngradients\n"), "{text}");
    for section in [
        "trace    ",
        "flags    ",
        "findings ",
        "dominant paths",
        "precision replay",
    ] {
        assert!(!text.contains(section), "{section} in {text}");
    }
    assert!(
        text.trim_end().ends_with("1 NaN"),
        "the gradient table ends it: {text}"
    );
}

#[test]
fn chains_and_paths_fit_the_width_keeping_both_ends() {
    for width in [80usize, 120] {
        let text = stdout(&ebb(&[
            "check",
            arg(&demo("exploding.ron")),
            "--width",
            &width.to_string(),
        ]));
        let paths: Vec<&str> = text
            .lines()
            .skip_while(|line| !line.starts_with("dominant paths"))
            .skip(1)
            .take_while(|line| line.starts_with("  "))
            .collect();
        assert_eq!(paths.len(), 2, "{text}");
        for line in &paths {
            assert!(line.chars().count() <= width, "{width}: {line}");
            assert!(line.contains("loss → "), "{line}");
            assert!(line.contains(" hops … → "), "{line}");
        }
        assert!(paths[0].ends_with("→ cell.w ×1.008888"), "{}", paths[0]);
    }
    let text = stdout(&ebb(&[
        "check",
        arg(&demo("nan_hunt.ron")),
        "--width",
        "70",
    ]));
    for line in text.lines().filter(|line| line.starts_with("  chain")) {
        assert!(line.chars().count() <= 70, "{line}");
        assert!(line.starts_with("  chain    'ln_p' → "), "{line}");
    }
    // --width 0 (and a pipe without $COLUMNS) keeps everything.
    let full = stdout(&ebb(&["check", arg(&demo("nan_hunt.ron")), "--width", "0"]));
    assert!(full.contains(
        "'ln_p' → 'predicted' → 'out.pre' → 'out.xw' → 'hidden.relu' → 'hidden.pre' → 'hidden.xw' → 'hidden.w'"
    ));
    let piped = stdout(&ebb(&["check", arg(&demo("nan_hunt.ron"))]));
    assert_eq!(piped, full);
}

#[test]
fn sweep_from_a_step_for_a_node_and_as_json() {
    let path = demo("nan_hunt.ron");
    let text = stdout(&ebb(&["sweep", arg(&path), "--from", "9", "--steps", "1"]));
    assert_eq!(
        text.lines().filter(|l| l.starts_with("step ")).count(),
        1,
        "{text}"
    );
    assert!(text.starts_with("step 9/22  ln_p (log)"), "{text}");
    // The contribution to 'predicted' holds −inf in row 4 (σ(−827) = 0, ln'(0) = inf):
    // the preview shows it and says where.
    assert!(text.contains("first non-finite -inf at [4, 0]"), "{text}");
    let text = stdout(&ebb(&["sweep", arg(&path), "--node", "out.w"]));
    let steps: Vec<&str> = text.lines().filter(|l| l.starts_with("step ")).collect();
    assert_eq!(steps.len(), 2, "{text}");
    assert!(steps[0].contains("out.xw (matmul)") && steps[1].contains("out.w (param)"));
    let output = ebb(&["sweep", arg(&path), "--node", "out.w", "--json"]);
    assert_eq!(output.status.code(), Some(1), "the sweep raised flags");
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(json["total"], 22);
    let steps = json["steps"].as_array().unwrap();
    assert_eq!(steps[1]["node"], "out.w");
    let adjoint = &steps[1]["adjoint"];
    assert_eq!(adjoint["shape"], serde_json::json!([5, 1]));
    assert_eq!(adjoint["nan"], 5);
    assert_eq!(
        adjoint["first_non_finite"]["index"],
        serde_json::json!([0, 0])
    );
    assert_eq!(
        ebb(&["sweep", arg(&path), "--node", "nowhere"])
            .status
            .code(),
        Some(2)
    );
    assert_eq!(
        ebb(&["sweep", arg(&path), "--from", "0"]).status.code(),
        Some(2)
    );
    assert_eq!(
        ebb(&["sweep", arg(&path), "--from", "99"]).status.code(),
        Some(2)
    );
}

#[test]
fn every_command_that_reads_a_trace_names_every_form_in_its_help() {
    for command in ["open", "check", "sweep", "verify", "gradients", "convert"] {
        let help = stdout(&ebb(&[command, "--help"]));
        for form in [".ron", ".json", ".tape", ".safetensors"] {
            assert!(
                help.contains(form),
                "`ebb {command} --help` names {form}:\n{help}"
            );
        }
    }
}

//! The `ebb` binary end to end: reports, exit statuses, errors and help.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn ebb(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .expect("the binary runs")
}

fn stdout(output: &Output) -> String {
    String::from_utf8_lossy(&output.stdout).into_owned()
}

fn stderr(output: &Output) -> String {
    String::from_utf8_lossy(&output.stderr).into_owned()
}

fn write_temp(dir: &Path, name: &str, text: &str) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    path
}

/// A trace whose loss takes the log of an exact zero.
const LOG_ZERO: &str = r#"(format: 1, title: "log of zero", dtype: f32, output: "loss", nodes: [
  (id: "p", op: "param", value: [0.0, 0.5]),
  (id: "logp", op: "log", inputs: ["p"], value: [-inf, -0.6931471824645996]),
  (id: "loss", op: "sum", inputs: ["logp"], value: -inf),
])"#;

#[test]
fn no_arguments_checks_the_built_in_demo() {
    let output = ebb(&[]);
    assert_eq!(output.status.code(), Some(0), "{}", stderr(&output));
    let text = stdout(&output);
    assert!(text.contains("market stall"), "{text}");
    // ∂profit/∂p = 0.42q + 0.08q² with q = e⁻¹ (closed form, tests/view_verify.rs) = 0.165336.
    assert!(
        text.contains("price") && text.contains("0.165336"),
        "{text}"
    );
}

#[test]
fn check_reports_gradients_and_exits_zero_when_clean() {
    let output = ebb(&["check", "traces/teaching.ron"]);
    assert_eq!(output.status.code(), Some(0));
    let text = stdout(&output);
    assert!(
        text.contains("15 nodes, 18 edges, 3 groups, 2 params"),
        "{text}"
    );
    // ∂profit/∂s = ((p − c) − 2kq − f)·(−p·q) with q = e^(−s·p) (closed form, chain rule):
    // (1.45 − 0.2/e)·(−2.5/e) = −1.265895.
    assert!(
        text.contains("sensitivity") && text.contains("-1.265895"),
        "{text}"
    );
    assert!(text.contains("flags    none"), "{text}");
}

#[test]
fn check_flags_a_log_of_zero_and_exits_one() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_temp(dir.path(), "log_zero.ron", LOG_ZERO);
    let before = std::fs::read(&path).unwrap();
    let output = ebb(&["check", path.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(1), "{}", stderr(&output));
    let text = stdout(&output);
    let marked = text
        .lines()
        .find(|line| line.contains(" * "))
        .expect("the origin's flag is marked");
    assert!(
        marked.contains("'logp'") && marked.contains("forward value is -inf"),
        "the origin, not the first symptom at 'loss': {text}"
    );
    assert!(text.contains("'logp'") && text.contains("(log)"), "{text}");
    assert_eq!(
        std::fs::read(&path).unwrap(),
        before,
        "ebb never writes to a trace it reads"
    );

    let output = ebb(&["check", path.to_str().unwrap(), "--json"]);
    assert_eq!(output.status.code(), Some(1));
    let report: serde_json::Value = serde_json::from_slice(&output.stdout).expect("valid JSON");
    assert_eq!(report["report"], 1);
    assert_eq!(report["clean"], false);
    assert_eq!(report["trace"]["dtype"], "f32");
    assert_eq!(report["counts"]["nodes"], 3);
    let flags = report["flags"].as_array().unwrap();
    assert_eq!(flags[0]["first"], true);
    assert_eq!(flags[0]["node"], "loss");
    assert_eq!(flags[0]["kind"], "non_finite_value");
    assert_eq!(flags[0]["value"], "-inf");
    let gradient = &report["gradients"][0];
    assert_eq!(gradient["id"], "p");
    assert_eq!(gradient["shape"], serde_json::json!([2]));
    assert!(gradient["non_finite"].as_u64().unwrap() >= 1);
}

#[test]
fn sweep_lists_steps_and_stops_early() {
    let output = ebb(&["sweep", "traces/teaching.ron", "--steps", "5"]);
    assert_eq!(output.status.code(), Some(0));
    let text = stdout(&output);
    assert_eq!(
        text.lines()
            .filter(|line| line.starts_with("step "))
            .count(),
        5,
        "{text}"
    );
    assert!(text.starts_with("step 1/15  profit (sub)"), "{text}");
    // fee = f·demand sends −f first; then demand_sq = demand·demand sends both of its
    // contributions to `demand`, each on top of the one before.
    assert!(
        text.contains("-> demand (input 1)  contribution -0.05  adjoint none -> -0.05"),
        "{text}"
    );
    assert!(text.contains("-> demand (input 0)  contribution -0.036787944117144235  adjoint -0.05 -> -0.08678794411714424"), "{text}");
    assert!(
        text.contains("-> demand (input 1)  contribution -0.036787944117144235  adjoint -0.08678794411714424 -> -0.12357588823428847"),
        "{text}"
    );
}

#[test]
fn bad_input_is_one_line_with_exit_two() {
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("nope.ron");
    let output = ebb(&["check", missing.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(2));
    assert!(stdout(&output).is_empty(), "no half-written output");
    let message = stderr(&output);
    assert_eq!(message.lines().count(), 1, "{message}");
    assert!(
        message.contains("nope.ron") && message.contains("cannot read"),
        "{message}"
    );
    // The operating system's reason is said once, before the hint.
    assert_eq!(message.matches("os error").count(), 1, "{message}");
    assert!(message.trim_end().ends_with("permissions)"), "{message}");

    let path = write_temp(
        dir.path(),
        "broken.json",
        "{\"format\": 1,\n  \"title\": \"x\",\n  \"dtype\": \"f64\" \"output\": 1}",
    );
    let output = ebb(&["check", path.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(2));
    let message = stderr(&output);
    assert!(message.contains("broken.json:3:"), "{message}");
    assert_eq!(message.lines().count(), 1, "{message}");

    let path = write_temp(
        dir.path(),
        "invalid.ron",
        &LOG_ZERO.replace("[\"logp\"]", "[\"nowhere\"]"),
    );
    let output = ebb(&["sweep", path.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(2));
    let message = stderr(&output);
    assert!(
        message.contains("invalid.ron:4:4: node 'loss': unknown input id 'nowhere'"),
        "{message}"
    );
}

#[test]
fn usage_errors_exit_two() {
    assert_eq!(ebb(&["check"]).status.code(), Some(2));
    assert_eq!(ebb(&["frobnicate"]).status.code(), Some(2));
    assert_eq!(
        ebb(&["sweep", "traces/teaching.ron", "--steps", "many"])
            .status
            .code(),
        Some(2)
    );
}

#[test]
fn help_version_completions_and_catalog() {
    let commands = [
        "check",
        "sweep",
        "verify",
        "open",
        "convert",
        "ops",
        "completions",
    ];
    let helps: Vec<Vec<&str>> = std::iter::once(vec!["--help"])
        .chain(commands.iter().map(|c| vec![*c, "--help"]))
        .collect();
    for command in &helps {
        let output = ebb(command);
        assert_eq!(output.status.code(), Some(0));
        assert!(
            stdout(&output).contains("Example"),
            "{command:?} help has an example"
        );
    }
    let version = stdout(&ebb(&["--version"]));
    assert!(version.starts_with("ebb ") && version.contains(env!("CARGO_PKG_VERSION")));
    let completions = stdout(&ebb(&["completions", "bash"]));
    assert!(completions.contains("_ebb()") && completions.contains("check"));
    let catalog = stdout(&ebb(&["ops"]));
    for name in ["matmul", "cross_entropy", "leaky_relu", "logsumexp"] {
        assert!(catalog.contains(name), "{catalog}");
    }
}

#[test]
fn verify_agrees_on_the_demo_and_names_a_wrong_partial() {
    let output = ebb(&["verify", "traces/teaching.ron"]);
    assert_eq!(output.status.code(), Some(0), "{}", stdout(&output));
    assert!(stdout(&output).contains("every check agrees"));

    // exp's partial is its output; recording −e instead is a sign error.
    let dir = tempfile::tempdir().unwrap();
    let text = r#"(format: 1, title: "wrong exp partial", dtype: f64, output: "y", nodes: [
      (id: "x", op: "param", value: 1.0),
      (id: "y", op: "exp", inputs: ["x"], value: 2.718281828459045, partials: [-2.718281828459045]),
    ])"#;
    let path = write_temp(dir.path(), "wrong.ron", text);
    let output = ebb(&["verify", path.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(1));
    let report = stdout(&output);
    let first = report
        .lines()
        .find(|line| line.starts_with("  1. "))
        .expect("a ranked suspect");
    assert!(
        first.contains("'y' (exp)") && first.contains("probably wrong"),
        "{report}"
    );
    let output = ebb(&["verify", path.to_str().unwrap(), "--json"]);
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(json["agrees"], false);
    assert_eq!(json["suspects"][0]["node"], "y");
    assert_eq!(json["suspects"][0]["evidence"], "recorded_partial");
    assert_eq!(
        ebb(&["verify", path.to_str().unwrap(), "--direction", "nowhere"])
            .status
            .code(),
        Some(2)
    );
}

#[test]
fn verify_exits_one_on_a_nan_run_and_says_it_cannot_judge() {
    let output = ebb(&["verify", "traces/nan_hunt.ron"]);
    assert_eq!(output.status.code(), Some(1), "{}", stdout(&output));
    assert!(stdout(&output).starts_with("verdict  cannot judge"));
    let output = ebb(&["verify", "traces/nan_hunt.ron", "--json"]);
    assert_eq!(output.status.code(), Some(1));
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(json["verdict"], "cannot_judge");
    assert_eq!(json["agrees"], false);
    assert_eq!(json["tangent"]["relative"], "NaN");
}

#[test]
fn a_bad_key_file_is_one_line_with_its_place_and_exit_status_2() {
    let dir = tempfile::tempdir().unwrap();
    let keys = write_temp(
        dir.path(),
        "keys.ron",
        "[\n    (action: \"step\", keys: [\"Right\"]),\n    (action: \"back\", keys: [\"Right\"]),\n]\n",
    );
    let output = ebb(&[
        "open",
        "traces/teaching.ron",
        "--keys",
        keys.to_str().unwrap(),
    ]);
    assert_eq!(output.status.code(), Some(2));
    let message = stderr(&output);
    assert_eq!(message.lines().count(), 1, "{message}");
    assert!(
        message.contains("keys.ron:3:")
            && message.contains("key '→' is already bound to 'step' in global"),
        "{message}"
    );
    // The key file is checked before the view asks for a terminal, and never written.
    let after = std::fs::read_to_string(&keys).unwrap();
    assert!(after.contains("(action: \"back\", keys: [\"Right\"])"));
}

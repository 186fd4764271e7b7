//! `ebb check` with diagnosis, run as a real process: the short diagnosis
//! comes first, `--json` carries it, `--rules` and `--set` change the
//! thresholds, and bad settings exit 2 with one line naming the place.

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::trace::{Encoding, to_text};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn ebb(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .output()
        .expect("the binary runs")
}

/// log(w · x) at x = 0: the forward value of the log is −inf (IEEE 754-2019 §9.2.1).
fn write_log_of_zero(dir: &Path) -> PathBuf {
    let mut tape = Tape::new("log of zero", Dtype::F32);
    let w = tape.param("w", 2.0);
    let x = tape.input("x", 0.0);
    let product = tape.mul(w, x);
    let product = tape.rename(product, "product");
    let log = tape.log(product);
    let log = tape.rename(log, "log_p");
    let path = dir.join("log.ron");
    std::fs::write(&path, to_text(&tape.finish(log), Encoding::Ron)).unwrap();
    path
}

/// y = 1000 · neg(w): the node y passes on a thousand times its adjoint.
fn write_big_gain(dir: &Path) -> PathBuf {
    let mut tape = Tape::new("big gain", Dtype::F64);
    let w = tape.param("w", 1.0);
    let x = tape.neg(w);
    let big = tape.input("big", 1000.0);
    let y = tape.mul(big, x);
    let path = dir.join("gain.json");
    std::fs::write(&path, to_text(&tape.finish(y), Encoding::Json)).unwrap();
    path
}

fn stdout(output: &Output) -> String {
    String::from_utf8(output.stdout.clone()).unwrap()
}

#[test]
fn text_report_opens_with_origin_class_chain_and_advice() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_log_of_zero(dir.path());
    let output = ebb(&["check", path.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(1));
    let text = stdout(&output);
    let lines: Vec<&str> = text.lines().collect();
    assert!(
        lines[0].starts_with("diagnosis  origin (a) non-finite forward value at 'log_p' (log)"),
        "{text}"
    );
    assert!(lines[1].contains("log of 0 is −inf"), "{text}");
    assert!(lines[2].contains("'log_p' → 'product' → 'w'"), "{text}");
    assert!(
        lines[3].contains("turned into NaN at 'w'") && lines[3].contains("0 × inf"),
        "log_p's −inf times x = 0 is NaN at w: {text}"
    );
    assert!(
        lines[4].starts_with("  advice   Keep the argument of 'log_p' away from 0"),
        "{text}"
    );
    assert!(text.contains("\ntrace    "), "the details follow");
}

#[test]
fn json_carries_the_diagnosis_and_keeps_the_old_fields() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_log_of_zero(dir.path());
    let output = ebb(&["check", path.to_str().unwrap(), "--json"]);
    assert_eq!(output.status.code(), Some(1));
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    for field in ["report", "trace", "counts", "gradients", "flags", "clean"] {
        assert!(json.get(field).is_some(), "{field} is still there");
    }
    assert_eq!(json["report"], 1);
    let origin = &json["diagnosis"]["first_origin"];
    assert_eq!(origin["letter"], "a");
    assert_eq!(origin["class"], "non_finite_value");
    assert_eq!(origin["node"], "log_p");
    assert_eq!(
        origin["reached"][0]["chain"],
        serde_json::json!(["log_p", "product", "w"])
    );
    let w_flag = json["flags"]
        .as_array()
        .unwrap()
        .iter()
        .find(|flag| flag["node"] == "w")
        .unwrap();
    assert_eq!(w_flag["class"], "a");
    assert_eq!(json["diagnosis"]["replay"].as_array().unwrap().len(), 4);
    assert!(
        json["diagnosis"]["advice"][0]["text"]
            .as_str()
            .unwrap()
            .contains("log_softmax")
    );
    let finding = &json["diagnosis"]["findings"][0];
    for field in ["rule", "node", "step", "site", "value", "threshold"] {
        assert!(finding.get(field).is_some(), "a finding records {field}");
    }
}

#[test]
fn thresholds_come_from_the_rules_file_and_set_options() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_big_gain(dir.path());
    let trace = path.to_str().unwrap();
    let output = ebb(&["check", trace, "--json"]);
    assert_eq!(
        output.status.code(),
        Some(1),
        "gain 1000 is above the default 100"
    );
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(json["diagnosis"]["findings"][0]["rule"], "gain");

    let rules = dir.path().join("rules.ron");
    std::fs::write(
        &rules,
        "// a looser gain band\n(gain_above: 5000.0, replay: [])\n",
    )
    .unwrap();
    let output = ebb(&["check", trace, "--rules", rules.to_str().unwrap(), "--json"]);
    assert_eq!(
        output.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    assert_eq!(json["diagnosis"]["settings"]["gain_above"], 5000.0);
    assert_eq!(json["diagnosis"]["replay"].as_array().unwrap().len(), 0);

    let output = ebb(&[
        "check",
        trace,
        "--rules",
        rules.to_str().unwrap(),
        "--set",
        "gain_above=500",
    ]);
    assert_eq!(
        output.status.code(),
        Some(1),
        "--set is applied after the file"
    );
    let output = ebb(&["check", trace, "--set", "off=[gain]"]);
    assert_eq!(output.status.code(), Some(0));
}

#[test]
fn bad_settings_exit_two_with_the_place() {
    let dir = tempfile::tempdir().unwrap();
    let path = write_big_gain(dir.path());
    let trace = path.to_str().unwrap();
    let rules = dir.path().join("rules.ron");
    std::fs::write(&rules, "(\n  gain_above: 50.0,\n  gian_below: 0.1,\n)\n").unwrap();
    let output = ebb(&["check", trace, "--rules", rules.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(2));
    assert!(output.stdout.is_empty(), "no half-written report");
    let stderr = String::from_utf8(output.stderr).unwrap();
    assert_eq!(stderr.lines().count(), 1, "{stderr}");
    assert!(
        stderr.contains(&format!("{}:3:", rules.display())),
        "{stderr}"
    );
    assert!(stderr.contains("gian_below"), "{stderr}");

    let output = ebb(&["check", trace, "--set", "gain_above=fast"]);
    assert_eq!(output.status.code(), Some(2));
    let output = ebb(&[
        "check",
        trace,
        "--rules",
        dir.path().join("missing.ron").to_str().unwrap(),
    ]);
    assert_eq!(output.status.code(), Some(2));
    assert!(
        String::from_utf8(output.stderr)
            .unwrap()
            .contains("missing.ron")
    );
}

#[test]
fn the_built_in_demo_is_clean() {
    let output = ebb(&[]);
    assert_eq!(output.status.code(), Some(0));
    assert!(stdout(&output).starts_with("diagnosis  clean: no rule fired in f64"));
}

#[test]
fn the_settings_example_in_the_readme_is_the_defaults() {
    let readme =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md")).unwrap();
    let start = readme
        .find("```ron\n// rules.ron")
        .expect("the README shows a settings file")
        + "```ron\n".len();
    let end = start + readme[start..].find("```").unwrap();
    let settings =
        ebb::diagnose::Settings::parse(&readme[start..end], Path::new("README.md")).unwrap();
    assert_eq!(settings, ebb::diagnose::Settings::default());
}

#[test]
fn help_names_every_setting() {
    let output = ebb(&["check", "--help"]);
    let help = stdout(&output);
    for name in ebb::diagnose::Settings::NAMES {
        assert!(help.contains(name), "--help lists {name}");
    }
}

fn write(dir: &Path, name: &str, file: &ebb::trace::TraceFile) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, to_text(file, Encoding::Ron)).unwrap();
    path
}

// d√w/dw = 1/(2√w) is +inf at w = 0 (IEEE 754-2019 §7.3, division by zero):
// a scalar gradient of +inf, whose min and max are +inf (infinities are
// ordered, §5.10), not NaN.
#[test]
fn numbers_that_do_not_mislead() {
    let dir = tempfile::tempdir().unwrap();
    let mut tape = Tape::new("sqrt at zero", Dtype::F64);
    let w = tape.param("w", 0.0);
    let y = tape.sqrt(w);
    let path = write(dir.path(), "sqrt.ron", &tape.finish(y));
    let output = ebb(&["check", path.to_str().unwrap()]);
    let text = stdout(&output);
    let row = text
        .lines()
        .find(|line| line.starts_with("  w "))
        .unwrap_or_else(|| panic!("{text}"));
    let cells: Vec<&str> = row.split_whitespace().collect();
    assert_eq!(
        cells,
        ["w", "[]", "inf", "inf", "inf", "1", "+inf"],
        "{text}"
    );
    // A non-finite number has no threshold worth printing.
    let findings: Vec<&str> = text
        .lines()
        .skip_while(|line| !line.starts_with("findings"))
        .skip(1)
        .take_while(|line| line.starts_with("  step"))
        .collect();
    assert!(!findings.is_empty(), "{text}");
    for line in findings.iter().filter(|line| line.contains("non_finite")) {
        assert!(!line.contains("threshold"), "{line}");
    }
    let output = ebb(&["check", path.to_str().unwrap(), "--json"]);
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let gradient = &json["gradients"][0];
    assert_eq!(gradient["min"], "inf");
    assert_eq!(gradient["max"], "inf");
    assert_eq!(gradient["finite_min"], "NaN");
    assert_eq!(gradient["pos_inf"], 1);
}

// Speelpenning's product ∏ xᵢ (Griewank & Walther, "Evaluating Derivatives",
// 2nd ed., SIAM 2008, ch. 3) at x = (0, 2, 3, 4): every path to x2, x3, x4
// crosses a factor 0, so the product of gains is exactly 0.
#[test]
fn a_path_through_a_zero_factor_has_gain_zero_not_ten_to_minus_infinity() {
    let dir = tempfile::tempdir().unwrap();
    let mut tape = Tape::new("Speelpenning", Dtype::F64);
    let xs: Vec<_> = [0.0, 2.0, 3.0, 4.0]
        .iter()
        .enumerate()
        .map(|(i, &x)| tape.param(&format!("x{}", i + 1), x))
        .collect();
    let mut product = xs[0];
    for &x in &xs[1..] {
        product = tape.mul(product, x);
    }
    let path = write(dir.path(), "speelpenning.ron", &tape.finish(product));
    let text = stdout(&ebb(&["check", path.to_str().unwrap()]));
    assert!(!text.contains("10^-inf"), "{text}");
    assert!(
        text.lines()
            .any(|line| line.starts_with("  x4") && line.contains("gain 0 ")),
        "{text}"
    );
}

/// The first line of `ebb check` on a shipped demo.
fn first_line(name: &str) -> String {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("traces")
        .join(name);
    let text = stdout(&ebb(&["check", path.to_str().unwrap()]));
    text.lines().next().unwrap_or_default().to_string()
}

// Each demo's story (src/demos/) fixes its true cause: ln 0 at ln_p; a
// recurrent weight of gain 1.2 applied over 50 steps (49 multiplications
// back from h50 to h01; Pascanu, Mikolov & Bengio, ICML 2013, §2); sixteen
// sigmoid layers, σ' ≤ 1/4 (Goodfellow, Bengio & Courville, "Deep
// Learning", 2016, §6.3.2); f16 gradients below 2^-24 that flush to zero,
// kept by a loss scale of 2^15 (Micikevicius et al., ICLR 2018, §3.2).
#[test]
fn the_first_line_names_the_true_cause_on_every_demo() {
    let line = first_line("nan_hunt.ron");
    assert!(
        line.starts_with("diagnosis  origin (a) non-finite forward value at 'ln_p' (log), step 9"),
        "{line}"
    );
    let line = first_line("exploding.ron");
    assert!(
        line.starts_with("diagnosis  exploding gradients: a recurrent gain of ×1.2 per step through 'cell.w', repeated 49 times"),
        "{line}"
    );
    let line = first_line("vanishing.ron");
    assert!(
        line.starts_with("diagnosis  vanishing gradients: the sigmoid layers")
            && line.contains("16 of them")
            && line.contains("at most 1/4"),
        "{line}"
    );
    let line = first_line("underflow_f16.ron");
    assert!(
        line.starts_with("diagnosis  underflow in f16:")
            && line.contains("flush to zero")
            && line.contains("2^15 = 32768"),
        "{line}"
    );
    assert_eq!(
        first_line("teaching.ron"),
        "diagnosis  clean: no rule fired in f64"
    );
}

#[test]
fn the_advice_names_the_repeating_factor_not_the_largest_hop() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("traces/exploding.ron");
    let output = ebb(&["check", path.to_str().unwrap(), "--json"]);
    let json: serde_json::Value = serde_json::from_slice(&output.stdout).unwrap();
    let diagnosis = &json["diagnosis"];
    let advice = diagnosis["advice"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["topic"] == "exploding")
        .unwrap()["text"]
        .as_str()
        .unwrap()
        .to_string();
    assert!(!advice.contains("2150"), "{advice}");
    assert!(advice.contains("×1.2 per step"), "{advice}");
    let repeat = &diagnosis["repeats"][0];
    assert_eq!(repeat["factor"], "weight");
    assert_eq!(repeat["weight"], "cell.w");
    assert_eq!(repeat["shared"], true);
    assert_eq!(repeat["count"], 49);
    assert_eq!(repeat["unit"], "step");
    assert!(
        diagnosis["headline"]
            .as_str()
            .unwrap()
            .starts_with("exploding gradients")
    );
}

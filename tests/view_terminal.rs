//! The built binary in a real pseudo-terminal (portable-pty), its output fed
//! to a terminal emulator (vt100): step the teaching demo, watch a branch
//! node's adjoint before and after each contribution and after stepping
//! back, then quit and find the terminal restored. Needs no controlling
//! terminal, so it runs in CI.

mod common;

use common::pty::Screen;
use std::process::Command;

// Closed form for the teaching demo (see tests/view_render.rs): q = e⁻¹ and the
// adjoint of demand collects −f, −kq, −kq, then p − c, with f = 0.05, k = 0.1 and p − c = 1.5.
const Q: f64 = 0.36787944117144233;
const F: f64 = 0.05;

#[track_caller]
fn near(shown: f64, expected: f64) {
    assert!(
        (shown - expected).abs() < 1e-15,
        "shown {shown}, closed form {expected}"
    );
}

#[test]
fn stepping_the_teaching_demo_in_a_real_terminal() {
    let mut screen = Screen::open(50, 200, &["open", "traces/teaching.ron"]);
    screen.wait_for("step 0/15 │ next profit (sub)");
    assert!(
        screen.parser.lock().unwrap().screen().alternate_screen(),
        "the view runs on the alternate screen"
    );
    screen.send(":demand\r");
    screen.wait_for("Inflow · demand");
    screen.wait_for("adjoint  none yet");
    screen.send("ss");
    screen.wait_for("step 2/15");
    screen.wait_for("adjoint  none yet");
    // Step 3 processes fee = f·q: the first contribution, −f.
    screen.send("s");
    near(screen.number_after("step 3/15", "adjoint  "), -F);
    // Step 5 processes demand_sq = q·q: two contributions of −kq each.
    screen.send("ss");
    near(screen.number_after("step 5/15", "adjoint  "), -F - 0.2 * Q);
    // Step 6 processes gross = (p − c)·q: the last contribution, p − c.
    screen.send("s");
    near(
        screen.number_after("step 6/15", "adjoint  "),
        1.5 - F - 0.2 * Q,
    );
    screen.wait_for("complete: 4 contribution(s), the adjoint is final");
    // Back over step 6: gross is still to come.
    screen.send("b");
    near(screen.number_after("step 5/15", "adjoint  "), -F - 0.2 * Q);
    screen.wait_for("to come (1):");
    screen.send("bb");
    screen.wait_for("step 3/15");
    // Help, a theme change and the run to the end keep working.
    screen.send("?");
    screen.wait_for("Keys (? or Esc closes");
    screen.send("?t");
    screen.wait_for("theme: light");
    screen.send("e");
    screen.wait_for("sweep done");
    screen.send("q");
    let status = screen.wait_exit();
    assert!(status.success(), "{status:?}");
    let parser = screen.parser.lock().unwrap();
    assert!(
        !parser.screen().alternate_screen(),
        "the alternate screen was left"
    );
    assert!(!parser.screen().hide_cursor(), "the cursor is shown again");
}

#[test]
fn ctrl_c_quits_and_restores_at_80_by_24() {
    let mut screen = Screen::open(24, 80, &["open", "traces/teaching.ron"]);
    screen.wait_for("1 Order");
    screen.send("s");
    screen.wait_for("step 1/15");
    screen.send("\u{3}");
    assert!(screen.wait_exit().success());
    assert!(!screen.parser.lock().unwrap().screen().alternate_screen());
}

#[test]
fn a_bad_trace_is_one_line_and_exit_2_with_the_terminal_restored() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("broken.ron");
    std::fs::write(&path, "(format: 1, title: \"x\",").unwrap();
    let mut screen = Screen::open(24, 80, &["open", path.to_str().unwrap()]);
    let status = screen.wait_exit();
    assert_eq!(status.exit_code(), 2);
    let parser = screen.parser.lock().unwrap();
    assert!(!parser.screen().alternate_screen());
    let text = parser.screen().contents();
    assert!(text.contains("broken.ron:1:"), "{text}");
}

#[test]
fn without_a_terminal_open_points_to_check_and_sweep() {
    let output = Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(["open", "traces/teaching.ron"])
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .unwrap();
    assert_eq!(output.status.code(), Some(2));
    let stderr = String::from_utf8(output.stderr).unwrap();
    assert_eq!(stderr.lines().count(), 1, "{stderr}");
    assert!(
        stderr.contains("needs a terminal")
            && stderr.contains("ebb check traces/teaching.ron")
            && stderr.contains("ebb sweep"),
        "{stderr}"
    );
    assert!(output.stdout.is_empty());
    // With no arguments and no terminal, ebb keeps printing the demo's report.
    let output = Command::new(env!("CARGO_BIN_EXE_ebb")).output().unwrap();
    assert_eq!(output.status.code(), Some(0));
    assert!(
        String::from_utf8(output.stdout)
            .unwrap()
            .contains("market stall")
    );
}

#[test]
fn a_bad_theme_is_one_line_with_its_position() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("mine.ron");
    std::fs::write(
        &path,
        "(\n  name: \"mine\",\n  text: (fg: \"no-such-colour\"),\n)",
    )
    .unwrap();
    let mut screen = Screen::open(
        24,
        80,
        &[
            "open",
            "traces/teaching.ron",
            "--theme",
            path.to_str().unwrap(),
        ],
    );
    assert_eq!(screen.wait_exit().exit_code(), 2);
    let text = screen.parser.lock().unwrap().screen().contents();
    assert!(text.contains("mine.ron:3:"), "{text}");
    assert!(text.contains("is not a colour"), "{text}");
}

#[test]
fn forward_mode_in_a_real_terminal() {
    // Along v = e_price the tangent sweep's ∂f/∂v is ∂profit/∂p = 0.42q + 0.08q²
    // (closed form by the chain rule, derived in tests/view_verify.rs).
    let mut screen = Screen::open(50, 200, &["open", "traces/teaching.ron"]);
    screen.wait_for("step 0/15");
    screen.send(":price\r");
    screen.wait_for("Node · price");
    screen.send("m");
    screen.wait_for("FORWARD MODE");
    screen.send("ssssssss");
    screen.wait_for("tangent step 8/15 │ next margin (sub)");
    screen.send("e");
    near(
        screen.number_after("= agree", "∂f/∂v   "),
        0.42 * Q + 0.08 * Q * Q,
    );
    near(
        screen.number_after("= agree", "⟨v, ∇f⟩ "),
        0.42 * Q + 0.08 * Q * Q,
    );
    screen.send("m");
    screen.wait_for("reverse sweep: step 0/15");
    screen.send("q");
    assert!(screen.wait_exit().success());
}

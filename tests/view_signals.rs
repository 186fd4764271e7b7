//! The terminal survives signals: `ebb open` in a real pseudo-terminal is sent
//! SIGTERM, SIGHUP, SIGINT or SIGQUIT by pid (as `kill`, `timeout`, a closed
//! window or an editor do), or reads a memory-mapped sidecar that was
//! truncated under it (SIGBUS). Each time the terminal must be handed back:
//! alternate screen left, cursor shown, echo, canonical input and key
//! signals on again.

mod common;

use common::pty::Screen;
use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::tensor::Value;
use std::path::{Path, PathBuf};

/// Opens the teaching demo in a directory of its own (a SIGQUIT may leave a
/// core file where the process runs: never in the repository).
fn open_teaching(dir: &Path) -> Screen {
    let trace = Path::new(env!("CARGO_MANIFEST_DIR")).join("traces/teaching.ron");
    let screen = Screen::open_in(24, 80, &["open", trace.to_str().unwrap()], dir);
    screen.wait_for("1 Order");
    assert_eq!(
        screen.screen_state(),
        (true, true),
        "the view runs on the alternate screen with the cursor hidden"
    );
    let (echo, canonical, _) = screen.modes();
    assert!(!echo && !canonical, "the view runs in raw mode");
    screen
}

#[track_caller]
fn assert_restored(screen: &Screen) {
    assert_eq!(
        screen.screen_state(),
        (false, false),
        "alternate screen left and cursor shown"
    );
    assert_eq!(
        screen.modes(),
        (true, true, true),
        "echo, canonical input and key signals are back"
    );
}

/// Ends with the signal's own default action, which a shell reports as 128 + its number.
fn ends_by_signal(signal: &str, number: libc::c_int) {
    let dir = tempfile::tempdir().unwrap();
    let mut screen = open_teaching(dir.path());
    screen.send("ss");
    screen.wait_for("step 2/15");
    screen.kill(signal);
    let status = screen.wait_exit();
    // The name the C library gives the signal (what portable-pty reports).
    let name = unsafe { std::ffi::CStr::from_ptr(libc::strsignal(number)) }
        .to_string_lossy()
        .into_owned();
    assert_eq!(
        status.signal(),
        Some(name.as_str()),
        "SIG{signal} ends the process by its default action: {status:?}"
    );
    assert_restored(&screen);
}

#[test]
fn sigterm_restores_the_terminal() {
    ends_by_signal("TERM", libc::SIGTERM);
}

#[test]
fn sighup_restores_the_terminal() {
    ends_by_signal("HUP", libc::SIGHUP);
}

#[test]
fn sigint_restores_the_terminal() {
    ends_by_signal("INT", libc::SIGINT);
}

#[test]
fn sigquit_restores_the_terminal() {
    ends_by_signal("QUIT", libc::SIGQUIT);
}

/// A binary-backed trace of f64 tensors (used in place from the mapped
/// sidecar, so every read after a truncation faults).
fn tensor_trace(dir: &Path) -> PathBuf {
    let mut tape = Tape::new("tensors for the sidecar test", Dtype::F64);
    let mut x = tape.param(
        "x",
        Value::from_parts(
            vec![64, 64],
            (0..4096).map(|k| (k as f64) / 4096.0).collect(),
        ),
    );
    for _ in 0..8 {
        x = tape.tanh(x);
    }
    let loss = tape.sum(x);
    let path = dir.join("run.tape");
    ebb::trace::save(&tape.finish(loss), &path).unwrap();
    path
}

#[test]
fn a_truncated_sidecar_is_one_line_and_exit_2_with_the_terminal_restored() {
    let dir = tempfile::tempdir().unwrap();
    let path = tensor_trace(dir.path());
    let sidecars: Vec<PathBuf> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|entry| entry.unwrap().path())
        .filter(|file| file != &path)
        .collect();
    assert_eq!(sidecars.len(), 1, "one sidecar beside the header");
    // A sidecar this small is copied when opened, and truncating it then
    // changes nothing; mapped, as big ones are, truncation reaches the view.
    let mut screen = Screen::open_with(
        24,
        80,
        &["open", path.to_str().unwrap()],
        dir.path(),
        &[("EBB_SIDECAR_COPY_LIMIT", "0")],
    );
    screen.wait_for("1 Order");
    // The run that wrote the sidecar is still writing it, say: it shrinks.
    std::fs::File::options()
        .write(true)
        .open(&sidecars[0])
        .unwrap()
        .set_len(0)
        .unwrap();
    // Stepping reads the tensors again.
    screen.send("e");
    let status = screen.wait_exit();
    assert_eq!(status.exit_code(), 2, "{status:?}");
    assert_eq!(status.signal(), None, "{status:?}");
    assert_restored(&screen);
    let text = screen.parser.lock().unwrap().screen().contents();
    let lines: Vec<&str> = text.lines().filter(|line| line.contains("ebb:")).collect();
    assert_eq!(lines.len(), 1, "{text}");
    assert!(
        lines[0].contains("truncated or changed") && lines[0].contains("hint:"),
        "{text}"
    );
}

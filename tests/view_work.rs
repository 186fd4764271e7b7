//! Long work runs off the input thread: in a real pseudo-terminal, the view
//! of a big generated network draws its first frame and keeps answering keys
//! (stepping, moving) while the diagnosis runs on a worker, shows its
//! progress, and Esc cancels it; quitting never waits for a worker.

mod common;

use common::pty::Screen;
use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::tensor::Value;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

/// Eight tanh layers of width 256 on a batch of 64 (f32), binary-backed:
/// quick to load, and a diagnosis that sweeps it several times takes seconds.
fn network(dir: &Path) -> PathBuf {
    const WIDTH: usize = 256;
    const BATCH: usize = 64;
    let mut tape = Tape::new("eight tanh layers", Dtype::F32);
    let mut h = tape.input(
        "x",
        Value::from_parts(
            vec![BATCH, WIDTH],
            (0..BATCH * WIDTH)
                .map(|k| ((k % 17) as f64 - 8.0) / 8.0)
                .collect(),
        ),
    );
    for layer in 0..8 {
        let weights = tape.param(
            &format!("layer{layer}.w"),
            Value::from_parts(
                vec![WIDTH, WIDTH],
                (0..WIDTH * WIDTH)
                    .map(|k| ((k % 13) as f64 - 6.0) / 96.0)
                    .collect(),
            ),
        );
        let product = tape.matmul(h, weights);
        h = tape.tanh(product);
    }
    let target = tape.input(
        "target",
        Value::from_parts(vec![BATCH, WIDTH], vec![0.0; BATCH * WIDTH]),
    );
    let loss = tape.mse(h, target);
    let path = dir.join("network.tape");
    ebb::trace::save(&tape.finish(loss), &path).unwrap();
    path
}

#[test]
fn keys_are_answered_while_a_diagnosis_runs_and_esc_cancels_it() {
    let dir = tempfile::tempdir().unwrap();
    let path = network(dir.path());
    let mut screen = Screen::open_in(40, 160, &["open", path.to_str().unwrap()], dir.path());
    // The first frame, and the diagnosis under way on the worker.
    let first = screen.wait_for("⟳ diagnosing in f32");
    assert!(first.contains("step 0/"), "{first}");
    // Keys keep working: step, step, move down in Order.
    screen.send("ss");
    let stepped = screen.wait_for("step 2/");
    assert!(
        stepped.contains("⟳ diagnosing in f32"),
        "the keys were answered while the diagnosis still ran:\n{stepped}"
    );
    screen.send("j");
    screen.wait_for("Node · matmul_23");
    // Esc cancels it; the view carries on without a diagnosis.
    screen.send("\u{1b}");
    let cancelled = screen.wait_for("cancelled: diagnosing in f32");
    assert!(!cancelled.contains("⟳ diagnosing"), "{cancelled}");
    assert!(cancelled.contains("D diagnoses"), "{cancelled}");
    screen.send("b");
    screen.wait_for("step 1/");
    // Quitting while a cancelled worker may still run does not wait for it.
    let asked = Instant::now();
    screen.send("D");
    screen.wait_for("⟳ diagnosing in f32");
    screen.send("q");
    let status = screen.wait_exit();
    assert!(status.success(), "{status:?}");
    assert!(
        asked.elapsed() < Duration::from_secs(15),
        "quitting waited {:?}",
        asked.elapsed()
    );
    assert_eq!(
        screen.screen_state(),
        (false, false),
        "the terminal is restored"
    );
}

//! Peak memory of `ebb check` on 10⁶-node scalar chains against the size of
//! their JSON files (target: at most 8×). Three files: the recorded chain of
//! the open benchmark (`x ← x + sin(0.999·x)`, three nodes a step) and a
//! lean one (`x ← w·x`, one node a step), both as Ebb writes JSON (indented,
//! with recording sites), and the lean chain written compactly, one node a
//! line, as a script of a user's might: the same trace in a third of the
//! bytes, and so the hardest ratio. Each is generated here, then checked by
//! the real binary in a child process; its peak resident memory is the
//! child's `ru_maxrss` from `wait4`. Then the same work is done stage by
//! stage in a child of this bench, printing the peak (VmHWM) and current
//! (VmRSS) resident memory after each stage, to show where memory goes.
//! Linux only.
//!
//!   cargo bench --bench check_memory [-- REPEATS]
//!
//! `EBB_BIN` names another `ebb` binary to measure instead (an older build,
//! to compare).

#[path = "support/fixtures.rs"]
#[allow(dead_code, reason = "shared with the open benchmarks")]
mod fixtures;

use ebb::dtype::Dtype;
use ebb::record::Tape;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

/// `x_t = w · x_{t−1}`, `nodes` nodes in all, saved as JSON at `dir/lean.json`.
fn lean_chain_json(dir: &Path, nodes: usize) -> PathBuf {
    let mut tape = Tape::new("a lean scalar chain", Dtype::F64);
    let w = tape.param("w", 0.999_999_9);
    let mut x = tape.input("x", 1.0);
    while tape.len() < nodes {
        x = tape.mul(w, x);
    }
    let path = dir.join("lean.json");
    ebb::trace::save(&tape.finish(x), &path).expect("the fixture saves");
    path
}

/// The lean chain as compact JSON, one node a line, at `dir/compact.json`.
fn compact_chain_json(dir: &Path, nodes: usize) -> PathBuf {
    use std::fmt::Write;
    let mut text =
        String::from("{\"format\": 1, \"title\": \"a lean scalar chain\", \"dtype\": \"f64\",");
    let _ = writeln!(text, " \"output\": \"x{}\", \"nodes\": [", nodes - 2);
    text.push_str("{\"id\":\"w\",\"op\":\"param\",\"value\":0.9999999},\n");
    text.push_str("{\"id\":\"x0\",\"op\":\"input\",\"value\":1.0}");
    let mut x = 1.0f64;
    for k in 1..nodes - 1 {
        x *= 0.9999999;
        let _ = write!(
            text,
            ",\n{{\"id\":\"x{k}\",\"op\":\"mul\",\"inputs\":[\"w\",\"x{}\"],\"value\":{x:?}}}",
            k - 1
        );
    }
    text.push_str("\n]}\n");
    let path = dir.join("compact.json");
    std::fs::write(&path, text).expect("the fixture saves");
    path
}

/// Runs `ebb check PATH` with its report thrown away; returns the exit code
/// and the child's peak resident memory in KiB.
#[allow(
    clippy::zombie_processes,
    reason = "reaped by wait4, which std cannot do"
)]
fn check_peak_kib(path: &Path) -> (i32, u64) {
    let binary = std::env::var_os("EBB_BIN").unwrap_or(env!("CARGO_BIN_EXE_ebb").into());
    let child = Command::new(binary)
        .arg("check")
        .arg(path)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("ebb runs");
    let mut status = 0;
    // SAFETY: an all-zero rusage is a valid value to be overwritten.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    // SAFETY: waiting for our own child, which std has not reaped.
    let waited = unsafe { libc::wait4(child.id() as libc::pid_t, &mut status, 0, &mut usage) };
    assert_eq!(waited, child.id() as libc::pid_t, "wait4 failed");
    // Linux reports ru_maxrss in KiB.
    (libc::WEXITSTATUS(status), usage.ru_maxrss as u64)
}

fn status_kib(field: &str) -> u64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    status
        .lines()
        .find(|line| line.starts_with(field))
        .and_then(|line| line.split_whitespace().nth(1)?.parse().ok())
        .unwrap_or(0)
}

/// In a child: `ebb check`'s work stage by stage, the peak and current
/// resident memory after each.
fn stages(path: &Path) {
    use ebb::diagnose::{Settings, diagnose};
    use ebb::report::Report;
    use ebb::sweep::{LedgerMode, Sweep};
    let mark = |stage: &str| {
        println!(
            "{stage:<34} peak {:>6} MiB  now {:>6} MiB",
            status_kib("VmHWM:") / 1024,
            status_kib("VmRSS:") / 1024
        );
    };
    mark("start");
    let trace = ebb::trace::load(path).expect("the fixture loads");
    mark("loaded (read, parse, validate)");
    let settings = Settings::default();
    let own = settings.swept_trace(&trace);
    let mut sweep = Sweep::new(&own, LedgerMode::Off);
    sweep.run_to_end();
    mark("swept (ledger off)");
    let diagnosis = diagnose(&trace, &settings);
    mark("diagnosed");
    let report = Report::new("chain", &sweep).with_diagnosis(&trace, &diagnosis);
    let text = report.to_text();
    mark("reported");
    assert!(!text.is_empty());
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if let Some(at) = args.iter().position(|arg| arg == "--stages") {
        return stages(Path::new(&args[at + 1]));
    }
    let repeats: usize = args
        .iter()
        .skip(1)
        .find_map(|arg| arg.parse().ok())
        .unwrap_or(3);
    let dir = tempfile::tempdir().expect("a temporary directory");
    let chains = [
        (
            "recorded chain (x + sin(0.999x))",
            fixtures::scalar_chain_json(dir.path(), 1_000_000),
        ),
        ("lean chain (w·x)", lean_chain_json(dir.path(), 1_000_000)),
        (
            "lean chain, compact JSON",
            compact_chain_json(dir.path(), 1_000_000),
        ),
    ];
    for (name, path) in &chains {
        let file_kib = std::fs::metadata(path).expect("the fixture").len() / 1024;
        let mut peaks = Vec::new();
        for _ in 0..repeats {
            let (code, peak) = check_peak_kib(path);
            assert!(code == 0 || code == 1, "ebb check failed ({code})");
            peaks.push(peak);
        }
        peaks.sort_unstable();
        let median = peaks[peaks.len() / 2];
        println!(
            "{name}: JSON {} MiB; ebb check peak {} MiB ({:.2}x the file; median of {repeats}, range {}-{} MiB)",
            file_kib / 1024,
            median / 1024,
            median as f64 / file_kib as f64,
            peaks[0] / 1024,
            peaks[peaks.len() - 1] / 1024,
        );
        let output = Command::new(std::env::current_exe().expect("this binary"))
            .args(["--stages", path.to_str().expect("a UTF-8 path")])
            .output()
            .expect("the child runs");
        print!("{}", String::from_utf8_lossy(&output.stdout));
    }
}

//! Peak memory while a binary-backed trace of 10⁴ tensor nodes and 5·10⁷
//! f32 elements is open (target: at most 1.5× the sidecar's size). The
//! fixture is generated in this process; the trace is opened in a child
//! process so the generator's memory does not count. Peak resident memory
//! is read from /proc/self/status (VmHWM; Linux only).

#[path = "support/fixtures.rs"]
#[allow(
    dead_code,
    reason = "shared with the open bench, which uses every fixture"
)]
mod fixtures;

use std::process::Command;

fn status_kib(field: &str) -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|line| line.starts_with(field))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

fn child(path: &str) {
    let start = std::time::Instant::now();
    let trace = ebb::trace::load(std::path::Path::new(path)).expect("the fixture loads");
    let opened = start.elapsed();
    let open_peak = status_kib("VmHWM:").unwrap_or(0);
    let nan: usize = trace
        .nodes()
        .iter()
        .map(|node| node.value.summary(trace.dtype()).nan)
        .sum();
    let summarised_peak = status_kib("VmHWM:").unwrap_or(0);
    println!("{open_peak} {summarised_peak} {} {nan}", opened.as_millis());
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if let Some(at) = args.iter().position(|arg| arg == "--child") {
        return child(&args[at + 1]);
    }
    let dir = tempfile::tempdir().expect("a temporary directory");
    let path = fixtures::wide_tape(dir.path(), 10_000, 5_000);
    let sidecar = std::fs::metadata(ebb::trace::sidecar::sidecar_path(&path))
        .expect("the sidecar")
        .len();
    let output = Command::new(std::env::current_exe().expect("this binary"))
        .args(["--child", path.to_str().expect("a UTF-8 path")])
        .output()
        .expect("the child runs");
    let text = String::from_utf8_lossy(&output.stdout);
    let figures: Vec<u64> = text
        .split_whitespace()
        .filter_map(|field| field.parse().ok())
        .collect();
    let [open_peak, summarised_peak, millis, _] = figures[..] else {
        panic!("unexpected child output: {text}")
    };
    let sidecar_kib = sidecar / 1024;
    println!("sidecar                      {:>8} MiB", sidecar_kib / 1024);
    println!(
        "peak after open              {:>8} MiB  ({:.2}x sidecar, opened in {millis} ms)",
        open_peak / 1024,
        open_peak as f64 / sidecar_kib as f64
    );
    println!(
        "peak after summarising all   {:>8} MiB  ({:.2}x sidecar)",
        summarised_peak / 1024,
        summarised_peak as f64 / sidecar_kib as f64
    );
}

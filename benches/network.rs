//! Network-shaped traces at real size against PyTorch's own CPU backward,
//! in the same run (README, "Performance").
//!
//! For each network of `ebb::demos::networks` recorded in f32 and saved with
//! a safetensors sidecar, this measures: a full sweep with the ledger off and
//! with it on, `ebb check`'s diagnosis with the default replays, the time
//! from starting `ebb open` in a pseudo-terminal to its first frame, and the
//! peak memory of a process that loads the trace and sweeps it with the
//! ledger on, against the trace's tensor bytes. The peer is
//! `benches/peer/torch_step.py` (forward and `loss.backward()` of the same
//! network), run with the same thread count and again with one thread, the
//! faster of the two kept (PyTorch's OpenMP threads wait on each other when
//! another process holds a core, and one thread was then up to twenty times
//! faster than two: the peer is taken at its best), when a Python with torch
//! is found: `$EBB_PYTHON`, then `~/.cache/ebb-venv/bin/python`, then `python3`.
//!
//! `cargo bench --bench network [-- NAME ...] [--repeats N]`
//!
//! `cargo bench --bench network -- ops [--repeats N]` instead times the
//! structured ops alone at the networks' sizes in f32 (forward, then each
//! input's vector-Jacobian product; minimum over the repeats), to weigh a
//! change to a kernel before and after.

use ebb::demos::networks::Network;
use ebb::diagnose::{Settings, diagnose};
use ebb::dtype::Dtype;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::{self, Trace};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

/// Minimum and median of `repeats` timed runs after one warm-up.
fn timed(repeats: usize, mut run: impl FnMut()) -> (Duration, Duration) {
    run();
    let mut times: Vec<Duration> = (0..repeats)
        .map(|_| {
            let start = Instant::now();
            run();
            start.elapsed()
        })
        .collect();
    times.sort();
    (times[0], times[times.len() / 2])
}

fn ms(d: Duration) -> String {
    format!("{:.2} ms", d.as_secs_f64() * 1e3)
}

fn status_kib(field: &str) -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|line| line.starts_with(field))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

/// The child process of the memory measurement: load, sweep with the ledger
/// on, print the peak resident memory in KiB and the trace's tensor bytes.
fn memory_child(path: &str) {
    let trace = trace::load(Path::new(path)).expect("the trace loads");
    let mut sweep = Sweep::new(&trace, LedgerMode::On);
    sweep.run_to_end();
    let bytes: usize = trace.nodes().iter().map(|node| node.value.bytes()).sum();
    println!("{} {bytes}", status_kib("VmHWM:").unwrap_or(0));
}

fn peak_memory(path: &Path) -> (u64, u64) {
    let output = Command::new(std::env::current_exe().expect("this binary"))
        .args(["--memory-child", path.to_str().expect("a UTF-8 path")])
        .output()
        .expect("the child runs");
    let text = String::from_utf8_lossy(&output.stdout);
    let figures: Vec<u64> = text
        .split_whitespace()
        .filter_map(|f| f.parse().ok())
        .collect();
    match figures[..] {
        [peak, bytes] => (peak * 1024, bytes),
        _ => panic!("unexpected child output: {text}"),
    }
}

/// Seconds from starting `ebb open` in a 200×50 pseudo-terminal until the
/// screen shows the trace's title, then quits it.
fn first_frame(path: &Path, title: &str) -> Option<Duration> {
    use portable_pty::{CommandBuilder, NativePtySystem, PtySize, PtySystem};
    use std::io::{Read, Write};
    use std::sync::{Arc, Mutex};
    let pair = NativePtySystem::default()
        .openpty(PtySize {
            rows: 50,
            cols: 200,
            pixel_width: 0,
            pixel_height: 0,
        })
        .ok()?;
    let mut command = CommandBuilder::new(env!("CARGO_BIN_EXE_ebb"));
    command.args(["open", path.to_str()?]);
    command.env("TERM", "xterm-256color");
    let start = Instant::now();
    let mut child = pair.slave.spawn_command(command).ok()?;
    drop(pair.slave);
    let parser = Arc::new(Mutex::new(vt100::Parser::new(
        50.try_into().unwrap(),
        200.try_into().unwrap(),
        0,
    )));
    let (shared, mut reader) = (Arc::clone(&parser), pair.master.try_clone_reader().ok()?);
    std::thread::spawn(move || {
        let mut buffer = [0u8; 8192];
        while let Ok(n) = reader.read(&mut buffer) {
            if n == 0 {
                break;
            }
            shared.lock().unwrap().process(&buffer[..n]);
        }
    });
    let seen = loop {
        if parser.lock().unwrap().screen().contents().contains(title) {
            break Some(start.elapsed());
        }
        if start.elapsed() > Duration::from_secs(60) {
            break None;
        }
        std::thread::sleep(Duration::from_millis(1));
    };
    let mut keys = pair.master.take_writer().ok()?;
    let _ = keys.write_all(b"q");
    let _ = keys.flush();
    let deadline = Instant::now() + Duration::from_secs(10);
    while child.try_wait().ok()?.is_none() && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(10));
    }
    let _ = child.kill();
    seen
}

/// A Python that can import torch, if there is one.
fn python() -> Option<PathBuf> {
    let home = std::env::var_os("HOME").map(PathBuf::from);
    let candidates = std::env::var_os("EBB_PYTHON")
        .map(PathBuf::from)
        .into_iter()
        .chain(home.map(|home| home.join(".cache/ebb-venv/bin/python")))
        .chain([PathBuf::from("python3")]);
    candidates.into_iter().find(|python| {
        Command::new(python)
            .args(["-c", "import torch"])
            .output()
            .is_ok_and(|output| output.status.success())
    })
}

/// PyTorch's forward and backward minimum seconds for `network`, from the peer script.
fn peer(python: &Path, network: Network, threads: usize, repeats: usize) -> Option<(f64, f64)> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("benches/peer/torch_step.py");
    let output = Command::new(python)
        .arg(script)
        .args([
            "--threads",
            &threads.to_string(),
            "--repeats",
            &repeats.to_string(),
        ])
        .arg(network.name())
        .output()
        .ok()?;
    let line = String::from_utf8_lossy(&output.stdout)
        .lines()
        .next()?
        .to_string();
    let json: serde_json::Value = serde_json::from_str(&line).ok()?;
    Some((
        json["forward_min_s"].as_f64()?,
        json["backward_min_s"].as_f64()?,
    ))
}

/// The structured ops of the CNN and the transformer stack at their sizes:
/// forward and each vector-Jacobian product, minimum of `repeats` runs.
fn ops_alone(repeats: usize) {
    use ebb::ops::{self, Attrs, Op, Precision, VjpArgs};
    use ebb::tensor::Value;
    let p = Precision::of(Dtype::F32);
    let mut state = 0x5eed_u64;
    let mut filled = |shape: &[usize]| {
        let data = (0..shape.iter().product())
            .map(|_| {
                state = state
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                (state >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
            })
            .collect();
        Value::from_parts(shape.to_vec(), data).stored_as(Dtype::F32)
    };
    let attrs = |padding: Option<usize>, kernel: Option<usize>| Attrs {
        padding: padding.map(|p| vec![p]),
        kernel: kernel.map(|k| vec![k]),
        stride: kernel.map(|k| vec![k]),
        ..Attrs::default()
    };
    let conv = attrs(Some(1), None);
    let pool = attrs(None, Some(2));
    let plain = Attrs::default();
    let cases: Vec<(&str, Op, Vec<Value>, &Attrs)> = vec![
        (
            "conv2d 3→32 on 32×3×32×32",
            Op::Conv2d,
            vec![
                filled(&[32, 3, 32, 32]),
                filled(&[32, 3, 3, 3]),
                filled(&[32]),
            ],
            &conv,
        ),
        (
            "conv2d 32→64 on 32×32×16×16",
            Op::Conv2d,
            vec![
                filled(&[32, 32, 16, 16]),
                filled(&[64, 32, 3, 3]),
                filled(&[64]),
            ],
            &conv,
        ),
        (
            "conv2d 64→128 on 32×64×8×8",
            Op::Conv2d,
            vec![
                filled(&[32, 64, 8, 8]),
                filled(&[128, 64, 3, 3]),
                filled(&[128]),
            ],
            &conv,
        ),
        (
            "batch_norm 32×32×32×32",
            Op::BatchNorm,
            vec![filled(&[32, 32, 32, 32]), filled(&[32]), filled(&[32])],
            &plain,
        ),
        (
            "batch_norm 32×64×16×16",
            Op::BatchNorm,
            vec![filled(&[32, 64, 16, 16]), filled(&[64]), filled(&[64])],
            &plain,
        ),
        (
            "max_pool2d 2 on 32×32×32×32",
            Op::MaxPool2d,
            vec![filled(&[32, 32, 32, 32])],
            &pool,
        ),
        (
            "layer_norm 8×128×256",
            Op::LayerNorm,
            vec![filled(&[8, 128, 256]), filled(&[256]), filled(&[256])],
            &plain,
        ),
    ];
    println!(
        "{:<32} {:>12}  vector-Jacobian products by input (min of {repeats})",
        "op", "forward"
    );
    for (label, op, inputs, attrs) in &cases {
        let inputs: Vec<&Value> = inputs.iter().collect();
        let output = ops::forward(*op, &inputs, attrs, p);
        let (forward, _) = timed(repeats, || {
            std::hint::black_box(ops::forward(*op, &inputs, attrs, p));
        });
        let products: Vec<String> = (0..inputs.len())
            .map(|slot| {
                let args = VjpArgs {
                    slot,
                    inputs: &inputs,
                    output: &output,
                    adjoint: &output,
                    attrs,
                    precision: p,
                };
                let (min, _) = timed(repeats, || {
                    std::hint::black_box(ops::vjp(*op, &args));
                });
                ms(min)
            })
            .collect();
        println!("{label:<32} {:>12}  {}", ms(forward), products.join(" / "));
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if let Some(at) = args.iter().position(|arg| arg == "--memory-child") {
        return memory_child(&args[at + 1]);
    }
    let repeats = args
        .iter()
        .position(|arg| arg == "--repeats")
        .and_then(|at| args.get(at + 1)?.parse().ok())
        .unwrap_or(10);
    if args.iter().any(|arg| arg == "ops") {
        return ops_alone(repeats);
    }
    // Arguments naming networks choose them (cargo adds `--bench` of its own).
    let named: Vec<Network> = Network::ALL
        .into_iter()
        .filter(|network| args.iter().any(|arg| arg == network.name()))
        .collect();
    let chosen = if named.is_empty() {
        Network::ALL.to_vec()
    } else {
        named
    };
    let threads = rayon::current_num_threads();
    let python = python();
    let dir = tempfile::tempdir().expect("a temporary directory");
    println!(
        "threads {threads}; peer: {}",
        python
            .as_ref()
            .map_or("none found".into(), |p| p.display().to_string())
    );
    for network in chosen {
        let path = dir.path().join(format!("{}.tape", network.name()));
        trace::save(&network.record(Dtype::F32), &path).expect("the trace saves");
        let trace: Trace = trace::load(&path).expect("the trace loads");
        let bytes: usize = trace.nodes().iter().map(|node| node.value.bytes()).sum();
        println!(
            "\n{}: {} nodes, {:.1} MB of tensors (f32)",
            network.name(),
            trace.nodes().len(),
            bytes as f64 / 1e6
        );
        // The sweep must run clean and the recorded values must be the op
        // table's own: a bench of a broken trace would time the wrong thing.
        // A causal mask's −inf is noted, not flagged (`sweep::masked`).
        let mut sweep = Sweep::new(&trace, LedgerMode::Off);
        sweep.run_to_end();
        let masking = ebb::sweep::Masking::of(&sweep);
        let forward_start = Instant::now();
        let forward = ebb::diagnose::check_forward(&trace, 1.0);
        println!(
            "  sweep flags: {} ({} masked nodes noted); forward consistency: {} nodes recomputed, {} beyond tolerance ({})",
            masking.unexplained(sweep.flags()).len(),
            masking.masked.len(),
            forward.checked,
            forward.mismatches.len(),
            ms(forward_start.elapsed())
        );
        drop(sweep);
        let diagnosis = diagnose(&trace, &Settings::default());
        println!("  ebb check: {}", diagnosis.headline);
        // `ebb verify` with one sampled entry per parameter: every
        // finite difference re-evaluates the whole network in f64.
        let verify_start = Instant::now();
        let options = ebb::verify::VerifyOptions {
            samples: 1,
            ..Default::default()
        };
        let verification = ebb::verify::verify(&trace, &options);
        println!(
            "  ebb verify: {} ({} parameters by central differences, tangent relative error {:.1e}; {})",
            verification.verdict().name(),
            verification.differences.len(),
            verification.tangent.map_or(f64::NAN, |t| t.relative),
            ms(verify_start.elapsed())
        );
        let (off_min, off_median) = timed(repeats, || {
            let mut sweep = Sweep::new(&trace, LedgerMode::Off);
            sweep.run_to_end();
        });
        let (on_min, on_median) = timed(repeats, || {
            let mut sweep = Sweep::new(&trace, LedgerMode::On);
            sweep.run_to_end();
        });
        let settings = Settings::default();
        let (check_min, check_median) = timed(repeats.div_ceil(3), || {
            diagnose(&trace, &settings);
        });
        let frame = first_frame(&path, trace.title());
        let (peak, tensor_bytes) = peak_memory(&path);
        let peer = python.as_ref().and_then(|python| {
            let both = peer(python, network, threads, repeats);
            let one = peer(python, network, 1, repeats);
            match (both, one) {
                (Some(both), Some(one)) => Some((both.0.min(one.0), both.1.min(one.1))),
                (both, one) => both.or(one),
            }
        });
        let ratio = |d: Duration| match peer {
            Some((_, backward)) => format!("{:.2}x", d.as_secs_f64() / backward),
            None => "—".to_string(),
        };
        println!(
            "  {:<34} {:>10} {:>10}  min / PyTorch backward min",
            "", "min", "median"
        );
        for (what, (min, median)) in [
            ("full sweep, ledger off", (off_min, off_median)),
            ("full sweep, ledger on", (on_min, on_median)),
            ("diagnosis (ebb check)", (check_min, check_median)),
        ] {
            println!(
                "  {what:<34} {:>10} {:>10}  {}",
                ms(min),
                ms(median),
                ratio(min)
            );
        }
        match peer {
            Some((forward, backward)) => println!(
                "  {:<34} {:>10}            forward {}",
                "PyTorch backward",
                ms(Duration::from_secs_f64(backward)),
                ms(Duration::from_secs_f64(forward))
            ),
            None => println!("  PyTorch: not measured (no Python with torch found)"),
        }
        match frame {
            Some(frame) => println!("  first frame of `ebb open`          {:>10}", ms(frame)),
            None => println!("  first frame of `ebb open`: not seen"),
        }
        println!(
            "  peak memory, load + sweep with ledger: {:.1} MB = {:.2}x the tensor bytes ({:.1} MB)",
            peak as f64 / 1e6,
            peak as f64 / tensor_bytes as f64,
            tensor_bytes as f64 / 1e6
        );
    }
}

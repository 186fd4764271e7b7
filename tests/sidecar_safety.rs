//! A sidecar that is linked, special, sparse, cut short or changed while Ebb
//! reads it gives one clear line and exit status 2: never a crash, a hang or
//! a report of data that is no longer in the file.

#![cfg(unix)]

use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

fn ebb(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(args)
        .stdin(Stdio::null())
        .output()
        .expect("the binary runs")
}

/// Waits for `child` for at most `seconds`; a hang fails the test (and the
/// child is killed).
fn finish(mut child: Child, seconds: u64) -> Output {
    let deadline = Instant::now() + Duration::from_secs(seconds);
    while child.try_wait().expect("the child is waited for").is_none() {
        if Instant::now() > deadline {
            let _ = child.kill();
            panic!("ebb hung for {seconds} s");
        }
        std::thread::sleep(Duration::from_millis(10));
    }
    child.wait_with_output().expect("its output")
}

#[track_caller]
fn assert_refused(output: &Output, expected: &str) {
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(2), "{stderr}");
    assert!(output.stdout.is_empty(), "nothing is reported");
    assert_eq!(stderr.lines().count(), 1, "one line: {stderr}");
    assert!(
        stderr.contains(expected),
        "expected {expected:?} in {stderr}"
    );
}

/// A trace `t.tape` in `dir` whose one parameter, of `elements` f64
/// numbers, lives in the sidecar `t.safetensors`, written by hand (header
/// length, JSON, then the data: zeros unless `fill`).
fn trace_with_sidecar(dir: &Path, elements: u64, fill: bool) -> (PathBuf, PathBuf) {
    let trace = dir.join("t.tape");
    std::fs::write(
        &trace,
        "(format: 2, title: \"t\", dtype: f64, sidecar: \"t.safetensors\", output: \"w\", nodes: [(id: \"w\", op: \"param\", value: (tensor: \"w\"))])",
    )
    .unwrap();
    let bytes = elements * 8;
    let mut json = format!(
        "{{\"w\":{{\"dtype\":\"F64\",\"shape\":[{elements}],\"data_offsets\":[0,{bytes}]}}}}"
    );
    while json.len() % 8 != 0 {
        json.push(' ');
    }
    let sidecar = dir.join("t.safetensors");
    let file = std::fs::File::create(&sidecar).unwrap();
    let mut head = (json.len() as u64).to_le_bytes().to_vec();
    head.extend_from_slice(json.as_bytes());
    file.write_all_at(&head, 0).unwrap();
    let start = head.len() as u64;
    if fill {
        let chunk: Vec<u8> = (0..1u64 << 20)
            .flat_map(|k| (k as f64 / 7.0).to_le_bytes())
            .collect();
        let mut at = 0;
        while at < bytes {
            let n = (bytes - at).min(chunk.len() as u64) as usize;
            file.write_all_at(&chunk[..n], start + at).unwrap();
            at += n as u64;
        }
    } else {
        // Never written: a hole.
        file.set_len(start + bytes).unwrap();
    }
    (trace, sidecar)
}

#[test]
fn a_symbolic_link_is_not_followed() {
    let dir = tempfile::tempdir().unwrap();
    let (trace, sidecar) = trace_with_sidecar(dir.path(), 4, true);
    let elsewhere = dir.path().join("elsewhere.bin");
    std::fs::rename(&sidecar, &elsewhere).unwrap();
    std::os::unix::fs::symlink(&elsewhere, &sidecar).unwrap();
    assert_refused(
        &ebb(&["check", trace.to_str().unwrap()]),
        "t.safetensors is a symbolic link, which Ebb does not follow",
    );
    // Nor to a device that never ends.
    std::fs::remove_file(&sidecar).unwrap();
    std::os::unix::fs::symlink("/dev/zero", &sidecar).unwrap();
    assert_refused(
        &ebb(&["check", trace.to_str().unwrap()]),
        "is a symbolic link",
    );
}

#[test]
fn a_directory_is_not_a_sidecar() {
    let dir = tempfile::tempdir().unwrap();
    let (trace, sidecar) = trace_with_sidecar(dir.path(), 4, true);
    std::fs::remove_file(&sidecar).unwrap();
    std::fs::create_dir(&sidecar).unwrap();
    assert_refused(
        &ebb(&["check", trace.to_str().unwrap()]),
        "t.safetensors is a directory, not a regular file",
    );
}

#[test]
fn a_fifo_is_refused_without_waiting_for_a_writer() {
    // Before: opening a FIFO with no writer blocked for ever.
    let dir = tempfile::tempdir().unwrap();
    let (trace, sidecar) = trace_with_sidecar(dir.path(), 4, true);
    std::fs::remove_file(&sidecar).unwrap();
    let name = std::ffi::CString::new(sidecar.to_str().unwrap()).unwrap();
    // SAFETY: a valid C string naming a path in our temporary directory.
    assert_eq!(unsafe { libc::mkfifo(name.as_ptr(), 0o644) }, 0);
    let child = Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(["check", trace.to_str().unwrap()])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    assert_refused(
        &finish(child, 60),
        "t.safetensors is a FIFO, not a regular file",
    );
}

#[test]
fn a_sparse_sidecar_is_refused() {
    // Before: a file of a few kilobytes on disk declaring 40 GB of data
    // aborted on allocation (exit status 134).
    let dir = tempfile::tempdir().unwrap();
    let (trace, _) = trace_with_sidecar(dir.path(), 5 << 30, false);
    assert_refused(
        &ebb(&["check", trace.to_str().unwrap()]),
        "t.safetensors is a sparse file: ",
    );
}

/// Runs `ebb check` on a trace whose sidecar is mapped (the copy limit set
/// to 0), stops it as soon as the mapping appears, lets `meddle` change the
/// sidecar, and lets it go on.
fn meddled_check(meddle: impl FnOnce(&Path)) -> Output {
    let dir = tempfile::tempdir().unwrap();
    let (trace, sidecar) = trace_with_sidecar(dir.path(), 1 << 20, true);
    let child = Command::new(env!("CARGO_BIN_EXE_ebb"))
        .args(["check", trace.to_str().unwrap()])
        .env("EBB_SIDECAR_COPY_LIMIT", "0")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let pid = child.id() as libc::pid_t;
    let maps = format!("/proc/{pid}/maps");
    let name = sidecar.to_str().unwrap().to_string();
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        let mapped = std::fs::read_to_string(&maps).unwrap_or_default();
        if mapped.contains(&name) {
            // SAFETY: signalling our own child.
            unsafe { libc::kill(pid, libc::SIGSTOP) };
            break;
        }
        assert!(Instant::now() < deadline, "the sidecar was never mapped");
        std::thread::sleep(Duration::from_micros(200));
    }
    meddle(&sidecar);
    // SAFETY: as above.
    unsafe { libc::kill(pid, libc::SIGCONT) };
    finish(child, 120)
}

#[test]
fn a_sidecar_cut_short_while_mapped_ends_with_one_line() {
    // Before: SIGBUS killed `ebb check` with no message.
    let output = meddled_check(|sidecar| {
        let file = std::fs::OpenOptions::new()
            .write(true)
            .open(sidecar)
            .unwrap();
        file.set_len(4096).unwrap();
    });
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(2), "{stderr}");
    assert!(output.stdout.is_empty(), "nothing is reported");
    assert_eq!(stderr.lines().count(), 1, "one line: {stderr}");
    // A bus error if it read the lost pages, else the change is noticed.
    assert!(
        stderr.contains(
            "t.tape: its sidecar was cut short by another program while ebb read it (bus error)"
        ) || stderr.contains("t.safetensors changed while Ebb read it"),
        "{stderr}"
    );
}

#[test]
fn a_sidecar_rewritten_in_place_while_mapped_gives_no_report() {
    // Before: the report silently mixed old and new numbers.
    let output = meddled_check(|sidecar| {
        let file = std::fs::OpenOptions::new()
            .write(true)
            .open(sidecar)
            .unwrap();
        file.write_all_at(&f64::NAN.to_le_bytes(), 4096).unwrap();
    });
    assert_refused(&output, "t.safetensors changed while Ebb read it");
}

#[test]
fn a_small_sidecar_is_read_once() {
    // Copied when opened: the report is of what the file held then.
    let dir = tempfile::tempdir().unwrap();
    let (trace, _) = trace_with_sidecar(dir.path(), 1000, true);
    let output = ebb(&["check", trace.to_str().unwrap()]);
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert_eq!(output.status.code(), Some(0), "{stderr}");
    assert!(String::from_utf8_lossy(&output.stdout).contains("1 node"));
}

#[test]
fn convert_never_replaces_the_sidecar_its_input_names() {
    // Before: `a.tape` naming `b.safetensors`, converted to `b.tape`,
    // replaced its own sidecar.
    let dir = tempfile::tempdir().unwrap();
    let (trace, sidecar) = trace_with_sidecar(dir.path(), 16, true);
    let a = dir.path().join("a.tape");
    let b_sidecar = dir.path().join("b.safetensors");
    std::fs::rename(&trace, &a).unwrap();
    std::fs::rename(&sidecar, &b_sidecar).unwrap();
    let header = std::fs::read_to_string(&a)
        .unwrap()
        .replace("t.safetensors", "b.safetensors");
    std::fs::write(&a, header).unwrap();
    let before = std::fs::read(&b_sidecar).unwrap();
    let b = dir.path().join("b.tape");
    let output = ebb(&["convert", a.to_str().unwrap(), b.to_str().unwrap()]);
    assert_refused(&output, "would overwrite the input's sidecar");
    assert!(
        std::fs::read(&b_sidecar).unwrap() == before,
        "the sidecar is untouched"
    );
    assert!(!b.exists());
    // To another name it converts, and the copy reads back.
    let c = dir.path().join("c.tape");
    let output = ebb(&["convert", a.to_str().unwrap(), c.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(0));
    let output = ebb(&["check", c.to_str().unwrap()]);
    assert_eq!(
        output.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
}

#[test]
fn convert_never_writes_through_a_link_to_what_it_reads() {
    // An output sidecar that is a symbolic link to the input's sidecar is
    // refused; an output that is a hard link to the input is replaced as a
    // name, so the input keeps its bytes.
    let dir = tempfile::tempdir().unwrap();
    let (trace, sidecar) = trace_with_sidecar(dir.path(), 16, true);
    let header = std::fs::read(&trace).unwrap();
    let data = std::fs::read(&sidecar).unwrap();
    let out = dir.path().join("out.tape");
    std::os::unix::fs::symlink(&sidecar, dir.path().join("out.safetensors")).unwrap();
    let output = ebb(&["convert", trace.to_str().unwrap(), out.to_str().unwrap()]);
    assert_refused(&output, "would overwrite the input's sidecar");
    assert!(
        std::fs::read(&sidecar).unwrap() == data,
        "the sidecar is untouched"
    );

    let text = dir.path().join("t.json");
    let output = ebb(&["convert", trace.to_str().unwrap(), text.to_str().unwrap()]);
    assert_eq!(output.status.code(), Some(0));
    let text_bytes = std::fs::read(&text).unwrap();
    let linked = dir.path().join("linked.ron");
    std::fs::hard_link(&text, &linked).unwrap();
    let output = ebb(&["convert", text.to_str().unwrap(), linked.to_str().unwrap()]);
    assert_eq!(
        output.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&output.stderr)
    );
    assert!(
        std::fs::read(&text).unwrap() == text_bytes,
        "the input keeps its bytes"
    );
    assert!(std::fs::read(&trace).unwrap() == header);
    assert!(
        std::fs::read_to_string(&linked).unwrap().starts_with('('),
        "RON at the output"
    );
}

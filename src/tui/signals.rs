//! The terminal survives signals. While the view holds the terminal, SIGTERM,
//! SIGHUP, SIGINT and SIGQUIT (what `kill`, `timeout`, a closed window or an
//! editor stopping a task send) restore it — alternate screen left, cursor
//! shown, mouse reporting off, the saved terminal modes (echo, canonical
//! input, signals) back — and then the signal's default action ends the
//! process, so the parent sees the conventional status (128 + the signal's
//! number in a shell). A SIGBUS (a memory-mapped file truncated while it is
//! read) restores the terminal, prints one line and exits with status 2.
//!
//! The handlers run in signal context, so they only do what is
//! async-signal-safe: `write(2)` of fixed bytes, `tcsetattr(3)` with modes
//! saved beforehand, and re-raising or `_exit(2)`. They are installed once
//! and stay installed; while the view is not running they do what the
//! default action would (and a SIGBUS still gets its one line).

use std::io;
use std::os::fd::IntoRawFd;
use std::sync::OnceLock;
use std::sync::atomic::{AtomicBool, Ordering};

/// True while the view holds the terminal (raw mode, alternate screen).
static ACTIVE: AtomicBool = AtomicBool::new(false);

/// The terminal's modes before the view changed them, and the descriptor to
/// set them on (standard input when it is a terminal, else `/dev/tty`, as
/// crossterm chooses).
static SAVED: OnceLock<Saved> = OnceLock::new();

/// Whether the handlers are installed (once per process).
static INSTALLED: OnceLock<Result<(), String>> = OnceLock::new();

struct Saved {
    fd: libc::c_int,
    modes: libc::termios,
}

/// What puts a terminal back: CAN ends any escape sequence a frame left half
/// written, then reset attributes, mouse reporting off (every mode crossterm
/// turns on), cursor shown, alternate screen left.
const RESTORE: &[u8] =
    b"\x18\x1b[0m\x1b[?1006l\x1b[?1015l\x1b[?1003l\x1b[?1002l\x1b[?1000l\x1b[?25h\x1b[?1049l";

/// The one line a bus error prints.
const BUS_ERROR: &[u8] = b"\nebb: a memory-mapped file was truncated or changed while ebb read it (bus error) (hint: let the run that writes the trace finish, then open it again)\n";

/// The signals after which the view restores the terminal and ends.
pub const ENDING: [libc::c_int; 4] = [libc::SIGTERM, libc::SIGHUP, libc::SIGINT, libc::SIGQUIT];

/// Saves the terminal's modes and installs the handlers (once). Call before
/// entering raw mode.
pub fn arm() -> io::Result<()> {
    if SAVED.get().is_none() {
        let fd = if unsafe { libc::isatty(libc::STDIN_FILENO) } == 1 {
            libc::STDIN_FILENO
        } else {
            // Kept open for the life of the process: the handler may need it at any time.
            std::fs::OpenOptions::new()
                .read(true)
                .write(true)
                .open("/dev/tty")?
                .into_raw_fd()
        };
        let mut modes: libc::termios = unsafe { std::mem::zeroed() };
        if unsafe { libc::tcgetattr(fd, &mut modes) } != 0 {
            return Err(io::Error::last_os_error());
        }
        let _ = SAVED.set(Saved { fd, modes });
    }
    INSTALLED
        .get_or_init(install)
        .clone()
        .map_err(io::Error::other)
}

/// The view holds the terminal from now on (call just before entering raw mode).
pub fn entered() {
    ACTIVE.store(true, Ordering::SeqCst);
}

/// The view has given the terminal back (call after restoring it).
pub fn left() {
    ACTIVE.store(false, Ordering::SeqCst);
}

fn install() -> Result<(), String> {
    for signal in ENDING {
        // SAFETY: the action only calls async-signal-safe functions (see `restore`).
        unsafe {
            signal_hook::low_level::register(signal, move || {
                restore();
                let _ = signal_hook::low_level::emulate_default_handler(signal);
            })
        }
        .map_err(|error| format!("cannot handle signal {signal}: {error}"))?;
    }
    // SAFETY: as above; `_exit` is async-signal-safe and ends the process at once.
    unsafe {
        signal_hook::low_level::register(libc::SIGBUS, || {
            restore();
            write_all(libc::STDERR_FILENO, BUS_ERROR);
            libc::_exit(2);
        })
    }
    .map_err(|error| format!("cannot handle SIGBUS: {error}"))?;
    Ok(())
}

/// Puts the terminal back if the view holds it. Async-signal-safe: an atomic
/// swap, `write` and `tcsetattr`.
fn restore() {
    if !ACTIVE.swap(false, Ordering::SeqCst) {
        return;
    }
    write_all(libc::STDOUT_FILENO, RESTORE);
    if let Some(saved) = SAVED.get() {
        // SAFETY: `saved.modes` was filled by tcgetattr on this descriptor.
        unsafe {
            libc::tcsetattr(saved.fd, libc::TCSANOW, &saved.modes);
        }
    }
}

/// `write(2)` until every byte is out or the descriptor fails.
fn write_all(fd: libc::c_int, mut bytes: &[u8]) {
    while !bytes.is_empty() {
        // SAFETY: the pointer and length describe `bytes`.
        let written = unsafe { libc::write(fd, bytes.as_ptr().cast(), bytes.len()) };
        if written <= 0 {
            return;
        }
        bytes = &bytes[written as usize..];
    }
}

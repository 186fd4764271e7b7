//! A bus error (a memory-mapped sidecar cut short by another program while
//! Ebb reads it) ends `check`, `sweep`, `verify` and `convert` with one line
//! naming the trace and exit status 2, instead of a silent crash. The view
//! has its own handler, which also restores the terminal.

use anyhow::{Context, Result};
use std::path::Path;
use std::sync::OnceLock;

/// The line the handler writes, prepared before any sidecar is mapped: a
/// signal handler may not allocate.
static MESSAGE: OnceLock<Vec<u8>> = OnceLock::new();

/// Installs the handler (once), naming `trace` in its message.
pub fn guard(trace: &Path) -> Result<()> {
    let message = format!(
        "ebb: {}: its sidecar was cut short by another program while ebb read it (bus error) (hint: let the program writing the trace finish, then run ebb again)\n",
        trace.display()
    );
    if MESSAGE.set(message.into_bytes()).is_err() {
        return Ok(());
    }
    // SAFETY: the action only reads a message prepared above, calls write(2)
    // and _exit(2), all async-signal-safe.
    unsafe {
        signal_hook::low_level::register(libc::SIGBUS, || {
            if let Some(message) = MESSAGE.get() {
                let mut bytes = message.as_slice();
                while !bytes.is_empty() {
                    let written =
                        libc::write(libc::STDERR_FILENO, bytes.as_ptr().cast(), bytes.len());
                    if written <= 0 {
                        break;
                    }
                    bytes = &bytes[written as usize..];
                }
            }
            libc::_exit(2);
        })
    }
    .context("installing the handler for bus errors")?;
    Ok(())
}

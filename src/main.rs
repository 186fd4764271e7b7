//! The `ebb` binary: parse arguments, run, map the result to an exit status
//! (0 clean, 1 flagged, 2 bad input or usage).

mod cli;

use clap::Parser;
use std::io::{self, Write};
use std::process::ExitCode;

fn main() -> ExitCode {
    let cli = cli::Cli::parse();
    // Output goes to a buffer first so a failure never leaves half a report.
    let mut buffer = Vec::new();
    let result = cli::run(cli, &mut buffer);
    if let Err(error) = &result {
        let _ = io::stdout().flush();
        eprintln!("ebb: {error:#}");
        return ExitCode::from(2);
    }
    let mut stdout = io::stdout().lock();
    if let Err(error) = stdout.write_all(&buffer).and_then(|()| stdout.flush()) {
        // A closed pipe (`ebb check t.ron | head`) is not a failure.
        if error.kind() != io::ErrorKind::BrokenPipe {
            eprintln!("ebb: writing output: {error}");
            return ExitCode::from(2);
        }
    }
    match result {
        Ok(cli::Outcome::Clean) => ExitCode::SUCCESS,
        Ok(cli::Outcome::Flagged) => ExitCode::from(1),
        Err(_) => ExitCode::from(2),
    }
}

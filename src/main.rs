//! The `befit` binary: parses arguments and runs the command; errors become a
//! message and exit code 1.

use std::process::ExitCode;

fn main() -> ExitCode {
    match befit::cli::run(std::env::args_os()) {
        Ok(code) => code,
        Err(e) => {
            eprintln!("befit: error: {e:#}");
            ExitCode::FAILURE
        }
    }
}

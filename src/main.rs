//! The `befit` binary: parses arguments and runs the command; errors become a
//! message and exit code 1.

use std::process::ExitCode;

fn main() -> ExitCode {
    match befit::cli::run(std::env::args_os()) {
        Ok(code) => code,
        Err(e) => {
            // Each cause once: an error whose message already quotes its source is not repeated.
            let mut parts: Vec<String> = Vec::new();
            for cause in e.chain() {
                let text = cause.to_string();
                if parts.last().is_none_or(|last| !last.contains(&text)) {
                    parts.push(text);
                }
            }
            eprintln!("befit: error: {}", parts.join(": "));
            ExitCode::FAILURE
        }
    }
}

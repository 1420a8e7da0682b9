//! The command line: arguments parsed raw by clap (with `befit serve`'s
//! config file, [`config_file`]), validated into typed settings here, and
//! dispatched. This is the only module that reads environment variables
//! (`ORT_DYLIB_PATH`, `RUST_LOG`, and the `BEFIT_*` ones `befit serve --help`
//! lists).

pub mod args;
mod bank_commands;
pub mod config_file;
mod keys_command;
mod probe_commands;
pub mod progress;
mod score_command;
mod serve;

use std::ffi::OsString;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context;

use crate::runtime::LibrarySearch;
use args::{BankCommand, Command, KeysCommand};
use config_file::ArgsError;

/// Parses `argv` and runs the command; the error chain is for `main` to print.
pub fn run(argv: impl IntoIterator<Item = OsString>) -> anyhow::Result<ExitCode> {
    let cli = match config_file::parse_args(argv.into_iter().collect()) {
        Ok(cli) => cli,
        Err(ArgsError::Usage(e)) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return Ok(ExitCode::from(code));
        }
        Err(ArgsError::Config(e)) => return Err(e.into()),
    };
    init_logging(cli.log_json);
    if !matches!(cli.command, Command::Serve(_)) {
        stop_quietly_on_closed_pipe();
    }
    match cli.command {
        Command::Serve(a) => serve::serve(a),
        Command::CheckBundle(a) => serve::check_bundle(a),
        Command::Score(a) => score_command::score(a),
        Command::Calibrate(a) => probe_commands::calibrate(a),
        Command::Drift(a) => probe_commands::drift(a),
        Command::Bank(BankCommand::Import(a)) => bank_commands::import(a),
        Command::Bank(BankCommand::Query(a)) => bank_commands::query(a),
        Command::Bank(BankCommand::EmbedMissing(a)) => bank_commands::embed_missing(a),
        Command::Keys(KeysCommand::New(a)) => keys_command::new_key(a),
        Command::Openapi => {
            print!("{}", crate::server::openapi::document());
            Ok(ExitCode::SUCCESS)
        }
    }
}

/// Offline commands end quietly when their output is closed (`befit ... | head`),
/// as command-line tools do, instead of panicking in `println!`. Rust ignores
/// SIGPIPE; the default action is restored for them only: the server keeps it
/// ignored, so a client closing its socket is an error to handle, not an exit.
fn stop_quietly_on_closed_pipe() {
    // SAFETY: setting a signal's disposition to its default before any thread
    // that writes to stdout starts; no handler code runs.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
}

/// Log levels when `RUST_LOG` is not set: befit at INFO; ONNX Runtime and the
/// HNSW library, which report every graph load and drop at INFO, at WARN.
const DEFAULT_LOG_FILTER: &str = "info,ort=warn,hnsw_rs=warn";

fn init_logging(json: bool) {
    use std::io::IsTerminal;
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(DEFAULT_LOG_FILTER));
    // Colour codes only for a person at a terminal, never in a redirected log.
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::stderr().is_terminal())
        .with_writer(std::io::stderr);
    let _ = if json {
        builder.json().try_init()
    } else {
        builder.try_init()
    };
}

/// Where ONNX Runtime is looked for: the flag, then `ORT_DYLIB_PATH`, then the cache.
pub(crate) fn library_search(flag: Option<PathBuf>) -> LibrarySearch {
    let env = std::env::var_os("ORT_DYLIB_PATH")
        .filter(|v| !v.is_empty())
        .map(PathBuf::from);
    LibrarySearch::with_default_roots(flag, env)
}

/// Loads ONNX Runtime or explains how to get it.
pub(crate) fn ort_environment(
    flag: Option<PathBuf>,
) -> anyhow::Result<&'static ort::environment::Environment> {
    let path = library_search(flag).locate()?;
    crate::runtime::environment(&path)
        .with_context(|| format!("using ONNX Runtime at {}", path.display()))
}

//! `befit serve --config FILE.toml`: flag values from a file, so a container
//! platform can hand the service its settings as one mounted file.
//!
//! The file is flat: each key is the long name of a `befit serve` flag, without
//! its dashes (`max-groups = 1024`, `bundle = ["/models/blocks-v1"]`,
//! `log-json = true`); a key means exactly what its flag means, relative paths
//! included (taken from the working directory). The file's values become the
//! flags' defaults, so clap checks them as it checks flags, and the order of
//! precedence is clap's own: command line, then `BEFIT_*` variables, then the
//! file, then the built-in defaults. Unknown keys and bad values are refused,
//! naming the key and the file. `docker/serve.toml` lists every key with its
//! default; a test below keeps it in step with the flags.

use std::error::Error as _;
use std::ffi::OsString;
use std::path::{Path, PathBuf};

use clap::{Arg, ArgAction, Command, CommandFactory, FromArgMatches};

use super::args::Cli;

/// The subcommand that takes a config file.
const SERVE: &str = "serve";
/// The flag naming the file (not itself a key of it).
const CONFIG_FLAG: &str = "config";

/// Why a config file was refused.
#[derive(Debug, thiserror::Error)]
pub enum ConfigFileError {
    #[error("reading the config file {}: {source}", path.display())]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("config file {}: not valid TOML: {source}", path.display())]
    Syntax {
        path: PathBuf,
        #[source]
        source: toml::de::Error,
    },
    #[error("config file {}: unknown key `{key}`: the keys are the long flags of `befit serve --help` without their dashes{hint}", path.display())]
    UnknownKey {
        path: PathBuf,
        key: String,
        hint: String,
    },
    #[error("config file {}: key `{key}`: {reason}", path.display())]
    BadValue {
        path: PathBuf,
        key: String,
        reason: String,
    },
}

/// Why the command line could not be parsed.
#[derive(Debug)]
pub enum ArgsError {
    /// Bad flags, or `--help` / `--version`: clap prints these itself.
    Usage(clap::Error),
    /// The `--config` file was refused.
    Config(ConfigFileError),
}

/// Parses `argv`; when `befit serve` names a config file (`--config` or
/// `BEFIT_CONFIG`), parses again with the file's values as the flags' defaults.
pub fn parse_args(argv: Vec<OsString>) -> Result<Cli, ArgsError> {
    let first = Cli::command()
        .try_get_matches_from(&argv)
        .map_err(ArgsError::Usage)?;
    let file = first
        .subcommand_matches(SERVE)
        .and_then(|m| m.get_one::<PathBuf>(CONFIG_FLAG))
        .cloned();
    let matches = match file {
        None => first,
        Some(path) => with_file_defaults(Cli::command(), &path)
            .map_err(ArgsError::Config)?
            .try_get_matches_from(&argv)
            .map_err(ArgsError::Usage)?,
    };
    Cli::from_arg_matches(&matches).map_err(ArgsError::Usage)
}

/// `cmd` with the values of the config file at `path` as the defaults of
/// `befit serve`'s flags.
fn with_file_defaults(mut cmd: Command, path: &Path) -> Result<Command, ConfigFileError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigFileError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    let table: toml::Table = text.parse().map_err(|source| ConfigFileError::Syntax {
        path: path.to_path_buf(),
        source,
    })?;
    let bad = |key: &str, reason: String| ConfigFileError::BadValue {
        path: path.to_path_buf(),
        key: key.to_string(),
        reason,
    };
    for (key, value) in &table {
        if key == CONFIG_FLAG {
            return Err(bad(
                key,
                "names the config file itself; it cannot be set in one".into(),
            ));
        }
        let Some((arg, on_serve)) = find_key(&cmd, key) else {
            return Err(ConfigFileError::UnknownKey {
                path: path.to_path_buf(),
                key: key.clone(),
                hint: hint(&cmd, key),
            });
        };
        let values = flag_values(&arg, value).map_err(|reason| bad(key, reason))?;
        if !is_switch(&arg) {
            for v in &values {
                check_value(&arg, key, v).map_err(|reason| bad(key, reason))?;
            }
        }
        // clap's builder takes `&'static str` defaults (owned ones need its
        // `string` feature); a config file is read once per process, so its
        // values live as long as the process anyway.
        let values: Vec<&'static str> = values
            .into_iter()
            .map(|v| &*Box::leak(v.into_boxed_str()))
            .collect();
        let id = arg.get_id().clone();
        let set = move |a: Arg| a.default_values(values);
        cmd = if on_serve {
            cmd.mut_subcommand(SERVE, |s| s.mut_arg(id, set))
        } else {
            cmd.mut_arg(id, set)
        };
    }
    Ok(cmd)
}

/// Every key a config file may hold, in `--help` order, with whether it
/// belongs to `serve` (else it is a global flag of the root command).
fn keys(cmd: &Command) -> Vec<(Arg, bool)> {
    let serve: Vec<(Arg, bool)> = cmd
        .find_subcommand(SERVE)
        .map(|s| s.get_arguments().map(|a| (a.clone(), true)).collect())
        .unwrap_or_default();
    let global = cmd
        .get_arguments()
        .filter(|a| a.is_global_set())
        .map(|a| (a.clone(), false));
    serve
        .into_iter()
        .chain(global)
        .filter(|(a, _)| a.get_long().is_some_and(|l| l != CONFIG_FLAG))
        .collect()
}

fn find_key(cmd: &Command, key: &str) -> Option<(Arg, bool)> {
    keys(cmd)
        .into_iter()
        .find(|(a, _)| a.get_long() == Some(key))
}

/// A guess at the key meant, for the two usual slips: `_` for `-`, a plural.
fn hint(cmd: &Command, key: &str) -> String {
    let dashed = key.replace('_', "-");
    let guesses = [dashed.clone(), dashed.trim_end_matches('s').to_string()];
    guesses
        .iter()
        .find(|g| find_key(cmd, g).is_some())
        .map_or_else(String::new, |g| format!(" (did you mean `{g}`?)"))
}

fn is_switch(arg: &Arg) -> bool {
    matches!(arg.get_action(), ArgAction::SetTrue | ArgAction::SetFalse)
}

/// The flag's values as strings clap parses; the TOML types a flag accepts.
fn flag_values(arg: &Arg, value: &toml::Value) -> Result<Vec<String>, String> {
    if is_switch(arg) {
        return match value {
            toml::Value::Boolean(b) => Ok(vec![b.to_string()]),
            other => Err(format!("takes true or false, not {other}")),
        };
    }
    let repeatable = matches!(arg.get_action(), ArgAction::Append);
    let scalar = |v: &toml::Value| match v {
        toml::Value::String(s) => Ok(s.clone()),
        toml::Value::Integer(i) => Ok(i.to_string()),
        toml::Value::Float(f) => Ok(f.to_string()),
        other => Err(format!(
            "takes a {}, not {other}",
            if repeatable {
                "list of strings"
            } else {
                "string or number"
            }
        )),
    };
    match value {
        toml::Value::Array(items) if repeatable => items.iter().map(scalar).collect(),
        toml::Value::Array(_) => Err("takes one value, not a list".into()),
        other => Ok(vec![scalar(other)?]),
    }
}

/// Runs one value through the flag's own parser, so a bad value is refused
/// here, naming the file, rather than later as if it had been typed.
fn check_value(arg: &Arg, key: &str, value: &str) -> Result<(), String> {
    let alone = arg
        .clone()
        .env(None)
        .default_value(None)
        .required(false)
        .global(false);
    let probe = Command::new("config-check").no_binary_name(true).arg(alone);
    match probe.try_get_matches_from([format!("--{key}={value}")]) {
        Ok(_) => Ok(()),
        Err(e) => Err(format!(
            "{value:?}: {}",
            e.source()
                .map_or_else(|| e.kind().to_string(), |s| s.to_string())
        )),
    }
}

#[cfg(test)]
mod tests {
    use std::net::SocketAddr;
    use std::sync::Mutex;

    use super::*;
    use crate::cli::args::{Command as Sub, ServeArgs};

    /// Tests here read and set `BEFIT_*` variables, which are process-wide.
    static ENV: Mutex<()> = Mutex::new(());

    /// Holds the variables for one test, cleared of whatever the shell set.
    fn env_lock() -> std::sync::MutexGuard<'static, ()> {
        let guard = ENV.lock().unwrap_or_else(|e| e.into_inner());
        for name in [
            "BEFIT_CONFIG",
            "BEFIT_LISTEN",
            "BEFIT_DATA_DIR",
            "BEFIT_IMAGE_ROOT",
            "BEFIT_LOG_JSON",
        ] {
            std::env::remove_var(name);
        }
        guard
    }

    fn write(dir: &tempfile::TempDir, text: &str) -> PathBuf {
        let path = dir.path().join("serve.toml");
        std::fs::write(&path, text).unwrap();
        path
    }

    fn parse(args: &[&str]) -> Result<Cli, ArgsError> {
        parse_args(
            std::iter::once("befit")
                .chain(args.iter().copied())
                .map(OsString::from)
                .collect(),
        )
    }

    fn serve_args(cli: Cli) -> ServeArgs {
        match cli.command {
            Sub::Serve(a) => a,
            other => panic!("expected serve, got {other:?}"),
        }
    }

    fn config_error(result: Result<Cli, ArgsError>) -> ConfigFileError {
        match result {
            Err(ArgsError::Config(e)) => e,
            Err(ArgsError::Usage(e)) => panic!("expected a config error, got usage: {e}"),
            Ok(cli) => panic!("expected a config error, got {cli:?}"),
        }
    }

    #[test]
    fn file_values_become_the_flags_values() {
        let _env = env_lock();
        let dir = tempfile::tempdir().unwrap();
        let path = write(
            &dir,
            "bundle = [\"models/a\", \"models/b\"]\nlisten = \"127.0.0.1:9100\"\n\
             max-groups = 7\nworkers = 3\nlog-json = true\nmap = [\"old=m.json\"]\n",
        );
        let cli = parse(&["serve", "--config", path.to_str().unwrap()]).unwrap();
        assert!(cli.log_json);
        let a = serve_args(cli);
        assert_eq!(
            a.bundles,
            [PathBuf::from("models/a"), PathBuf::from("models/b")]
        );
        assert_eq!(a.listen, "127.0.0.1:9100".parse::<SocketAddr>().unwrap());
        assert_eq!(a.max_groups, 7);
        assert_eq!(a.encoders.workers, Some(3));
        assert_eq!(a.maps, ["old=m.json"]);
        // Keys the file leaves out keep the built-in defaults.
        assert_eq!(a.max_images, crate::intake::limits::DEFAULT_MAX_IMAGES);
    }

    #[test]
    fn flags_override_the_file() {
        let _env = env_lock();
        let dir = tempfile::tempdir().unwrap();
        let path = write(
            &dir,
            "bundle = [\"models/a\", \"models/b\"]\nmax-groups = 7\n",
        );
        let a = serve_args(
            parse(&[
                "serve",
                "--max-groups",
                "9",
                "--config",
                path.to_str().unwrap(),
                "--bundle",
                "models/c",
            ])
            .unwrap(),
        );
        assert_eq!(a.max_groups, 9);
        // A repeatable flag given on the command line replaces the file's whole list.
        assert_eq!(a.bundles, [PathBuf::from("models/c")]);
    }

    #[test]
    fn environment_overrides_the_file_and_flags_override_the_environment() {
        let _env = env_lock();
        let dir = tempfile::tempdir().unwrap();
        let path = write(
            &dir,
            "bundle = [\"m\"]\nlisten = \"127.0.0.1:9100\"\ndata-dir = \"from-file\"\n",
        );
        std::env::set_var("BEFIT_LISTEN", "127.0.0.1:9200");
        std::env::set_var("BEFIT_CONFIG", &path);
        let from_env = parse(&["serve"]);
        let from_flag = parse(&["serve", "--listen", "127.0.0.1:9300"]);
        std::env::remove_var("BEFIT_LISTEN");
        std::env::remove_var("BEFIT_CONFIG");
        let a = serve_args(from_env.unwrap());
        assert_eq!(a.listen, "127.0.0.1:9200".parse::<SocketAddr>().unwrap());
        // The file named by BEFIT_CONFIG was read.
        assert_eq!(a.data_dir, PathBuf::from("from-file"));
        let a = serve_args(from_flag.unwrap());
        assert_eq!(a.listen, "127.0.0.1:9300".parse::<SocketAddr>().unwrap());
    }

    #[test]
    fn unknown_keys_are_refused_by_name() {
        let _env = env_lock();
        let dir = tempfile::tempdir().unwrap();
        let path = write(&dir, "bundle = [\"m\"]\nmax_groups = 7\n");
        let e = config_error(parse(&["serve", "--config", path.to_str().unwrap()]));
        let text = e.to_string();
        assert!(matches!(&e, ConfigFileError::UnknownKey { key, .. } if key == "max_groups"));
        assert!(text.contains(&path.display().to_string()), "{text}");
        assert!(text.contains("did you mean `max-groups`?"), "{text}");

        let path = write(&dir, "bundles = [\"m\"]\n");
        let e = config_error(parse(&["serve", "--config", path.to_str().unwrap()]));
        assert!(e.to_string().contains("did you mean `bundle`?"), "{e}");

        let path = write(&dir, "config = \"other.toml\"\n");
        let e = config_error(parse(&["serve", "--config", path.to_str().unwrap()]));
        assert!(matches!(&e, ConfigFileError::BadValue { key, .. } if key == "config"));
    }

    #[test]
    fn bad_values_name_the_key_and_the_file() {
        let _env = env_lock();
        let dir = tempfile::tempdir().unwrap();
        let cases = [
            ("max-groups = \"many\"", "max-groups", "invalid digit"),
            ("max-groups = -3", "max-groups", "invalid digit"),
            ("listen = 7878", "listen", "invalid socket address"),
            ("max-groups = [1, 2]", "max-groups", "not a list"),
            ("bundle = { a = 1 }", "bundle", "takes a list of strings"),
            ("log-json = \"yes\"", "log-json", "takes true or false"),
        ];
        for (line, want_key, want_reason) in cases {
            let path = write(&dir, line);
            let e = config_error(parse(&["serve", "--config", path.to_str().unwrap()]));
            let text = e.to_string();
            assert!(
                matches!(&e, ConfigFileError::BadValue { key, .. } if key == want_key),
                "{line}: {text}"
            );
            assert!(text.contains(&path.display().to_string()), "{text}");
            assert!(text.contains(want_reason), "{line}: {text}");
        }
        let path = write(&dir, "max-groups = ");
        let e = config_error(parse(&["serve", "--config", path.to_str().unwrap()]));
        assert!(matches!(e, ConfigFileError::Syntax { .. }), "{e}");
        let missing = dir.path().join("absent.toml");
        let e = config_error(parse(&["serve", "--config", missing.to_str().unwrap()]));
        assert!(matches!(e, ConfigFileError::Read { .. }), "{e}");
    }

    /// The commented defaults of `docker/serve.toml`, as the flags define them:
    /// the help line, then `# key = default` (a bare placeholder when the flag
    /// has no default).
    fn reference_block() -> String {
        let cmd = Cli::command();
        let mut out = String::new();
        for (arg, _) in keys(&cmd) {
            let key = arg.get_long().unwrap();
            let help = arg.get_help().map(|h| h.to_string()).unwrap_or_default();
            let defaults: Vec<String> = arg
                .get_default_values()
                .iter()
                .map(|v| toml_literal(&v.to_string_lossy()))
                .collect();
            let value = match (defaults.as_slice(), arg.get_action()) {
                ([], ArgAction::Append) => "[]".to_string(),
                ([], ArgAction::SetTrue) => "false".to_string(),
                ([], _) => "(no default)".to_string(),
                ([one], ArgAction::Append) => format!("[{one}]"),
                ([one], _) => one.clone(),
                (many, _) => format!("[{}]", many.join(", ")),
            };
            out.push_str(&format!("# {help}\n# {key} = {value}\n"));
        }
        out
    }

    fn toml_literal(v: &str) -> String {
        if v.parse::<f64>().is_ok() || v == "true" || v == "false" {
            v.to_string()
        } else {
            format!("{v:?}")
        }
    }

    #[test]
    fn the_image_config_documents_every_key_with_its_default() {
        let file = concat!(env!("CARGO_MANIFEST_DIR"), "/docker/serve.toml");
        let text = std::fs::read_to_string(file).unwrap();
        let want = reference_block();
        assert!(
            text.contains(&want),
            "docker/serve.toml must hold this block, generated from the flags:\n{want}"
        );
        // The file the image ships parses and names a bundle.
        let _env = env_lock();
        let a = serve_args(parse(&["serve", "--config", file]).unwrap());
        assert_eq!(a.bundles, [PathBuf::from("/models/blocks-v1")]);
        assert_eq!(a.data_dir, PathBuf::from("/data"));
    }
}

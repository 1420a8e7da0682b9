//! `befit keys new`: a new API key for `befit serve --keys`.

use std::process::ExitCode;

use super::args::KeysNewArgs;
use crate::server::access::keys::add_key;

/// Makes the key, appends its hash to the file, and prints the token (the
/// only time it is shown) on standard output, the details on standard error.
pub fn new_key(a: KeysNewArgs) -> anyhow::Result<ExitCode> {
    let key = add_key(&a.keys, a.id.as_deref(), &a.scopes)?;
    let scopes: Vec<&str> = key.entry.scopes.iter().map(|s| s.as_str()).collect();
    eprintln!(
        "befit: key {:?} with scopes {} added to {}; its token follows and is not stored: keep it now",
        key.entry.id,
        scopes.join(","),
        a.keys.display()
    );
    println!("{}", key.token);
    Ok(ExitCode::SUCCESS)
}

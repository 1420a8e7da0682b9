//! API keys: the keys file (hashes only), scopes, making new tokens, and
//! checking a presented token in constant time.
//!
//! A token is `bft_` followed by 32 bytes from the operating system's random
//! source in URL-safe base64 (256 bits, so a plain SHA-256 of it is enough to
//! store: nothing is left to guess that a slow password hash would protect).
//! The file has one key a line, `ID SCOPES sha256:HEX`, where SCOPES is a
//! comma-separated list of [`Scope`] names; `#` starts a comment line.

use std::fmt;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::str::FromStr;

use base64::Engine as _;
use sha2::{Digest, Sha256};
use subtle::ConstantTimeEq;

/// What a token starts with, so a leaked one is recognisable in a scan.
pub const TOKEN_PREFIX: &str = "bft_";
/// Random bytes in a token: 256 bits.
const TOKEN_BYTES: usize = 32;
/// Longest key id, so ids stay readable in logs.
const MAX_ID_LEN: usize = 64;

/// What a key may do. Every route that does work needs one of these.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Scope {
    /// Images, vectors, rewards, neighbours, bank statistics.
    Scoring,
    /// Appending captions to the bank.
    BankWrite,
    /// Calibration and drift.
    Statistics,
    /// Saving reward maps, and anything later that changes the server.
    Admin,
}

impl Scope {
    pub const ALL: [Scope; 4] = [
        Scope::Scoring,
        Scope::BankWrite,
        Scope::Statistics,
        Scope::Admin,
    ];

    /// The scope as the keys file and `befit keys new --scope` spell it.
    pub fn as_str(self) -> &'static str {
        match self {
            Scope::Scoring => "scoring",
            Scope::BankWrite => "bank-write",
            Scope::Statistics => "statistics",
            Scope::Admin => "admin",
        }
    }
}

impl fmt::Display for Scope {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl FromStr for Scope {
    type Err = String;
    fn from_str(s: &str) -> Result<Scope, String> {
        Scope::ALL
            .into_iter()
            .find(|scope| scope.as_str() == s)
            .ok_or_else(|| {
                let names: Vec<&str> = Scope::ALL.iter().map(|s| s.as_str()).collect();
                format!("unknown scope {s:?}; the scopes are {}", names.join(", "))
            })
    }
}

/// One key of the file: its id, scopes and the SHA-256 of its token.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct KeyEntry {
    pub id: String,
    pub scopes: Vec<Scope>,
    hash: [u8; 32],
}

impl KeyEntry {
    pub fn allows(&self, scope: Scope) -> bool {
        self.scopes.contains(&scope)
    }

    /// The entry's line in the keys file.
    pub fn line(&self) -> String {
        let scopes: Vec<&str> = self.scopes.iter().map(|s| s.as_str()).collect();
        format!(
            "{} {} sha256:{}",
            self.id,
            scopes.join(","),
            hex::encode(self.hash)
        )
    }
}

/// Why a keys file, a key id or a scope list was refused.
#[derive(Debug, thiserror::Error)]
pub enum KeysError {
    #[error("reading the keys file {}: {source}", path.display())]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("writing the keys file {}: {source}", path.display())]
    Write {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("keys file {}, line {line}: {reason} (a line is `ID SCOPES sha256:HEX`, as `befit keys new` writes it)", path.display())]
    Line {
        path: PathBuf,
        line: usize,
        reason: String,
    },
    #[error("keys file {} holds no key; add one with `befit keys new --keys FILE --scope ...`", path.display())]
    Empty { path: PathBuf },
    #[error("key id {0:?}: use 1 to 64 letters, digits, '.', '_' or '-'")]
    BadId(String),
    #[error("key id {id:?} is already in {}; pick another --id", path.display())]
    DuplicateId { path: PathBuf, id: String },
    #[error("give at least one --scope ({})", scope_names())]
    NoScope,
    #[error("the operating system's random source failed: {0}")]
    Random(String),
}

fn scope_names() -> String {
    Scope::ALL
        .iter()
        .map(|s| s.as_str())
        .collect::<Vec<_>>()
        .join(", ")
}

fn valid_id(id: &str) -> bool {
    !id.is_empty()
        && id.len() <= MAX_ID_LEN
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"._-".contains(&b))
}

fn sha256(token: &str) -> [u8; 32] {
    Sha256::digest(token.as_bytes()).into()
}

/// The keys a server accepts.
#[derive(Debug, Clone, Default)]
pub struct KeySet {
    entries: Vec<KeyEntry>,
}

impl KeySet {
    /// Reads a keys file; an empty one is refused (it would lock every route).
    pub fn load(path: &Path) -> Result<KeySet, KeysError> {
        let text = std::fs::read_to_string(path).map_err(|source| KeysError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        let set = KeySet::parse(&text, path)?;
        if set.entries.is_empty() {
            return Err(KeysError::Empty {
                path: path.to_path_buf(),
            });
        }
        Ok(set)
    }

    /// Reads a keys file that may be empty or missing (for appending to it).
    fn read_existing(path: &Path) -> Result<KeySet, KeysError> {
        let text = match std::fs::read_to_string(path) {
            Ok(text) => text,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => String::new(),
            Err(source) => {
                return Err(KeysError::Read {
                    path: path.to_path_buf(),
                    source,
                })
            }
        };
        KeySet::parse(&text, path)
    }

    /// Parses the text of a keys file (`path` only names it in errors).
    pub fn parse(text: &str, path: &Path) -> Result<KeySet, KeysError> {
        let mut entries: Vec<KeyEntry> = Vec::new();
        for (n, raw) in text.lines().enumerate() {
            let line = raw.trim();
            if line.is_empty() || line.starts_with('#') {
                continue;
            }
            let bad = |reason: String| KeysError::Line {
                path: path.to_path_buf(),
                line: n + 1,
                reason,
            };
            let parts: Vec<&str> = line.split_whitespace().collect();
            let [id, scopes, hash] = parts[..] else {
                return Err(bad(format!("{} fields, not 3", parts.len())));
            };
            if !valid_id(id) {
                return Err(bad(KeysError::BadId(id.into()).to_string()));
            }
            if entries.iter().any(|e| e.id == id) {
                return Err(bad(format!("key id {id:?} appears twice")));
            }
            let scopes = scopes
                .split(',')
                .map(Scope::from_str)
                .collect::<Result<Vec<_>, _>>()
                .map_err(bad)?;
            let hex_digits = hash
                .strip_prefix("sha256:")
                .ok_or_else(|| bad("the hash must start with `sha256:`".into()))?;
            let mut digest = [0u8; 32];
            hex::decode_to_slice(hex_digits, &mut digest)
                .map_err(|_| bad("the hash must be 64 hex digits after `sha256:`".into()))?;
            entries.push(KeyEntry {
                id: id.to_string(),
                scopes,
                hash: digest,
            });
        }
        Ok(KeySet { entries })
    }

    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }

    pub fn entries(&self) -> &[KeyEntry] {
        &self.entries
    }

    /// The key whose token this is. Every stored hash is compared, each in
    /// constant time, so the time taken says nothing about which bytes or
    /// which key came close.
    pub fn verify(&self, token: &str) -> Option<&KeyEntry> {
        let presented = sha256(token);
        let mut found = None;
        for entry in &self.entries {
            if bool::from(entry.hash.ct_eq(&presented)) {
                found = Some(entry);
            }
        }
        found
    }
}

/// A new key: the token (shown once) and the line stored for it.
#[derive(Debug)]
pub struct NewKey {
    pub token: String,
    pub entry: KeyEntry,
}

/// Makes a key with `scopes` and appends its hash to the keys file at `path`
/// (created, readable by its owner only, when missing). `id` defaults to 8
/// random hex digits.
pub fn add_key(path: &Path, id: Option<&str>, scopes: &[Scope]) -> Result<NewKey, KeysError> {
    if scopes.is_empty() {
        return Err(KeysError::NoScope);
    }
    let existing = KeySet::read_existing(path)?;
    let id = match id {
        Some(id) if !valid_id(id) => return Err(KeysError::BadId(id.into())),
        Some(id) => id.to_string(),
        None => hex::encode(random_bytes::<4>()?),
    };
    if existing.entries.iter().any(|e| e.id == id) {
        return Err(KeysError::DuplicateId {
            path: path.to_path_buf(),
            id,
        });
    }
    let token = format!(
        "{TOKEN_PREFIX}{}",
        base64::engine::general_purpose::URL_SAFE_NO_PAD.encode(random_bytes::<TOKEN_BYTES>()?)
    );
    let mut scopes = scopes.to_vec();
    scopes.sort();
    scopes.dedup();
    let entry = KeyEntry {
        id,
        scopes,
        hash: sha256(&token),
    };
    let write = |source| KeysError::Write {
        path: path.to_path_buf(),
        source,
    };
    let mut options = std::fs::OpenOptions::new();
    options.create(true).append(true);
    #[cfg(unix)]
    std::os::unix::fs::OpenOptionsExt::mode(&mut options, 0o600);
    let mut file = options.open(path).map_err(write)?;
    writeln!(file, "{}", entry.line()).map_err(write)?;
    file.sync_all().map_err(write)?;
    Ok(NewKey { token, entry })
}

fn random_bytes<const N: usize>() -> Result<[u8; N], KeysError> {
    let mut bytes = [0u8; N];
    getrandom::fill(&mut bytes).map_err(|e| KeysError::Random(e.to_string()))?;
    Ok(bytes)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_new_key_verifies_and_its_file_holds_only_the_hash() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("keys");
        let a = add_key(&path, Some("trainer-1"), &[Scope::Scoring]).unwrap();
        let b = add_key(&path, None, &[Scope::Admin, Scope::BankWrite, Scope::Admin]).unwrap();
        assert!(a.token.starts_with(TOKEN_PREFIX));
        // 32 bytes in unpadded base64 are ceil(32 * 8 / 6) = 43 characters (RFC 4648 §5).
        assert_eq!(a.token.len(), TOKEN_PREFIX.len() + 43);
        assert_ne!(a.token, b.token);
        assert_eq!(b.entry.id.len(), 8);
        assert_eq!(b.entry.scopes, [Scope::BankWrite, Scope::Admin]);
        let text = std::fs::read_to_string(&path).unwrap();
        assert!(!text.contains(&a.token[TOKEN_PREFIX.len()..]), "{text}");
        // The stored hash is SHA-256 of the token, as `sha256sum` (FIPS 180-4) computes it.
        let want = hex::encode(Sha256::digest(a.token.as_bytes()));
        assert!(
            text.contains(&format!("trainer-1 scoring sha256:{want}")),
            "{text}"
        );
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(&path).unwrap().permissions().mode();
            assert_eq!(mode & 0o777, 0o600);
        }
        let set = KeySet::load(&path).unwrap();
        assert_eq!(set.verify(&a.token).unwrap().id, "trainer-1");
        assert_eq!(set.verify(&b.token).unwrap().id, b.entry.id);
        assert!(set.verify("bft_wrong").is_none());
        assert!(set.verify("").is_none());
        let e = add_key(&path, Some("trainer-1"), &[Scope::Scoring]).unwrap_err();
        assert!(matches!(e, KeysError::DuplicateId { .. }), "{e}");
        assert!(matches!(
            add_key(&path, Some("a b"), &[Scope::Scoring]),
            Err(KeysError::BadId(_))
        ));
        assert!(matches!(add_key(&path, None, &[]), Err(KeysError::NoScope)));
    }

    #[test]
    fn a_known_hash_matches_its_token() {
        // sha256("abc") from FIPS 180-2, appendix B.1.
        let text = "# comment\n\nk1 scoring,statistics sha256:ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad\n";
        let set = KeySet::parse(text, Path::new("keys")).unwrap();
        let key = set.verify("abc").unwrap();
        assert_eq!(key.id, "k1");
        assert!(key.allows(Scope::Statistics) && !key.allows(Scope::Admin));
        assert!(set.verify("abd").is_none());
    }

    #[test]
    fn bad_lines_are_refused_with_their_number() {
        let hash = format!("sha256:{}", "0".repeat(64));
        let cases = [
            ("k1 scoring".to_string(), "2 fields"),
            (format!("k1 reading {hash}"), "unknown scope \"reading\""),
            ("k1 scoring md5:00".to_string(), "must start with `sha256:`"),
            ("k1 scoring sha256:zz".to_string(), "64 hex digits"),
            (format!("k/1 scoring {hash}"), "key id"),
            (
                format!("k1 scoring {hash}\nk1 admin {hash}"),
                "appears twice",
            ),
        ];
        for (text, want) in cases {
            let e = KeySet::parse(&format!("# keys\n{text}\n"), Path::new("keys")).unwrap_err();
            let message = e.to_string();
            assert!(message.contains(want), "{text}: {message}");
            assert!(
                message.contains("line 2") || message.contains("line 3"),
                "{message}"
            );
        }
        let dir = tempfile::tempdir().unwrap();
        let empty = dir.path().join("empty");
        std::fs::write(&empty, "# nothing yet\n").unwrap();
        assert!(matches!(KeySet::load(&empty), Err(KeysError::Empty { .. })));
        assert!(matches!(
            KeySet::load(&dir.path().join("absent")),
            Err(KeysError::Read { .. })
        ));
    }
}

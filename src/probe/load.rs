//! Reading a probe set from JSON Lines, one object per line:
//!
//! ```json
//! {"image": "images/00000.png", "captions": ["a red square"],
//!  "contrasts": [{"caption": "a blue square", "changed": "colour", "from": 0}],
//!  "scene": {"ignored": true}}
//! ```
//!
//! `image` is a path relative to the JSONL file, or `{"path": ...}`, or
//! `{"id": ...}` for an image a store knows. Every bad row is reported with
//! its 1-based line, all at once, so a probe set is fixed in one pass.

use std::path::{Path, PathBuf};

use serde::Deserialize;

use super::set::{Contrast, ImageSource, ProbeRow, ProbeSet};
use super::{ProbeError, RowIssue, RowProblem};

/// How strictly a probe set is read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LoadOptions {
    /// Skip bad rows (returned as warnings) instead of failing.
    pub skip_bad: bool,
    /// Check that every image path names an existing file. Off when the
    /// caller resolves paths itself (e.g. under a server's image root, with
    /// an empty `base` so paths stay as written) in its [`ProbeEncoder`].
    ///
    /// [`ProbeEncoder`]: super::ProbeEncoder
    pub check_files: bool,
}

impl Default for LoadOptions {
    fn default() -> Self {
        LoadOptions {
            skip_bad: false,
            check_files: true,
        }
    }
}

/// A probe set and the rows skipped on the way (empty unless `skip_bad`).
#[derive(Debug, Clone)]
pub struct LoadedProbe {
    /// The usable rows.
    pub set: ProbeSet,
    /// Rows left out, with why.
    pub skipped: Vec<RowIssue>,
}

#[derive(Deserialize)]
struct RawRow {
    /// Read as a value and interpreted by [`image_ref`], whose messages say
    /// more than serde's "did not match any variant".
    image: serde_json::Value,
    captions: Vec<String>,
    #[serde(default)]
    contrasts: Vec<RawContrast>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawContrast {
    caption: String,
    changed: String,
    from: usize,
}

impl ProbeSet {
    /// Reads the JSON Lines file at `path`; image paths are relative to its folder.
    pub fn load(path: &Path, options: &LoadOptions) -> Result<LoadedProbe, ProbeError> {
        let bytes = std::fs::read(path).map_err(|source| ProbeError::Read {
            path: path.to_path_buf(),
            source,
        })?;
        let base = path.parent().unwrap_or(Path::new(""));
        Self::parse(&bytes, base, &path.display().to_string(), options)
    }

    /// Parses JSON Lines `bytes`; image paths are joined to `base`; `source`
    /// names the set in messages. Blank lines are skipped.
    pub fn parse(
        bytes: &[u8],
        base: &Path,
        source: &str,
        options: &LoadOptions,
    ) -> Result<LoadedProbe, ProbeError> {
        let mut rows = Vec::new();
        let mut issues = Vec::new();
        for (index, raw) in bytes.split(|&b| b == b'\n').enumerate() {
            let line = index + 1;
            let raw = raw.strip_suffix(b"\r").unwrap_or(raw);
            if raw.iter().all(u8::is_ascii_whitespace) {
                continue;
            }
            let parsed = std::str::from_utf8(raw)
                .map_err(|_| RowProblem::InvalidJson("the line is not UTF-8".into()))
                .and_then(|text| {
                    serde_json::from_str::<RawRow>(text)
                        .map_err(|e| RowProblem::InvalidJson(e.to_string()))
                })
                .and_then(|row| validate(row, line, base, options));
            match parsed {
                Ok(row) => rows.push(row),
                Err(problem) => issues.push(RowIssue { line, problem }),
            }
        }
        finish(source, rows, issues, options)
    }

    /// Builds a probe set from rows already parsed as JSON values (a request
    /// body's array); row `i` is reported as line `i + 1`.
    pub fn from_values(
        values: Vec<serde_json::Value>,
        base: &Path,
        source: &str,
        options: &LoadOptions,
    ) -> Result<LoadedProbe, ProbeError> {
        let mut rows = Vec::new();
        let mut issues = Vec::new();
        for (index, value) in values.into_iter().enumerate() {
            let line = index + 1;
            let parsed = serde_json::from_value::<RawRow>(value)
                .map_err(|e| RowProblem::InvalidJson(e.to_string()))
                .and_then(|row| validate(row, line, base, options));
            match parsed {
                Ok(row) => rows.push(row),
                Err(problem) => issues.push(RowIssue { line, problem }),
            }
        }
        finish(source, rows, issues, options)
    }
}

fn finish(
    source: &str,
    rows: Vec<ProbeRow>,
    issues: Vec<RowIssue>,
    options: &LoadOptions,
) -> Result<LoadedProbe, ProbeError> {
    if !issues.is_empty() && !options.skip_bad {
        return Err(ProbeError::bad_rows(source, issues));
    }
    if rows.is_empty() {
        return Err(ProbeError::Empty {
            source_name: source.to_string(),
            skipped: issues.len(),
        });
    }
    Ok(LoadedProbe {
        set: ProbeSet {
            source: source.to_string(),
            rows,
        },
        skipped: issues,
    })
}

fn validate(
    raw: RawRow,
    line: usize,
    base: &Path,
    options: &LoadOptions,
) -> Result<ProbeRow, RowProblem> {
    let (image, image_name) = image_ref(&raw.image, base, options)?;
    if raw.captions.is_empty() {
        return Err(RowProblem::NoCaptions);
    }
    if let Some(index) = raw.captions.iter().position(|c| c.trim().is_empty()) {
        return Err(RowProblem::EmptyCaption { index });
    }
    let mut contrasts = Vec::with_capacity(raw.contrasts.len());
    for (index, c) in raw.contrasts.into_iter().enumerate() {
        if c.caption.trim().is_empty() {
            return Err(RowProblem::EmptyContrast { index });
        }
        if c.changed.trim().is_empty() {
            return Err(RowProblem::EmptyLabel { index });
        }
        if c.from >= raw.captions.len() {
            return Err(RowProblem::FromOutOfRange {
                index,
                from: c.from,
                captions: raw.captions.len(),
            });
        }
        contrasts.push(Contrast {
            caption: c.caption,
            changed: c.changed,
            from: c.from,
        });
    }
    Ok(ProbeRow {
        line,
        image,
        image_name,
        captions: raw.captions,
        contrasts,
    })
}

fn image_ref(
    value: &serde_json::Value,
    base: &Path,
    options: &LoadOptions,
) -> Result<(ImageSource, String), RowProblem> {
    use serde_json::Value;
    const SHAPE: &str = "\"image\" must be a path string, {\"path\": \"...\"} or {\"id\": \"...\"}";
    let bad = |why: String| Err(RowProblem::BadImage(why));
    match value {
        Value::String(p) => path_ref(p, base, options),
        Value::Object(map) => {
            if map.contains_key("base64") {
                return bad("images in a probe set are named by path or id, not base64; register the image (POST /v1/images) and use its id".into());
            }
            if let Some(key) = map.keys().find(|k| *k != "id" && *k != "path") {
                return bad(format!("{SHAPE}; unknown field \"{key}\""));
            }
            match (map.get("id"), map.get("path")) {
                (Some(Value::String(id)), None) if !id.trim().is_empty() => {
                    match ImageSource::id(id, "image") {
                        Ok(source) => Ok((source, id.clone())),
                        Err(e) => bad(e.problem.to_string()),
                    }
                }
                (None, Some(Value::String(p))) => path_ref(p, base, options),
                (Some(_), Some(_)) => bad(format!("{SHAPE}, not both")),
                _ => bad(format!("{SHAPE}, with a non-empty string")),
            }
        }
        _ => bad(SHAPE.into()),
    }
}

fn path_ref(
    p: &str,
    base: &Path,
    options: &LoadOptions,
) -> Result<(ImageSource, String), RowProblem> {
    if p.trim().is_empty() {
        return Err(RowProblem::BadImage("\"image\" is an empty path".into()));
    }
    let resolved: PathBuf = base.join(p);
    if options.check_files && !resolved.is_file() {
        return Err(RowProblem::MissingImage(resolved));
    }
    Ok((ImageSource::Path(resolved), p.to_string()))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(text: &str, options: &LoadOptions) -> Result<LoadedProbe, ProbeError> {
        ProbeSet::parse(text.as_bytes(), Path::new("/probe"), "probe.jsonl", options)
    }

    fn no_files() -> LoadOptions {
        LoadOptions {
            check_files: false,
            ..Default::default()
        }
    }

    #[test]
    fn a_good_file_keeps_lines_and_resolves_paths() {
        let text = concat!(
            r#"{"image": "images/0.png", "captions": ["a red square"], "scene": {"x": 1}}"#,
            "\n\n",
            r#"{"image": {"id": "abcdef0123456789abcdef0123456789abcdef0123456789abcdef0123456789"}, "captions": ["a", "b"], "contrasts": [{"caption": "c", "changed": "colour", "from": 1}]}"#,
            "\r\n"
        );
        let loaded = parse(text, &no_files()).unwrap();
        let rows = &loaded.set.rows;
        assert_eq!(rows.len(), 2);
        assert_eq!(rows[0].line, 1);
        assert_eq!(
            rows[0].image,
            ImageSource::Path(PathBuf::from("/probe/images/0.png"))
        );
        assert_eq!(rows[0].image_name, "images/0.png");
        assert_eq!(rows[1].line, 3);
        assert_eq!(
            rows[1].image,
            ImageSource::Id(
                "abcdef0123456789abcdef0123456789abcdef0123456789abcdef0123456789".into()
            )
        );
        assert_eq!(rows[1].contrasts[0].from, 1);
        assert_eq!(loaded.set.caption_count(), 3);
        assert_eq!(loaded.set.contrast_count(), 1);
    }

    #[test]
    fn every_bad_row_is_listed_with_its_line() {
        let text = [
            r#"{"image": "a.png", "captions": ["ok"]}"#,
            r#"{"image": "b.png", "captions": []}"#,
            r#"not json"#,
            r#"{"image": "c.png", "captions": ["x", ""]}"#,
            r#"{"image": "d.png", "captions": ["x"], "contrasts": [{"caption": "y", "changed": "size", "from": 3}]}"#,
            r#"{"image": "e.png", "captions": ["x"], "contrasts": [{"caption": " ", "changed": "size", "from": 0}]}"#,
            r#"{"image": {"base64": "AAAA"}, "captions": ["x"]}"#,
        ]
        .join("\n");
        let err = parse(&text, &no_files()).unwrap_err();
        let ProbeError::BadRows { issues, total, .. } = &err else {
            panic!("{err}");
        };
        assert_eq!(*total, 6);
        let lines: Vec<usize> = issues.iter().map(|i| i.line).collect();
        assert_eq!(lines, vec![2, 3, 4, 5, 6, 7]);
        assert!(matches!(
            issues[3].problem,
            RowProblem::FromOutOfRange {
                from: 3,
                captions: 1,
                ..
            }
        ));
        let message = err.to_string();
        assert!(message.contains("line 2: "), "{message}");
        assert!(message.contains("skip"), "{message}");
    }

    #[test]
    fn skip_bad_keeps_good_rows_and_warns() {
        let text = "{\"image\": \"a.png\", \"captions\": [\"ok\"]}\n{\"image\": \"b.png\", \"captions\": []}\n";
        let loaded = parse(
            text,
            &LoadOptions {
                skip_bad: true,
                check_files: false,
            },
        )
        .unwrap();
        assert_eq!(loaded.set.rows.len(), 1);
        assert_eq!(loaded.skipped.len(), 1);
        assert_eq!(loaded.skipped[0].line, 2);
        assert!(matches!(loaded.skipped[0].problem, RowProblem::NoCaptions));
    }

    #[test]
    fn missing_files_are_bad_rows() {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("here.png"), b"png").unwrap();
        let file = dir.path().join("probe.jsonl");
        std::fs::write(
            &file,
            "{\"image\": \"here.png\", \"captions\": [\"a\"]}\n{\"image\": \"gone.png\", \"captions\": [\"b\"]}\n",
        )
        .unwrap();
        let err = ProbeSet::load(&file, &LoadOptions::default()).unwrap_err();
        let ProbeError::BadRows { issues, .. } = &err else {
            panic!("{err}");
        };
        assert_eq!(issues.len(), 1);
        assert_eq!(issues[0].line, 2);
        assert!(
            matches!(&issues[0].problem, RowProblem::MissingImage(p) if p.ends_with("gone.png"))
        );
    }

    #[test]
    fn an_all_bad_file_skipped_is_empty() {
        let err = parse(
            "{\"image\": \"a.png\", \"captions\": []}",
            &LoadOptions {
                skip_bad: true,
                check_files: false,
            },
        )
        .unwrap_err();
        assert!(matches!(err, ProbeError::Empty { skipped: 1, .. }));
    }

    #[test]
    fn the_list_of_bad_rows_is_capped() {
        let text = vec!["{}"; 500].join("\n");
        let err = parse(&text, &no_files()).unwrap_err();
        let ProbeError::BadRows { issues, total, .. } = &err else {
            panic!("{err}");
        };
        assert_eq!(*total, 500);
        assert_eq!(issues.len(), super::super::MAX_LISTED_BAD_ROWS);
        assert!(err.to_string().contains("and 450 more"), "{err}");
    }

    #[test]
    fn values_from_a_request_count_rows_from_one() {
        let values = vec![
            serde_json::json!({"image": {"id": "a".repeat(64)}, "captions": ["a"]}),
            serde_json::json!({"image": {"id": "b".repeat(64)}, "captions": [""]}),
            serde_json::json!({"image": {"id": "not-hex"}, "captions": ["a"]}),
        ];
        let err = ProbeSet::from_values(values, Path::new(""), "request", &no_files()).unwrap_err();
        let ProbeError::BadRows { issues, .. } = &err else {
            panic!("{err}");
        };
        assert_eq!(issues[0].line, 2);
        // An id that is not a content id is the third row's fault, found before any encoder work.
        assert_eq!(issues[1].line, 3);
        assert!(
            issues[1].to_string().contains("not an image id"),
            "{}",
            issues[1]
        );
    }
}

//! Where a report's numbers come from: the bundles (id and digest), the
//! probe set (sha256 and row count), befit's version and the time it was
//! written, printed at the top of every report.

use std::fmt::Write as _;
use std::time::{SystemTime, UNIX_EPOCH};

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use super::page::{table, td_text};
use crate::stats::svg::escape;
use crate::stats::MapBundle;

/// What a report was computed from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// The bundles, in the report's order (old, then new, for a drift).
    pub bundles: Vec<MapBundle>,
    /// Lowercase hex sha256 of the probe set: the file's bytes (CLI), or the
    /// request's `probe` rows as JSON Lines, one compact JSON object per line
    /// each ended by a newline (server).
    pub probe_sha256: String,
    /// Rows of the probe set as given, before any were skipped.
    pub probe_rows: usize,
    /// befit's version.
    pub befit_version: String,
    /// When the report was written, RFC 3339 in UTC.
    pub generated_at: String,
}

impl Provenance {
    /// Provenance stamped now with this befit's version.
    pub fn now(bundles: Vec<MapBundle>, probe_sha256: String, probe_rows: usize) -> Self {
        let seconds = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .map_or(0, |d| d.as_secs());
        Provenance {
            bundles,
            probe_sha256,
            probe_rows,
            befit_version: env!("CARGO_PKG_VERSION").to_string(),
            generated_at: rfc3339_utc(seconds),
        }
    }

    /// The provenance table, escaped.
    pub(super) fn html(&self) -> String {
        let mut rows: Vec<Vec<String>> = self
            .bundles
            .iter()
            .map(|b| {
                vec![
                    td_text("bundle"),
                    format!(
                        "<td class=\"text\">{} <code>{}</code></td>",
                        escape(&b.id),
                        escape(&b.digest)
                    ),
                ]
            })
            .collect();
        rows.push(vec![
            td_text("probe set"),
            format!(
                "<td class=\"text\">{} rows, sha256 <code>{}</code></td>",
                self.probe_rows,
                escape(&self.probe_sha256)
            ),
        ]);
        rows.push(vec![
            td_text("written by"),
            td_text(&format!(
                "befit {} at {}",
                self.befit_version, self.generated_at
            )),
        ]);
        let mut out =
            String::from("<details class=\"provenance\" open><summary>Provenance</summary>");
        out.push_str(&table(&["", ""], &rows));
        let _ = write!(out, "</details>");
        out
    }
}

/// Lowercase hex sha256 of `bytes`.
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex::encode(Sha256::digest(bytes))
}

/// Seconds since the Unix epoch as `YYYY-MM-DDTHH:MM:SSZ`.
///
/// Days to a civil date by Howard Hinnant's `civil_from_days` algorithm
/// ("chrono-Compatible Low-Level Date Algorithms", 2013), proleptic Gregorian.
pub fn rfc3339_utc(seconds: u64) -> String {
    let days = (seconds / 86_400) as i64;
    let rest = seconds % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        rest / 3600,
        rest / 60 % 60,
        rest % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dates_match_known_epochs() {
        // `date -u -d @0`, `@951782400` (a leap day) and `@1700000000`.
        assert_eq!(rfc3339_utc(0), "1970-01-01T00:00:00Z");
        assert_eq!(rfc3339_utc(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(rfc3339_utc(1_700_000_000), "2023-11-14T22:13:20Z");
    }

    #[test]
    fn sha256_of_abc_is_the_fips_example() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        assert_eq!(
            sha256_hex(b"abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }
}

//! What every report page shares: the frame (doctype, inline style sheet),
//! tables, number formatting and escaping of every text cell.

use std::fmt::Write as _;

use crate::stats::svg::escape;

/// The one style sheet, inline in every page.
const STYLE: &str = "body{font-family:system-ui,sans-serif;margin:2em auto;max-width:60em;color:#222;padding:0 1em}\
h1{font-size:1.5em}h2{font-size:1.2em;margin-top:2em;border-bottom:1px solid #ccc}\
table{border-collapse:collapse;margin:.5em 0}td,th{padding:.2em .6em;border-bottom:1px solid #eee;text-align:right}\
th:first-child,td:first-child{text-align:left}td.text{text-align:left;max-width:28em}\
.tick{font-size:10px;fill:#444}.label{font-size:12px;fill:#222}\
.legend span{margin-right:1.2em;font-size:.9em}.legend i{display:inline-block;width:.9em;height:.9em;margin-right:.3em;vertical-align:-.1em}\
.note{color:#555;font-size:.9em}code{font-size:.9em}";

/// A figure with four decimals, or "n/a".
pub(super) fn number(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.4}")
    } else {
        "n/a".into()
    }
}

/// An optional figure, or "n/a".
pub(super) fn maybe(v: Option<f64>) -> String {
    v.map_or_else(|| "n/a".into(), number)
}

/// A whole page: title escaped, style inline, `body` already escaped.
pub(super) fn page(title: &str, body: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>{}</title><style>{STYLE}</style></head><body>\n{body}\n</body></html>\n",
        escape(title)
    )
}

/// A table; `rows` are already-escaped cells.
pub(super) fn table(headers: &[&str], rows: &[Vec<String>]) -> String {
    let mut out = String::from("<table><tr>");
    for h in headers {
        let _ = write!(out, "<th>{}</th>", escape(h));
    }
    out.push_str("</tr>");
    for row in rows {
        out.push_str("<tr>");
        for cell in row {
            out.push_str(cell);
        }
        out.push_str("</tr>");
    }
    out.push_str("</table>");
    out
}

/// A number cell (already formatted).
pub(super) fn td(v: impl AsRef<str>) -> String {
    format!("<td>{}</td>", v.as_ref())
}

/// A text cell, escaped.
pub(super) fn td_text(v: &str) -> String {
    format!("<td class=\"text\">{}</td>", escape(v))
}

//! What every report page shares: the frame (doctype, inline style sheet),
//! tables, number formatting and escaping of every text cell.
//!
//! Built with `format!` rather than a compile-time template engine after
//! trying `askama` 0.16 on the same table (2,000 rows of hostile captions):
//! it rendered in 0.17 ms against 0.72 ms here, and added 7.5 s to a clean
//! release build of its own on this 2-core machine. A report takes seconds of
//! statistics before either runs, and most of a page is SVG geometry
//! (`crate::stats::svg`), which a template would only wrap. Escaping does not
//! rest on care at each call: text reaches a page only through [`td_text`],
//! [`page`]'s title and `svg::escape`, and `report::tests` feeds captions,
//! ids and digests with markup through both reports.

use std::fmt::Write as _;

use crate::stats::svg::escape;

/// The one style sheet, inline in every page.
const STYLE: &str = "body{font-family:system-ui,sans-serif;margin:2em auto;max-width:60em;color:#222;padding:0 1em}\
h1{font-size:1.5em}h2{font-size:1.2em;margin-top:2em;border-bottom:1px solid #ccc}\
table{border-collapse:collapse;margin:.5em 0}td,th{padding:.2em .6em;border-bottom:1px solid #eee;text-align:right}\
th:first-child,td:first-child{text-align:left}td.text{text-align:left;max-width:28em}\
.tick{font-size:10px;fill:#444}.label{font-size:12px;fill:#222}\
.legend span{margin-right:1.2em;font-size:.9em}.legend i{display:inline-block;width:.9em;height:.9em;margin-right:.3em;vertical-align:-.1em}\
.note{color:#555;font-size:.9em}code{font-size:.9em;word-break:break-all}\
.headline{font-size:1.1em;background:#f3f6fa;border-left:4px solid #0072B2;padding:.6em 1em}\
details{margin:1em 0}summary{cursor:pointer;font-weight:600}img.thumb{width:64px;height:64px;object-fit:cover;vertical-align:middle}";

/// A figure to four decimals without trailing zeros (0.7, not 0.7000), or
/// "n/a".
pub(super) fn number(v: f64) -> String {
    if !v.is_finite() {
        return "n/a".into();
    }
    let text = format!("{v:.4}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text == "-0" {
        "0".into()
    } else {
        text.into()
    }
}

/// A percentage to one decimal (79.3), or "n/a".
pub(super) fn percent(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.1}")
    } else {
        "n/a".into()
    }
}

/// A fraction as a percentage to one decimal, or "n/a".
pub(super) fn maybe_percent(fraction: Option<f64>) -> String {
    fraction.map_or_else(|| "n/a".into(), |f| percent(100.0 * f))
}

/// An affine scale as a formula: `10.56 * c - 8.27`.
pub(super) fn affine_formula(a: f64, b: f64) -> String {
    let sign = if b < 0.0 { '-' } else { '+' };
    format!("{a:.2} * c {sign} {:.2}", b.abs())
}

/// An interval in percent: "93.1 to 98.9".
pub(super) fn percent_interval(i: Option<crate::stats::intervals::Interval>) -> String {
    i.map_or_else(
        || "n/a".into(),
        |i| format!("{} to {}", percent(i.low), percent(i.high)),
    )
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

/// The image cell of an example pair: its thumbnail when there is one, and
/// its name and probe line.
pub(super) fn td_image(image: &str, line: usize, thumbnails: &super::Thumbnails) -> String {
    let name = escape(&format!("{image} (line {line})"));
    match thumbnails.get(&line) {
        // A data URI holds only base64 characters after its fixed prefix: nothing to escape.
        Some(uri) => format!(
            "<td class=\"text\"><img class=\"thumb\" src=\"{uri}\" alt=\"probe image at line {line}\"> {name}</td>"
        ),
        None => format!("<td class=\"text\">{name}</td>"),
    }
}

/// A text cell, escaped.
pub(super) fn td_text(v: &str) -> String {
    format!("<td class=\"text\">{}</td>", escape(v))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_print_without_padding_and_signs_fold_in() {
        assert_eq!(number(0.7), "0.7");
        assert_eq!(number(0.12345), "0.1235");
        assert_eq!(number(-0.00001), "0");
        assert_eq!(number(2.0), "2");
        assert_eq!(percent(79.3), "79.3");
        assert_eq!(maybe_percent(Some(0.97)), "97.0");
        assert_eq!(affine_formula(10.5612, -8.2694), "10.56 * c - 8.27");
        assert_eq!(affine_formula(1.0, 0.5), "1.00 * c + 0.50");
    }
}

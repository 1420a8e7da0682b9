//! Calibration and drift reports as single self-contained HTML files: inline
//! CSS and SVG, no scripts, no external fonts or styles, every caption and
//! name escaped. Tables carry the numbers, plots the shapes.

use std::fmt::Write as _;

use super::calibration::CalibrationReport;
use super::continuity::ContinuityMap;
use super::drift::{DriftReport, PairKind};
use super::hinge::HingeFigures;
use super::summary::Distribution;
use super::svg::{self, escape, Curve, HistogramSeries, PALETTE};

const STYLE: &str = "body{font-family:system-ui,sans-serif;margin:2em auto;max-width:60em;color:#222;padding:0 1em}\
h1{font-size:1.5em}h2{font-size:1.2em;margin-top:2em;border-bottom:1px solid #ccc}\
table{border-collapse:collapse;margin:.5em 0}td,th{padding:.2em .6em;border-bottom:1px solid #eee;text-align:right}\
th:first-child,td:first-child{text-align:left}td.text{text-align:left;max-width:28em}\
.tick{font-size:10px;fill:#444}.label{font-size:12px;fill:#222}\
.legend span{margin-right:1.2em;font-size:.9em}.legend i{display:inline-block;width:.9em;height:.9em;margin-right:.3em;vertical-align:-.1em}\
.note{color:#555;font-size:.9em}code{font-size:.9em}";

fn number(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.4}")
    } else {
        "n/a".into()
    }
}

fn maybe(v: Option<f64>) -> String {
    v.map_or_else(|| "n/a".into(), number)
}

fn page(title: &str, body: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>{}</title><style>{STYLE}</style></head><body>\n{body}\n</body></html>\n",
        escape(title)
    )
}

/// A table; `rows` are already-escaped cells.
fn table(headers: &[&str], rows: &[Vec<String>]) -> String {
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

fn td(v: impl AsRef<str>) -> String {
    format!("<td>{}</td>", v.as_ref())
}

fn td_text(v: &str) -> String {
    format!("<td class=\"text\">{}</td>", escape(v))
}

fn distribution_row(name: &str, d: &Distribution) -> Vec<String> {
    let q = &d.quantiles;
    let mut row = vec![td_text(name), td(d.count.to_string())];
    for v in [
        d.mean, d.std, d.min, q.p01, q.p05, q.p25, q.p50, q.p75, q.p95, q.p99, d.max,
    ] {
        row.push(td(number(v)));
    }
    row
}

const DISTRIBUTION_HEADERS: [&str; 13] = [
    "cosines", "count", "mean", "std", "min", "1%", "5%", "25%", "50%", "75%", "95%", "99%", "max",
];

fn hinge_rows(name: &str, f: &HingeFigures) -> Vec<String> {
    vec![
        td_text(name),
        td(f.positives.to_string()),
        td(number(f.sum_of_hinges)),
        td(number(f.sum_of_hinges_caption_negatives)),
        td(number(f.sum_of_hinges_image_negatives)),
        td(number(f.max_of_hinges)),
        td(number(f.max_of_hinges_caption_negatives)),
        td(number(f.max_of_hinges_image_negatives)),
        td(number(100.0 * f.violation_rate)),
    ]
}

const HINGE_HEADERS: [&str; 9] = [
    "evaluated as",
    "positives",
    "SH",
    "SH captions",
    "SH images",
    "MH",
    "MH captions",
    "MH images",
    "violating %",
];

fn cosine_histograms(title: &str, r: &CalibrationReport) -> String {
    let c = &r.cosines;
    let mut series = vec![
        ("true pairs", &c.true_pairs),
        ("hardest negatives", &c.hardest_negatives),
        ("all negatives", &c.all_negatives),
    ];
    if let Some(contrasts) = &c.contrasts {
        series.push(("contrast pairs", contrasts));
    }
    let series: Vec<HistogramSeries> = series
        .into_iter()
        .zip(PALETTE)
        .map(|((label, d), colour)| HistogramSeries {
            label,
            low: d.histogram.low,
            high: d.histogram.high,
            counts: &d.histogram.counts,
            colour,
        })
        .collect();
    svg::histograms(title, &series)
}

fn calibration_sections(r: &CalibrationReport, out: &mut String) {
    let s = &r.suggested;
    out.push_str("<h2>Suggested reward scale</h2>");
    out.push_str(&table(
        &["scale", "value", "meaning"],
        &[
            vec![
                td_text("affine a, b"),
                td(s.affine.as_ref().map_or_else(
                    || "n/a".into(),
                    |a| format!("a = {}, b = {}", number(a.a), number(a.b)),
                )),
                td_text(
                    "a c + b sends the median hardest negative to 0 and the median true pair to 1",
                ),
            ],
            vec![
                td_text("CLIP-S weight w"),
                td(maybe(s.clip_s_weight)),
                td_text("w max(c, 0) puts the median true pair at 1 (CLIPScore uses 2.5)"),
            ],
            vec![
                td_text("median true cosine"),
                td(number(s.median_true)),
                td_text(""),
            ],
            vec![
                td_text("median hardest negative"),
                td(number(s.median_hardest_negative)),
                td_text(""),
            ],
        ],
    ));

    out.push_str("<h2>Cosines</h2>");
    out.push_str(&cosine_histograms("cosine histograms", r));
    let c = &r.cosines;
    let mut rows = vec![
        distribution_row("true pairs", &c.true_pairs),
        distribution_row("hardest negatives", &c.hardest_negatives),
        distribution_row("all negatives", &c.all_negatives),
    ];
    if let Some(d) = &c.contrasts {
        rows.push(distribution_row("contrast pairs", d));
    }
    out.push_str(&table(&DISTRIBUTION_HEADERS, &rows));
    out.push_str("<p class=\"note\">std is the population standard deviation; quantiles interpolate linearly (numpy's default).</p>");

    out.push_str("<h2>Retrieval</h2>");
    let (i2t, t2i) = (&r.retrieval.image_to_text, &r.retrieval.text_to_image);
    out.push_str(&svg::bars(
        "recall at K",
        &[
            ("R@1".into(), vec![i2t.r_at_1, t2i.r_at_1]),
            ("R@5".into(), vec![i2t.r_at_5, t2i.r_at_5]),
            ("R@10".into(), vec![i2t.r_at_10, t2i.r_at_10]),
        ],
        &[("image to text", PALETTE[0]), ("text to image", PALETTE[1])],
        100.0,
        "recall %",
    ));
    let retrieval_row = |name: &str, f: &super::retrieval::RetrievalFigures| {
        vec![
            td_text(name),
            td(f.queries.to_string()),
            td(number(f.r_at_1)),
            td(number(f.r_at_5)),
            td(number(f.r_at_10)),
            td(number(f.median_rank)),
            td(number(f.mean_rank)),
        ]
    };
    out.push_str(&table(
        &[
            "direction",
            "queries",
            "R@1 %",
            "R@5 %",
            "R@10 %",
            "median rank",
            "mean rank",
        ],
        &[
            retrieval_row("image to text", i2t),
            retrieval_row("text to image", t2i),
        ],
    ));
    let _ = write!(
        out,
        "<p>rsum (sum of the six recalls, percentage points): <b>{}</b>. A caption or image ranks above the true one only with a strictly greater cosine.</p>",
        number(r.retrieval.rsum)
    );

    let h = &r.hinge;
    let _ = write!(
        out,
        "<h2>Hinge losses (VSE++, margin {})</h2>",
        number(h.margin)
    );
    out.push_str(&table(
        &HINGE_HEADERS,
        &[
            hinge_rows("whole probe set as one batch", &h.whole_set),
            hinge_rows(
                &format!(
                    "mean over {} batches of {} images",
                    h.batched.batches, h.batched.batch_images
                ),
                &h.batched.mean,
            ),
        ],
    ));
    out.push_str("<p class=\"note\">Means per positive pair. SH: sum of hinges; MH: max of hinges (hardest negative); captions/images: the caption-negative and image-negative terms.</p>");

    out.push_str("<h2>Contrast captions</h2>");
    let ct = &r.contrast;
    if ct.overall.count == 0 {
        out.push_str("<p>The probe set has no contrast captions.</p>");
    } else {
        let groups: Vec<(String, Vec<f64>)> = ct
            .by_label
            .iter()
            .map(|(label, f)| (label.clone(), vec![100.0 * f.rate.unwrap_or(0.0)]))
            .collect();
        out.push_str(&svg::bars(
            "true caption beats contrast, per changed fact",
            &groups,
            &[("true caption strictly above contrast", PALETTE[2])],
            100.0,
            "rate %",
        ));
        let mut rows: Vec<Vec<String>> = ct
            .by_label
            .iter()
            .map(|(label, f)| {
                vec![
                    td_text(label),
                    td(f.count.to_string()),
                    td(f.wins.to_string()),
                    td(f.ties.to_string()),
                    td(maybe(f.rate.map(|v| 100.0 * v))),
                    td(maybe(f.mean_gap)),
                ]
            })
            .collect();
        let o = &ct.overall;
        rows.push(vec![
            "<td><b>all</b></td>".into(),
            td(o.count.to_string()),
            td(o.wins.to_string()),
            td(o.ties.to_string()),
            td(maybe(o.rate.map(|v| 100.0 * v))),
            td(maybe(o.mean_gap)),
        ]);
        out.push_str(&table(
            &["changed", "pairs", "wins", "ties", "rate %", "mean gap"],
            &rows,
        ));
    }
}

/// The calibration report as one self-contained HTML page.
pub fn calibration_html(report: &CalibrationReport) -> String {
    let mut body = String::new();
    let _ = write!(
        body,
        "<h1>Calibration of {}</h1><p>{} images, {} true captions, {} contrast captions, dimension {}.</p>",
        escape(&report.bundle),
        report.counts.images,
        report.counts.captions,
        report.counts.contrasts,
        report.counts.dimension
    );
    calibration_sections(report, &mut body);
    page(&format!("befit calibration: {}", report.bundle), &body)
}

/// Points along a continuity map over [lo, hi], for drawing.
fn curve(map: &ContinuityMap, lo: f64, hi: f64) -> Vec<(f64, f64)> {
    match map {
        ContinuityMap::Affine { .. } => vec![(lo, map.apply_f64(lo)), (hi, map.apply_f64(hi))],
        ContinuityMap::Monotone { knots } => {
            let mut pts = vec![(lo, map.apply_f64(lo))];
            pts.extend(
                knots
                    .iter()
                    .filter(|k| k[0] > lo && k[0] < hi)
                    .map(|k| (k[0], k[1])),
            );
            pts.push((hi, map.apply_f64(hi)));
            pts
        }
    }
}

/// The drift report as one self-contained HTML page.
pub fn drift_html(report: &DriftReport) -> String {
    let r = report;
    let (from, to) = (escape(&r.from_bundle), escape(&r.to_bundle));
    let mut b = String::new();
    let _ = write!(
        b,
        "<h1>Drift from {from} to {to}</h1><p>{} images, {} true captions, {} contrast captions ({} pairs); dimension {} to {}.</p>",
        r.counts.images, r.counts.captions, r.counts.contrasts, r.counts.pairs, r.counts.dimension_from, r.counts.dimension_to
    );

    b.push_str("<h2>Agreement</h2>");
    let procrustes = |p: &Option<super::spaces::ProcrustesFit>| {
        p.as_ref().map_or_else(
            || "n/a (dimensions differ)".to_string(),
            |p| {
                format!(
                    "{} (normalised {})",
                    number(p.residual),
                    number(p.normalised_residual)
                )
            },
        )
    };
    let ag = &r.agreement;
    b.push_str(&table(
        &["figure", "value"],
        &[
            vec![
                td_text("Spearman rho, all pairs"),
                td(maybe(ag.all_pairs.spearman_rho)),
            ],
            vec![
                td_text("Kendall tau-b, all pairs"),
                td(maybe(ag.all_pairs.kendall_tau_b)),
            ],
            vec![
                td_text("Spearman rho, true pairs"),
                td(maybe(ag.true_pairs.spearman_rho)),
            ],
            vec![
                td_text("Kendall tau-b, true pairs"),
                td(maybe(ag.true_pairs.kendall_tau_b)),
            ],
            vec![
                td_text("KS D, true-pair cosines"),
                td(format!(
                    "{} (asymptotic p {})",
                    number(r.true_cosine_ks.statistic),
                    number(r.true_cosine_ks.p_value_asymptotic)
                )),
            ],
            vec![td_text("linear CKA, images"), td(maybe(r.cka.images))],
            vec![td_text("linear CKA, captions"), td(maybe(r.cka.texts))],
            vec![
                td_text("Procrustes residual, images"),
                td(procrustes(&r.procrustes.images)),
            ],
            vec![
                td_text("Procrustes residual, captions"),
                td(procrustes(&r.procrustes.texts)),
            ],
            vec![
                td_text(&format!(
                    "nearest {} captions per image, mean Jaccard",
                    r.neighbour_overlap.k
                )),
                td(number(r.neighbour_overlap.mean_jaccard)),
            ],
        ],
    ));

    b.push_str("<h2>Reward continuity</h2>");
    let (lo, hi) = r
        .scatter
        .points
        .iter()
        .map(|p| p[0])
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, z), v| {
            (a.min(v), z.max(v))
        });
    let (lo, hi) = if lo < hi { (lo, hi) } else { (-1.0, 1.0) };
    b.push_str(&svg::scatter(
        "old cosine against new cosine, with the fitted maps",
        &r.scatter.points,
        &[
            Curve {
                label: "affine map",
                points: curve(&r.continuity.affine.map, lo, hi),
                colour: PALETTE[1],
            },
            Curve {
                label: "monotone map",
                points: curve(&r.continuity.monotone.map, lo, hi),
                colour: PALETTE[2],
            },
        ],
        &format!("cosine under {}", r.to_bundle),
        &format!("cosine under {}", r.from_bundle),
    ));
    let shown = match r.scatter.stride {
        0 | 1 => "All pairs shown.".to_string(),
        n => format!("One pair in {n} shown."),
    };
    let _ = write!(
        b,
        "<p class=\"note\">{shown} The maps take a cosine of {to} to the scale of {from}.</p>"
    );
    let fit_row = |name: &str, f: &super::continuity::FittedMap| {
        let json = serde_json::to_string(&f.map).unwrap_or_default();
        let shown = if json.len() > 300 {
            format!(
                "{}... ({} knots)",
                &json[..json.char_indices().nth(300).map_or(json.len(), |(i, _)| i)],
                knot_count(&f.map)
            )
        } else {
            json
        };
        vec![
            td_text(name),
            td(f.pairs.to_string()),
            td(number(f.rmse)),
            td(number(f.max_error)),
            format!("<td class=\"text\"><code>{}</code></td>", escape(&shown)),
        ]
    };
    b.push_str(&table(
        &["map", "pairs", "RMSE", "max error", "map (JSON)"],
        &[
            fit_row("affine (least squares)", &r.continuity.affine),
            fit_row("monotone (isotonic)", &r.continuity.monotone),
        ],
    ));

    b.push_str("<h2>Cosines before and after</h2>");
    let series = [
        (
            format!("true pairs, {}", r.from_bundle),
            &r.from.cosines.true_pairs,
        ),
        (
            format!("true pairs, {}", r.to_bundle),
            &r.to.cosines.true_pairs,
        ),
        (
            format!("hardest negatives, {}", r.from_bundle),
            &r.from.cosines.hardest_negatives,
        ),
        (
            format!("hardest negatives, {}", r.to_bundle),
            &r.to.cosines.hardest_negatives,
        ),
    ];
    let hs: Vec<HistogramSeries> = series
        .iter()
        .zip(PALETTE)
        .map(|((label, d), colour)| HistogramSeries {
            label,
            low: d.histogram.low,
            high: d.histogram.high,
            counts: &d.histogram.counts,
            colour,
        })
        .collect();
    b.push_str(&svg::histograms(
        "true and hardest-negative cosines under both bundles",
        &hs,
    ));

    b.push_str("<h2>Retrieval before and after</h2>");
    let (fa, fb) = (&r.from.retrieval, &r.to.retrieval);
    b.push_str(&svg::bars(
        "recall at K under both bundles",
        &[
            (
                "i2t R@1".into(),
                vec![fa.image_to_text.r_at_1, fb.image_to_text.r_at_1],
            ),
            (
                "i2t R@5".into(),
                vec![fa.image_to_text.r_at_5, fb.image_to_text.r_at_5],
            ),
            (
                "i2t R@10".into(),
                vec![fa.image_to_text.r_at_10, fb.image_to_text.r_at_10],
            ),
            (
                "t2i R@1".into(),
                vec![fa.text_to_image.r_at_1, fb.text_to_image.r_at_1],
            ),
            (
                "t2i R@5".into(),
                vec![fa.text_to_image.r_at_5, fb.text_to_image.r_at_5],
            ),
            (
                "t2i R@10".into(),
                vec![fa.text_to_image.r_at_10, fb.text_to_image.r_at_10],
            ),
        ],
        &[(&r.from_bundle, PALETTE[0]), (&r.to_bundle, PALETTE[1])],
        100.0,
        "recall %",
    ));

    if r.counts.contrasts > 0 {
        b.push_str("<h2>Contrast rates before and after</h2>");
        let groups: Vec<(String, Vec<f64>)> = r
            .from
            .contrast
            .by_label
            .iter()
            .map(|(label, f)| {
                let after = r.to.contrast.by_label.get(label).and_then(|g| g.rate);
                (
                    label.clone(),
                    vec![100.0 * f.rate.unwrap_or(0.0), 100.0 * after.unwrap_or(0.0)],
                )
            })
            .collect();
        b.push_str(&svg::bars(
            "true caption beats contrast, per changed fact",
            &groups,
            &[(&r.from_bundle, PALETTE[0]), (&r.to_bundle, PALETTE[1])],
            100.0,
            "rate %",
        ));
    }

    b.push_str("<h2>Pairs whose reward moved most</h2>");
    let rows: Vec<Vec<String>> = r
        .moved
        .iter()
        .map(|p| {
            let kind = match p.kind {
                PairKind::True => "true".to_string(),
                PairKind::Contrast => format!("contrast ({})", p.changed.as_deref().unwrap_or("")),
            };
            let caption = match &p.true_caption {
                Some(t) => format!(
                    "{}<br><span class=\"note\">alters: {}</span>",
                    escape(&p.caption),
                    escape(t)
                ),
                None => escape(&p.caption),
            };
            vec![
                td_text(&format!("{} (line {})", p.image, p.image_line)),
                td_text(&kind),
                format!("<td class=\"text\">{caption}</td>"),
                td(number(p.cos_from)),
                td(number(p.cos_to)),
                td(number(p.raw_delta)),
                td(number(p.mapped_delta)),
            ]
        })
        .collect();
    b.push_str(&table(
        &[
            "image",
            "pair",
            "caption",
            "old cos",
            "new cos",
            "new - old",
            "affine(new) - old",
        ],
        &rows,
    ));
    b.push_str("<p class=\"note\">Ranked by |affine(new) - old|: the move that remains once the new scale is mapped onto the old one.</p>");

    b.push_str("<h2>Every calibration figure</h2>");
    let rows: Vec<Vec<String>> = r
        .changes
        .iter()
        .map(|(name, c)| {
            vec![
                td_text(name),
                td(maybe(c.from)),
                td(maybe(c.to)),
                td(maybe(c.delta)),
            ]
        })
        .collect();
    b.push_str(&table(&["figure", "old", "new", "new - old"], &rows));

    let _ = write!(b, "<h2>Calibration of {from}</h2>");
    calibration_sections(&r.from, &mut b);
    let _ = write!(b, "<h2>Calibration of {to}</h2>");
    calibration_sections(&r.to, &mut b);
    page(
        &format!("befit drift: {} to {}", r.from_bundle, r.to_bundle),
        &b,
    )
}

fn knot_count(map: &ContinuityMap) -> usize {
    match map {
        ContinuityMap::Affine { .. } => 0,
        ContinuityMap::Monotone { knots } => knots.len(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::drift::{drift, DriftOptions};
    use crate::stats::pairs::tests::from_similarity;
    use crate::stats::{calibrate, CalibrationOptions};
    use ndarray::array;

    fn hostile() -> crate::stats::ProbeVectors {
        let mut v = from_similarity(&array![[0.8, 0.1], [0.2, 0.7]], vec![0, 1]);
        v.bundle = "<b>evil</b>".into();
        v.caption_texts[0] = "<script>alert('x')</script> & co".into();
        v.image_names[1] = "a\"b.png".into();
        v.contrasts = v.captions.slice(ndarray::s![1..2, ..]).to_owned();
        v.contrast_texts = vec!["<img src=x onerror=y>".into()];
        v.contrast_labels = vec!["<colour>".into()];
        v.contrast_from = vec![0];
        v
    }

    fn assert_clean(html: &str) {
        assert!(html.starts_with("<!DOCTYPE html>"));
        assert!(!html.contains("<script"), "unescaped script");
        assert!(!html.contains("<img"), "unescaped img");
        assert!(!html.contains("<b>evil"), "unescaped bundle name");
        // Nothing fetched from anywhere: no URLs, no external resources.
        assert!(!html.contains("http"), "a URL in a self-contained report");
        assert!(!html.contains("<link") && !html.contains("@import") && !html.contains("src=\""));
    }

    #[test]
    fn calibration_page_escapes_text_and_stays_offline() {
        let r = calibrate(&hostile(), &CalibrationOptions::default()).unwrap();
        let html = calibration_html(&r);
        assert_clean(&html);
        assert!(html.contains("&lt;b&gt;evil&lt;/b&gt;"));
        assert!(html.contains("&lt;colour&gt;"));
        assert!(
            html.matches("<svg").count() >= 3,
            "histogram, recall and contrast plots"
        );
    }

    #[test]
    fn drift_page_escapes_captions_and_draws_the_scatter() {
        let v = hostile();
        let r = drift(&v, &v, &DriftOptions::default()).unwrap();
        let html = drift_html(&r);
        assert_clean(&html);
        assert!(html.contains("&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt; &amp; co"));
        assert!(html.contains("a&quot;b.png"));
        assert!(html.contains("<circle"));
        assert!(html.contains("affine map"));
    }
}

//! The calibration page: suggested scale, cosine distributions, hinge
//! losses, retrieval and contrast figures of one bundle.

use std::collections::BTreeSet;
use std::fmt::Write as _;

use super::page::{
    affine_formula, maybe, maybe_percent, number, page, percent, percent_interval, table, td,
    td_image, td_text,
};
use super::provenance::Provenance;
use super::Thumbnails;
use crate::stats::calibration::CalibrationReport;
use crate::stats::hinge::HingeFigures;
use crate::stats::retrieval::RetrievalFigures;
use crate::stats::summary::Distribution;
use crate::stats::svg::{self, escape, Curve, Estimate, HistogramSeries, PALETTE};

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
        td(percent(100.0 * f.violation_rate)),
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

/// The sections of one bundle's calibration, shared with the drift page.
pub(super) fn calibration_sections(
    r: &CalibrationReport,
    thumbnails: &Thumbnails,
    out: &mut String,
) {
    let s = &r.suggested;
    out.push_str("<h2>Suggested reward scale</h2>");
    out.push_str(&table(
        &["scale", "value", "meaning"],
        &[
            vec![
                td_text("affine"),
                td(s.affine
                    .as_ref()
                    .map_or_else(|| "n/a".into(), |a| affine_formula(a.a, a.b))),
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
    out.push_str(&svg::estimates(
        "recall at K with 95 % Wilson intervals",
        &recall_groups(&[i2t, t2i]),
        &[("image to text", PALETTE[0]), ("text to image", PALETTE[1])],
        100.0,
        "recall %",
    ));
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
        "<p>rsum (sum of the six recalls, percentage points): <b>{}</b>. A caption or image ranks above the true one only with a strictly greater cosine. Brackets: 95 % Wilson score intervals (Wilson 1927), queries taken as independent trials.</p>",
        percent(r.retrieval.rsum)
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

    examples(r, thumbnails, out);

    out.push_str("<h2>Contrast captions</h2>");
    let ct = &r.contrast;
    if ct.overall.count == 0 {
        out.push_str("<p>The probe set has no contrast captions.</p>");
        return;
    }
    let groups: Vec<(String, Vec<Estimate>)> = ct
        .by_label
        .iter()
        .map(|(label, f)| (label.clone(), vec![contrast_estimate(f)]))
        .collect();
    out.push_str(&svg::estimates(
        "true caption beats contrast, per changed fact, with 95 % Wilson intervals",
        &groups,
        &[("true caption strictly above contrast", PALETTE[2])],
        100.0,
        "rate %",
    ));
    let row = |name: String, f: &crate::stats::contrast::ContrastFigures| {
        vec![
            name,
            td(f.count.to_string()),
            td(f.wins.to_string()),
            td(f.ties.to_string()),
            td(maybe_percent(f.rate)),
            td(percent_interval(f.rate_interval.map(|i| i.scaled(100.0)))),
            td(maybe(f.auc)),
            td(maybe(f.mean_gap)),
        ]
    };
    let mut rows: Vec<Vec<String>> = ct
        .by_label
        .iter()
        .map(|(label, f)| row(td_text(label), f))
        .collect();
    rows.push(row("<td><b>all</b></td>".into(), &ct.overall));
    out.push_str(&table(
        &[
            "changed",
            "pairs",
            "wins",
            "ties",
            "rate %",
            "95 % interval",
            "AUC",
            "mean gap",
        ],
        &rows,
    ));
    out.push_str("<p class=\"note\">rate: the true caption's cosine strictly above its contrast's, for the same image (paired). Interval: Wilson score, 95 % (Wilson 1927). AUC: area under the ROC curve of the true captions' cosines against the contrasts' cosines, unpaired (Hanley and McNeil 1982); 0.5 is chance.</p>");
    let curves: Vec<Curve> = ct
        .roc
        .iter()
        .zip(PALETTE.iter().cycle())
        .map(|((label, roc), colour)| Curve {
            label,
            points: roc.points.iter().map(|p| (p[0], p[1])).collect(),
            colour,
        })
        .collect();
    out.push_str(&svg::roc_curves(
        "ROC of true against contrast cosines, per changed fact",
        &curves,
    ));
}

/// The lowest true pairs and the contrasts the reward got wrong.
fn examples(r: &CalibrationReport, thumbnails: &Thumbnails, out: &mut String) {
    out.push_str("<h2>Pairs to look at</h2>");
    let ex = &r.examples;
    let rows: Vec<Vec<String>> = ex
        .lowest_true
        .iter()
        .map(|e| {
            vec![
                td_image(&e.image, e.image_line, thumbnails),
                td_text(&e.caption),
                td(number(e.true_cos)),
            ]
        })
        .collect();
    out.push_str("<p>The true pairs of lowest cosine:</p>");
    out.push_str(&table(&["image", "true caption", "cosine"], &rows));
    if ex.lost_contrasts.is_empty() {
        out.push_str("<p>Every contrast scored strictly below its true caption.</p>");
        return;
    }
    let rows: Vec<Vec<String>> = ex
        .lost_contrasts
        .iter()
        .map(|e| {
            vec![
                td_image(&e.image, e.image_line, thumbnails),
                td_text(e.changed.as_deref().unwrap_or("")),
                td_text(&e.caption),
                td_text(e.contrast.as_deref().unwrap_or("")),
                td(number(e.true_cos)),
                td(maybe(e.contrast_cos)),
            ]
        })
        .collect();
    out.push_str(
        "<p>Contrasts the reward got wrong (scored at or above the true caption), worst first:</p>",
    );
    out.push_str(&table(
        &[
            "image",
            "changed",
            "true caption",
            "contrast",
            "true cos",
            "contrast cos",
        ],
        &rows,
    ));
}

/// One estimate per recall, for the interval chart.
pub(super) fn recall_groups(directions: &[&RetrievalFigures]) -> Vec<(String, Vec<Estimate>)> {
    let at = |f: &RetrievalFigures, k: usize| match k {
        1 => (f.r_at_1, f.intervals.r_at_1),
        5 => (f.r_at_5, f.intervals.r_at_5),
        _ => (f.r_at_10, f.intervals.r_at_10),
    };
    [1, 5, 10]
        .into_iter()
        .map(|k| {
            let values = directions
                .iter()
                .map(|f| {
                    let (value, interval) = at(f, k);
                    Estimate {
                        value,
                        interval: Some(interval),
                    }
                })
                .collect();
            (format!("R@{k}"), values)
        })
        .collect()
}

/// A contrast rate in percent with its interval.
pub(super) fn contrast_estimate(f: &crate::stats::contrast::ContrastFigures) -> Estimate {
    Estimate {
        value: 100.0 * f.rate.unwrap_or(0.0),
        interval: f.rate_interval.map(|i| i.scaled(100.0)),
    }
}

fn retrieval_row(name: &str, f: &RetrievalFigures) -> Vec<String> {
    let with = |v: f64, i: crate::stats::intervals::Interval| {
        td(format!(
            "{} <span class=\"note\">[{}]</span>",
            percent(v),
            percent_interval(Some(i))
        ))
    };
    vec![
        td_text(name),
        td(f.queries.to_string()),
        with(f.r_at_1, f.intervals.r_at_1),
        with(f.r_at_5, f.intervals.r_at_5),
        with(f.r_at_10, f.intervals.r_at_10),
        td(number(f.median_rank)),
        td(number(f.mean_rank)),
    ]
}

/// The probe lines of the images [`calibration_html`] shows as examples.
pub fn calibration_example_lines(report: &CalibrationReport) -> BTreeSet<usize> {
    let ex = &report.examples;
    ex.lowest_true
        .iter()
        .chain(&ex.lost_contrasts)
        .map(|e| e.image_line)
        .collect()
}

/// The calibration report as one self-contained HTML page, with where its
/// numbers come from and the example pairs' images from `thumbnails`.
pub fn calibration_html(
    report: &CalibrationReport,
    provenance: &Provenance,
    thumbnails: &Thumbnails,
) -> String {
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
    body.push_str(&provenance.html());
    calibration_sections(report, thumbnails, &mut body);
    page(&format!("befit calibration: {}", report.bundle), &body)
}

//! The drift page: agreement between two bundles, the continuity maps,
//! figures before and after, the pairs that moved most, and both bundles'
//! calibrations.

use std::fmt::Write as _;

use serde::{Deserialize, Serialize};

use super::calibration::{
    calibration_example_lines, calibration_sections, contrast_estimate, recall_groups,
};
use super::page::{affine_formula, maybe, number, page, percent, table, td, td_image, td_text};
use super::provenance::Provenance;
use super::Thumbnails;
use crate::stats::continuity::ContinuityMap;
use crate::stats::drift::{DriftReport, PairKind};
use crate::stats::summary::median;
use crate::stats::svg::{self, escape, Curve, HistogramSeries, PointGroup, PALETTE};

/// When the drift headline calls a swap safe. Defaults are common practice
/// for reward models, with no published source; `docs/statistics.md`
/// explains each.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HeadlineThresholds {
    /// Least Spearman rho over all pairs: below it the bundles disagree on
    /// which captions fit better, and no map can fix that.
    pub min_spearman: f64,
    /// Largest RMSE of the monotone map (cosine units) still called small:
    /// the reward error a run keeps after remapping.
    pub max_map_rmse: f64,
    /// Largest fall of the overall contrast rate, in percentage points.
    pub max_contrast_drop: f64,
}

impl Default for HeadlineThresholds {
    fn default() -> Self {
        HeadlineThresholds {
            min_spearman: 0.9,
            max_map_rmse: 0.02,
            max_contrast_drop: 1.0,
        }
    }
}

/// One sentence on a drift: how far rewards move, what error is left after
/// the map, and whether the swap looks safe against `t`.
pub fn drift_headline(r: &DriftReport, t: &HeadlineThresholds) -> String {
    let moves: Vec<f64> = r
        .scatter
        .points
        .iter()
        .map(|p| (p[0] - p[1]).abs())
        .collect();
    let typical = if moves.is_empty() {
        "an unmeasured amount (no pairs sampled)".to_string()
    } else {
        format!("a median of {} in cosine", number(median(&moves)))
    };
    let rho = r.agreement.all_pairs.spearman_rho;
    let rmse = r.continuity.monotone.rmse;
    let drop = match (r.from.contrast.overall.rate, r.to.contrast.overall.rate) {
        (Some(a), Some(b)) => Some(100.0 * (a - b)),
        _ => None,
    };
    let mut problems = Vec::new();
    if rho.is_none_or(|v| v < t.min_spearman) {
        problems.push(format!(
            "rank agreement (Spearman {}) is below {}",
            maybe(rho),
            number(t.min_spearman)
        ));
    }
    if rmse.is_nan() || rmse > t.max_map_rmse {
        problems.push(format!(
            "the map leaves an RMSE of {} above {}",
            number(rmse),
            number(t.max_map_rmse)
        ));
    }
    if let Some(d) = drop.filter(|d| *d > t.max_contrast_drop) {
        problems.push(format!(
            "the contrast rate falls by {} points (more than {})",
            percent(d),
            percent(t.max_contrast_drop)
        ));
    }
    let verdict = if problems.is_empty() {
        format!(
            "the swap looks safe (Spearman {} at least {}, map RMSE at most {}, contrast rate down at most {} points)",
            maybe(rho),
            number(t.min_spearman),
            number(t.max_map_rmse),
            percent(t.max_contrast_drop)
        )
    } else {
        format!("the swap needs a look: {}", problems.join("; "))
    };
    format!(
        "Rewards move by {typical} from {} to {}; after the monotone map an RMSE of {} is left; {verdict}.",
        r.from_bundle,
        r.to_bundle,
        number(rmse)
    )
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

/// The probe lines of the images [`drift_html`] shows as examples: the moved
/// pairs' and both calibrations' example pairs'.
pub fn drift_example_lines(report: &DriftReport) -> std::collections::BTreeSet<usize> {
    let mut lines: std::collections::BTreeSet<usize> =
        report.moved.iter().map(|p| p.image_line).collect();
    lines.extend(calibration_example_lines(&report.from));
    lines.extend(calibration_example_lines(&report.to));
    lines
}

/// The drift report as one self-contained HTML page: a headline against
/// the default [`HeadlineThresholds`], where the numbers come from, then
/// the figures; the two full calibrations folded away at the end.
pub fn drift_html(
    report: &DriftReport,
    provenance: &Provenance,
    thumbnails: &Thumbnails,
) -> String {
    let r = report;
    let (from, to) = (escape(&r.from_bundle), escape(&r.to_bundle));
    let mut b = String::new();
    let _ = write!(
        b,
        "<h1>Drift from {from} to {to}</h1><p class=\"headline\">{}</p><p>{} images, {} true captions, {} contrast captions ({} pairs); dimension {} to {}.</p>",
        escape(&drift_headline(r, &HeadlineThresholds::default())),
        r.counts.images, r.counts.captions, r.counts.contrasts, r.counts.pairs, r.counts.dimension_from, r.counts.dimension_to
    );
    b.push_str(&provenance.html());

    agreement(r, &mut b);
    continuity(r, &mut b);
    before_and_after(r, &mut b);
    moved_pairs_and_figures(r, thumbnails, &mut b);
    for (name, cal) in [(&from, &r.from), (&to, &r.to)] {
        let _ = write!(b, "<details><summary>Full calibration of {name}</summary>");
        calibration_sections(cal, thumbnails, &mut b);
        b.push_str("</details>");
    }
    page(
        &format!("befit drift: {} to {}", r.from_bundle, r.to_bundle),
        &b,
    )
}

/// Agreement between the two bundles: rank correlations, CKA, Procrustes, neighbours.
fn agreement(r: &DriftReport, b: &mut String) {
    b.push_str("<h2>Agreement</h2>");
    let procrustes = |p: &Option<crate::stats::spaces::ProcrustesFit>| {
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
}

/// The continuity maps over the scatter of old against new cosines.
fn continuity(r: &DriftReport, b: &mut String) {
    let (from, to) = (escape(&r.from_bundle), escape(&r.to_bundle));
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
    // Pairs 0..M are true pairs, the rest contrasts; the sample keeps every
    // stride-th pair in order.
    let stride = r.scatter.stride.max(1);
    let (mut trues, mut contrasts) = (Vec::new(), Vec::new());
    for (k, p) in r.scatter.points.iter().enumerate() {
        if k * stride < r.counts.captions {
            trues.push(*p);
        } else {
            contrasts.push(*p);
        }
    }
    b.push_str(&svg::scatter(
        "old cosine against new cosine, with the fitted maps",
        &[
            PointGroup {
                label: "true pairs",
                colour: PALETTE[0],
                points: trues,
            },
            PointGroup {
                label: "contrast pairs",
                colour: PALETTE[3],
                points: contrasts,
            },
        ],
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
    let fit_row = |name: &str, f: &crate::stats::continuity::FittedMap| {
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
            fit_row(
                &format!(
                    "affine (least squares): {}",
                    match r.continuity.affine.map {
                        ContinuityMap::Affine { a, b } => affine_formula(a, b),
                        ContinuityMap::Monotone { .. } => String::new(),
                    }
                ),
                &r.continuity.affine,
            ),
            fit_row("monotone (isotonic)", &r.continuity.monotone),
        ],
    ));
}

/// Cosines, retrieval and contrast rates of both bundles side by side.
fn before_and_after(r: &DriftReport, b: &mut String) {
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
    let mut groups = Vec::new();
    for (direction, one, other) in [
        ("i2t", &fa.image_to_text, &fb.image_to_text),
        ("t2i", &fa.text_to_image, &fb.text_to_image),
    ] {
        for (label, values) in recall_groups(&[one, other]) {
            groups.push((format!("{direction} {label}"), values));
        }
    }
    b.push_str(&svg::estimates(
        "recall at K under both bundles, with 95 % Wilson intervals",
        &groups,
        &[(&r.from_bundle, PALETTE[0]), (&r.to_bundle, PALETTE[1])],
        100.0,
        "recall %",
    ));

    if r.counts.contrasts > 0 {
        b.push_str("<h2>Contrast rates before and after</h2>");
        let groups: Vec<(String, Vec<svg::Estimate>)> = r
            .from
            .contrast
            .by_label
            .iter()
            .filter_map(|(label, f)| {
                let after = r.to.contrast.by_label.get(label)?;
                Some((
                    label.clone(),
                    vec![contrast_estimate(f), contrast_estimate(after)],
                ))
            })
            .collect();
        b.push_str(&svg::estimates(
            "true caption beats contrast, per changed fact, with 95 % Wilson intervals",
            &groups,
            &[(&r.from_bundle, PALETTE[0]), (&r.to_bundle, PALETTE[1])],
            100.0,
            "rate %",
        ));
    }
}

/// The pairs whose reward moved most, and every calibration figure old and new.
fn moved_pairs_and_figures(r: &DriftReport, thumbnails: &Thumbnails, b: &mut String) {
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
                td_image(&p.image, p.image_line, thumbnails),
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
}

fn knot_count(map: &ContinuityMap) -> usize {
    match map {
        ContinuityMap::Affine { .. } => 0,
        ContinuityMap::Monotone { knots } => knots.len(),
    }
}

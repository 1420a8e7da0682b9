//! The measures [`super::drift`] assembles beyond the shared statistics:
//! the probe check, neighbour overlap, the most-moved pairs, the scatter
//! sample and the change of every calibration figure.

use std::collections::BTreeMap;

use ndarray::Array2;

use super::{FigureChange, MovedPair, PairKind, Scatter};
use crate::stats::calibration::CalibrationReport;
use crate::stats::continuity::ContinuityMap;
use crate::stats::pairs::ProbeVectors;
use crate::stats::StatsError;

/// Refuses two vector sets that do not describe the same probe rows.
pub(super) fn same_probe(a: &ProbeVectors, b: &ProbeVectors) -> Result<(), StatsError> {
    let differ = |what: &str| {
        Err(StatsError::DifferentProbe {
            why: format!("their {what} differ"),
        })
    };
    if a.image_names != b.image_names || a.image_lines != b.image_lines {
        return differ("images");
    }
    if a.caption_texts != b.caption_texts || a.caption_image != b.caption_image {
        return differ("true captions");
    }
    if a.contrast_texts != b.contrast_texts
        || a.contrast_labels != b.contrast_labels
        || a.contrast_from != b.contrast_from
    {
        return differ("contrast captions");
    }
    Ok(())
}

/// The `k` captions (columns) with the highest cosine in `row`, ties by index.
pub(super) fn top_k(row: ndarray::ArrayView1<f64>, k: usize) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..row.len()).collect();
    let by_rank = |&a: &usize, &b: &usize| row[b].total_cmp(&row[a]).then(a.cmp(&b));
    if k < idx.len() {
        idx.select_nth_unstable_by(k, by_rank);
        idx.truncate(k);
    }
    idx.sort_unstable();
    idx
}

pub(super) fn mean_jaccard(sa: &Array2<f64>, sb: &Array2<f64>, k: usize) -> f64 {
    let n = sa.nrows();
    let total: f64 = sa
        .outer_iter()
        .zip(sb.outer_iter())
        .map(|(ra, rb)| {
            let (ta, tb) = (top_k(ra, k), top_k(rb, k));
            let common = ta.iter().filter(|c| tb.binary_search(c).is_ok()).count();
            common as f64 / (ta.len() + tb.len() - common) as f64
        })
        .sum();
    total / n as f64
}

pub(super) fn moved_pairs(
    v: &ProbeVectors,
    cos_a: &[f64],
    cos_b: &[f64],
    affine: &ContinuityMap,
    count: usize,
) -> Vec<MovedPair> {
    let m = v.caption_count();
    let mapped: Vec<f64> = cos_a
        .iter()
        .zip(cos_b)
        .map(|(&a, &b)| affine.apply_f64(b) - a)
        .collect();
    let mut order: Vec<usize> = (0..cos_a.len()).collect();
    order.sort_by(|&p, &q| mapped[q].abs().total_cmp(&mapped[p].abs()).then(p.cmp(&q)));
    order
        .into_iter()
        .take(count)
        .map(|p| {
            let (kind, changed, caption, true_caption, image) = if p < m {
                (
                    PairKind::True,
                    None,
                    v.caption_texts[p].clone(),
                    None,
                    v.caption_image[p],
                )
            } else {
                let k = p - m;
                let from = v.contrast_from[k];
                (
                    PairKind::Contrast,
                    Some(v.contrast_labels[k].clone()),
                    v.contrast_texts[k].clone(),
                    Some(v.caption_texts[from].clone()),
                    v.caption_image[from],
                )
            };
            MovedPair {
                pair: p,
                kind,
                changed,
                image: v.image_names[image].clone(),
                image_line: v.image_lines[image],
                caption,
                true_caption,
                cos_from: cos_a[p],
                cos_to: cos_b[p],
                raw_delta: cos_b[p] - cos_a[p],
                mapped_delta: mapped[p],
            }
        })
        .collect()
}

pub(super) fn scatter(cos_a: &[f64], cos_b: &[f64], most: usize) -> Scatter {
    if most == 0 || cos_a.is_empty() {
        return Scatter {
            stride: 0,
            points: vec![],
        };
    }
    let stride = cos_a.len().div_ceil(most).max(1);
    Scatter {
        stride,
        points: (0..cos_a.len())
            .step_by(stride)
            .map(|p| [cos_b[p], cos_a[p]])
            .collect(),
    }
}

/// Leaves of a calibration report that are fixed by the probe and the
/// options rather than measured, left out of the changes.
const FIXED_FIGURES: [&str; 7] = [
    "margin",
    "batch_images",
    "batches",
    "dropped_images",
    "positives",
    "queries",
    "count",
];

/// Every measured number of two calibration reports, by dotted path.
pub(super) fn figure_changes(
    a: &CalibrationReport,
    b: &CalibrationReport,
) -> BTreeMap<String, FigureChange> {
    let mut fa = BTreeMap::new();
    let mut fb = BTreeMap::new();
    for (report, out) in [(a, &mut fa), (b, &mut fb)] {
        let value = serde_json::to_value(report).expect("a calibration report is plain data");
        for section in ["hinge", "cosines", "retrieval", "contrast", "suggested"] {
            flatten(&value[section], section.to_string(), out);
        }
    }
    let names: std::collections::BTreeSet<&String> = fa.keys().chain(fb.keys()).collect();
    names
        .into_iter()
        .filter_map(|name| {
            let from = fa.get(name).copied().flatten();
            let to = fb.get(name).copied().flatten();
            (from.is_some() || to.is_some()).then(|| {
                let delta = from.zip(to).map(|(f, t)| t - f);
                (name.clone(), FigureChange { from, to, delta })
            })
        })
        .collect()
}

fn flatten(value: &serde_json::Value, path: String, out: &mut BTreeMap<String, Option<f64>>) {
    match value {
        serde_json::Value::Object(map) => {
            for (key, v) in map {
                if key == "histogram" || FIXED_FIGURES.contains(&key.as_str()) {
                    continue;
                }
                flatten(v, format!("{path}.{key}"), out);
            }
        }
        serde_json::Value::Number(n) => {
            out.insert(path, n.as_f64());
        }
        serde_json::Value::Null => {
            out.insert(path, None);
        }
        _ => {}
    }
}

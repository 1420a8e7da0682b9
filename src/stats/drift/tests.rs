use super::measures::top_k;
use super::*;
use crate::stats::pairs::tests::from_similarity;
use ndarray::array;

#[test]
fn top_k_breaks_ties_by_caption_order() {
    let row = array![0.5, 0.9, 0.5, 0.5];
    assert_eq!(top_k(row.view(), 2), vec![0, 1]);
    assert_eq!(top_k(row.view(), 3), vec![0, 1, 2]);
    assert_eq!(top_k(row.view(), 9), vec![0, 1, 2, 3]);
}

#[test]
fn jaccard_worked_by_hand() {
    // Image 0: top-2 under A {0, 1}, under B {1, 2}: 1 common of 3 -> 1/3.
    // Image 1: top-2 {1, 2} under both -> 1. Mean 2/3.
    let sa = array![[0.9, 0.8, 0.1], [0.1, 0.8, 0.9]];
    let sb = array![[0.1, 0.8, 0.9], [0.1, 0.8, 0.9]];
    assert!((mean_jaccard(&sa, &sb, 2) - 2.0 / 3.0).abs() < 1e-12);
}

#[test]
fn identical_bundles_do_not_drift() {
    let v = from_similarity(
        &array![[0.8, 0.3, 0.2], [0.4, 0.7, 0.1], [0.2, 0.1, 0.6]],
        vec![0, 1, 2],
    );
    let r = drift(&v, &v, &DriftOptions::default()).unwrap();
    assert!((r.agreement.true_pairs.spearman_rho.unwrap() - 1.0).abs() < 1e-12);
    assert!((r.agreement.true_pairs.kendall_tau_b.unwrap() - 1.0).abs() < 1e-12);
    assert_eq!(r.true_cosine_ks.statistic, 0.0);
    assert!((r.cka.images.unwrap() - 1.0).abs() < 1e-12);
    assert!(r.procrustes.images.as_ref().unwrap().residual < 1e-12);
    assert_eq!(r.neighbour_overlap.mean_jaccard, 1.0);
    assert!(r.continuity.monotone.max_error < 1e-12);
    assert!(r.moved.iter().all(|p| p.mapped_delta.abs() < 1e-12));
    assert!(r.changes.values().all(|c| c.delta.is_none_or(|d| d == 0.0)));
    assert!(r.changes.contains_key("retrieval.image_to_text.r_at_1"));
    assert!(!r
        .changes
        .keys()
        .any(|k| k.contains("histogram") || k.ends_with(".count")));
}

#[test]
fn different_probes_are_refused() {
    let a = from_similarity(&array![[0.8, 0.1], [0.2, 0.7]], vec![0, 1]);
    let mut b = a.clone();
    b.caption_texts[1] = "something else".into();
    let err = drift(&a, &b, &DriftOptions::default())
        .unwrap_err()
        .to_string();
    assert!(err.contains("true captions"), "{err}");
}

#[test]
fn moved_pairs_rank_by_mapped_delta_and_name_contrasts() {
    // Two images with one caption each and one contrast of caption 0.
    let mut a = from_similarity(&array![[0.8, 0.1], [0.2, 0.7]], vec![0, 1]);
    a.contrasts = a.captions.slice(ndarray::s![1..2, ..]).to_owned();
    a.contrast_texts = vec!["a blue thing".into()];
    a.contrast_labels = vec!["colour".into()];
    a.contrast_from = vec![0];
    let r = drift(&a, &a, &DriftOptions::default()).unwrap();
    assert_eq!(r.counts.pairs, 3);
    let contrast = r
        .moved
        .iter()
        .find(|p| p.kind == PairKind::Contrast)
        .unwrap();
    assert_eq!(contrast.changed.as_deref(), Some("colour"));
    assert_eq!(contrast.true_caption.as_deref(), Some("caption 0"));
    assert_eq!(contrast.image, "images/0.png");
    // cos(image 0, contrast) = s[0, 1] = 0.1
    assert!((contrast.cos_from - 0.1).abs() < 1e-12);
}

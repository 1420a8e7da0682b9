use std::path::PathBuf;

use super::*;
use crate::probe::cancel::Cancel;
use crate::probe::{LoadOptions, ProbeSet};
use crate::vectors::{EmbedError, Embedder};
use std::path::Path;

/// An embedder whose vectors depend only on the text or file name; any
/// batch with a path containing "broken" fails, like an undecodable image.
struct Fake {
    dimension: usize,
    always_fail: bool,
    wrong_dimension: bool,
}

fn fake() -> Fake {
    Fake {
        dimension: 4,
        always_fail: false,
        wrong_dimension: false,
    }
}

fn vector_of(key: &str, d: usize) -> Vec<f32> {
    let mut h = 1469598103934665603u64;
    for b in key.bytes() {
        h = (h ^ u64::from(b)).wrapping_mul(1099511628211);
    }
    let v: Vec<f32> = (0..d)
        .map(|j| ((h.rotate_left(j as u32 * 7) % 1000) as f32 + 1.0) / 1000.0)
        .collect();
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    v.into_iter().map(|x| x / norm).collect()
}

impl Fake {
    fn rows(&self, keys: &[String]) -> Result<Array2<f32>, EmbedError> {
        if self.always_fail {
            return Err(EmbedError::encoder("session lost"));
        }
        let d = if self.wrong_dimension {
            self.dimension + 1
        } else {
            self.dimension
        };
        let flat: Vec<f32> = keys.iter().flat_map(|k| vector_of(k, d)).collect();
        Ok(Array2::from_shape_vec((keys.len(), d), flat).unwrap())
    }
}

impl Embedder for Fake {
    fn dimension(&self) -> usize {
        self.dimension
    }
    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
        self.rows(texts)
    }
    fn embed_image_files(&self, paths: &[PathBuf]) -> Result<Array2<f32>, EmbedError> {
        if let Some(p) = paths
            .iter()
            .find(|p| p.to_string_lossy().contains("broken"))
        {
            return Err(EmbedError::encoder(format!("{} is not a PNG", p.display())));
        }
        self.rows(
            &paths
                .iter()
                .map(|p| p.display().to_string())
                .collect::<Vec<_>>(),
        )
    }
}

fn probe() -> ProbeSet {
    let text = [
        r#"{"image": "0.png", "captions": ["a red square", "a square"]}"#,
        r#"{"image": "1.png", "captions": ["a blue ring"], "contrasts": [{"caption": "a green ring", "changed": "colour", "from": 0}]}"#,
        r#"{"image": "broken.png", "captions": ["a big cube"], "contrasts": [{"caption": "a small cube", "changed": "size", "from": 0}]}"#,
        r#"{"image": "3.png", "captions": ["two stars", "stars"], "contrasts": [{"caption": "three stars", "changed": "count", "from": 1}]}"#,
    ]
    .join("\n");
    let options = LoadOptions {
        check_files: false,
        ..Default::default()
    };
    ProbeSet::parse(text.as_bytes(), Path::new("p"), "probe.jsonl", &options)
        .unwrap()
        .set
}

fn options(skip_bad: bool) -> EmbedOptions {
    EmbedOptions {
        bundle: "fake@v1".into(),
        skip_bad,
        image_batch: 2,
        text_batch: 3,
        cancel: Cancel::default(),
    }
}

#[test]
fn an_undecodable_image_is_found_by_its_line() {
    let encoder = fake();
    let err = embed_probe(
        &probe(),
        &ImageFiles(&encoder),
        &options(false),
        &mut |_, _| {},
    )
    .unwrap_err();
    let ProbeError::BadRows { issues, total, .. } = &err else {
        panic!("{err}");
    };
    assert_eq!(*total, 1);
    assert_eq!(issues[0].line, 3);
    assert!(
        matches!(&issues[0].problem, RowProblem::Image(m) if m.contains("broken.png is not a PNG"))
    );
}

#[test]
fn skip_bad_drops_the_row_and_keeps_indices_straight() {
    let encoder = fake();
    let set = probe();
    let mut calls = Vec::new();
    let out = embed_probe(&set, &ImageFiles(&encoder), &options(true), &mut |d, t| {
        calls.push((d, t))
    })
    .unwrap();
    assert_eq!(out.skipped.len(), 1);
    assert_eq!(out.skipped[0].line, 3);
    let v = &out.vectors;
    v.check().unwrap();
    assert_eq!(v.bundle, "fake@v1");
    assert_eq!(v.image_names, vec!["0.png", "1.png", "3.png"]);
    assert_eq!(v.image_lines, vec![1, 2, 4]);
    assert_eq!(
        v.caption_texts,
        vec![
            "a red square",
            "a square",
            "a blue ring",
            "two stars",
            "stars"
        ]
    );
    assert_eq!(v.caption_image, vec![0, 0, 1, 2, 2]);
    assert_eq!(v.contrast_texts, vec!["a green ring", "three stars"]);
    assert_eq!(v.contrast_labels, vec!["colour", "count"]);
    // "three stars" alters "stars", caption 4 overall.
    assert_eq!(v.contrast_from, vec![2, 4]);
    // The caption "stars" got the vector of its own text.
    let want = vector_of("stars", 4);
    assert!((v.captions[[4, 0]] - f64::from(want[0])).abs() < 1e-6);
    // 4 images + 9 captions; progress ends at the total and never goes back.
    assert_eq!(calls.last(), Some(&(13, 13)));
    assert!(calls.windows(2).all(|w| w[0].0 <= w[1].0));
}

#[test]
fn an_encoder_failing_on_everything_is_not_blamed_on_rows() {
    let encoder = Fake {
        always_fail: true,
        ..fake()
    };
    let err = embed_probe(
        &probe(),
        &ImageFiles(&encoder),
        &options(true),
        &mut |_, _| {},
    )
    .unwrap_err();
    assert!(
        matches!(
            &err,
            ProbeError::Encoder {
                tower: "image",
                first_line: 1,
                last_line: 2,
                ..
            }
        ),
        "{err}"
    );
}

#[test]
fn a_wrong_dimension_is_refused() {
    let encoder = Fake {
        wrong_dimension: true,
        ..fake()
    };
    let err = embed_probe(
        &probe(),
        &ImageFiles(&encoder),
        &options(true),
        &mut |_, _| {},
    )
    .unwrap_err();
    assert!(
        matches!(
            err,
            ProbeError::Shape {
                tower: "image",
                got: (2, 5),
                ..
            }
        ),
        "{err}"
    );
}

#[test]
fn image_ids_need_a_store() {
    let set = ProbeSet::parse(
        br#"{"image": {"id": "abcdef0123456789abcdef0123456789abcdef0123456789abcdef0123456789"}, "captions": ["x"]}"#,
        Path::new(""),
        "request",
        &LoadOptions::default(),
    )
    .unwrap()
    .set;
    let encoder = fake();
    let err =
        embed_probe(&set, &ImageFiles(&encoder), &options(false), &mut |_, _| {}).unwrap_err();
    assert!(err.to_string().contains("name the image by path"), "{err}");
}

#[test]
fn a_cancelled_embedding_stops_before_its_next_batch() {
    let encoder = fake();
    let opts = options(true);
    let cancel = opts.cancel.clone();
    let mut batches_done = 0;
    // The asker goes away after the first batch (of 2 images; the probe has 4 rows).
    let err = embed_probe(&probe(), &ImageFiles(&encoder), &opts, &mut |_, _| {
        batches_done += 1;
        cancel.cancel();
    })
    .unwrap_err();
    assert!(matches!(err, ProbeError::Cancelled), "{err}");
    assert_eq!(batches_done, 1, "no encoder call after the cancel");
}

//! Rust preprocessing, tokenisation and inference against the PyTorch +
//! Pillow goldens that `tools/blocksworld/make_goldens.py` wrote from the
//! models' training code (`fixtures/golden/<bundle>/golden.json`).

use befit::intake::image_decode::{decode_rgb, ImageLimits};
use befit::intake::image_tensor::to_tensor;
use serde::Deserialize;

use crate::util::*;

#[derive(Deserialize)]
struct Golden {
    images: Vec<GoldenImage>,
    texts: Vec<GoldenText>,
}

#[derive(Deserialize)]
struct GoldenImage {
    file: String,
    tensor: String,
    shape: Vec<usize>,
    embedding: Vec<f32>,
}

#[derive(Deserialize)]
struct GoldenText {
    text: String,
    ids: Vec<i64>,
    truncated: bool,
    embedding: Vec<f32>,
}

fn golden(bundle: &str) -> (std::path::PathBuf, Golden) {
    let dir = fixtures().join("golden").join(bundle);
    let golden = serde_json::from_slice(&read(dir.join("golden.json"))).unwrap();
    (dir, golden)
}

fn f32s(bytes: &[u8]) -> Vec<f32> {
    bytes
        .chunks_exact(4)
        .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect()
}

/// The largest difference between two `[3, h, w]` normalised tensors, in 8-bit grey levels.
/// A value is `(p / 255 - mean[c]) / std[c]`, so one level is `1 / 255 / std[c]` in channel `c`
/// and a difference `d` is `d * std[c] * 255` levels (blocks: 1 level = 1/255/0.09 = 0.0436 in the
/// green channel; clip-tiny: 1/255/0.2613 = 0.0150).
fn worst_levels(ours: &[f32], theirs: &[f32], std: [f32; 3]) -> f64 {
    let plane = ours.len() / 3;
    ours.iter()
        .zip(theirs)
        .enumerate()
        .map(|(i, (a, b))| f64::from((a - b).abs()) * f64::from(std[i / plane]) * 255.0)
        .fold(0f64, f64::max)
}

/// Largest pixel difference allowed between befit's tensor and the golden one, in grey levels.
///
/// PNG is lossless and `resample.rs` repeats Pillow's fixed-point two-pass resampling, so a PNG's
/// tensor may differ only by float32 rounding of `(p / 255 - mean) / std` (a few ulp of values
/// below 12, i.e. under 1e-5 levels; 1e-3 leaves room for the order of operations).
///
/// JPEG: befit decodes with the `image` crate's decoder, the goldens with Pillow's libjpeg(-turbo).
/// The JPEG standard fixes the IDCT only to an accuracy, not bit for bit: a compliant decoder's
/// output may differ from the reference by one level per sample (ISO/IEC 10918-2, the compliance
/// tests, from memory), and the YCbCr -> RGB conversion rounds differently between libraries by
/// up to one more (from memory). The probe JPEGs are 4:4:4, so no chroma upsampling adds to that.
/// Two levels in all; measured: one (blocks-v1/-v2 0.0436 = 1.0 level, clip-tiny 0.0150 = 1.0).
fn allowed_levels(file: &str) -> f64 {
    if file.ends_with(".jpg") {
        2.0
    } else {
        1e-3
    }
}

/// Checks one bundle's tensors, token ids and embeddings against its goldens.
fn check(bundle: &str, min_cosine: f64) {
    let (dir, golden) = golden(bundle);
    let model = model(bundle);
    let spec = model.bundle.manifest.image.clone();
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let mut worst_levels_seen = 0f64;
    let mut tensors = Vec::new();
    for image in &golden.images {
        let rgb = decode_rgb(&read(dir.join(&image.file)), &ImageLimits::default()).unwrap();
        let ours = to_tensor(&rgb, &spec);
        let theirs = f32s(&read(dir.join(&image.tensor)));
        assert_eq!(
            ours.len(),
            image.shape.iter().product::<usize>(),
            "{}",
            image.file
        );
        assert_eq!(ours.len(), theirs.len(), "{}", image.file);
        let levels = worst_levels(&ours, &theirs, spec.std);
        assert!(
            levels <= allowed_levels(&image.file),
            "{bundle} {}: tensor differs by {levels} grey levels",
            image.file
        );
        worst_levels_seen = worst_levels_seen.max(levels);
        tensors.push(ours);
    }
    let vectors = runtime.block_on(model.tensor_vectors(tensors)).unwrap();
    let mut worst_image = 1f64;
    for (image, v) in golden.images.iter().zip(&vectors) {
        let c = cosine(v, &image.embedding);
        assert!(
            c >= min_cosine,
            "{bundle} {}: cosine {c} with the PyTorch embedding",
            image.file
        );
        worst_image = worst_image.min(c);
    }
    let texts: Vec<String> = golden.texts.iter().map(|t| t.text.clone()).collect();
    for t in &golden.texts {
        let tokens = model.tokenize(&t.text).unwrap();
        assert_eq!(tokens.ids, t.ids, "{bundle}: token ids of {:?}", t.text);
        assert_eq!(
            tokens.truncated, t.truncated,
            "{bundle}: truncation of {:?}",
            t.text
        );
    }
    let vectors = runtime.block_on(model.caption_vectors(&texts)).unwrap();
    let mut worst_text = 1f64;
    for (t, v) in golden.texts.iter().zip(&vectors) {
        let c = cosine(&v.vector, &t.embedding);
        assert!(
            c >= min_cosine,
            "{bundle} {:?}: cosine {c} with the PyTorch embedding",
            t.text
        );
        worst_text = worst_text.min(c);
    }
    eprintln!("{bundle}: worst image cosine {worst_image:.7}, worst text cosine {worst_text:.7}, worst pixel difference {worst_levels_seen:.3} grey levels");
}

#[test]
fn the_independent_cosine_is_the_textbook_one() {
    // Worked by hand: (1, 2, 2) . (2, 1, 2) = 8, both norms 3, cosine 8/9; opposite vectors give -1.
    assert!((cosine(&[1.0, 2.0, 2.0], &[2.0, 1.0, 2.0]) - 8.0 / 9.0).abs() < 1e-15);
    assert!((cosine(&[3.0, 4.0], &[-6.0, -8.0]) + 1.0).abs() < 1e-15);
}

#[test]
fn blocks_v1_matches_pytorch() {
    // 0.9999 is the target for the embeddings' cosine with PyTorch's.
    check("blocks-v1", 0.9999);
}

#[test]
fn blocks_v2_matches_pytorch() {
    check("blocks-v2", 0.9999);
}

#[test]
fn clip_tiny_matches_pytorch() {
    // The CLIP-layout bundle: 640x480 JPEGs resized to 224 (bicubic) and centre-cropped, a vision
    // transformer and a causal text transformer with an attention mask. A one-level pixel difference
    // from the JPEG decoder moves its embedding by up to 2.2e-4 per component (measured on the
    // Python side, tools/blocksworld/README.md), so its image cosine is held to 0.999.
    check("clip-tiny", 0.999);
}

#[derive(Deserialize)]
struct FluencyGolden {
    texts: Vec<FluencyText>,
}

#[derive(Deserialize)]
struct FluencyText {
    text: String,
    ids: Vec<i64>,
    probability: f32,
}

/// The fluency head's probabilities against PyTorch's
/// (`fixtures/golden/<bundle>/fluency.json`, written by
/// `tools/blocksworld/train_fluency.py` from the head's training code):
/// befit's token ids, then the head run on each caption alone and on all of
/// them padded into one batch.
fn check_fluency(bundle: &str) {
    let golden: FluencyGolden = serde_json::from_slice(&read(
        fixtures().join("golden").join(bundle).join("fluency.json"),
    ))
    .unwrap();
    let model = model(bundle);
    let head = model.fluency_head().expect("the bundle has a fluency head");
    let ids: Vec<Vec<i64>> = golden
        .texts
        .iter()
        .map(|t| model.tokenize(&t.text).unwrap().ids)
        .collect();
    for (t, ours) in golden.texts.iter().zip(&ids) {
        assert_eq!(ours, &t.ids, "{:?}", t.text);
    }
    let rows: Vec<&[i64]> = ids.iter().map(Vec::as_slice).collect();
    let together = head.probabilities(&rows).unwrap();
    let mut worst = 0f32;
    for ((t, row), in_batch) in golden.texts.iter().zip(&rows).zip(together) {
        let alone = head.probabilities(&[row]).unwrap()[0];
        for got in [alone, in_batch] {
            worst = worst.max((got - t.probability).abs());
            assert!(
                (got - t.probability).abs() < 1e-5,
                "{:?}: {got} vs PyTorch {}",
                t.text,
                t.probability
            );
        }
    }
    // The goldens hold well-formed and edited captions alike, so the
    // comparison covers both ends of the scale.
    let probabilities: Vec<f32> = golden.texts.iter().map(|t| t.probability).collect();
    assert!(probabilities.iter().any(|&p| p > 0.9) && probabilities.iter().any(|&p| p < 0.1));
    eprintln!("{bundle}: fluency head within {worst:.1e} of PyTorch");
}

#[test]
fn blocks_v1_fluency_head_matches_pytorch() {
    check_fluency("blocks-v1");
}

#[test]
fn blocks_v2_fluency_head_matches_pytorch() {
    check_fluency("blocks-v2");
}

#[test]
fn clip_tiny_has_no_fluency_head() {
    assert!(model("clip-tiny").fluency_head().is_none());
}

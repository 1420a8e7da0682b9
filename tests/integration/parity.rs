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

/// Checks one bundle; returns (worst image cosine, worst text cosine, worst tensor difference).
fn check(bundle: &str, min_cosine: f64, max_tensor_diff: f32) -> (f64, f64, f32) {
    let (dir, golden) = golden(bundle);
    let model = model(bundle);
    let spec = model.bundle.manifest.image.clone();
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let mut worst_diff = 0f32;
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
        let diff = ours
            .iter()
            .zip(&theirs)
            .map(|(a, b)| (a - b).abs())
            .fold(0f32, f32::max);
        assert!(
            diff <= max_tensor_diff,
            "{bundle} {}: tensor differs by {diff}",
            image.file
        );
        worst_diff = worst_diff.max(diff);
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
    eprintln!("{bundle}: worst image cosine {worst_image:.7}, worst text cosine {worst_text:.7}, worst tensor diff {worst_diff:.2e}");
    (worst_image, worst_text, worst_diff)
}

#[test]
fn blocks_v1_matches_pytorch() {
    // Tolerance 0.9999 is the target; the tensors are expected to agree to float rounding
    // because the decoder of lossless PNG and the Pillow-compatible resampler are exact.
    // Two JPEG goldens are decoded by a different JPEG decoder than Pillow's libjpeg, so their
    // pixels may differ by a few levels: 8/255 / std bounds that (common practice, no source).
    check("blocks-v1", 0.9999, 0.15);
}

#[test]
fn blocks_v2_matches_pytorch() {
    check("blocks-v2", 0.9999, 0.15);
}

#[test]
fn clip_tiny_matches_pytorch() {
    // The CLIP-layout bundle: 640x480 JPEGs resized to 224 (bicubic) and centre-cropped, a vision
    // transformer and a causal text transformer with an attention mask. A one-level pixel difference
    // from the JPEG decoder moves its embedding by up to 2.2e-4 per component (measured on the Python
    // side), so the image cosine is held to 0.999 and the tensors to a few levels (0.2 in normalised units).
    check("clip-tiny", 0.999, 0.2);
}

//! Image bytes -> encoder tensor: any bytes decode to a tensor of the
//! bundle's shape with finite values, or to a typed refusal; never a panic.
#![no_main]

use std::sync::LazyLock;

use befit::bundle::{ImageSpec, Manifest};
use befit::intake::image_decode::ImageLimits;
use befit::intake::image_tensor::tensor_from_bytes;
use libfuzzer_sys::fuzz_target;

static SPECS: LazyLock<Vec<ImageSpec>> = LazyLock::new(|| {
    // Both preprocessing rules: blocks (stretch, bilinear) and clip-tiny (shorter-then-crop, bicubic).
    [
        include_str!("../../fixtures/models/blocks-v1/bundle.toml"),
        include_str!("../../fixtures/models/clip-tiny/bundle.toml"),
    ]
    .iter()
    .map(|text| {
        Manifest::parse(text, std::path::Path::new("bundle.toml"))
            .expect("a committed bundle.toml parses")
            .image
    })
    .collect()
});

/// Small enough that libFuzzer's memory limit is never the finding.
const LIMITS: ImageLimits = ImageLimits {
    max_pixels: 4_000_000,
    max_decoded_bytes: 64 << 20,
};

fuzz_target!(|data: &[u8]| {
    let Some((&which, bytes)) = data.split_first() else {
        return;
    };
    let spec = &SPECS[usize::from(which) % SPECS.len()];
    if let Ok(tensor) = tensor_from_bytes(bytes, &LIMITS, spec) {
        let side = spec.size as usize;
        assert_eq!(tensor.values.len(), 3 * side * side);
        assert!(tensor.width > 0 && tensor.height > 0);
        assert!(u64::from(tensor.width) * u64::from(tensor.height) <= LIMITS.max_pixels);
        assert!(tensor.values.iter().all(|v| v.is_finite()));
    }
});

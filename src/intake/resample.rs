//! Resampling that reproduces Pillow's `Image.resize` on 8-bit RGB.
//!
//! The encoders were trained on images resized by Pillow, so befit computes
//! the same kernels, the same support widening when shrinking (antialias), the
//! same 22-bit fixed-point weights and the same rounding to 8 bits between the
//! horizontal and the vertical pass (Pillow's `libImaging/Resample.c`). NEAREST
//! follows Pillow's affine nearest-neighbour rule: source index
//! `floor((x + 0.5) * scale)`.
//!
//! Kept by hand on purpose: a general resizing crate uses other kernels or
//! rounding, and parity with the pixels the encoders were trained on matters
//! more to a reward than speed. Measured by `bench/libraries/run.py`: a bicubic
//! 640x480 -> 224x168 takes 2.3 ms here against Pillow 13's 1.7 ms (0.73x,
//! BENCHMARKS.md "Hand-written code and the libraries"); the encoder run that
//! follows costs far more.

use image::RgbImage;

use crate::bundle::Filter;

/// Fixed-point precision of Pillow's 8-bit resampling: `PRECISION_BITS` in
/// `libImaging/Resample.c`, defined there as `32 - 8 - 2` (from memory).
const PRECISION_BITS: u32 = 22;

fn support(filter: Filter) -> f64 {
    match filter {
        Filter::Nearest => 0.0,
        Filter::Bilinear => 1.0,
        Filter::Bicubic => 2.0,
        Filter::Lanczos3 => 3.0,
    }
}

fn kernel(filter: Filter, x: f64) -> f64 {
    match filter {
        Filter::Nearest => 0.0,
        Filter::Bilinear => {
            let x = x.abs();
            if x < 1.0 {
                1.0 - x
            } else {
                0.0
            }
        }
        Filter::Bicubic => {
            // Cubic convolution with a = -0.5 (R. G. Keys, "Cubic convolution interpolation
            // for digital image processing", IEEE Trans. ASSP 29(6), 1981: the a that makes it
            // third-order accurate), the value Pillow's bicubic_filter uses (both from memory).
            const A: f64 = -0.5;
            let x = x.abs();
            if x < 1.0 {
                ((A + 2.0) * x - (A + 3.0)) * x * x + 1.0
            } else if x < 2.0 {
                (((x - 5.0) * x + 8.0) * x - 4.0) * A
            } else {
                0.0
            }
        }
        Filter::Lanczos3 => {
            if (-3.0..3.0).contains(&x) {
                sinc(x) * sinc(x / 3.0)
            } else {
                0.0
            }
        }
    }
}

fn sinc(x: f64) -> f64 {
    if x == 0.0 {
        1.0
    } else {
        let px = x * std::f64::consts::PI;
        px.sin() / px
    }
}

/// Per output pixel: the first source index and the fixed-point weights.
struct Coefficients {
    first: Vec<usize>,
    weights: Vec<Vec<i32>>,
}

/// Pillow's `precompute_coeffs` followed by `normalize_coeffs_8bpc`.
fn coefficients(in_size: usize, out_size: usize, filter: Filter) -> Coefficients {
    let scale = in_size as f64 / out_size as f64;
    let filterscale = scale.max(1.0);
    let support = support(filter) * filterscale;
    let mut first = Vec::with_capacity(out_size);
    let mut weights = Vec::with_capacity(out_size);
    for xx in 0..out_size {
        let center = (xx as f64 + 0.5) * scale;
        let ss = 1.0 / filterscale;
        // C's (int) truncates toward zero; both bounds are clamped right after.
        let xmin = ((center - support + 0.5) as i64).max(0) as usize;
        let xmax = ((center + support + 0.5) as i64).min(in_size as i64) as usize;
        let count = xmax.saturating_sub(xmin);
        let raw: Vec<f64> = (0..count)
            .map(|x| kernel(filter, (x as f64 + xmin as f64 - center + 0.5) * ss))
            .collect();
        let total: f64 = raw.iter().sum();
        let fixed = raw
            .iter()
            .map(|w| {
                let w = if total != 0.0 { w / total } else { *w };
                let scaled = w * f64::from(1u32 << PRECISION_BITS);
                if w < 0.0 {
                    (scaled - 0.5) as i32
                } else {
                    (scaled + 0.5) as i32
                }
            })
            .collect();
        first.push(xmin);
        weights.push(fixed);
    }
    Coefficients { first, weights }
}

fn clip8(acc: i64) -> u8 {
    (acc >> PRECISION_BITS).clamp(0, 255) as u8
}

fn horizontal(src: &RgbImage, out_w: u32, filter: Filter) -> RgbImage {
    let (w, h) = src.dimensions();
    let c = coefficients(w as usize, out_w as usize, filter);
    let mut out = RgbImage::new(out_w, h);
    let row_len = w as usize * 3;
    let src_raw = src.as_raw();
    for (y, row_out) in out.chunks_exact_mut(out_w as usize * 3).enumerate() {
        let row = &src_raw[y * row_len..(y + 1) * row_len];
        for (xx, px) in row_out.chunks_exact_mut(3).enumerate() {
            for (ch, value) in px.iter_mut().enumerate() {
                let mut acc: i64 = 1 << (PRECISION_BITS - 1);
                for (i, k) in c.weights[xx].iter().enumerate() {
                    acc += i64::from(row[(c.first[xx] + i) * 3 + ch]) * i64::from(*k);
                }
                *value = clip8(acc);
            }
        }
    }
    out
}

fn vertical(src: &RgbImage, out_h: u32, filter: Filter) -> RgbImage {
    let (w, h) = src.dimensions();
    let c = coefficients(h as usize, out_h as usize, filter);
    let mut out = RgbImage::new(w, out_h);
    let row_len = w as usize * 3;
    let src_raw = src.as_raw();
    for (yy, row_out) in out.chunks_exact_mut(row_len).enumerate() {
        for (i, value) in row_out.iter_mut().enumerate() {
            let mut acc: i64 = 1 << (PRECISION_BITS - 1);
            for (j, k) in c.weights[yy].iter().enumerate() {
                acc += i64::from(src_raw[(c.first[yy] + j) * row_len + i]) * i64::from(*k);
            }
            *value = clip8(acc);
        }
    }
    out
}

fn nearest(src: &RgbImage, out_w: u32, out_h: u32) -> RgbImage {
    let (w, h) = src.dimensions();
    let sx = f64::from(w) / f64::from(out_w);
    let sy = f64::from(h) / f64::from(out_h);
    RgbImage::from_fn(out_w, out_h, |x, y| {
        let src_x = (((f64::from(x) + 0.5) * sx) as u32).min(w - 1);
        let src_y = (((f64::from(y) + 0.5) * sy) as u32).min(h - 1);
        *src.get_pixel(src_x, src_y)
    })
}

/// Resizes like Pillow's `image.resize((out_w, out_h), filter)`; an axis whose
/// size does not change is not resampled (as in Pillow).
pub fn resize(src: &RgbImage, out_w: u32, out_h: u32, filter: Filter) -> RgbImage {
    let (w, h) = src.dimensions();
    if (w, h) == (out_w, out_h) {
        return src.clone();
    }
    if filter == Filter::Nearest {
        return nearest(src, out_w, out_h);
    }
    let stage = if w != out_w {
        horizontal(src, out_w, filter)
    } else {
        src.clone()
    };
    if h != out_h {
        vertical(&stage, out_h, filter)
    } else {
        stage
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weights_sum_to_one_in_fixed_point() {
        for filter in [Filter::Bilinear, Filter::Bicubic, Filter::Lanczos3] {
            for (n_in, n_out) in [(640, 224), (64, 64 * 3), (7, 3), (3, 7)] {
                let c = coefficients(n_in, n_out, filter);
                for w in &c.weights {
                    let sum: i64 = w.iter().map(|&k| i64::from(k)).sum();
                    // Rounding each weight can move the sum by at most half a unit per tap.
                    assert!(
                        (sum - (1 << PRECISION_BITS)).abs() <= w.len() as i64,
                        "{filter:?} {sum}"
                    );
                }
            }
        }
    }

    #[test]
    fn halving_with_bilinear_averages_pixel_pairs() {
        // Worked by hand: shrinking 4 -> 2 gives scale 2, support 2, and for output 0
        // (centre 1.0) taps at sources 0..=2 with triangle weights (0.75, 0.75, 0.25)
        // before normalising -> (3/7, 3/7, 1/7). Sources 10, 20, 30: (30+60+30)/7 = 17.14 -> 17.
        let src = RgbImage::from_fn(4, 1, |x, _| image::Rgb([10 * (x as u8 + 1); 3]));
        let out = resize(&src, 2, 1, Filter::Bilinear);
        assert_eq!(out.get_pixel(0, 0).0[0], 17);
    }

    #[test]
    fn constant_images_stay_constant() {
        let src = RgbImage::from_pixel(37, 23, image::Rgb([200, 13, 90]));
        for filter in [
            Filter::Nearest,
            Filter::Bilinear,
            Filter::Bicubic,
            Filter::Lanczos3,
        ] {
            let out = resize(&src, 11, 29, filter);
            assert!(out.pixels().all(|p| p.0 == [200, 13, 90]), "{filter:?}");
        }
    }
}

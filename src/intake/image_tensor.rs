//! The bundle's resize rule and normalisation: RGB pixels to a `[3, size, size]`
//! float tensor, channel first, `(pixel / 255 - mean) / std`.

use image::RgbImage;

use super::image_decode::{decode_rgb, DecodeError, ImageLimits};
use super::resample;
use crate::bundle::{ImageSpec, ResizeRule};

/// An image file's bytes as the encoder's input: decoded (pixel and decoded-size
/// limits checked from the header), resized and normalised. The one way bytes become a tensor,
/// for the server, the offline commands and the parity tests alike.
pub fn tensor_from_bytes(
    bytes: &[u8],
    limits: &ImageLimits,
    spec: &ImageSpec,
) -> Result<ImageTensor, DecodeError> {
    let rgb = decode_rgb(bytes, limits)?;
    let (width, height) = rgb.dimensions();
    Ok(ImageTensor {
        width,
        height,
        values: to_tensor(&rgb, spec),
    })
}

/// A decoded image's size and its encoder input.
#[derive(Debug, Clone, PartialEq)]
pub struct ImageTensor {
    pub width: u32,
    pub height: u32,
    /// `[3, size, size]`, channel first.
    pub values: Vec<f32>,
}

/// Brings `image` to the encoder's square input and normalises it.
///
/// `shorter-then-crop` sends the shorter side to `size` and the other to
/// `round(other * size / shorter)`, then crops the centre at
/// `round((side - size) / 2)`; halves round up (`docs/bundles.md`), as the
/// fixtures' preprocessing does.
pub fn to_tensor(image: &RgbImage, spec: &ImageSpec) -> Vec<f32> {
    let size = spec.size;
    let square = match spec.resize {
        ResizeRule::Stretch => resample::resize(image, size, size, spec.filter),
        ResizeRule::ShorterThenCrop => {
            let (w, h) = image.dimensions();
            let (new_w, new_h) = if w <= h {
                (size, scaled_side(h, size, w))
            } else {
                (scaled_side(w, size, h), size)
            };
            let resized = resample::resize(image, new_w, new_h, spec.filter);
            let left = half_up(f64::from(new_w - size) / 2.0);
            let top = half_up(f64::from(new_h - size) / 2.0);
            image::imageops::crop_imm(&resized, left, top, size, size).to_image()
        }
    };
    normalise(&square, spec)
}

fn scaled_side(side: u32, size: u32, shorter: u32) -> u32 {
    half_up(f64::from(side) * f64::from(size) / f64::from(shorter)).max(size)
}

fn half_up(x: f64) -> u32 {
    x.round() as u32
}

fn normalise(image: &RgbImage, spec: &ImageSpec) -> Vec<f32> {
    let (w, h) = image.dimensions();
    let plane = (w * h) as usize;
    let mut out = vec![0f32; 3 * plane];
    for (i, pixel) in image.pixels().enumerate() {
        for c in 0..3 {
            out[c * plane + i] = (f32::from(pixel.0[c]) / 255.0 - spec.mean[c]) / spec.std[c];
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bundle::Filter;

    fn spec(size: u32, resize: ResizeRule) -> ImageSpec {
        ImageSpec {
            file: String::new(),
            input: String::new(),
            output: String::new(),
            size,
            resize,
            filter: Filter::Bilinear,
            mean: [0.5, 0.25, 0.0],
            std: [0.5, 0.25, 1.0],
        }
    }

    #[test]
    fn normalises_channel_first() {
        let mut img = RgbImage::new(2, 2);
        img.put_pixel(1, 0, image::Rgb([255, 0, 51]));
        let t = to_tensor(&img, &spec(2, ResizeRule::Stretch));
        // Layout [c][y][x], planes of 4; pixel (1,0): (1-0.5)/0.5 = 1, (0-0.25)/0.25 = -1, 0.2/1 = 0.2.
        assert_eq!(t.len(), 12);
        assert!(
            (t[1] - 1.0).abs() < 1e-6 && (t[5] + 1.0).abs() < 1e-6 && (t[9] - 0.2).abs() < 1e-6
        );
        assert!((t[0] + 1.0).abs() < 1e-6);
    }

    #[test]
    fn crop_keeps_the_centre_of_a_wide_image() {
        // 6 x 2 image, columns coloured by index; to 2 x 2 with nearest: shorter side already 2,
        // so no resize, and the crop starts at round((6 - 2) / 2) = 2: columns 2 and 3.
        let img = RgbImage::from_fn(6, 2, |x, _| image::Rgb([x as u8 * 40, 0, 0]));
        let mut s = spec(2, ResizeRule::ShorterThenCrop);
        s.mean = [0.0; 3];
        s.std = [1.0; 3];
        let t = to_tensor(&img, &s);
        assert!((t[0] - 80.0 / 255.0).abs() < 1e-6 && (t[1] - 120.0 / 255.0).abs() < 1e-6);
    }

    #[test]
    fn rounding_takes_halves_up() {
        assert_eq!(half_up(37.5), 38);
        assert_eq!(half_up(36.5), 37);
        assert_eq!(scaled_side(640, 224, 480), 299);
    }
}

//! Small previews of probe images for the reports: decoded under the same
//! limits as any image, shrunk to fit a square, and written as a JPEG
//! `data:` URI so a report stays one self-contained file.

use base64::Engine as _;
use image::codecs::jpeg::JpegEncoder;
use image::imageops::FilterType;

use super::image_decode::{decode_rgb, DecodeError, ImageLimits};

/// Longest side of a thumbnail in pixels: twice the 64 px it is shown at,
/// so it stays sharp on a high-density screen.
pub const THUMBNAIL_SIDE: u32 = 128;

/// JPEG quality of a thumbnail: a 128 px preview is about 4 KB at 80, small
/// enough for a report with a few dozen of them (common practice, no source).
const JPEG_QUALITY: u8 = 80;

/// The image in `bytes` shrunk to fit `THUMBNAIL_SIDE` (aspect kept, never
/// enlarged), as `data:image/jpeg;base64,...`.
pub fn thumbnail_data_uri(bytes: &[u8], limits: &ImageLimits) -> Result<String, DecodeError> {
    let image = decode_rgb(bytes, limits)?;
    let (w, h) = image.dimensions();
    let scale = (f64::from(THUMBNAIL_SIDE) / f64::from(w.max(h))).min(1.0);
    let (tw, th) = (
        ((f64::from(w) * scale).round() as u32).max(1),
        ((f64::from(h) * scale).round() as u32).max(1),
    );
    let small = image::imageops::resize(&image, tw, th, FilterType::Triangle);
    let mut jpeg = Vec::new();
    JpegEncoder::new_with_quality(&mut jpeg, JPEG_QUALITY)
        .encode_image(&small)
        // Encoding a decoded RGB image in memory fails only on a bug in the encoder.
        .map_err(|e| DecodeError::Corrupt {
            format: "JPEG thumbnail",
            message: e.to_string(),
        })?;
    Ok(format!(
        "data:image/jpeg;base64,{}",
        base64::engine::general_purpose::STANDARD.encode(jpeg)
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn png(w: u32, h: u32) -> Vec<u8> {
        let image = image::RgbImage::from_fn(w, h, |x, y| {
            image::Rgb([(x % 256) as u8, (y % 256) as u8, 90])
        });
        let mut out = std::io::Cursor::new(Vec::new());
        image.write_to(&mut out, image::ImageFormat::Png).unwrap();
        out.into_inner()
    }

    fn decoded(uri: &str) -> image::RgbImage {
        let b64 = uri
            .strip_prefix("data:image/jpeg;base64,")
            .expect("a JPEG data URI");
        let bytes = base64::engine::general_purpose::STANDARD
            .decode(b64)
            .unwrap();
        image::load_from_memory_with_format(&bytes, image::ImageFormat::Jpeg)
            .unwrap()
            .to_rgb8()
    }

    #[test]
    fn shrinks_to_fit_keeping_the_aspect_and_never_enlarges() {
        let uri = thumbnail_data_uri(&png(640, 480), &ImageLimits::default()).unwrap();
        assert_eq!(decoded(&uri).dimensions(), (128, 96));
        let uri = thumbnail_data_uri(&png(40, 30), &ImageLimits::default()).unwrap();
        assert_eq!(decoded(&uri).dimensions(), (40, 30));
    }

    #[test]
    fn keeps_the_picture_and_refuses_what_any_decode_refuses() {
        // A left-to-right red ramp survives the shrink: red grows along x.
        let uri = thumbnail_data_uri(&png(256, 256), &ImageLimits::default()).unwrap();
        let small = decoded(&uri);
        assert!(small.get_pixel(120, 60)[0] > small.get_pixel(8, 60)[0] + 150);
        assert!(thumbnail_data_uri(b"not an image", &ImageLimits::default()).is_err());
        let tight = ImageLimits {
            max_pixels: 100,
            ..ImageLimits::default()
        };
        assert!(thumbnail_data_uri(&png(640, 480), &tight).is_err());
    }
}

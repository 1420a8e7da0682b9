//! Image bytes to upright 8-bit RGB, with the pixel and decoded-size limits
//! checked from the header, so a small file declaring 50,000 x 50,000 pixels,
//! or 40 megapixels at 16 bits per sample, is refused before any decoding.

use std::io::Cursor;

use image::{ImageDecoder, ImageFormat, ImageReader, RgbImage};

/// Default for the largest `width * height` befit decodes (40 megapixels:
/// above any camera frame a trainer feeds, 120 MB once decoded to 8-bit RGB,
/// so a handful at once stays well inside a server's memory).
pub const DEFAULT_MAX_PIXELS: u64 = 40_000_000;

/// Default for the bytes one image may take once decoded, as its header
/// declares them (width x height x channels x bytes per sample): 40
/// megapixels of 8-bit RGBA. A 40-megapixel PNG of 16-bit RGB (240 MB
/// decoded, from a file of a few hundred kilobytes) is over it.
pub const DEFAULT_MAX_DECODED_BYTES: u64 = 4 * DEFAULT_MAX_PIXELS;

/// The limits one decode is held to.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ImageLimits {
    /// Largest `width * height` (`--max-pixels`).
    pub max_pixels: u64,
    /// Largest decoded size in bytes, from the header (`--max-decoded-bytes`).
    pub max_decoded_bytes: u64,
}

impl Default for ImageLimits {
    fn default() -> Self {
        ImageLimits {
            max_pixels: DEFAULT_MAX_PIXELS,
            max_decoded_bytes: DEFAULT_MAX_DECODED_BYTES,
        }
    }
}

/// What a header declares, read without decoding any pixel.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Header {
    pub format: ImageFormat,
    pub width: u32,
    pub height: u32,
    /// width x height x channels x bytes per sample, as the decoder would allocate.
    pub decoded_bytes: u64,
}

impl Header {
    /// Refuses an image over `limits`, or with no pixels.
    pub fn check(&self, limits: &ImageLimits) -> Result<(), DecodeError> {
        let (width, height) = (self.width, self.height);
        let pixels = u64::from(width) * u64::from(height);
        if pixels == 0 {
            return Err(DecodeError::Empty { width, height });
        }
        if pixels > limits.max_pixels {
            return Err(DecodeError::TooLarge {
                width,
                height,
                pixels,
                limit: limits.max_pixels,
            });
        }
        if self.decoded_bytes > limits.max_decoded_bytes {
            return Err(DecodeError::TooManyBytes {
                width,
                height,
                bytes: self.decoded_bytes,
                limit: limits.max_decoded_bytes,
            });
        }
        Ok(())
    }
}

/// Why bytes could not become an image.
#[derive(Debug, thiserror::Error)]
pub enum DecodeError {
    #[error("not a PNG, JPEG or WebP image")]
    UnknownFormat,
    #[error("{format} image could not be decoded: {message}")]
    Corrupt {
        format: &'static str,
        message: String,
    },
    #[error("image declares {width} x {height} = {pixels} pixels, over the limit of {limit} (--max-pixels)")]
    TooLarge {
        width: u32,
        height: u32,
        pixels: u64,
        limit: u64,
    },
    #[error("image declares {width} x {height} pixels that take {bytes} bytes decoded, over the limit of {limit} (--max-decoded-bytes)")]
    TooManyBytes {
        width: u32,
        height: u32,
        bytes: u64,
        limit: u64,
    },
    #[error("image has no pixels ({width} x {height})")]
    Empty { width: u32, height: u32 },
}

impl DecodeError {
    /// Whether the image was refused for its size rather than its bytes.
    pub fn is_too_large(&self) -> bool {
        matches!(
            self,
            DecodeError::TooLarge { .. } | DecodeError::TooManyBytes { .. }
        )
    }
}

/// What the header declares, before any decoding. The header is read without
/// the decoder's own allocation limits (only a few bytes are read), so an
/// absurd size is reported as [`DecodeError::TooLarge`], not as a corrupt file.
pub fn read_header(bytes: &[u8]) -> Result<Header, DecodeError> {
    let format = sniff(bytes)?;
    let mut reader = ImageReader::with_format(Cursor::new(bytes), format);
    reader.no_limits();
    let decoder = reader.into_decoder().map_err(|e| corrupt(format, e))?;
    let (width, height) = decoder.dimensions();
    Ok(Header {
        format,
        width,
        height,
        decoded_bytes: decoder.total_bytes(),
    })
}

/// Width and height as the header declares them, before any decoding.
pub fn peek_dimensions(bytes: &[u8]) -> Result<(ImageFormat, u32, u32), DecodeError> {
    let header = read_header(bytes)?;
    Ok((header.format, header.width, header.height))
}

/// Decodes `bytes` within `limits`, applies EXIF orientation, and converts to
/// RGB (alpha dropped, greyscale replicated).
pub fn decode_rgb(bytes: &[u8], limits: &ImageLimits) -> Result<RgbImage, DecodeError> {
    let header = read_header(bytes)?;
    header.check(limits)?;
    let (format, width, height) = (header.format, header.width, header.height);
    let mut reader = ImageReader::with_format(Cursor::new(bytes), format);
    let mut decode_limits = image::Limits::default();
    decode_limits.max_image_width = Some(width);
    decode_limits.max_image_height = Some(height);
    // The declared size, the RGB copy made after it, plus slack for the decoder's own buffers.
    let rgb_bytes = u64::from(width) * u64::from(height) * 3;
    decode_limits.max_alloc = Some(
        header
            .decoded_bytes
            .saturating_add(rgb_bytes)
            .saturating_add(1 << 24),
    );
    reader.limits(decode_limits);
    let mut decoder = reader.into_decoder().map_err(|e| corrupt(format, e))?;
    let orientation = decoder
        .orientation()
        .unwrap_or(image::metadata::Orientation::NoTransforms);
    let mut image = image::DynamicImage::from_decoder(decoder).map_err(|e| corrupt(format, e))?;
    image.apply_orientation(orientation);
    Ok(image.into_rgb8())
}

fn sniff(bytes: &[u8]) -> Result<ImageFormat, DecodeError> {
    match image::guess_format(bytes) {
        Ok(f @ (ImageFormat::Png | ImageFormat::Jpeg | ImageFormat::WebP)) => Ok(f),
        _ => Err(DecodeError::UnknownFormat),
    }
}

fn corrupt(format: ImageFormat, e: image::ImageError) -> DecodeError {
    let format = match format {
        ImageFormat::Png => "PNG",
        ImageFormat::Jpeg => "JPEG",
        _ => "WebP",
    };
    DecodeError::Corrupt {
        format,
        message: e.to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn garbage_is_an_error() {
        assert!(matches!(
            decode_rgb(b"hello world", &ImageLimits::default()),
            Err(DecodeError::UnknownFormat)
        ));
        // Limits read from headers are tested with hand-made headers in tests/integration/abuse.rs.
    }

    #[test]
    fn round_trips_a_small_png_and_drops_alpha() {
        let mut rgba = image::RgbaImage::new(3, 2);
        rgba.put_pixel(2, 1, image::Rgba([10, 20, 30, 0]));
        let mut bytes = Vec::new();
        rgba.write_to(&mut Cursor::new(&mut bytes), ImageFormat::Png)
            .unwrap();
        let rgb = decode_rgb(&bytes, &ImageLimits::default()).unwrap();
        assert_eq!(rgb.dimensions(), (3, 2));
        assert_eq!(rgb.get_pixel(2, 1).0, [10, 20, 30]);
    }
}

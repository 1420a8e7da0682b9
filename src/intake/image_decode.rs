//! Image bytes to upright 8-bit RGB, with the pixel limit checked from the
//! header so a small file declaring 50,000 x 50,000 pixels is refused cheaply.

use std::io::Cursor;

use image::{ImageDecoder, ImageFormat, ImageReader, RgbImage};

/// Default for the largest `width * height` befit decodes (40 megapixels:
/// above any camera frame a trainer feeds, 120 MB once decoded to 8-bit RGB,
/// so a handful at once stays well inside a server's memory).
pub const DEFAULT_MAX_PIXELS: u64 = 40_000_000;

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
    #[error("image has no pixels ({width} x {height})")]
    Empty { width: u32, height: u32 },
}

/// Width and height as the header declares them, before any decoding.
pub fn peek_dimensions(bytes: &[u8]) -> Result<(ImageFormat, u32, u32), DecodeError> {
    let format = sniff(bytes)?;
    let reader = ImageReader::with_format(Cursor::new(bytes), format);
    let (width, height) = reader.into_dimensions().map_err(|e| corrupt(format, e))?;
    Ok((format, width, height))
}

/// Decodes `bytes`, applies EXIF orientation, and converts to RGB
/// (alpha dropped, greyscale replicated).
pub fn decode_rgb(bytes: &[u8], max_pixels: u64) -> Result<RgbImage, DecodeError> {
    let (format, width, height) = peek_dimensions(bytes)?;
    let pixels = u64::from(width) * u64::from(height);
    if pixels == 0 {
        return Err(DecodeError::Empty { width, height });
    }
    if pixels > max_pixels {
        return Err(DecodeError::TooLarge {
            width,
            height,
            pixels,
            limit: max_pixels,
        });
    }
    let mut reader = ImageReader::with_format(Cursor::new(bytes), format);
    let mut limits = image::Limits::default();
    limits.max_image_width = Some(width);
    limits.max_image_height = Some(height);
    // Room for the decoded image at 16 bits per channel with alpha, plus slack.
    limits.max_alloc = Some(pixels.saturating_mul(8).saturating_add(1 << 24));
    reader.limits(limits);
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

    /// A PNG whose IHDR declares `width x height` but whose one IDAT chunk holds
    /// an empty zlib stream: a few dozen bytes claiming any size.
    ///
    /// Section numbers are those of "Portable Network Graphics (PNG) Specification
    /// (Second Edition)", W3C Recommendation 10 November 2003 = ISO/IEC 15948:2003
    /// (quoted from memory).
    pub(crate) fn png_header_only(width: u32, height: u32) -> Vec<u8> {
        // IHDR (11.2.2): width and height as 4-byte big-endian integers, then bit depth 8,
        // colour type 2 (truecolour), compression method 0, filter method 0, no interlace.
        let mut ihdr = Vec::new();
        ihdr.extend_from_slice(&width.to_be_bytes());
        ihdr.extend_from_slice(&height.to_be_bytes());
        ihdr.extend_from_slice(&[8, 2, 0, 0, 0]);
        // The PNG signature (5.2): 137 80 78 71 13 10 26 10.
        let mut png = b"\x89PNG\r\n\x1a\n".to_vec();
        // zlib header 78 9c (RFC 1950, 2.2: deflate with a 32 KiB window, default level),
        // one final block with fixed Huffman codes holding only the end-of-block code
        // (RFC 1951, 3.2.3 and 3.2.6: bits 1, 01, 0000000, then padding: bytes 03 00), and the
        // Adler-32 of no bytes, 1 (RFC 1950, 8.2). Python's zlib.compress(b"") gives these bytes.
        let empty_zlib = [0x78, 0x9c, 0x03, 0x00, 0x00, 0x00, 0x00, 0x01];
        // Each chunk (5.3): data length (4 bytes, big endian), type, data, CRC; IHDR first,
        // then IDAT (11.2.4), IEND (11.2.5) last.
        for (kind, data) in [
            (&b"IHDR"[..], &ihdr[..]),
            (b"IDAT", &empty_zlib),
            (b"IEND", &[]),
        ] {
            let mut chunk = kind.to_vec();
            chunk.extend_from_slice(data);
            png.extend_from_slice(&(data.len() as u32).to_be_bytes());
            png.extend_from_slice(&chunk);
            // Chunk CRC over type and data (5.5; the CRC-32 of ISO 3309 / ITU-T V.42).
            png.extend_from_slice(&crc32(&chunk).to_be_bytes());
        }
        png
    }

    /// CRC-32 bit by bit with the reflected polynomial 0xEDB88320, initial value and final
    /// XOR all ones (PNG specification 5.5 and its sample code in Annex D).
    fn crc32(data: &[u8]) -> u32 {
        let mut crc = 0xFFFF_FFFFu32;
        for &byte in data {
            crc ^= u32::from(byte);
            for _ in 0..8 {
                crc = if crc & 1 == 1 {
                    (crc >> 1) ^ 0xEDB8_8320
                } else {
                    crc >> 1
                };
            }
        }
        !crc
    }

    #[test]
    fn crc_matches_the_published_check_value() {
        // CRC-32 check value for "123456789" is 0xCBF43926 (the catalogue of parametrised CRCs, CRC-32/ISO-HDLC).
        assert_eq!(crc32(b"123456789"), 0xCBF4_3926);
    }

    #[test]
    fn refuses_a_huge_declared_image_before_decoding() {
        let bytes = png_header_only(50_000, 50_000);
        assert_eq!(peek_dimensions(&bytes).unwrap().1, 50_000);
        match decode_rgb(&bytes, DEFAULT_MAX_PIXELS) {
            Err(DecodeError::TooLarge { pixels, .. }) => assert_eq!(pixels, 2_500_000_000),
            other => panic!("expected TooLarge, got {other:?}"),
        }
    }

    #[test]
    fn garbage_and_truncated_images_are_errors() {
        assert!(matches!(
            decode_rgb(b"hello world", DEFAULT_MAX_PIXELS),
            Err(DecodeError::UnknownFormat)
        ));
        let truncated = png_header_only(4, 4);
        assert!(matches!(
            decode_rgb(&truncated, DEFAULT_MAX_PIXELS),
            Err(DecodeError::Corrupt { .. })
        ));
    }

    #[test]
    fn round_trips_a_small_png_and_drops_alpha() {
        let mut rgba = image::RgbaImage::new(3, 2);
        rgba.put_pixel(2, 1, image::Rgba([10, 20, 30, 0]));
        let mut bytes = Vec::new();
        rgba.write_to(&mut Cursor::new(&mut bytes), ImageFormat::Png)
            .unwrap();
        let rgb = decode_rgb(&bytes, DEFAULT_MAX_PIXELS).unwrap();
        assert_eq!(rgb.dimensions(), (3, 2));
        assert_eq!(rgb.get_pixel(2, 1).0, [10, 20, 30]);
    }
}

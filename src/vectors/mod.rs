//! The shared-space math: L2 normalisation and cosine similarity, and the
//! [`Embedder`] seam through which offline work (bank import, calibration,
//! drift) asks for vectors without knowing how encoders are run.

use std::path::PathBuf;

use ndarray::Array2;

/// Why an [`Embedder`] could not produce vectors; the message is for people.
#[derive(Debug, thiserror::Error)]
#[error("{message}")]
pub struct EmbedError {
    pub message: String,
    /// The input is to blame (a missing or undecodable image, an unknown id),
    /// not the encoder: skipping that row is the remedy.
    pub input: bool,
}

impl EmbedError {
    /// The encoder failed.
    pub fn encoder(message: impl Into<String>) -> EmbedError {
        EmbedError {
            message: message.into(),
            input: false,
        }
    }

    /// The input could not be used.
    pub fn input(message: impl Into<String>) -> EmbedError {
        EmbedError {
            message: message.into(),
            input: true,
        }
    }
}

/// Something that maps captions and image files into one shared space.
///
/// Every returned row is L2-normalised, so a dot product is a cosine.
pub trait Embedder: Send + Sync {
    /// Length of every vector.
    fn dimension(&self) -> usize;
    /// One row per caption, in order.
    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError>;
    /// One row per image file, in order.
    fn embed_image_files(&self, paths: &[PathBuf]) -> Result<Array2<f32>, EmbedError>;
}

/// Scales `v` to unit length in place; a zero vector stays zero (its cosine
/// with anything is then 0, not NaN).
pub fn normalise(v: &mut [f32]) {
    let norm = v
        .iter()
        .map(|x| f64::from(*x) * f64::from(*x))
        .sum::<f64>()
        .sqrt();
    if norm > 0.0 {
        for x in v.iter_mut() {
            *x = (f64::from(*x) / norm) as f32;
        }
    }
}

/// Dot product accumulated in f64; on unit vectors, their cosine similarity.
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    a.iter()
        .zip(b)
        .map(|(x, y)| f64::from(*x) * f64::from(*y))
        .sum::<f64>() as f32
}

/// Cosine similarity of two vectors of any length (0 when either is zero).
pub fn cosine(a: &[f32], b: &[f32]) -> f32 {
    let na = dot(a, a).sqrt();
    let nb = dot(b, b).sqrt();
    if na == 0.0 || nb == 0.0 {
        0.0
    } else {
        (dot(a, b) / (na * nb)).clamp(-1.0, 1.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cosine_of_worked_vectors() {
        // cos([1,2,3],[4,5,6]) = 32 / (sqrt(14) * sqrt(77)) = 0.974631846... (worked by hand).
        assert!((cosine(&[1.0, 2.0, 3.0], &[4.0, 5.0, 6.0]) - 0.974_631_85).abs() < 1e-6);
        assert_eq!(cosine(&[0.0, 0.0], &[1.0, 0.0]), 0.0);
        let mut v = vec![3.0, 4.0];
        normalise(&mut v);
        assert_eq!(v, vec![0.6, 0.8]);
        assert!((dot(&v, &v) - 1.0).abs() < 1e-7);
    }
}

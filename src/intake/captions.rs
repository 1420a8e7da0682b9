//! Captions to token ids: the bundle's prefix, the tokenizer with its special
//! tokens, truncation at the token limit (reported per caption), and padding
//! of a batch.

use std::path::Path;

use ndarray::Array2;
use tokenizers::{Tokenizer, TruncationDirection, TruncationParams, TruncationStrategy};

use crate::bundle::{Padding, TextSpec};

/// Why a caption could not be tokenised.
#[derive(Debug, thiserror::Error)]
pub enum CaptionError {
    #[error("{path}: not a tokenizer file the `tokenizers` library can load: {message}")]
    Load { path: String, message: String },
    #[error("tokenizer rejected the settings of bundle.toml [text]: {0}")]
    Settings(String),
    #[error("caption could not be tokenised: {0}")]
    Encode(String),
    #[error("caption has no tokens after tokenisation")]
    NoTokens,
}

/// A tokenised caption, unpadded.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Tokens {
    pub ids: Vec<i64>,
    /// The caption was cut at the bundle's `max_tokens`.
    pub truncated: bool,
}

/// The bundle's tokenizer with its `[text]` settings applied.
pub struct CaptionTokenizer {
    tokenizer: Tokenizer,
    prefix: String,
}

impl CaptionTokenizer {
    /// Loads `tokenizer.json`; its own padding is switched off (befit pads per
    /// batch) and its truncation set to `max_tokens`, special tokens included.
    pub fn load(path: &Path, spec: &TextSpec) -> Result<CaptionTokenizer, CaptionError> {
        let mut tokenizer = Tokenizer::from_file(path).map_err(|e| CaptionError::Load {
            path: path.display().to_string(),
            message: e.to_string(),
        })?;
        tokenizer.with_padding(None);
        tokenizer
            .with_truncation(Some(TruncationParams {
                max_length: spec.max_tokens,
                strategy: TruncationStrategy::LongestFirst,
                stride: 0,
                direction: TruncationDirection::Right,
            }))
            .map_err(|e| CaptionError::Settings(e.to_string()))?;
        Ok(CaptionTokenizer {
            tokenizer,
            prefix: spec.prefix.clone(),
        })
    }

    /// The id of the tokenizer's unknown token: none for models without one
    /// (byte-level BPE) and for Unigram models, whose id the library keeps private.
    pub fn unknown_id(&self) -> Option<i64> {
        use tokenizers::models::ModelWrapper;
        let token = match self.tokenizer.get_model() {
            ModelWrapper::WordLevel(m) => Some(m.unk_token.as_str()),
            ModelWrapper::WordPiece(m) => Some(m.unk_token.as_str()),
            ModelWrapper::BPE(m) => m.unk_token.as_deref(),
            ModelWrapper::Unigram(_) => None,
        }?;
        self.tokenizer.token_to_id(token).map(i64::from)
    }

    /// Tokenises one caption.
    pub fn encode(&self, caption: &str) -> Result<Tokens, CaptionError> {
        let text = if self.prefix.is_empty() {
            caption.to_string()
        } else {
            format!("{}{caption}", self.prefix)
        };
        let encoding = self
            .tokenizer
            .encode(text, true)
            .map_err(|e| CaptionError::Encode(e.to_string()))?;
        let ids: Vec<i64> = encoding.get_ids().iter().map(|&id| i64::from(id)).collect();
        if ids.is_empty() {
            return Err(CaptionError::NoTokens);
        }
        Ok(Tokens {
            ids,
            truncated: !encoding.get_overflowing().is_empty(),
        })
    }
}

/// Pads token sequences on the right into `[batch, width]` ids and a mask
/// that is 1 on real tokens; `width` is the longest sequence or `max_tokens`.
pub fn pad_batch(
    sequences: &[&[i64]],
    pad_id: u32,
    padding: Padding,
    max_tokens: usize,
) -> (Array2<i64>, Array2<i64>) {
    let longest = sequences.iter().map(|s| s.len()).max().unwrap_or(0);
    let width = match padding {
        Padding::Longest => longest.max(1),
        Padding::Fixed => max_tokens.max(longest),
    };
    let mut ids = Array2::from_elem((sequences.len(), width), i64::from(pad_id));
    let mut mask = Array2::zeros((sequences.len(), width));
    for (row, seq) in sequences.iter().enumerate() {
        for (col, &id) in seq.iter().enumerate() {
            ids[[row, col]] = id;
            mask[[row, col]] = 1;
        }
    }
    (ids, mask)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pads_right_with_mask() {
        let (ids, mask) = pad_batch(&[&[5, 6, 7], &[8]], 0, Padding::Longest, 32);
        assert_eq!(ids, ndarray::array![[5, 6, 7], [8, 0, 0]]);
        assert_eq!(mask, ndarray::array![[1, 1, 1], [1, 0, 0]]);
        let (ids, _) = pad_batch(&[&[5]], 9, Padding::Fixed, 4);
        assert_eq!(ids, ndarray::array![[5, 9, 9, 9]]);
    }
}

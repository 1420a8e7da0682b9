//! Embedding a probe set with one bundle, in batches, with progress.
//!
//! An encoder reports failure for a whole batch; when one fails, its items are
//! retried one by one to find the rows at fault (an image that does not
//! decode), which are reported by line, or dropped with a warning when
//! skipping bad rows. Images go first, so captions of a dropped row are never
//! embedded.

mod batches;
mod encoder;

use ndarray::Array2;

use super::cancel::Cancel;
use super::set::{ImageSource, ProbeSet};
use super::{ProbeError, RowIssue, RowProblem};
use crate::stats::ProbeVectors;
use batches::{embed_in_batches, Batches, Tower};
pub use encoder::{ImageFiles, ProbeEncoder};

/// Default images per encoder call: enough to keep an encoder busy, few
/// enough that a retry after a failure is cheap.
pub const DEFAULT_IMAGE_BATCH: usize = 32;

/// Default captions per encoder call.
pub const DEFAULT_TEXT_BATCH: usize = 256;

/// How a probe set is embedded.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct EmbedOptions {
    /// Name of the bundle, carried into the vectors and reports (e.g. `blocks@v1`).
    pub bundle: String,
    /// Drop rows the encoder fails on (returned as warnings) instead of failing.
    pub skip_bad: bool,
    /// Images per encoder call, at least 1.
    pub image_batch: usize,
    /// Captions per encoder call, at least 1.
    pub text_batch: usize,
    /// Checked before every encoder batch: once set, embedding stops with
    /// [`ProbeError::Cancelled`].
    pub cancel: Cancel,
}

impl Default for EmbedOptions {
    fn default() -> Self {
        EmbedOptions {
            bundle: String::new(),
            skip_bad: false,
            image_batch: DEFAULT_IMAGE_BATCH,
            text_batch: DEFAULT_TEXT_BATCH,
            cancel: Cancel::default(),
        }
    }
}

/// A probe set's vectors and the rows dropped on the way.
#[derive(Debug, Clone)]
pub struct EmbeddedProbe {
    /// Vectors of the rows kept, in `f64`, L2-normalised.
    pub vectors: ProbeVectors,
    /// Rows dropped because the encoder failed on them (only with `skip_bad`).
    pub skipped: Vec<RowIssue>,
}

/// Embeds every row of `set` with `encoder`.
///
/// `progress(done, total)` is called after every encoder batch; `total` is the
/// number of images plus captions (true and contrast) of the whole set, and
/// captions of dropped rows count as done when they are dropped.
pub fn embed_probe(
    set: &ProbeSet,
    encoder: &dyn ProbeEncoder,
    options: &EmbedOptions,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<EmbeddedProbe, ProbeError> {
    let image_batch = options.image_batch.max(1);
    let text_batch = options.text_batch.max(1);
    let dimension = encoder.dimension();
    let texts_of = |r: usize| set.rows[r].captions.len() + set.rows[r].contrasts.len();
    let total = set.rows.len() + (0..set.rows.len()).map(texts_of).sum::<usize>();
    let mut done = 0;

    // Images, one per row.
    let images: Vec<&ImageSource> = set.rows.iter().map(|r| &r.image).collect();
    let image_lines: Vec<usize> = set.rows.iter().map(|r| r.line).collect();
    let batches = |tower, batch| Batches {
        tower,
        batch,
        dimension,
        cancel: &options.cancel,
    };
    let image_vectors = embed_in_batches(
        &batches(Tower::Image, image_batch),
        &images,
        &image_lines,
        &|batch| encoder.embed_images(batch),
        &mut |n| {
            done += n;
            progress(done, total);
        },
    )?;
    let mut issues = Vec::new();
    let mut kept = Vec::new();
    for (r, result) in image_vectors.iter().enumerate() {
        match result {
            Ok(_) => kept.push(r),
            Err(message) => {
                issues.push(RowIssue {
                    line: set.rows[r].line,
                    problem: RowProblem::Image(message.clone()),
                });
                done += texts_of(r);
            }
        }
    }
    if !issues.is_empty() && !options.skip_bad {
        return Err(ProbeError::bad_rows(&set.source, issues));
    }

    // Captions of the kept rows: true captions first, then contrasts, each
    // remembering its row and where its row's run starts.
    let mut texts: Vec<String> = Vec::new();
    let mut text_rows: Vec<usize> = Vec::new();
    let mut slots = TextSlots {
        captions: vec![0; set.rows.len()],
        contrasts: vec![0; set.rows.len()],
    };
    for &r in &kept {
        slots.captions[r] = texts.len();
        for c in &set.rows[r].captions {
            texts.push(c.clone());
            text_rows.push(r);
        }
    }
    for &r in &kept {
        slots.contrasts[r] = texts.len();
        for c in &set.rows[r].contrasts {
            texts.push(c.caption.clone());
            text_rows.push(r);
        }
    }
    let text_lines: Vec<usize> = text_rows.iter().map(|&r| set.rows[r].line).collect();
    let text_vectors = embed_in_batches(
        &batches(Tower::Text, text_batch),
        &texts,
        &text_lines,
        &|batch| encoder.embed_texts(batch),
        &mut |n| {
            done += n;
            progress(done, total);
        },
    )?;
    let mut bad_text_rows: Vec<usize> = Vec::new();
    for (t, result) in text_vectors.iter().enumerate() {
        if let Err(message) = result {
            let r = text_rows[t];
            if !bad_text_rows.contains(&r) {
                bad_text_rows.push(r);
                issues.push(RowIssue {
                    line: set.rows[r].line,
                    problem: RowProblem::Text(message.clone()),
                });
            }
        }
    }
    if !bad_text_rows.is_empty() && !options.skip_bad {
        issues.sort_by_key(|i| i.line);
        return Err(ProbeError::bad_rows(&set.source, issues));
    }
    issues.sort_by_key(|i| i.line);

    let rows: Vec<usize> = kept
        .into_iter()
        .filter(|r| !bad_text_rows.contains(r))
        .collect();
    if rows.is_empty() {
        return Err(ProbeError::Empty {
            source_name: set.source.clone(),
            skipped: issues.len(),
        });
    }
    let mut vectors = assemble(
        set,
        options,
        dimension,
        &rows,
        &image_vectors,
        &text_vectors,
        &slots,
    );
    vectors
        .normalise()
        .expect("every vector was checked to be finite and non-zero");
    Ok(EmbeddedProbe {
        vectors,
        skipped: issues,
    })
}

/// Where each row's captions start in the list of texts embedded.
struct TextSlots {
    /// Index of the row's first true caption.
    captions: Vec<usize>,
    /// Index of the row's first contrast.
    contrasts: Vec<usize>,
}

/// Builds the vectors of rows `rows` (all embedded) from the per-item results.
fn assemble(
    set: &ProbeSet,
    options: &EmbedOptions,
    dimension: usize,
    rows: &[usize],
    image_vectors: &[Result<Vec<f32>, String>],
    text_vectors: &[Result<Vec<f32>, String>],
    slots: &TextSlots,
) -> ProbeVectors {
    let vector = |results: &[Result<Vec<f32>, String>], i: usize| -> Vec<f64> {
        let v = results[i].as_ref().expect("rows kept were embedded");
        v.iter().map(|&x| f64::from(x)).collect()
    };
    let to_matrix = |vs: Vec<Vec<f64>>| {
        let n = vs.len();
        Array2::from_shape_vec((n, dimension), vs.into_iter().flatten().collect())
            .expect("every vector has the encoder's dimension")
    };
    let mut images = Vec::with_capacity(rows.len());
    let (mut captions, mut caption_texts, mut caption_image) = (Vec::new(), Vec::new(), Vec::new());
    let mut first_caption = vec![0; set.rows.len()];
    for (image, &r) in rows.iter().enumerate() {
        images.push(vector(image_vectors, r));
        first_caption[r] = captions.len();
        for (j, text) in set.rows[r].captions.iter().enumerate() {
            captions.push(vector(text_vectors, slots.captions[r] + j));
            caption_texts.push(text.clone());
            caption_image.push(image);
        }
    }
    let (mut contrasts, mut contrast_texts, mut contrast_labels, mut contrast_from) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for &r in rows {
        for (j, c) in set.rows[r].contrasts.iter().enumerate() {
            contrasts.push(vector(text_vectors, slots.contrasts[r] + j));
            contrast_texts.push(c.caption.clone());
            contrast_labels.push(c.changed.clone());
            contrast_from.push(first_caption[r] + c.from);
        }
    }
    ProbeVectors {
        bundle: options.bundle.clone(),
        images: to_matrix(images),
        image_names: rows
            .iter()
            .map(|&r| set.rows[r].image_name.clone())
            .collect(),
        image_lines: rows.iter().map(|&r| set.rows[r].line).collect(),
        captions: to_matrix(captions),
        caption_texts,
        caption_image,
        contrasts: to_matrix(contrasts),
        contrast_texts,
        contrast_labels,
        contrast_from,
    }
}

#[cfg(test)]
mod tests;

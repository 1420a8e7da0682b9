//! Embedding a probe set with one bundle, in batches, with progress.
//!
//! An encoder reports failure for a whole batch; when one fails, its items are
//! retried one by one to find the rows at fault (an image that does not
//! decode), which are reported by line, or dropped with a warning when
//! skipping bad rows. Images go first, so captions of a dropped row are never
//! embedded.

use std::path::PathBuf;

use ndarray::Array2;

use crate::stats::ProbeVectors;
use crate::vectors::{EmbedError, Embedder};

use super::set::{ImageSource, ProbeSet};
use super::{ProbeError, RowIssue, RowProblem};

/// Default images per encoder call: enough to keep an encoder busy, few
/// enough that a retry after a failure is cheap.
pub const DEFAULT_IMAGE_BATCH: usize = 32;

/// Default captions per encoder call.
pub const DEFAULT_TEXT_BATCH: usize = 256;

/// Turns probe images and captions into vectors; every returned row is
/// L2-normalised.
///
/// Implemented by [`ImageFiles`] for an [`Embedder`] and image paths; a
/// caller with an image store implements it to resolve [`ImageSource::Id`].
pub trait ProbeEncoder {
    /// Length of every vector.
    fn dimension(&self) -> usize;
    /// One row per image, in order.
    fn embed_images(&self, images: &[&ImageSource]) -> Result<Array2<f32>, EmbedError>;
    /// One row per caption, in order.
    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError>;
}

/// A [`ProbeEncoder`] for probe sets whose images are files.
pub struct ImageFiles<'a>(pub &'a dyn Embedder);

impl ProbeEncoder for ImageFiles<'_> {
    fn dimension(&self) -> usize {
        self.0.dimension()
    }

    fn embed_images(&self, images: &[&ImageSource]) -> Result<Array2<f32>, EmbedError> {
        let paths = images
            .iter()
            .map(|image| match image {
                ImageSource::Path(p) => Ok(p.clone()),
                ImageSource::Id(id) => Err(EmbedError(format!(
                    "image id {id} can only be resolved by a server's image store; name the image by path"
                ))),
                ImageSource::Bytes(_) => Err(EmbedError(
                    "probe rows name images by path or id".to_string(),
                )),
            })
            .collect::<Result<Vec<PathBuf>, _>>()?;
        self.0.embed_image_files(&paths)
    }

    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
        self.0.embed_texts(texts)
    }
}

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
}

impl Default for EmbedOptions {
    fn default() -> Self {
        EmbedOptions {
            bundle: String::new(),
            skip_bad: false,
            image_batch: DEFAULT_IMAGE_BATCH,
            text_batch: DEFAULT_TEXT_BATCH,
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

/// Which tower, for messages.
#[derive(Clone, Copy)]
enum Tower {
    Image,
    Text,
}

impl Tower {
    fn name(self) -> &'static str {
        match self {
            Tower::Image => "image",
            Tower::Text => "text",
        }
    }
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
    let image_vectors = embed_in_batches(
        Tower::Image,
        &images,
        &image_lines,
        image_batch,
        dimension,
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
        Tower::Text,
        &texts,
        &text_lines,
        text_batch,
        dimension,
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

/// One encoder call on a batch of items.
type EncodeBatch<'a, T> = dyn Fn(&[T]) -> Result<Array2<f32>, EmbedError> + 'a;

/// Per item: its vector, or why the encoder failed on it alone.
type ItemVectors = Vec<Result<Vec<f32>, String>>;

/// Embeds `items` in batches of `batch`; per item, its vector or why the
/// encoder failed on it alone. `done(n)` is told after every batch.
fn embed_in_batches<T>(
    tower: Tower,
    items: &[T],
    lines: &[usize],
    batch: usize,
    dimension: usize,
    embed: &EncodeBatch<'_, T>,
    done: &mut dyn FnMut(usize),
) -> Result<ItemVectors, ProbeError> {
    let mut out = Vec::with_capacity(items.len());
    for (chunk_index, chunk) in items.chunks(batch).enumerate() {
        let start = chunk_index * batch;
        match embed(chunk) {
            Ok(m) => out.extend(rows_of(tower, &m, chunk.len(), dimension)?),
            Err(batch_error) => {
                // Find the culprits: every item alone.
                let mut singles = Vec::with_capacity(chunk.len());
                for one in chunk.chunks(1) {
                    singles.push(match embed(one) {
                        Ok(m) => rows_of(tower, &m, 1, dimension)?.remove(0),
                        Err(e) => Err(e.0),
                    });
                }
                if chunk.len() > 1 && singles.iter().all(Result::is_err) {
                    return Err(ProbeError::Encoder {
                        tower: tower.name(),
                        first_line: lines[start],
                        last_line: lines[start + chunk.len() - 1],
                        message: batch_error.0,
                    });
                }
                out.extend(singles);
            }
        }
        done(chunk.len());
    }
    Ok(out)
}

/// The rows of an encoder's answer, each checked to be usable.
fn rows_of(
    tower: Tower,
    m: &Array2<f32>,
    want_rows: usize,
    dimension: usize,
) -> Result<ItemVectors, ProbeError> {
    if m.dim() != (want_rows, dimension) {
        return Err(ProbeError::Shape {
            tower: tower.name(),
            got: m.dim(),
            want_rows,
            want_dimension: dimension,
        });
    }
    Ok(m.outer_iter()
        .map(|row| {
            let norm: f32 = row.iter().map(|x| x * x).sum::<f32>().sqrt();
            if norm.is_finite() && norm > 0.0 {
                Ok(row.to_vec())
            } else {
                Err("the encoder returned a zero or non-finite vector".to_string())
            }
        })
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::probe::{LoadOptions, ProbeSet};
    use std::path::Path;

    /// An embedder whose vectors depend only on the text or file name; any
    /// batch with a path containing "broken" fails, like an undecodable image.
    struct Fake {
        dimension: usize,
        always_fail: bool,
        wrong_dimension: bool,
    }

    fn fake() -> Fake {
        Fake {
            dimension: 4,
            always_fail: false,
            wrong_dimension: false,
        }
    }

    fn vector_of(key: &str, d: usize) -> Vec<f32> {
        let mut h = 1469598103934665603u64;
        for b in key.bytes() {
            h = (h ^ u64::from(b)).wrapping_mul(1099511628211);
        }
        let v: Vec<f32> = (0..d)
            .map(|j| ((h.rotate_left(j as u32 * 7) % 1000) as f32 + 1.0) / 1000.0)
            .collect();
        let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
        v.into_iter().map(|x| x / norm).collect()
    }

    impl Fake {
        fn rows(&self, keys: &[String]) -> Result<Array2<f32>, EmbedError> {
            if self.always_fail {
                return Err(EmbedError("session lost".into()));
            }
            let d = if self.wrong_dimension {
                self.dimension + 1
            } else {
                self.dimension
            };
            let flat: Vec<f32> = keys.iter().flat_map(|k| vector_of(k, d)).collect();
            Ok(Array2::from_shape_vec((keys.len(), d), flat).unwrap())
        }
    }

    impl Embedder for Fake {
        fn dimension(&self) -> usize {
            self.dimension
        }
        fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
            self.rows(texts)
        }
        fn embed_image_files(&self, paths: &[PathBuf]) -> Result<Array2<f32>, EmbedError> {
            if let Some(p) = paths
                .iter()
                .find(|p| p.to_string_lossy().contains("broken"))
            {
                return Err(EmbedError(format!("{} is not a PNG", p.display())));
            }
            self.rows(
                &paths
                    .iter()
                    .map(|p| p.display().to_string())
                    .collect::<Vec<_>>(),
            )
        }
    }

    fn probe() -> ProbeSet {
        let text = [
            r#"{"image": "0.png", "captions": ["a red square", "a square"]}"#,
            r#"{"image": "1.png", "captions": ["a blue ring"], "contrasts": [{"caption": "a green ring", "changed": "colour", "from": 0}]}"#,
            r#"{"image": "broken.png", "captions": ["a big cube"], "contrasts": [{"caption": "a small cube", "changed": "size", "from": 0}]}"#,
            r#"{"image": "3.png", "captions": ["two stars", "stars"], "contrasts": [{"caption": "three stars", "changed": "count", "from": 1}]}"#,
        ]
        .join("\n");
        let options = LoadOptions {
            check_files: false,
            ..Default::default()
        };
        ProbeSet::parse(text.as_bytes(), Path::new("p"), "probe.jsonl", &options)
            .unwrap()
            .set
    }

    fn options(skip_bad: bool) -> EmbedOptions {
        EmbedOptions {
            bundle: "fake@v1".into(),
            skip_bad,
            image_batch: 2,
            text_batch: 3,
        }
    }

    #[test]
    fn an_undecodable_image_is_found_by_its_line() {
        let encoder = fake();
        let err = embed_probe(
            &probe(),
            &ImageFiles(&encoder),
            &options(false),
            &mut |_, _| {},
        )
        .unwrap_err();
        let ProbeError::BadRows { issues, total, .. } = &err else {
            panic!("{err}");
        };
        assert_eq!(*total, 1);
        assert_eq!(issues[0].line, 3);
        assert!(
            matches!(&issues[0].problem, RowProblem::Image(m) if m.contains("broken.png is not a PNG"))
        );
    }

    #[test]
    fn skip_bad_drops_the_row_and_keeps_indices_straight() {
        let encoder = fake();
        let set = probe();
        let mut calls = Vec::new();
        let out = embed_probe(&set, &ImageFiles(&encoder), &options(true), &mut |d, t| {
            calls.push((d, t))
        })
        .unwrap();
        assert_eq!(out.skipped.len(), 1);
        assert_eq!(out.skipped[0].line, 3);
        let v = &out.vectors;
        v.check().unwrap();
        assert_eq!(v.bundle, "fake@v1");
        assert_eq!(v.image_names, vec!["0.png", "1.png", "3.png"]);
        assert_eq!(v.image_lines, vec![1, 2, 4]);
        assert_eq!(
            v.caption_texts,
            vec![
                "a red square",
                "a square",
                "a blue ring",
                "two stars",
                "stars"
            ]
        );
        assert_eq!(v.caption_image, vec![0, 0, 1, 2, 2]);
        assert_eq!(v.contrast_texts, vec!["a green ring", "three stars"]);
        assert_eq!(v.contrast_labels, vec!["colour", "count"]);
        // "three stars" alters "stars", caption 4 overall.
        assert_eq!(v.contrast_from, vec![2, 4]);
        // The caption "stars" got the vector of its own text.
        let want = vector_of("stars", 4);
        assert!((v.captions[[4, 0]] - f64::from(want[0])).abs() < 1e-6);
        // 4 images + 9 captions; progress ends at the total and never goes back.
        assert_eq!(calls.last(), Some(&(13, 13)));
        assert!(calls.windows(2).all(|w| w[0].0 <= w[1].0));
    }

    #[test]
    fn an_encoder_failing_on_everything_is_not_blamed_on_rows() {
        let encoder = Fake {
            always_fail: true,
            ..fake()
        };
        let err = embed_probe(
            &probe(),
            &ImageFiles(&encoder),
            &options(true),
            &mut |_, _| {},
        )
        .unwrap_err();
        assert!(
            matches!(
                &err,
                ProbeError::Encoder {
                    tower: "image",
                    first_line: 1,
                    last_line: 2,
                    ..
                }
            ),
            "{err}"
        );
    }

    #[test]
    fn a_wrong_dimension_is_refused() {
        let encoder = Fake {
            wrong_dimension: true,
            ..fake()
        };
        let err = embed_probe(
            &probe(),
            &ImageFiles(&encoder),
            &options(true),
            &mut |_, _| {},
        )
        .unwrap_err();
        assert!(
            matches!(
                err,
                ProbeError::Shape {
                    tower: "image",
                    got: (2, 5),
                    ..
                }
            ),
            "{err}"
        );
    }

    #[test]
    fn image_ids_need_a_store() {
        let set = ProbeSet::parse(
            br#"{"image": {"id": "abcdef0123456789abcdef0123456789abcdef0123456789abcdef0123456789"}, "captions": ["x"]}"#,
            Path::new(""),
            "request",
            &LoadOptions::default(),
        )
        .unwrap()
        .set;
        let encoder = fake();
        let err =
            embed_probe(&set, &ImageFiles(&encoder), &options(false), &mut |_, _| {}).unwrap_err();
        assert!(err.to_string().contains("name the image by path"), "{err}");
    }
}

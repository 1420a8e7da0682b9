//! The input of every statistic: one bundle's vectors of one probe set, with
//! the labels that say which caption belongs to which image, and the
//! similarity matrix every figure is read from.
//!
//! Vectors are held in `f64` so that the figures agree with a numpy recomputation
//! from the exported vectors to 1e-6 whatever the summation order.

use ndarray::{Array1, Array2, ArrayView1, Axis};
use serde::{Deserialize, Serialize};

use super::StatsError;

/// How far a row's L2 norm may be from 1 before the vectors are refused.
///
/// Loose on purpose: `f32` rows normalised by an encoder are within ~1e-7 of
/// unit length; anything further off was not normalised at all.
pub const NORM_TOLERANCE: f64 = 1e-4;

/// One bundle's vectors of one probe set, plus the labels of every row.
///
/// Images are rows of `images`; true captions are rows of `captions`, and
/// `caption_image[c]` is the image caption `c` describes; contrast captions are
/// rows of `contrasts`, `contrast_from[k]` is the true caption (index into
/// `captions`) that contrast `k` alters and `contrast_labels[k]` what it
/// changed. Every row is L2-normalised, so a dot product is a cosine.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ProbeVectors {
    /// Which bundle produced the vectors (e.g. `blocks@v1`); shown in reports.
    pub bundle: String,
    /// N x d image vectors.
    #[serde(with = "matrix_rows")]
    pub images: Array2<f64>,
    /// How each image was named in the probe set (its path or id), N entries.
    pub image_names: Vec<String>,
    /// 1-based line of each image's row in the probe file, N entries.
    pub image_lines: Vec<usize>,
    /// M x d true-caption vectors.
    #[serde(with = "matrix_rows")]
    pub captions: Array2<f64>,
    /// Text of each true caption, M entries.
    pub caption_texts: Vec<String>,
    /// Image (row of `images`) of each true caption, M entries.
    pub caption_image: Vec<usize>,
    /// K x d contrast-caption vectors (K may be 0).
    #[serde(with = "matrix_rows")]
    pub contrasts: Array2<f64>,
    /// Text of each contrast caption, K entries.
    pub contrast_texts: Vec<String>,
    /// What each contrast changed (`colour`, `shape`, ...), K entries.
    pub contrast_labels: Vec<String>,
    /// True caption (row of `captions`) each contrast alters, K entries.
    pub contrast_from: Vec<usize>,
}

impl ProbeVectors {
    /// Number of images (N).
    pub fn image_count(&self) -> usize {
        self.images.nrows()
    }

    /// Number of true captions (M).
    pub fn caption_count(&self) -> usize {
        self.captions.nrows()
    }

    /// Number of contrast captions (K).
    pub fn contrast_count(&self) -> usize {
        self.contrasts.nrows()
    }

    /// Length of every vector (d).
    pub fn dimension(&self) -> usize {
        self.images.ncols()
    }

    /// Scales every row to unit L2 norm, in `f64`.
    ///
    /// Fails on a zero or non-finite row, which no encoder should produce.
    pub fn normalise(&mut self) -> Result<(), StatsError> {
        normalise_rows(&mut self.images, "images")?;
        normalise_rows(&mut self.captions, "captions")?;
        normalise_rows(&mut self.contrasts, "contrasts")?;
        Ok(())
    }

    /// Checks that shapes, indices and norms agree, saying what is wrong.
    pub fn check(&self) -> Result<(), StatsError> {
        let n = self.image_count();
        let m = self.caption_count();
        let k = self.contrast_count();
        let d = self.dimension();
        let shape = |why: String| Err(StatsError::Shape { why });
        if d == 0 {
            return shape("the vectors have dimension 0".into());
        }
        if self.captions.ncols() != d || (k > 0 && self.contrasts.ncols() != d) {
            return shape(format!(
                "images have dimension {d} but captions have {} and contrasts {}",
                self.captions.ncols(),
                self.contrasts.ncols()
            ));
        }
        for (what, len, want) in [
            ("image_names", self.image_names.len(), n),
            ("image_lines", self.image_lines.len(), n),
            ("caption_texts", self.caption_texts.len(), m),
            ("caption_image", self.caption_image.len(), m),
            ("contrast_texts", self.contrast_texts.len(), k),
            ("contrast_labels", self.contrast_labels.len(), k),
            ("contrast_from", self.contrast_from.len(), k),
        ] {
            if len != want {
                return shape(format!("{what} has {len} entries, expected {want}"));
            }
        }
        if let Some((c, &i)) = self.caption_image.iter().enumerate().find(|(_, &i)| i >= n) {
            return shape(format!(
                "caption {c} points at image {i}, but there are {n} images"
            ));
        }
        if let Some((j, &c)) = self.contrast_from.iter().enumerate().find(|(_, &c)| c >= m) {
            return shape(format!(
                "contrast {j} alters caption {c}, but there are {m} captions"
            ));
        }
        let mut has_caption = vec![false; n];
        for &i in &self.caption_image {
            has_caption[i] = true;
        }
        if let Some(i) = has_caption.iter().position(|&h| !h) {
            return shape(format!(
                "image {i} ({}) has no true caption",
                self.image_names[i]
            ));
        }
        for (what, rows) in [
            ("images", &self.images),
            ("captions", &self.captions),
            ("contrasts", &self.contrasts),
        ] {
            for (row, v) in rows.outer_iter().enumerate() {
                let norm = v.dot(&v).sqrt();
                if norm.is_nan() || (norm - 1.0).abs() > NORM_TOLERANCE {
                    return Err(StatsError::NotNormalised { what, row, norm });
                }
            }
        }
        Ok(())
    }

    /// The cosines every figure is read from.
    pub(crate) fn similarities(&self) -> Similarities {
        let s = self.images.dot(&self.captions.t());
        let true_cos = self
            .caption_image
            .iter()
            .enumerate()
            .map(|(c, &i)| s[[i, c]])
            .collect();
        let contrast_cos = self
            .contrasts
            .outer_iter()
            .zip(&self.contrast_from)
            .map(|(t, &c)| self.images.row(self.caption_image[c]).dot(&t))
            .collect();
        Similarities {
            s,
            true_cos,
            contrast_cos,
        }
    }
}

/// Cosines of one bundle over one probe set.
pub(crate) struct Similarities {
    /// N x M: image i against true caption c.
    pub s: Array2<f64>,
    /// Cosine of each true caption with its own image (M).
    pub true_cos: Vec<f64>,
    /// Cosine of each contrast caption with the image of the caption it alters (K).
    pub contrast_cos: Vec<f64>,
}

fn normalise_rows(rows: &mut Array2<f64>, what: &'static str) -> Result<(), StatsError> {
    for (row, mut v) in rows.axis_iter_mut(Axis(0)).enumerate() {
        let norm = norm_of(v.view());
        if !(norm.is_finite() && norm > 0.0) {
            return Err(StatsError::NotNormalised { what, row, norm });
        }
        v.mapv_inplace(|x| x / norm);
    }
    Ok(())
}

fn norm_of(v: ArrayView1<f64>) -> f64 {
    v.dot(&v).sqrt()
}

/// Serde for a matrix as a list of rows, the shape numpy's `np.array` reads.
mod matrix_rows {
    use super::*;
    use serde::de::Error as _;
    use serde::{Deserializer, Serializer};

    pub fn serialize<S: Serializer>(m: &Array2<f64>, ser: S) -> Result<S::Ok, S::Error> {
        ser.collect_seq(m.outer_iter().map(|r| r.to_vec()))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(de: D) -> Result<Array2<f64>, D::Error> {
        let rows: Vec<Vec<f64>> = Vec::deserialize(de)?;
        let cols = rows.first().map_or(0, Vec::len);
        if let Some(r) = rows.iter().position(|r| r.len() != cols) {
            return Err(D::Error::custom(format!(
                "row {r} has {} numbers but row 0 has {cols}",
                rows[r].len()
            )));
        }
        let n = rows.len();
        let flat: Array1<f64> = rows.into_iter().flatten().collect();
        flat.into_shape_with_order((n, cols))
            .map_err(|e| D::Error::custom(e.to_string()))
    }
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use ndarray::array;

    /// Probe vectors, without contrasts, whose image x caption cosines are
    /// exactly `s` (n x m, every column of length at most 1).
    pub(crate) fn from_similarity(s: &Array2<f64>, caption_image: Vec<usize>) -> ProbeVectors {
        // Images are the standard basis e_0..e_{n-1} of R^(n+1); caption c is
        // s[:, c] plus whatever is left of unit length on the last axis, so
        // that image i . caption c = s[i, c] exactly.
        let (n, m) = s.dim();
        let d = n + 1;
        let mut images = Array2::zeros((n, d));
        for i in 0..n {
            images[[i, i]] = 1.0;
        }
        let mut captions = Array2::zeros((m, d));
        for c in 0..m {
            let col = s.column(c);
            let rest = 1.0 - col.dot(&col);
            assert!(
                rest >= 0.0,
                "column {c} of the test matrix is longer than 1"
            );
            for i in 0..n {
                captions[[c, i]] = s[[i, c]];
            }
            captions[[c, n]] = rest.sqrt();
        }
        ProbeVectors {
            bundle: "test".into(),
            images,
            image_names: (0..n).map(|i| format!("images/{i}.png")).collect(),
            image_lines: (1..=n).collect(),
            captions,
            caption_texts: (0..m).map(|c| format!("caption {c}")).collect(),
            caption_image,
            contrasts: Array2::zeros((0, d)),
            contrast_texts: vec![],
            contrast_labels: vec![],
            contrast_from: vec![],
        }
    }

    #[test]
    fn similarity_matrix_is_reproduced_exactly() {
        let s = array![[0.6, 0.5], [0.7, 0.4]];
        let v = from_similarity(&s, vec![0, 1]);
        v.check().unwrap();
        let sims = v.similarities();
        assert!((sims.s[[1, 0]] - 0.7).abs() < 1e-15);
        assert_eq!(sims.true_cos.len(), 2);
        assert!((sims.true_cos[1] - 0.4).abs() < 1e-15);
    }

    #[test]
    fn check_names_the_broken_index() {
        let s = array![[0.6, 0.5], [0.7, 0.4]];
        let mut v = from_similarity(&s, vec![0, 1]);
        v.caption_image = vec![0, 0];
        let err = v.check().unwrap_err().to_string();
        assert!(err.contains("image 1"), "{err}");
        v.caption_image = vec![0, 5];
        let err = v.check().unwrap_err().to_string();
        assert!(err.contains("caption 1 points at image 5"), "{err}");
    }

    #[test]
    fn unnormalised_rows_are_refused_and_normalise_fixes_them() {
        let s = array![[0.6, 0.5], [0.7, 0.4]];
        let mut v = from_similarity(&s, vec![0, 1]);
        v.images[[0, 0]] = 2.0;
        assert!(matches!(
            v.check(),
            Err(StatsError::NotNormalised {
                what: "images",
                row: 0,
                ..
            })
        ));
        v.normalise().unwrap();
        v.check().unwrap();
    }

    #[test]
    fn serde_round_trip_keeps_shapes() {
        let s = array![[0.6, 0.5], [0.7, 0.4]];
        let v = from_similarity(&s, vec![0, 1]);
        let json = serde_json::to_string(&v).unwrap();
        let back: ProbeVectors = serde_json::from_str(&json).unwrap();
        assert_eq!(back.images.dim(), (2, 3));
        assert_eq!(back.contrasts.nrows(), 0);
        assert_eq!(back.caption_image, v.caption_image);
        // serde_json's default float parsing may be one ulp off.
        assert!((&back.captions - &v.captions).mapv(f64::abs).sum() < 1e-15);
    }
}

//! Writes the exports that `tests/reference/test_stats.py` recomputes with
//! numpy and scipy, and checks the public path from a probe file to a report.
//!
//! Exports go to `$BEFIT_EXPORT_DIR`, or `target/stats-export/` under the
//! package. Two kinds of synthetic probe sets:
//!
//! - *realistic*: clustered random unit vectors with noise, one to four
//!   captions per image, contrasts with labels, a caption text shared by
//!   several images and an image listed twice (exact ties), and a second
//!   version made by a rotation plus noise (and one by a projection to fewer
//!   dimensions);
//! - *lattice*: vectors with four entries of +-1/2 and the rest 0, so every
//!   cosine is a multiple of 1/4 computed exactly in any summation order:
//!   ties everywhere, identical on both sides of the cross-check.

use std::path::{Path, PathBuf};

use befit::probe::{embed_probe, EmbedOptions, ImageFiles, LoadOptions, ProbeSet};
use befit::stats::{
    calibrate, calibration_export, calibration_html, drift_export, drift_html, write_json,
    CalibrationOptions, DriftOptions, MapBundle, ProbeVectors, Provenance, Thumbnails,
};
use befit::vectors::{EmbedError, Embedder};
use ndarray::Array2;

/// Deterministic pseudo-random numbers (xorshift64*), so exports are the
/// same on every run and machine.
struct Rng(u64);

impl Rng {
    fn next_u64(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545F4914F6CDD1D)
    }

    fn uniform(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }

    fn below(&mut self, n: usize) -> usize {
        (self.next_u64() % n as u64) as usize
    }

    /// Standard normal by Box-Muller.
    fn normal(&mut self) -> f64 {
        let u = self.uniform().max(1e-300);
        let v = self.uniform();
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    }

    fn normal_vec(&mut self, d: usize) -> Vec<f64> {
        (0..d).map(|_| self.normal()).collect()
    }
}

fn unit(v: Vec<f64>) -> Vec<f64> {
    let n = v.iter().map(|x| x * x).sum::<f64>().sqrt();
    v.into_iter().map(|x| x / n).collect()
}

fn add(a: &[f64], b: &[f64], scale: f64) -> Vec<f64> {
    a.iter().zip(b).map(|(x, y)| x + scale * y).collect()
}

fn matrix(rows: &[Vec<f64>], d: usize) -> Array2<f64> {
    Array2::from_shape_vec((rows.len(), d), rows.iter().flatten().copied().collect()).unwrap()
}

const LABELS: [&str; 5] = ["colour", "shape", "size", "relation", "count"];
const COLOURS: [&str; 6] = ["red", "green", "blue", "yellow", "purple", "grey"];
const SHAPES: [&str; 5] = ["square", "ring", "triangle", "star", "cross"];

/// The rows of a probe set before embedding: texts and how they relate.
struct Layout {
    image_names: Vec<String>,
    captions: Vec<String>,
    caption_image: Vec<usize>,
    contrasts: Vec<String>,
    contrast_labels: Vec<String>,
    contrast_from: Vec<usize>,
}

fn realistic_layout(rng: &mut Rng, n: usize) -> Layout {
    let mut l = Layout {
        image_names: Vec::new(),
        captions: Vec::new(),
        caption_image: Vec::new(),
        contrasts: Vec::new(),
        contrast_labels: Vec::new(),
        contrast_from: Vec::new(),
    };
    for i in 0..n {
        // Image 7 is listed again as the last row: the same file twice.
        let name = if i == n - 1 { 7 } else { i };
        l.image_names.push(format!("images/{name:05}.png"));
        let per_image = 1 + rng.below(4);
        for k in 0..per_image {
            let colour = COLOURS[(i + k) % COLOURS.len()];
            let shape = SHAPES[(i / 3 + k) % SHAPES.len()];
            let text = if k == 0 && i % 23 == 5 {
                // One caption text shared by several images.
                "some shapes on a plain background".to_string()
            } else {
                format!("a {colour} {shape} number {i}.{k}")
            };
            let c = l.captions.len();
            l.captions.push(text);
            l.caption_image.push(i);
            if rng.uniform() < 0.45 {
                let label = LABELS[rng.below(LABELS.len())];
                l.contrasts
                    .push(format!("{label}-changed {colour} {shape} number {i}.{k}"));
                l.contrast_labels.push(label.to_string());
                l.contrast_from.push(c);
            }
        }
    }
    l
}

/// Vectors for a layout: images around cluster centres; captions near their
/// image; contrasts near the caption they alter, some labels harder than others.
fn realistic_vectors(rng: &mut Rng, l: &Layout, d: usize, bundle: &str) -> ProbeVectors {
    let centres: Vec<Vec<f64>> = (0..12).map(|_| unit(rng.normal_vec(d))).collect();
    let mut images: Vec<Vec<f64>> = Vec::new();
    for (i, name) in l.image_names.iter().enumerate() {
        if let Some(first) = l
            .image_names
            .iter()
            .position(|n| n == name)
            .filter(|&f| f < i)
        {
            images.push(images[first].clone());
        } else {
            let noise = rng.normal_vec(d);
            images.push(unit(add(&centres[i % centres.len()], &noise, 0.12)));
        }
    }
    let mut by_text: std::collections::HashMap<&str, Vec<f64>> = Default::default();
    let mut captions = Vec::new();
    for (c, text) in l.captions.iter().enumerate() {
        let v = by_text
            .entry(text.as_str())
            .or_insert_with(|| {
                let noise = rng.normal_vec(d);
                unit(add(&images[l.caption_image[c]], &noise, 0.2))
            })
            .clone();
        captions.push(v);
    }
    let contrasts: Vec<Vec<f64>> = l
        .contrast_from
        .iter()
        .zip(&l.contrast_labels)
        .map(|(&c, label)| {
            let hardness = match label.as_str() {
                "colour" => 0.12,
                "count" => 0.05,
                _ => 0.09,
            };
            let noise = rng.normal_vec(d);
            unit(add(&captions[c], &noise, hardness))
        })
        .collect();
    let mut v = ProbeVectors {
        bundle: bundle.into(),
        images: matrix(&images, d),
        image_names: l.image_names.clone(),
        image_lines: (1..=l.image_names.len()).collect(),
        captions: matrix(&captions, d),
        caption_texts: l.captions.clone(),
        caption_image: l.caption_image.clone(),
        contrasts: matrix(&contrasts, d),
        contrast_texts: l.contrasts.clone(),
        contrast_labels: l.contrast_labels.clone(),
        contrast_from: l.contrast_from.clone(),
    };
    v.normalise().unwrap();
    v
}

/// Another version of `a`: every row through `map` (d_a x d_b), plus noise.
/// Rows equal in `a` stay equal, as one text or file gives one vector.
fn next_version(
    rng: &mut Rng,
    a: &ProbeVectors,
    map: &Array2<f64>,
    noise: f64,
    bundle: &str,
) -> ProbeVectors {
    let d = map.ncols();
    let mut moved = |m: &Array2<f64>| -> Array2<f64> {
        let base = m.dot(map);
        let mut out = base.clone();
        for r in 0..m.nrows() {
            if let Some(first) = (0..r).find(|&q| m.row(q) == m.row(r)) {
                let row = out.row(first).to_owned();
                out.row_mut(r).assign(&row);
            } else {
                for k in 0..d {
                    out[[r, k]] += noise * rng.normal();
                }
            }
        }
        out
    };
    let mut b = ProbeVectors {
        bundle: bundle.into(),
        images: moved(&a.images),
        captions: moved(&a.captions),
        contrasts: moved(&a.contrasts),
        ..a.clone()
    };
    b.normalise().unwrap();
    b
}

/// A random rotation (d x d): Gram-Schmidt of Gaussian columns.
fn rotation(rng: &mut Rng, d: usize) -> Array2<f64> {
    let mut q = Array2::<f64>::zeros((d, d));
    for j in 0..d {
        let mut v = rng.normal_vec(d);
        for _ in 0..2 {
            for k in 0..j {
                let dot: f64 = (0..d).map(|i| q[[i, k]] * v[i]).sum();
                for (i, x) in v.iter_mut().enumerate() {
                    *x -= dot * q[[i, k]];
                }
            }
        }
        let v = unit(v);
        for i in 0..d {
            q[[i, j]] = v[i];
        }
    }
    q
}

/// A lattice vector: four coordinates of +-1/2, unit length exactly.
fn lattice(rng: &mut Rng, d: usize) -> Vec<f64> {
    let mut v = vec![0.0; d];
    let mut placed = 0;
    while placed < 4 {
        let k = rng.below(d);
        if v[k] == 0.0 {
            v[k] = if rng.below(2) == 0 { 0.5 } else { -0.5 };
            placed += 1;
        }
    }
    v
}

/// `v` with one of its nonzero coordinates moved elsewhere: cosine 3/4 with v.
fn nudge(rng: &mut Rng, v: &[f64]) -> Vec<f64> {
    let mut out = v.to_vec();
    let nonzero: Vec<usize> = (0..v.len()).filter(|&k| v[k] != 0.0).collect();
    let zero: Vec<usize> = (0..v.len()).filter(|&k| v[k] == 0.0).collect();
    let from = nonzero[rng.below(nonzero.len())];
    let to = zero[rng.below(zero.len())];
    out[to] = out[from];
    out[from] = 0.0;
    out
}

fn lattice_pair(rng: &mut Rng) -> (ProbeVectors, ProbeVectors) {
    let (n, d) = (60, 16);
    let mut images = Vec::new();
    let mut image_names = Vec::new();
    let (mut captions, mut caption_texts, mut caption_image) = (Vec::new(), Vec::new(), Vec::new());
    let (mut contrasts, mut contrast_texts, mut contrast_labels, mut contrast_from) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for i in 0..n {
        let img = lattice(rng, d);
        image_names.push(format!("lattice/{i:03}.png"));
        for k in 0..1 + i % 3 {
            let c = if k == 0 {
                img.clone()
            } else {
                nudge(rng, &img)
            };
            let index = captions.len();
            if i % 4 == 0 {
                contrasts.push(nudge(rng, &c));
                contrast_texts.push(format!("contrast of {i}.{k}"));
                contrast_labels.push(LABELS[i % LABELS.len()].to_string());
                contrast_from.push(index);
            }
            captions.push(c);
            caption_texts.push(format!("caption {i}.{k}"));
            caption_image.push(i);
        }
        images.push(img);
    }
    let a = ProbeVectors {
        bundle: "lattice@v1".into(),
        images: matrix(&images, d),
        image_names,
        image_lines: (1..=n).collect(),
        captions: matrix(&captions, d),
        caption_texts,
        caption_image,
        contrasts: matrix(&contrasts, d),
        contrast_texts,
        contrast_labels,
        contrast_from,
    };
    // Version 2: a signed permutation of the coordinates (exact and
    // orthogonal), with every fifth caption and image nudged on top.
    let perm: Vec<usize> = (0..d).map(|k| (k * 5 + 3) % d).collect();
    let permute = |rng: &mut Rng, m: &Array2<f64>| {
        let mut out = Array2::zeros(m.dim());
        for r in 0..m.nrows() {
            let mut row: Vec<f64> = (0..d)
                .map(|k| {
                    if k % 3 == 0 {
                        -m[[r, perm[k]]]
                    } else {
                        m[[r, perm[k]]]
                    }
                })
                .collect();
            if r % 5 == 2 {
                row = nudge(rng, &row);
            }
            for k in 0..d {
                out[[r, k]] = row[k];
            }
        }
        out
    };
    let b = ProbeVectors {
        bundle: "lattice@v2".into(),
        images: permute(rng, &a.images),
        captions: permute(rng, &a.captions),
        contrasts: permute(rng, &a.contrasts),
        ..a.clone()
    };
    (a, b)
}

/// Provenance of a synthetic set: made-up digests, no probe file.
fn provenance(ids: &[&str]) -> Provenance {
    let bundles = ids
        .iter()
        .map(|id| MapBundle {
            id: id.to_string(),
            digest: "sha256:synthetic".into(),
        })
        .collect();
    Provenance::now(bundles, befit::stats::sha256_hex(b"synthetic"), 0)
}

fn export_dir() -> PathBuf {
    std::env::var_os("BEFIT_EXPORT_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("target/stats-export"))
}

#[test]
fn write_reference_exports() {
    let dir = export_dir();
    let mut rng = Rng(0x5eed_1234_abcd_0001);

    let layout = realistic_layout(&mut rng, 300);
    let a = realistic_vectors(&mut rng, &layout, 48, "blocks@v1");
    let r = rotation(&mut rng, 48);
    let b = next_version(&mut rng, &a, &r, 0.06, "blocks@v2");
    let projection = Array2::from_shape_simple_fn((48, 32), || rng.normal() / 48f64.sqrt());
    let c = next_version(&mut rng, &a, &projection, 0.03, "blocks-small@v1");
    let (la, lb) = lattice_pair(&mut rng);

    let cal = CalibrationOptions::default();
    let lattice_cal = CalibrationOptions {
        batch_images: 16,
        histogram_bins: 16,
        ..Default::default()
    };
    let lattice_drift = DriftOptions {
        calibration: lattice_cal.clone(),
        neighbour_k: 5,
        moved_pairs: 25,
        ..Default::default()
    };

    let realistic = calibration_export(&a, &cal).unwrap();
    write_json(&dir.join("calibration-realistic.json"), &realistic).unwrap();
    write_json(
        &dir.join("calibration-lattice.json"),
        &calibration_export(&la, &lattice_cal).unwrap(),
    )
    .unwrap();
    let drift_realistic = drift_export(&a, &b, &DriftOptions::default()).unwrap();
    write_json(&dir.join("drift-realistic.json"), &drift_realistic).unwrap();
    let projected = drift_export(&a, &c, &DriftOptions::default()).unwrap();
    write_json(&dir.join("drift-projected.json"), &projected).unwrap();
    let lattice = drift_export(&la, &lb, &lattice_drift).unwrap();
    write_json(&dir.join("drift-lattice.json"), &lattice).unwrap();
    // The pages, to look at; not checked by the reference test.
    std::fs::write(
        dir.join("calibration-realistic.html"),
        calibration_html(
            &realistic.report,
            &provenance(&["blocks@v1"]),
            &Thumbnails::new(),
        ),
    )
    .unwrap();
    std::fs::write(
        dir.join("drift-realistic.html"),
        drift_html(
            &drift_realistic.report,
            &provenance(&["blocks@v1", "blocks@v2"]),
            &Thumbnails::new(),
        ),
    )
    .unwrap();

    // The synthetic sets are what they claim to be.
    let rep = &realistic.report;
    assert!(
        rep.counts.captions > 600 && rep.counts.contrasts > 200,
        "{:?}",
        rep.counts
    );
    assert!(
        rep.retrieval.image_to_text.r_at_10 > 20.0,
        "captions are near their images"
    );
    assert_eq!(rep.contrast.by_label.len(), LABELS.len());
    let d = &drift_realistic.report;
    assert!(
        d.cka.images.unwrap() > 0.8,
        "a rotation plus a little noise keeps the space: {:?}",
        d.cka
    );
    let fit = d.procrustes.images.as_ref().unwrap();
    assert!(fit.normalised_residual < 0.5, "{fit:?}");
    assert!(
        projected.report.procrustes.images.is_none(),
        "48 against 32 dimensions"
    );
    // Linear CKA is defined across dimensions and lies in [0, 1] (Kornblith et al. 2019, eq. 5,
    // a normalised HSIC); a projection of the same texts keeps much of their similarity structure.
    let cka = projected
        .report
        .cka
        .texts
        .expect("CKA across 48 and 32 dimensions");
    assert!(cka > 0.0 && cka <= 1.0 + 1e-9, "linear CKA {cka}");
    let l = &lattice.report;
    assert!(
        l.procrustes.images.as_ref().unwrap().residual > 0.0,
        "some rows were nudged"
    );
    // First captions are their image's own vector, the others one coordinate
    // moved: true cosines are exactly 1 and 3/4.
    let t = &l.from.cosines.true_pairs;
    assert_eq!((t.min, t.max), (0.75, 1.0));
}

/// An embedder for the pipeline test: vectors from a hash of the name.
struct Hashing;

fn hashed(key: &str, d: usize) -> Vec<f32> {
    let mut h = 0xcbf29ce484222325u64;
    for b in key.bytes() {
        h = (h ^ u64::from(b)).wrapping_mul(0x100000001b3);
    }
    let v: Vec<f32> = (0..d)
        .map(|j| ((h.rotate_left(5 * j as u32) & 0xffff) as f32) - 32768.0)
        .collect();
    let n = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    v.into_iter().map(|x| x / n).collect()
}

impl Embedder for Hashing {
    fn dimension(&self) -> usize {
        8
    }
    fn embed_texts(&self, texts: &[String]) -> Result<Array2<f32>, EmbedError> {
        let flat: Vec<f32> = texts.iter().flat_map(|t| hashed(t, 8)).collect();
        Ok(Array2::from_shape_vec((texts.len(), 8), flat).unwrap())
    }
    fn embed_image_files(&self, paths: &[PathBuf]) -> Result<Array2<f32>, EmbedError> {
        let mut flat = Vec::new();
        for p in paths {
            let bytes = std::fs::read(p).map_err(|e| EmbedError::encoder(e.to_string()))?;
            if !bytes.starts_with(b"IMG") {
                return Err(EmbedError::encoder(format!(
                    "{} does not decode",
                    p.display()
                )));
            }
            flat.extend(hashed(&String::from_utf8_lossy(&bytes), 8));
        }
        Ok(Array2::from_shape_vec((paths.len(), 8), flat).unwrap())
    }
}

#[test]
fn probe_file_to_report() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir(dir.path().join("images")).unwrap();
    let mut lines = Vec::new();
    for i in 0..6 {
        let bytes: &[u8] = if i == 4 { b"garbage" } else { b"IMG" };
        std::fs::write(
            dir.path().join(format!("images/{i}.png")),
            [bytes, i.to_string().as_bytes()].concat(),
        )
        .unwrap();
        lines.push(format!(
            r#"{{"image": "images/{i}.png", "captions": ["thing {i}", "object {i}"], "contrasts": [{{"caption": "other {i}", "changed": "colour", "from": 1}}]}}"#
        ));
    }
    let file = dir.path().join("probe.jsonl");
    std::fs::write(&file, lines.join("\n")).unwrap();

    let loaded = ProbeSet::load(&file, &LoadOptions::default()).unwrap();
    assert_eq!(loaded.set.rows.len(), 6);
    let options = EmbedOptions {
        bundle: "hashing@v1".into(),
        skip_bad: true,
        ..Default::default()
    };
    let mut last = (0, 0);
    let embedded = embed_probe(&loaded.set, &ImageFiles(&Hashing), &options, &mut |d, t| {
        last = (d, t)
    })
    .unwrap();
    assert_eq!(last, (24, 24), "6 images + 12 captions + 6 contrasts");
    assert_eq!(embedded.skipped.len(), 1);
    assert_eq!(embedded.skipped[0].line, 5);
    let report = calibrate(&embedded.vectors, &CalibrationOptions::default()).unwrap();
    assert_eq!(report.counts.images, 5);
    assert_eq!(report.counts.captions, 10);
    assert_eq!(report.contrast.by_label["colour"].count, 5);
    let bytes = std::fs::read(&file).unwrap();
    let html = calibration_html(
        &report,
        &Provenance::now(vec![], befit::stats::sha256_hex(&bytes), 6),
        &Thumbnails::new(),
    );
    assert!(html.contains("hashing@v1"));
}

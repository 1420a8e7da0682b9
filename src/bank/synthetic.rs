//! Seeded synthetic unit vectors for tests and benchmarks: uniform on the
//! sphere, and "blocks-like" banks where the captions of one scene sit close
//! together around a scene centre.
//!
//! They stand in for real encoder output until a probe bank embedded by a
//! real bundle is available; no external randomness crate is needed, so a
//! seed gives the same vectors on every machine.

/// A small, fast, seedable generator (SplitMix64, Steele, Lea and Flood 2014,
/// "Fast splittable pseudorandom number generators").
#[derive(Debug, Clone)]
pub struct SplitMix64(u64);

impl SplitMix64 {
    /// A generator whose whole output is fixed by `seed`.
    pub fn new(seed: u64) -> Self {
        Self(seed)
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `[0, 1)`.
    pub fn next_f64(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }

    /// Uniform in `0..n` (`n > 0`).
    pub fn below(&mut self, n: usize) -> usize {
        (self.next_f64() * n as f64) as usize % n.max(1)
    }

    /// Standard normal (Box-Muller).
    pub fn normal(&mut self) -> f32 {
        let u1 = self.next_f64().max(f64::MIN_POSITIVE);
        let u2 = self.next_f64();
        ((-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()) as f32
    }
}

/// Scales `v` to unit length; a zero vector is left as it is.
pub fn normalise(v: &mut [f32]) {
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt();
    if norm > 0.0 {
        v.iter_mut().for_each(|x| *x /= norm);
    }
}

/// `n` vectors uniform on the unit sphere of `dim` dimensions, row-major.
pub fn uniform_sphere(n: usize, dim: usize, seed: u64) -> Vec<f32> {
    let mut rng = SplitMix64::new(seed);
    let mut out = Vec::with_capacity(n * dim);
    for _ in 0..n {
        let start = out.len();
        out.extend((0..dim).map(|_| rng.normal()));
        normalise(&mut out[start..]);
    }
    out
}

/// Shape of a "blocks-like" bank: scenes, each described by a few captions.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SceneSpec {
    /// Number of scenes (clusters).
    pub scenes: usize,
    /// Length of the noise added to a scene centre for one caption, relative
    /// to the centre's unit length: 0.5 puts a caption at cosine ~0.89 from its
    /// centre and ~0.8 from the other captions of its scene.
    pub spread: f32,
    /// Weight of one direction shared by every scene, so unrelated scenes are
    /// not orthogonal (real encoders are anisotropic): 0.7 gives unrelated
    /// scenes a cosine of about 0.33.
    pub shared: f32,
}

impl SceneSpec {
    /// About five captions per scene (several captions per scene, as a captioning
    /// corpus has; the number is a choice of ours), moderate spread.
    pub fn blocks_like(n: usize) -> Self {
        Self {
            scenes: (n / 5).max(1),
            spread: 0.5,
            shared: 0.7,
        }
    }
}

/// Scene centres and a sampler of captions around them.
#[derive(Debug, Clone)]
pub struct Scenes {
    dim: usize,
    spec: SceneSpec,
    centres: Vec<f32>,
    rng: SplitMix64,
}

impl Scenes {
    /// Draws `spec.scenes` centres in `dim` dimensions from `seed`.
    pub fn new(dim: usize, spec: SceneSpec, seed: u64) -> Self {
        let mut rng = SplitMix64::new(seed);
        let mut shared: Vec<f32> = (0..dim).map(|_| rng.normal()).collect();
        normalise(&mut shared);
        let scenes = spec.scenes.max(1);
        let mut centres = Vec::with_capacity(scenes * dim);
        for _ in 0..scenes {
            let start = centres.len();
            let mut own: Vec<f32> = (0..dim).map(|_| rng.normal()).collect();
            normalise(&mut own);
            centres.extend(own.iter().zip(&shared).map(|(o, s)| o + spec.shared * s));
            normalise(&mut centres[start..]);
        }
        Self {
            dim,
            spec,
            centres,
            rng,
        }
    }

    /// Number of scenes.
    pub fn len(&self) -> usize {
        self.centres.len() / self.dim.max(1)
    }

    /// True when there are no scenes (never, for `dim > 0`).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// One caption vector of scene `scene` (taken modulo the scene count).
    pub fn caption(&mut self, scene: usize) -> Vec<f32> {
        let scene = scene % self.len().max(1);
        let centre = &self.centres[scene * self.dim..(scene + 1) * self.dim];
        let scale = self.spec.spread / (self.dim as f32).sqrt();
        let mut v: Vec<f32> = centre
            .iter()
            .map(|c| c + scale * self.rng.normal())
            .collect();
        normalise(&mut v);
        v
    }

    /// `n` captions of random scenes, row-major.
    pub fn captions(&mut self, n: usize) -> Vec<f32> {
        let mut out = Vec::with_capacity(n * self.dim);
        for _ in 0..n {
            let scene = self.rng.below(self.len());
            out.extend(self.caption(scene));
        }
        out
    }
}

/// `n` blocks-like caption vectors ([`SceneSpec::blocks_like`]) and `queries`
/// further captions of the same scenes (not in the bank), both row-major.
pub fn blocks_like(n: usize, queries: usize, dim: usize, seed: u64) -> (Vec<f32>, Vec<f32>) {
    let mut scenes = Scenes::new(dim, SceneSpec::blocks_like(n), seed);
    let bank = scenes.captions(n);
    let probe = scenes.captions(queries);
    (bank, probe)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::bank::distance::dot;

    #[test]
    fn same_seed_same_vectors_and_unit_length() {
        assert_eq!(uniform_sphere(10, 8, 3), uniform_sphere(10, 8, 3));
        assert_ne!(uniform_sphere(10, 8, 3), uniform_sphere(10, 8, 4));
        for row in uniform_sphere(50, 64, 1).chunks(64) {
            assert!((dot(row, row) - 1.0).abs() < 1e-5);
        }
    }

    #[test]
    fn captions_of_a_scene_are_closer_than_captions_of_two_scenes() {
        let mut s = Scenes::new(64, SceneSpec::blocks_like(1000), 7);
        let (a, b, c) = (s.caption(1), s.caption(1), s.caption(2));
        let same = dot(&a, &b);
        let other = dot(&a, &c);
        // Expected ~0.8 within a scene and ~0.33 across (see SceneSpec's docs).
        assert!(same > 0.65 && same < 0.92, "{same}");
        assert!(other > 0.05 && other < 0.6, "{other}");
    }
}

/// A stand-in encoder for tests and benchmarks: a caption's vector is seeded
/// by its text, and captions that share their first word share a scene (so
/// "scene12 a red cube" and "scene12 two blue rings" are close).
#[derive(Debug, Clone)]
pub struct SceneEmbedder {
    dim: usize,
    scenes: Scenes,
}

impl SceneEmbedder {
    /// Vectors of `dim` numbers around `scenes` scene centres.
    pub fn new(dim: usize, scenes: usize) -> Self {
        let spec = SceneSpec {
            scenes,
            ..SceneSpec::blocks_like(scenes * 5)
        };
        Self {
            dim,
            scenes: Scenes::new(dim, spec, 0x5EED),
        }
    }

    /// The vector of one caption (deterministic).
    pub fn vector(&self, text: &str) -> Vec<f32> {
        let hash = |s: &str| {
            // FNV-1a: stable across runs and platforms, unlike std's hasher.
            s.bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| {
                (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
            })
        };
        let first = text.split_whitespace().next().unwrap_or("");
        let mut scenes = self.scenes.clone();
        scenes.rng = SplitMix64::new(hash(text));
        scenes.caption(hash(first) as usize)
    }
}

impl crate::vectors::Embedder for SceneEmbedder {
    fn dimension(&self) -> usize {
        self.dim
    }

    fn embed_texts(
        &self,
        texts: &[String],
    ) -> Result<ndarray::Array2<f32>, crate::vectors::EmbedError> {
        let mut out = ndarray::Array2::zeros((texts.len(), self.dim));
        for (mut row, t) in out.outer_iter_mut().zip(texts) {
            row.assign(&ndarray::ArrayView1::from(&self.vector(t)[..]));
        }
        Ok(out)
    }

    fn embed_image_files(
        &self,
        _paths: &[std::path::PathBuf],
    ) -> Result<ndarray::Array2<f32>, crate::vectors::EmbedError> {
        Err(crate::vectors::EmbedError::encoder(
            "the scene embedder has no image tower",
        ))
    }
}

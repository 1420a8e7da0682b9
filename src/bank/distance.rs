//! The distance the HNSW graph is built with: `1 - dot` on unit vectors,
//! clamped so rounding can never make it negative or NaN.
//!
//! hnsw_rs asserts that every distance is `>= 0` and panics on a NaN when it
//! orders candidates. Its own `DistDot` asserts `1 - dot >= 0` (the scalar
//! path) or `dot <= 1.000002` (the SIMD path), and two unit vectors that are
//! equal up to rounding give `dot` a hair above 1: a self-query or a duplicate
//! caption would take the process down. This distance clamps instead.

use hnsw_rs::anndists::dist::distances::Distance;

/// Largest value [`ClampedDot`] returns: the distance of opposite unit vectors.
/// A NaN (which validated input never produces) is mapped here too, so the
/// graph code never sees one.
pub const MAX_DISTANCE: f32 = 2.0;

/// `1 - dot(a, b)` clamped to `[0, MAX_DISTANCE]`, for L2-normalised vectors.
///
/// Uses AVX2 + FMA when the CPU has them (checked once, at first use, by the
/// standard library's feature detection), and a portable loop otherwise.
#[derive(Debug, Default, Clone, Copy)]
pub struct ClampedDot;

impl Distance<f32> for ClampedDot {
    fn eval(&self, va: &[f32], vb: &[f32]) -> f32 {
        clamp_distance(1.0 - dot(va, vb))
    }
}

/// Cosine of two unit vectors from a [`ClampedDot`] distance.
pub fn cosine_from_distance(distance: f32) -> f32 {
    1.0 - distance
}

fn clamp_distance(d: f32) -> f32 {
    if d.is_nan() {
        MAX_DISTANCE
    } else {
        d.clamp(0.0, MAX_DISTANCE)
    }
}

/// Dot product over the common length of `a` and `b`.
///
/// Kept by hand after measuring `simsimd` (runtime dispatch to AVX2, AVX-512,
/// NEON, SVE) beside it (`bench/libraries/run.py`): a scan of 100k rows took
/// 1.13x as long with simsimd at 64-d and 0.95x at 512-d, the same answers
/// within 3e-8, so a C build dependency would buy nothing measurable here. On
/// targets without AVX2 (aarch64 included) the portable loop below is
/// vectorised by the compiler (NEON on aarch64).
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
            // SAFETY: the CPU supports both features (checked just above).
            return unsafe { dot_avx2(a, b) };
        }
    }
    dot_portable(a, b)
}

/// Eight independent accumulators let the compiler vectorise this with
/// whatever the target has (SSE2 at least on x86_64, NEON on aarch64).
fn dot_portable(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0.0f32; 8];
    let chunks_a = a.chunks_exact(8);
    let chunks_b = b.chunks_exact(8);
    let tail: f32 = chunks_a
        .remainder()
        .iter()
        .zip(chunks_b.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (ca, cb) in chunks_a.zip(chunks_b) {
        for i in 0..8 {
            acc[i] += ca[i] * cb[i];
        }
    }
    acc.iter().sum::<f32>() + tail
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_avx2(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let mut i = 0;
    let mut acc0 = _mm256_setzero_ps();
    let mut acc1 = _mm256_setzero_ps();
    while i + 16 <= n {
        // SAFETY: i + 16 <= n, so both 8-lane loads stay inside the slices.
        unsafe {
            acc0 = _mm256_fmadd_ps(
                _mm256_loadu_ps(a.as_ptr().add(i)),
                _mm256_loadu_ps(b.as_ptr().add(i)),
                acc0,
            );
            acc1 = _mm256_fmadd_ps(
                _mm256_loadu_ps(a.as_ptr().add(i + 8)),
                _mm256_loadu_ps(b.as_ptr().add(i + 8)),
                acc1,
            );
        }
        i += 16;
    }
    if i + 8 <= n {
        // SAFETY: i + 8 <= n.
        unsafe {
            acc0 = _mm256_fmadd_ps(
                _mm256_loadu_ps(a.as_ptr().add(i)),
                _mm256_loadu_ps(b.as_ptr().add(i)),
                acc0,
            );
        }
        i += 8;
    }
    let acc = _mm256_add_ps(acc0, acc1);
    let hi = _mm256_extractf128_ps(acc, 1);
    let lo = _mm256_castps256_ps128(acc);
    let s = _mm_add_ps(hi, lo);
    let s = _mm_add_ps(s, _mm_movehl_ps(s, s));
    let s = _mm_add_ss(s, _mm_shuffle_ps(s, s, 0b01));
    let mut total = _mm_cvtss_f32(s);
    while i < n {
        total += a[i] * b[i];
        i += 1;
    }
    total
}

#[cfg(test)]
mod tests {
    use super::*;

    fn unit(v: &mut [f32]) {
        let n = v.iter().map(|x| x * x).sum::<f32>().sqrt();
        v.iter_mut().for_each(|x| *x /= n);
    }

    #[test]
    fn simd_and_portable_agree_on_every_length() {
        for len in 0..70 {
            let a: Vec<f32> = (0..len)
                .map(|i| ((i * 7 % 13) as f32 - 6.0) / 5.0)
                .collect();
            let b: Vec<f32> = (0..len)
                .map(|i| ((i * 5 % 11) as f32 - 5.0) / 3.0)
                .collect();
            let exact: f64 = a.iter().zip(&b).map(|(x, y)| *x as f64 * *y as f64).sum();
            assert!((dot(&a, &b) as f64 - exact).abs() < 1e-4, "len {len}");
            assert!(
                (dot_portable(&a, &b) as f64 - exact).abs() < 1e-4,
                "len {len}"
            );
        }
    }

    #[test]
    fn self_distance_is_never_negative_nor_nan() {
        let mut seed = 1u64;
        for _ in 0..2000 {
            let mut v: Vec<f32> = (0..64)
                .map(|_| {
                    seed = seed
                        .wrapping_mul(6364136223846793005)
                        .wrapping_add(1442695040888963407);
                    ((seed >> 33) as f32 / (1u64 << 31) as f32) - 0.5
                })
                .collect();
            unit(&mut v);
            let d = ClampedDot.eval(&v, &v);
            assert!((0.0..1e-5).contains(&d), "{d}");
        }
        let nan = vec![f32::NAN; 64];
        assert_eq!(ClampedDot.eval(&nan, &nan), MAX_DISTANCE);
    }

    #[test]
    fn opposite_vectors_are_at_the_maximum() {
        let a = [1.0f32, 0.0];
        let b = [-1.0f32, 0.0];
        assert_eq!(ClampedDot.eval(&a, &b), 2.0);
        assert_eq!(cosine_from_distance(ClampedDot.eval(&a, &b)), -1.0);
    }
}

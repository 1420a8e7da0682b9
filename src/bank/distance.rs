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
/// NEON, SVE) beside it (`bench/libraries/run.py`, BENCHMARKS.md
/// "Hand-written code and the libraries"): the same answers within 3e-8 and
/// no slower, so a C build dependency would buy nothing measurable here.
/// The kernel is picked once per process ([`kernel`]): on x86_64 AVX2 + FMA
/// for vectors shorter than [`AVX512_FROM`] and AVX-512F from there on when
/// the CPU has it; a portable loop that the compiler vectorises elsewhere
/// (NEON on aarch64). The SIMD kernels keep four independent accumulators
/// so the multiply-adds are not serialised on one register's latency.
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    match kernel() {
        #[cfg(target_arch = "x86_64")]
        // SAFETY: `kernel` picks this only when the CPU has AVX-512F, AVX2
        // and FMA.
        Kernel::Avx512 if n >= AVX512_FROM => unsafe { dot_avx512(a, b) },
        #[cfg(target_arch = "x86_64")]
        // SAFETY: as above; either kernel's CPU has AVX2 and FMA.
        Kernel::Avx512 | Kernel::Avx2 => unsafe { dot_avx2(a, b) },
        Kernel::Portable => dot_portable(a, b),
    }
}

/// Vectors at least this long use the AVX-512 kernel where there is one.
/// Measured in the retrieval benchmark, kernel against kernel on the same
/// machine (BENCHMARKS.md, "The dot kernels"): at 512-d AVX-512 built
/// usearch's graph in 0.90x the time of AVX2 with four accumulators and
/// searched the copy as fast or faster; at 64-d it built no faster and
/// searched the copy about 10 % slower (the 16-lane reduction costs more
/// than it saves on four loads). Lengths between were not measured; 256 is
/// a guess between the two.
pub const AVX512_FROM: usize = 256;

/// Which dot kernel this CPU runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kernel {
    /// 16 lanes with a masked tail for long vectors, [`Kernel::Avx2`] for
    /// short ones (x86_64 with AVX-512F, AVX2 and FMA).
    Avx512,
    /// 8 lanes with fused multiply-add (x86_64 with AVX2 and FMA).
    Avx2,
    /// Plain Rust, vectorised by the compiler for the target.
    Portable,
}

/// The kernel [`dot`] uses on this CPU, detected once.
pub fn kernel() -> Kernel {
    static KERNEL: std::sync::OnceLock<Kernel> = std::sync::OnceLock::new();
    *KERNEL.get_or_init(|| {
        #[cfg(target_arch = "x86_64")]
        {
            if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
                if std::is_x86_feature_detected!("avx512f") {
                    return Kernel::Avx512;
                }
                return Kernel::Avx2;
            }
        }
        Kernel::Portable
    })
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

/// Four 16-lane accumulators over 64 floats a step, then single steps of
/// 16, then one masked load for the last 1 to 15 (masked-off lanes are
/// neither read nor faulted on).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn dot_avx512(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    let mut acc = [_mm512_setzero_ps(); 4];
    let mut i = 0;
    while i + 64 <= n {
        for (j, acc) in acc.iter_mut().enumerate() {
            // SAFETY: i + 64 <= n, so each 16-lane load stays inside both slices.
            unsafe {
                *acc = _mm512_fmadd_ps(
                    _mm512_loadu_ps(pa.add(i + 16 * j)),
                    _mm512_loadu_ps(pb.add(i + 16 * j)),
                    *acc,
                );
            }
        }
        i += 64;
    }
    while i + 16 <= n {
        // SAFETY: i + 16 <= n.
        unsafe {
            acc[0] = _mm512_fmadd_ps(
                _mm512_loadu_ps(pa.add(i)),
                _mm512_loadu_ps(pb.add(i)),
                acc[0],
            );
        }
        i += 16;
    }
    if i < n {
        let mask: __mmask16 = (1u16 << (n - i)) - 1;
        // SAFETY: the mask selects the n - i < 16 lanes inside both slices;
        // masked-off lanes are not accessed.
        unsafe {
            acc[1] = _mm512_fmadd_ps(
                _mm512_maskz_loadu_ps(mask, pa.add(i)),
                _mm512_maskz_loadu_ps(mask, pb.add(i)),
                acc[1],
            );
        }
    }
    _mm512_reduce_add_ps(_mm512_add_ps(
        _mm512_add_ps(acc[0], acc[1]),
        _mm512_add_ps(acc[2], acc[3]),
    ))
}

/// Four 8-lane accumulators over 32 floats a step, then single steps of 8,
/// then a scalar tail.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_avx2(a: &[f32], b: &[f32]) -> f32 {
    use std::arch::x86_64::*;
    let n = a.len().min(b.len());
    let (pa, pb) = (a.as_ptr(), b.as_ptr());
    let mut acc = [_mm256_setzero_ps(); 4];
    let mut i = 0;
    while i + 32 <= n {
        for (j, acc) in acc.iter_mut().enumerate() {
            // SAFETY: i + 32 <= n, so each 8-lane load stays inside both slices.
            unsafe {
                *acc = _mm256_fmadd_ps(
                    _mm256_loadu_ps(pa.add(i + 8 * j)),
                    _mm256_loadu_ps(pb.add(i + 8 * j)),
                    *acc,
                );
            }
        }
        i += 32;
    }
    while i + 8 <= n {
        // SAFETY: i + 8 <= n.
        unsafe {
            acc[0] = _mm256_fmadd_ps(
                _mm256_loadu_ps(pa.add(i)),
                _mm256_loadu_ps(pb.add(i)),
                acc[0],
            );
        }
        i += 8;
    }
    let acc = _mm256_add_ps(_mm256_add_ps(acc[0], acc[1]), _mm256_add_ps(acc[2], acc[3]));
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
        for len in 0..600 {
            let a: Vec<f32> = (0..len)
                .map(|i| ((i * 7 % 13) as f32 - 6.0) / 5.0)
                .collect();
            let b: Vec<f32> = (0..len)
                .map(|i| ((i * 5 % 11) as f32 - 5.0) / 3.0)
                .collect();
            // Reference: the sum in f64; f32 rounding allows about 1e-7 of
            // the sum of the products' magnitudes per step, so 1e-6 of it is
            // a bound no kernel's order of adding can break.
            let exact: f64 = a.iter().zip(&b).map(|(x, y)| *x as f64 * *y as f64).sum();
            let tol = 1e-6
                * a.iter()
                    .zip(&b)
                    .map(|(x, y)| (*x as f64 * *y as f64).abs())
                    .sum::<f64>()
                + 1e-7;
            assert!((dot(&a, &b) as f64 - exact).abs() < tol, "len {len}");
            assert!(
                (dot_portable(&a, &b) as f64 - exact).abs() < tol,
                "len {len}"
            );
            #[cfg(target_arch = "x86_64")]
            {
                if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
                    // SAFETY: the CPU has both (checked just above).
                    let d = unsafe { dot_avx2(&a, &b) };
                    assert!((d as f64 - exact).abs() < tol, "avx2, len {len}");
                }
                if std::is_x86_feature_detected!("avx512f") {
                    // SAFETY: the CPU has AVX-512F (checked just above).
                    let d = unsafe { dot_avx512(&a, &b) };
                    assert!((d as f64 - exact).abs() < tol, "avx-512, len {len}");
                }
            }
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

//! Confidence intervals for proportions: the Wilson score interval (Wilson
//! 1927, "Probable inference, the law of succession, and statistical
//! inference", JASA 22(158)), without continuity correction, at 95 %.
//!
//! Chosen over the normal-approximation (Wald) interval because contrast
//! rates and recalls sit near 100 %, where Wald's interval collapses to a
//! point or leaves [0, 1]; Wilson's stays inside [0, 1] and keeps close to its
//! nominal coverage there (Brown, Cai and DasGupta 2001, Statistical Science
//! 16(2)). It is what `scipy.stats.binomtest(k, n).proportion_ci(method="wilson")`
//! returns, which `tests/reference` checks.

use serde::{Deserialize, Serialize};

/// The standard normal quantile at 0.975, `scipy.stats.norm.ppf(0.975)`:
/// two-sided 95 % intervals.
pub const Z_95: f64 = 1.959_963_984_540_054;

/// A closed interval `[low, high]`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Interval {
    /// Lower bound.
    pub low: f64,
    /// Upper bound.
    pub high: f64,
}

impl Interval {
    /// Both bounds times `factor` (a fraction's interval as percentages).
    pub fn scaled(self, factor: f64) -> Interval {
        Interval {
            low: self.low * factor,
            high: self.high * factor,
        }
    }
}

/// The 95 % Wilson score interval of `successes` out of `trials`, as
/// fractions; `None` when there are no trials.
///
/// With p = k / n and z = [`Z_95`]: centre (p + z^2 / 2n) / (1 + z^2 / n),
/// half-width z / (1 + z^2 / n) * sqrt(p (1 - p) / n + z^2 / 4n^2).
pub fn wilson(successes: usize, trials: usize) -> Option<Interval> {
    if trials == 0 {
        return None;
    }
    let n = trials as f64;
    let p = successes.min(trials) as f64 / n;
    let z2 = Z_95 * Z_95;
    let denominator = 1.0 + z2 / n;
    let centre = (p + z2 / (2.0 * n)) / denominator;
    let half = Z_95 / denominator * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).sqrt();
    Some(Interval {
        low: (centre - half).max(0.0),
        high: (centre + half).min(1.0),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wilson_matches_published_and_scipy_values() {
        // Newcombe 1998 (Statistics in Medicine 17, 857-872), table I, method 3
        // (Wilson score without continuity correction): 81/263 -> 0.2553 to
        // 0.3662; 15/148 -> 0.0624 to 0.1605; 0/20 -> 0 to 0.1611; 1/29 ->
        // 0.0061 to 0.1718 (four decimals as printed there; quoted from memory, and scipy's
        // wilson method gives the same four decimals).
        for (k, n, low, high) in [
            (81, 263, 0.2553, 0.3662),
            (15, 148, 0.0624, 0.1605),
            (0, 20, 0.0, 0.1611),
            (1, 29, 0.0061, 0.1718),
        ] {
            let i = wilson(k, n).unwrap();
            assert!((i.low - low).abs() < 5e-5, "{k}/{n}: {i:?}");
            assert!((i.high - high).abs() < 5e-5, "{k}/{n}: {i:?}");
        }
        // scipy.stats.binomtest(97, 100).proportion_ci(method="wilson"), run
        // with the project's venv: (0.9154806357094724, 0.9897454759759611).
        let i = wilson(97, 100).unwrap();
        assert!((i.low - 0.915_480_635_709_472_4).abs() < 1e-12, "{i:?}");
        assert!((i.high - 0.989_745_475_975_961_1).abs() < 1e-12, "{i:?}");
        // All successes: the upper bound is 1, the lower below it.
        let all = wilson(50, 50).unwrap();
        assert_eq!(all.high, 1.0);
        assert!(all.low < 1.0 && all.low > 0.9);
        assert_eq!(wilson(0, 0), None);
    }
}

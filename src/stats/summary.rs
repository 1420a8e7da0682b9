//! Summaries of a list of cosines: mean, population standard deviation,
//! quantiles by numpy's default ("linear") method, and a fixed-bin histogram
//! that counts exactly as `numpy.histogram` does, over a range with round
//! ends that encloses the data (so the series do not pile into one corner
//! of [-1, 1]).

use serde::{Deserialize, Serialize};

use super::StatsError;

/// Most steps of a round range: about ten ticks on an axis, the number a
/// reader takes in at a glance (common practice, no source).
pub const MAX_ROUND_STEPS: usize = 10;

/// A round step: `mantissa` (1, 2 or 5) times ten to the `exponent`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RoundStep {
    mantissa: i64,
    exponent: i32,
}

impl RoundStep {
    /// The smallest step of 1, 2 or 5 times a power of ten that cuts `span`
    /// into at most `max_steps` steps.
    pub fn covering(span: f64, max_steps: usize) -> RoundStep {
        let max_steps = max_steps.max(1) as f64;
        for exponent in -6..=9 {
            for mantissa in [1, 2, 5] {
                let step = RoundStep { mantissa, exponent };
                if span / step.size() <= max_steps {
                    return step;
                }
            }
        }
        RoundStep {
            mantissa: 1,
            exponent: 10,
        }
    }

    /// `k` steps from 0, as the double nearest the decimal value (0.35, not
    /// 7 * 0.05 = 0.35000000000000003).
    pub fn multiple(self, k: i64) -> f64 {
        let whole = (k * self.mantissa) as f64;
        if self.exponent < 0 {
            whole / 10f64.powi(-self.exponent)
        } else {
            whole * 10f64.powi(self.exponent)
        }
    }

    /// The step's size.
    pub fn size(self) -> f64 {
        self.multiple(1)
    }

    /// Decimals that print every multiple exactly.
    pub fn decimals(self) -> usize {
        (-self.exponent).max(0) as usize
    }

    /// The multiples of the step within [lo, hi].
    pub fn multiples_within(self, lo: f64, hi: f64) -> Vec<f64> {
        let size = self.size();
        let first = (lo / size - 1e-9).ceil() as i64;
        let last = (hi / size + 1e-9).floor() as i64;
        (first..=last).map(|k| self.multiple(k)).collect()
    }
}

/// The histogram range of cosines between `min` and `max`: multiples of a
/// [`RoundStep`] (at most [`MAX_ROUND_STEPS`] of them) enclosing both,
/// within [-1, 1]; [-1, 1] itself when the bounds are not finite.
pub fn round_range(min: f64, max: f64) -> (f64, f64) {
    if !(min.is_finite() && max.is_finite()) || min > max {
        return (-1.0, 1.0);
    }
    let step = RoundStep::covering(max - min, MAX_ROUND_STEPS);
    let size = step.size();
    // The slack keeps 0.12 / 0.01 = 11.999999999999998 at 12.
    let first = (min / size + 1e-9).floor() as i64;
    let mut last = (max / size - 1e-9).ceil() as i64;
    if last <= first {
        last = first + 1;
    }
    let (mut low, mut high) = (step.multiple(first).max(-1.0), step.multiple(last).min(1.0));
    if low >= high {
        // Every value at 1 (or -1): one step below (or above) it.
        if high >= 1.0 {
            low = 1.0 - size;
        } else {
            high = -1.0 + size;
        }
    }
    (low, high)
}

/// The quantiles reported for every distribution, as fractions.
pub const QUANTILE_LEVELS: [f64; 7] = [0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99];

/// Quantiles at [`QUANTILE_LEVELS`], numpy's `method="linear"`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Quantiles {
    /// 1st percentile.
    pub p01: f64,
    /// 5th percentile.
    pub p05: f64,
    /// 25th percentile (lower quartile).
    pub p25: f64,
    /// Median.
    pub p50: f64,
    /// 75th percentile (upper quartile).
    pub p75: f64,
    /// 95th percentile.
    pub p95: f64,
    /// 99th percentile.
    pub p99: f64,
}

/// Counts of values in equal-width bins over `[low, high]`.
///
/// Bin `k` holds values in `[low + k w, low + (k+1) w)`, the last bin also
/// its upper edge, w = (high - low) / bins; values outside the range (a cosine
/// a rounding error past 1) are counted in the end bins.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Histogram {
    /// Lower edge of the first bin.
    pub low: f64,
    /// Upper edge of the last bin.
    pub high: f64,
    /// Count per bin, lowest bin first.
    pub counts: Vec<u64>,
}

/// Summary of one list of cosines.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct Distribution {
    /// Number of values.
    pub count: usize,
    /// Arithmetic mean.
    pub mean: f64,
    /// Population standard deviation (ddof = 0): sqrt(mean((x - mean)^2)).
    pub std: f64,
    /// Smallest value.
    pub min: f64,
    /// Largest value.
    pub max: f64,
    /// Quantiles, linear interpolation between order statistics.
    pub quantiles: Quantiles,
    /// Histogram over a round range enclosing every cosine of the report
    /// ([`round_range`]), shared by the report's distributions.
    pub histogram: Histogram,
}

impl Distribution {
    /// Summarises `values` (consumed: they are sorted in place) with a
    /// histogram of `bins` bins over `range`.
    pub fn of(
        mut values: Vec<f64>,
        bins: usize,
        range: (f64, f64),
        what: &'static str,
    ) -> Result<Self, StatsError> {
        if values.is_empty() {
            return Err(StatsError::Empty { what });
        }
        if let Some(bad) = values.iter().find(|v| !v.is_finite()) {
            return Err(StatsError::NotFinite { what, value: *bad });
        }
        values.sort_unstable_by(f64::total_cmp);
        let n = values.len() as f64;
        let mean = values.iter().sum::<f64>() / n;
        let var = values.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / n;
        let q = |p| quantile_sorted(&values, p);
        let quantiles = Quantiles {
            p01: q(0.01),
            p05: q(0.05),
            p25: q(0.25),
            p50: q(0.5),
            p75: q(0.75),
            p95: q(0.95),
            p99: q(0.99),
        };
        Ok(Distribution {
            count: values.len(),
            mean,
            std: var.sqrt(),
            min: values[0],
            max: values[values.len() - 1],
            quantiles,
            histogram: histogram(&values, bins, range.0, range.1),
        })
    }
}

/// The `q` quantile (0 <= q <= 1) of ascending `sorted`, as
/// `numpy.quantile(x, q, method="linear")`: at virtual index h = (n - 1) q,
/// interpolate between the order statistics either side of h (Hyndman and
/// Fan 1996, definition 7), with numpy's own rounding of the interpolation.
pub fn quantile_sorted(sorted: &[f64], q: f64) -> f64 {
    let n = sorted.len();
    assert!(n > 0, "quantile of an empty list");
    let h = (n - 1) as f64 * q;
    let below = h.floor();
    let lo = (below as usize).min(n - 1);
    let hi = (lo + 1).min(n - 1);
    let t = h - below;
    let (a, b) = (sorted[lo], sorted[hi]);
    let diff = b - a;
    // numpy's _lerp interpolates from the nearer end, which keeps the result
    // exact at t = 1 and monotone in t.
    if t >= 0.5 {
        b - diff * (1.0 - t)
    } else {
        a + diff * t
    }
}

/// Median as `numpy.median`: the mean of the two middle values when the
/// count is even.
pub fn median(values: &[f64]) -> f64 {
    let mut v = values.to_vec();
    v.sort_unstable_by(f64::total_cmp);
    let n = v.len();
    assert!(n > 0, "median of an empty list");
    if n % 2 == 1 {
        v[n / 2]
    } else {
        (v[n / 2 - 1] + v[n / 2]) / 2.0
    }
}

/// Counts `values` into `bins` equal bins over `[low, high]` exactly as
/// `numpy.histogram(np.clip(values, low, high), bins, (low, high))` does,
/// including its correction of the computed bin at an edge.
pub fn histogram(values: &[f64], bins: usize, low: f64, high: f64) -> Histogram {
    // Edges as numpy.linspace makes them: k * step + low, the last exactly high.
    let step = (high - low) / bins as f64;
    let mut edges: Vec<f64> = (0..=bins).map(|k| k as f64 * step + low).collect();
    edges[bins] = high;
    let mut counts = vec![0u64; bins];
    for &v in values {
        let x = v.clamp(low, high);
        let f = (x - low) / (high - low) * bins as f64;
        let mut k = (f as usize).min(bins - 1);
        if x < edges[k] {
            k -= 1;
        }
        if k + 1 < bins && x >= edges[k + 1] {
            k += 1;
        }
        counts[k] += 1;
    }
    Histogram { low, high, counts }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantiles_match_numpy_linear() {
        // Worked by hand with numpy's linear method, h = (n - 1) q:
        // x = [1, 2, 3, 4]: q=0.25 -> h=0.75 -> 1 + 0.75 = 1.75;
        // q=0.5 -> h=1.5 -> 2.5; q=0.99 -> h=2.97 -> 3.97; q=0.01 -> h=0.03 -> 1.03.
        // (numpy.quantile([1,2,3,4], [0.01,0.25,0.5,0.99]) = [1.03, 1.75, 2.5, 3.97])
        let x = [1.0, 2.0, 3.0, 4.0];
        assert!((quantile_sorted(&x, 0.25) - 1.75).abs() < 1e-12);
        assert!((quantile_sorted(&x, 0.5) - 2.5).abs() < 1e-12);
        assert!((quantile_sorted(&x, 0.99) - 3.97).abs() < 1e-12);
        assert!((quantile_sorted(&x, 0.01) - 1.03).abs() < 1e-12);
        assert_eq!(quantile_sorted(&x, 1.0), 4.0);
        assert_eq!(quantile_sorted(&x, 0.0), 1.0);
        // x = [0, 10, 10, 30, 100]: q=0.95 -> h=3.8 -> 30 + 0.8*70 = 86;
        // q=0.05 -> h=0.2 -> 0 + 0.2*10 = 2.
        let y = [0.0, 10.0, 10.0, 30.0, 100.0];
        assert!((quantile_sorted(&y, 0.95) - 86.0).abs() < 1e-12);
        assert!((quantile_sorted(&y, 0.05) - 2.0).abs() < 1e-12);
        assert_eq!(quantile_sorted(&[7.0], 0.3), 7.0);
    }

    #[test]
    fn distribution_uses_population_std() {
        // Worked by hand: [1, 2, 3, 4] has mean 2.5, squared deviations
        // 2.25 + 0.25 + 0.25 + 2.25 = 5, population variance 5/4, std sqrt(1.25)
        // (the sample std, ddof = 1, would be sqrt(5/3)).
        let d = Distribution::of(vec![4.0, 1.0, 3.0, 2.0], 4, (0.0, 4.0), "test").unwrap();
        assert_eq!(d.count, 4);
        assert!((d.mean - 2.5).abs() < 1e-15);
        assert!((d.std - 1.25f64.sqrt()).abs() < 1e-15);
        assert_eq!((d.min, d.max), (1.0, 4.0));
        assert!((d.quantiles.p50 - 2.5).abs() < 1e-15);
    }

    #[test]
    fn empty_or_nan_lists_are_refused() {
        assert!(matches!(
            Distribution::of(vec![], 4, (-1.0, 1.0), "x"),
            Err(StatsError::Empty { .. })
        ));
        assert!(matches!(
            Distribution::of(vec![0.0, f64::NAN], 4, (-1.0, 1.0), "x"),
            Err(StatsError::NotFinite { .. })
        ));
    }

    #[test]
    fn histogram_edges_follow_numpy() {
        // numpy.histogram(np.clip(x, -1, 1), bins=4, range=(-1, 1)) with
        // edges [-1, -0.5, 0, 0.5, 1]: an edge value belongs to the bin above
        // it, 1 (and the clipped 1.0000001) to the last bin, -1.5 clipped to
        // the first: counts [2, 1, 2, 3].
        let x = [-1.5, -1.0, -0.5, 0.0, 0.25, 0.5, 1.0, 1.0000001];
        let h = histogram(&x, 4, -1.0, 1.0);
        assert_eq!(h.counts, vec![2, 1, 2, 3]);
    }

    #[test]
    fn histogram_forty_bins_follow_numpy_edges_not_decimal_ones() {
        // numpy.linspace(-1, 1, 41)[22] is 0.10000000000000009, just above 0.1,
        // so numpy.histogram([0.1], 40, (-1, 1)) counts 0.1 in bin 21, not 22;
        // likewise 0.05 in bin 20 and -0.05 in bin 18 (checked with numpy 2.4).
        let h = histogram(&[0.1, 0.05, -0.05], 40, -1.0, 1.0);
        assert_eq!(h.counts[21], 1);
        assert_eq!(h.counts[20], 1);
        assert_eq!(h.counts[18], 1);
        assert_eq!(h.counts.iter().sum::<u64>(), 3);
    }

    #[test]
    fn round_ranges_enclose_the_data_on_round_ends() {
        // Worked by hand: 0.31 to 0.97 spans 0.66; steps of 0.05 would take
        // 14, of 0.1 take 7 (<= 10): floor(3.1) = 3 -> 0.3, ceil(9.7) = 10 -> 1.0.
        assert_eq!(round_range(0.31, 0.97), (0.3, 1.0));
        // 0.12 to 0.215 spans 0.095: step 0.01, 0.12 to 0.22.
        assert_eq!(round_range(0.12, 0.215), (0.12, 0.22));
        // -0.93 to 0.98 by 0.2: -1.0 to 1.0.
        assert_eq!(round_range(-0.93, 0.98), (-1.0, 1.0));
        // One value: one step around it; 1.0 alone gets the step below.
        let (lo, hi) = round_range(0.5, 0.5);
        assert!(lo <= 0.5 && hi > 0.5 && hi - lo < 1e-5, "{lo} {hi}");
        let (lo, hi) = round_range(1.0, 1.0);
        assert!(lo < 1.0 && hi == 1.0);
        assert_eq!(round_range(f64::NAN, 1.0), (-1.0, 1.0));
        // Multiples print as the decimals they are.
        let step = RoundStep::covering(0.66, 10);
        assert_eq!((step.size(), step.decimals()), (0.1, 1));
        assert_eq!(step.multiples_within(0.3, 0.65), vec![0.3, 0.4, 0.5, 0.6]);
        assert_eq!(RoundStep::covering(37.0, 5).size(), 10.0);
    }

    #[test]
    fn median_of_even_count_is_mean_of_middle() {
        // Worked by hand: median of 1, 3 is 2; of 1, 2, 9 is 2.
        assert_eq!(median(&[3.0, 1.0]), 2.0);
        assert_eq!(median(&[9.0, 1.0, 2.0]), 2.0);
    }
}

//! Reward continuity maps: a function from a new bundle's cosine to the old
//! bundle's, fitted on a probe set, so that a training run switching bundles
//! can keep its reward scale (`remap` in `POST /v1/rewards`).
//!
//! A map is data: it serialises to a small JSON object,
//! `{"kind": "affine", "a": 1.1, "b": -0.02}` or
//! `{"kind": "monotone", "knots": [[x, y], ...]}`, and is checked when read.

use serde::{Deserialize, Serialize};

/// Why a continuity map cannot be fitted or used.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ContinuityError {
    /// Fitting needs paired lists of equal, non-zero length.
    #[error("a continuity map needs equally many cosines on both sides and at least one pair; got {x} and {y}")]
    BadPairs {
        /// Cosines of the new bundle.
        x: usize,
        /// Cosines of the old bundle.
        y: usize,
    },
    /// A number that is NaN or infinite.
    #[error("continuity map {what} must be finite numbers, found {value}")]
    NotFinite {
        /// Which part of the map.
        what: &'static str,
        /// The offending value.
        value: f64,
    },
    /// A monotone map without knots.
    #[error("a monotone continuity map needs at least one knot; give \"knots\": [[x, y], ...]")]
    NoKnots,
    /// Knots out of order.
    #[error("monotone continuity map knots must have strictly increasing x and non-decreasing y; knot {index} ({x}, {y}) breaks this")]
    Unordered {
        /// Index of the knot that breaks the order.
        index: usize,
        /// Its x.
        x: f64,
        /// Its y.
        y: f64,
    },
}

/// A map from a new bundle's cosine to the old bundle's scale.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(tag = "kind", rename_all = "lowercase", try_from = "UncheckedMap")]
pub enum ContinuityMap {
    /// y = a x + b.
    Affine {
        /// Slope.
        a: f64,
        /// Offset.
        b: f64,
    },
    /// Piecewise linear through `knots` ([x, y], x strictly increasing, y
    /// non-decreasing), constant beyond the first and last knot.
    Monotone {
        /// The knots, by increasing x.
        knots: Vec<[f64; 2]>,
    },
}

/// The same shape as [`ContinuityMap`], before [`ContinuityMap::validate`].
#[derive(Deserialize)]
#[serde(tag = "kind", rename_all = "lowercase", deny_unknown_fields)]
enum UncheckedMap {
    Affine { a: f64, b: f64 },
    Monotone { knots: Vec<[f64; 2]> },
}

impl TryFrom<UncheckedMap> for ContinuityMap {
    type Error = ContinuityError;

    fn try_from(raw: UncheckedMap) -> Result<Self, Self::Error> {
        let map = match raw {
            UncheckedMap::Affine { a, b } => ContinuityMap::Affine { a, b },
            UncheckedMap::Monotone { knots } => ContinuityMap::Monotone { knots },
        };
        map.validate()?;
        Ok(map)
    }
}

impl ContinuityMap {
    /// Checks that the map is usable: finite numbers, ordered knots.
    pub fn validate(&self) -> Result<(), ContinuityError> {
        let finite = |what, value: f64| {
            if value.is_finite() {
                Ok(())
            } else {
                Err(ContinuityError::NotFinite { what, value })
            }
        };
        match self {
            ContinuityMap::Affine { a, b } => {
                finite("a", *a)?;
                finite("b", *b)
            }
            ContinuityMap::Monotone { knots } => {
                if knots.is_empty() {
                    return Err(ContinuityError::NoKnots);
                }
                for (index, &[x, y]) in knots.iter().enumerate() {
                    finite("knots", x)?;
                    finite("knots", y)?;
                    if index > 0 {
                        let [px, py] = knots[index - 1];
                        if !(x > px && y >= py) {
                            return Err(ContinuityError::Unordered { index, x, y });
                        }
                    }
                }
                Ok(())
            }
        }
    }

    /// Maps one cosine (computed in `f64`).
    pub fn apply(&self, x: f32) -> f32 {
        self.apply_f64(f64::from(x)) as f32
    }

    /// Maps one cosine.
    pub fn apply_f64(&self, x: f64) -> f64 {
        match self {
            ContinuityMap::Affine { a, b } => a * x + b,
            ContinuityMap::Monotone { knots } => interpolate(knots, x),
        }
    }

    /// Least-squares line y = a x + b through the pairs (`numpy.polyfit(x, y, 1)`).
    /// With every x equal the slope is 0 and b the mean of y.
    pub fn fit_affine(x: &[f64], y: &[f64]) -> Result<FittedMap, ContinuityError> {
        check_pairs(x, y)?;
        let n = x.len() as f64;
        let mx = x.iter().sum::<f64>() / n;
        let my = y.iter().sum::<f64>() / n;
        let sxx: f64 = x.iter().map(|v| (v - mx) * (v - mx)).sum();
        let sxy: f64 = x.iter().zip(y).map(|(u, v)| (u - mx) * (v - my)).sum();
        let a = if sxx > 0.0 { sxy / sxx } else { 0.0 };
        Ok(FittedMap::new(
            ContinuityMap::Affine { a, b: my - a * mx },
            x,
            y,
        ))
    }

    /// Non-decreasing isotonic regression of y on x by pool-adjacent-violators
    /// (Ayer et al. 1955), as `sklearn.isotonic.IsotonicRegression(
    /// out_of_bounds="clip")`: pairs with equal x are first pooled into their
    /// mean, blocks become knots at their first and last x, and the map
    /// interpolates linearly between knots and is constant outside them.
    pub fn fit_monotone(x: &[f64], y: &[f64]) -> Result<FittedMap, ContinuityError> {
        check_pairs(x, y)?;
        let mut order: Vec<usize> = (0..x.len()).collect();
        order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));

        // Pool equal x: (x, weighted sum of y, weight).
        let mut points: Vec<(f64, f64, f64)> = Vec::new();
        for &i in &order {
            match points.last_mut() {
                Some(last) if last.0 == x[i] => {
                    last.1 += y[i];
                    last.2 += 1.0;
                }
                _ => points.push((x[i], y[i], 1.0)),
            }
        }

        // Blocks of consecutive points: (first point, last point, sum y, weight).
        let mut blocks: Vec<(usize, usize, f64, f64)> = Vec::new();
        for (p, &(_, sum, weight)) in points.iter().enumerate() {
            blocks.push((p, p, sum, weight));
            // Merge while the previous block's mean is not below the last one's
            // (equal means merge too, as scikit-learn does).
            while blocks.len() > 1 {
                let last = blocks[blocks.len() - 1];
                let prev = blocks[blocks.len() - 2];
                if prev.2 / prev.3 < last.2 / last.3 {
                    break;
                }
                blocks.pop();
                let merged = blocks.last_mut().expect("two blocks were there");
                merged.1 = last.1;
                merged.2 += last.2;
                merged.3 += last.3;
            }
        }

        let mut knots: Vec<[f64; 2]> = Vec::with_capacity(2 * blocks.len());
        for &(first, last, sum, weight) in &blocks {
            let value = sum / weight;
            knots.push([points[first].0, value]);
            if last != first {
                knots.push([points[last].0, value]);
            }
        }
        Ok(FittedMap::new(ContinuityMap::Monotone { knots }, x, y))
    }
}

fn check_pairs(x: &[f64], y: &[f64]) -> Result<(), ContinuityError> {
    if x.len() != y.len() || x.is_empty() {
        return Err(ContinuityError::BadPairs {
            x: x.len(),
            y: y.len(),
        });
    }
    if let Some(&value) = x.iter().chain(y).find(|v| !v.is_finite()) {
        return Err(ContinuityError::NotFinite {
            what: "input cosines",
            value,
        });
    }
    Ok(())
}

/// `numpy.interp(x, knots_x, knots_y)`: linear between knots, clamped outside.
fn interpolate(knots: &[[f64; 2]], x: f64) -> f64 {
    let first = knots[0];
    let last = knots[knots.len() - 1];
    if x.is_nan() {
        return f64::NAN;
    }
    if x <= first[0] {
        return first[1];
    }
    if x >= last[0] {
        return last[1];
    }
    // The last knot whose x is <= x; it exists and is not the last knot.
    let j = knots.partition_point(|k| k[0] <= x) - 1;
    let [x0, y0] = knots[j];
    let [x1, y1] = knots[j + 1];
    (y1 - y0) / (x1 - x0) * (x - x0) + y0
}

/// A fitted map and how well it fits the pairs it was fitted on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct FittedMap {
    /// The map, ready to save and pass as `remap`.
    pub map: ContinuityMap,
    /// Pairs fitted.
    pub pairs: usize,
    /// sqrt(mean((map(x) - y)^2)) over the fitted pairs.
    pub rmse: f64,
    /// max |map(x) - y| over the fitted pairs.
    pub max_error: f64,
}

impl FittedMap {
    fn new(map: ContinuityMap, x: &[f64], y: &[f64]) -> Self {
        let errors: Vec<f64> = x
            .iter()
            .zip(y)
            .map(|(&u, &v)| map.apply_f64(u) - v)
            .collect();
        let n = errors.len() as f64;
        FittedMap {
            map,
            pairs: errors.len(),
            rmse: (errors.iter().map(|e| e * e).sum::<f64>() / n).sqrt(),
            max_error: errors.iter().fold(0.0f64, |m, e| m.max(e.abs())),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn isotonic_regression_worked_by_hand() {
        // PAVA (non-decreasing) by hand on y = [1, 3, 2, 4, 3, 5] at x = 0..5:
        // 3 > 2 pool -> 2.5, 2.5; 4 > 3 pool -> 3.5, 3.5:
        // fit [1, 2.5, 2.5, 3.5, 3.5, 5]; blocks {0}, {1,2}, {3,4}, {5}; knots at
        // (0,1), (1,2.5), (2,2.5), (3,3.5), (4,3.5), (5,5). Squared errors
        // 0 + .25*4 + 0 = 1 over 6 -> rmse sqrt(1/6), max error 0.5.
        let x = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0];
        let y = [1.0, 3.0, 2.0, 4.0, 3.0, 5.0];
        let fit = ContinuityMap::fit_monotone(&x, &y).unwrap();
        let ContinuityMap::Monotone { knots } = &fit.map else {
            panic!("not monotone");
        };
        assert_eq!(
            knots,
            &vec![
                [0.0, 1.0],
                [1.0, 2.5],
                [2.0, 2.5],
                [3.0, 3.5],
                [4.0, 3.5],
                [5.0, 5.0]
            ]
        );
        assert!((fit.rmse - (1.0f64 / 6.0).sqrt()).abs() < 1e-12);
        assert!((fit.max_error - 0.5).abs() < 1e-12);
        // Between knots: halfway from (2, 2.5) to (3, 3.5) is 3; clamped outside.
        assert!((fit.map.apply_f64(2.5) - 3.0).abs() < 1e-12);
        assert_eq!(fit.map.apply_f64(-1.0), 1.0);
        assert_eq!(fit.map.apply_f64(9.0), 5.0);
    }

    #[test]
    fn isotonic_pools_tied_x_and_backtracks() {
        // Worked by hand: x = [0, 0, 1, 2], y = [0, 2, 3, 0].
        // Tied x pooled first: (0, 1), (1, 3), (2, 0). 3 > 0 pool -> 1.5 (weight 2);
        // 1 < 1.5 stops. Fit at x: 0 -> 1, 1 -> 1.5, 2 -> 1.5; knots (0,1), (1,1.5), (2,1.5).
        let fit =
            ContinuityMap::fit_monotone(&[0.0, 0.0, 1.0, 2.0], &[0.0, 2.0, 3.0, 0.0]).unwrap();
        assert_eq!(
            fit.map,
            ContinuityMap::Monotone {
                knots: vec![[0.0, 1.0], [1.0, 1.5], [2.0, 1.5]]
            }
        );
        // x = [0, 1, 2], y = [2, 3, 1]: 3 > 1 pool -> 2 (weight 2), then back
        // one block: 2 >= 2 pools again (equal means merge) -> one block of 2.
        let fit = ContinuityMap::fit_monotone(&[0.0, 1.0, 2.0], &[2.0, 3.0, 1.0]).unwrap();
        assert_eq!(
            fit.map,
            ContinuityMap::Monotone {
                knots: vec![[0.0, 2.0], [2.0, 2.0]]
            }
        );
    }

    #[test]
    fn affine_least_squares_worked_by_hand() {
        // x = [0, 1, 2], y = [1, 2, 4]: mean x 1, mean y 7/3; sxy = (-1)(-4/3) + 0 +
        // (1)(5/3) = 3, sxx = 2 -> a = 1.5, b = 7/3 - 1.5 = 5/6.
        // Residuals: 5/6 - 1 = -1/6, 7/3 - 2 = 1/3, 23/6 - 4 = -1/6: rmse sqrt((1/36+1/9+1/36)/3)
        let fit = ContinuityMap::fit_affine(&[0.0, 1.0, 2.0], &[1.0, 2.0, 4.0]).unwrap();
        let ContinuityMap::Affine { a, b } = fit.map else {
            panic!("not affine");
        };
        assert!((a - 1.5).abs() < 1e-12);
        assert!((b - 5.0 / 6.0).abs() < 1e-12);
        assert!((fit.rmse - ((1.0 / 36.0 + 1.0 / 9.0 + 1.0 / 36.0) / 3.0f64).sqrt()).abs() < 1e-12);
        assert!((fit.max_error - 1.0 / 3.0).abs() < 1e-12);
    }

    #[test]
    fn maps_round_trip_through_json() {
        let affine: ContinuityMap =
            serde_json::from_str(r#"{"kind": "affine", "a": 2, "b": -0.5}"#).unwrap();
        assert_eq!(affine.apply(0.5), 0.5);
        let monotone: ContinuityMap =
            serde_json::from_str(r#"{"kind": "monotone", "knots": [[0.0, 0.1], [1.0, 0.9]]}"#)
                .unwrap();
        assert!((monotone.apply(0.5) - 0.5).abs() < 1e-6);
        let json = serde_json::to_string(&monotone).unwrap();
        assert_eq!(json, r#"{"kind":"monotone","knots":[[0.0,0.1],[1.0,0.9]]}"#);
    }

    #[test]
    fn invalid_maps_are_refused_when_read() {
        let err = serde_json::from_str::<ContinuityMap>(
            r#"{"kind": "monotone", "knots": [[0.5, 0.1], [0.2, 0.9]]}"#,
        )
        .unwrap_err()
        .to_string();
        assert!(err.contains("strictly increasing x"), "{err}");
        assert!(
            serde_json::from_str::<ContinuityMap>(r#"{"kind": "monotone", "knots": []}"#).is_err()
        );
        assert!(serde_json::from_str::<ContinuityMap>(r#"{"kind": "spline"}"#).is_err());
        assert!(serde_json::from_str::<ContinuityMap>(r#"{"kind": "affine", "a": 1}"#).is_err());
    }

    #[test]
    fn single_knot_is_a_constant() {
        let m = ContinuityMap::Monotone {
            knots: vec![[0.3, 0.7]],
        };
        m.validate().unwrap();
        assert_eq!(m.apply_f64(-1.0), 0.7);
        assert_eq!(m.apply_f64(1.0), 0.7);
    }
}

//! Agreement between two lists of cosines of the same pairs (Spearman's rho,
//! Kendall's tau-b) and between two samples of cosines (the two-sample
//! Kolmogorov-Smirnov statistic), computed as scipy.stats computes them,
//! ties included.
//!
//! Kept by hand: no maintained Rust statistics crate computes tau-b and the
//! KS statistic with scipy's tie rules, and these few lines are checked
//! against scipy itself (`tests/reference/`) on every `make test`.

use serde::{Deserialize, Serialize};

/// Ranks 1..=n of `x`, tied values sharing the mean of their ranks
/// (`scipy.stats.rankdata(x, method="average")`).
pub fn average_ranks(x: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..x.len()).collect();
    order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
    let mut ranks = vec![0.0; x.len()];
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && x[order[end]] == x[order[start]] {
            end += 1;
        }
        // Ranks start+1..=end share their mean.
        let rank = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = rank;
        }
        start = end;
    }
    ranks
}

/// Pearson's correlation coefficient; `None` when either side is constant.
fn pearson(x: &[f64], y: &[f64]) -> Option<f64> {
    let n = x.len() as f64;
    let mx = x.iter().sum::<f64>() / n;
    let my = y.iter().sum::<f64>() / n;
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (&a, &b) in x.iter().zip(y) {
        sxy += (a - mx) * (b - my);
        sxx += (a - mx) * (a - mx);
        syy += (b - my) * (b - my);
    }
    if sxx == 0.0 || syy == 0.0 {
        return None;
    }
    Some((sxy / (sxx.sqrt() * syy.sqrt())).clamp(-1.0, 1.0))
}

/// Spearman's rank correlation: Pearson's r of the average ranks, as
/// `scipy.stats.spearmanr`. `None` (scipy: nan) when fewer than 2 pairs or
/// either list is constant.
pub fn spearman_rho(x: &[f64], y: &[f64]) -> Option<f64> {
    assert_eq!(
        x.len(),
        y.len(),
        "spearman_rho of lists of different lengths"
    );
    if x.len() < 2 {
        return None;
    }
    pearson(&average_ranks(x), &average_ranks(y))
}

/// Dense ranks 0..k of `x` (equal values share one rank).
fn dense_ranks(x: &[f64]) -> (Vec<usize>, usize) {
    let mut order: Vec<usize> = (0..x.len()).collect();
    order.sort_by(|&a, &b| x[a].total_cmp(&x[b]));
    let mut ranks = vec![0; x.len()];
    let mut rank = 0;
    for (pos, &i) in order.iter().enumerate() {
        if pos > 0 && x[i] != x[order[pos - 1]] {
            rank += 1;
        }
        ranks[i] = rank;
    }
    (ranks, if x.is_empty() { 0 } else { rank + 1 })
}

/// Sum over groups of equal keys (in a sorted run) of t (t - 1) / 2.
fn tied_pairs<T: PartialEq>(sorted: impl Iterator<Item = T>) -> u64 {
    let mut total = 0u64;
    let mut run = 0u64;
    let mut last: Option<T> = None;
    for key in sorted {
        if last.as_ref() == Some(&key) {
            run += 1;
        } else {
            total += run * run.saturating_sub(1) / 2;
            run = 1;
            last = Some(key);
        }
    }
    total + run * run.saturating_sub(1) / 2
}

/// Kendall's tau-b, as `scipy.stats.kendalltau(x, y)` (variant "b"):
/// (concordant - discordant) / sqrt((n0 - n_x)(n0 - n_y)), n0 = n(n-1)/2 and
/// n_x, n_y the pairs tied in x and in y. `None` (scipy: nan) when all of x
/// or all of y is tied, or fewer than 2 pairs.
///
/// O(n log n): discordant pairs are counted with a Fenwick tree over the y
/// ranks while walking the pairs in x order (Knight 1966's idea, with a tree
/// instead of a merge sort).
pub fn kendall_tau_b(x: &[f64], y: &[f64]) -> Option<f64> {
    assert_eq!(
        x.len(),
        y.len(),
        "kendall_tau_b of lists of different lengths"
    );
    let n = x.len();
    if n < 2 {
        return None;
    }
    let (xr, _) = dense_ranks(x);
    let (yr, ky) = dense_ranks(y);
    let mut order: Vec<usize> = (0..n).collect();
    // By x, then by y, so pairs tied in x are never counted as discordant.
    order.sort_by_key(|&i| (xr[i], yr[i]));

    let mut tree = vec![0u64; ky + 1];
    let mut discordant = 0u64;
    for (seen, &i) in order.iter().enumerate() {
        // Earlier pairs (smaller or equal x) with strictly greater y.
        let mut at_most = 0u64;
        let mut k = yr[i] + 1;
        while k > 0 {
            at_most += tree[k];
            k &= k - 1;
        }
        discordant += seen as u64 - at_most;
        let mut k = yr[i] + 1;
        while k <= ky {
            tree[k] += 1;
            k += k & k.wrapping_neg();
        }
    }

    let joint_ties = tied_pairs(order.iter().map(|&i| (xr[i], yr[i])));
    let x_ties = tied_pairs(order.iter().map(|&i| xr[i]));
    let mut ys = yr.clone();
    ys.sort_unstable();
    let y_ties = tied_pairs(ys.into_iter());
    let total = (n as u64) * (n as u64 - 1) / 2;
    if x_ties == total || y_ties == total {
        return None;
    }
    // total = con + dis + (x_ties - joint) + (y_ties - joint) + joint
    let con_minus_dis = total as i128 - x_ties as i128 - y_ties as i128 + joint_ties as i128
        - 2 * discordant as i128;
    let tau =
        con_minus_dis as f64 / ((total - x_ties) as f64).sqrt() / ((total - y_ties) as f64).sqrt();
    Some(tau.clamp(-1.0, 1.0))
}

/// Kendall's tau-b by direct comparison of every pair, O(n^2); the check of
/// [`kendall_tau_b`].
#[cfg(test)]
fn kendall_tau_b_quadratic(x: &[f64], y: &[f64]) -> Option<f64> {
    let n = x.len();
    let sign = |a: f64, b: f64| i64::from(a > b) - i64::from(a < b);
    let (mut s, mut tx, mut ty, mut total) = (0i64, 0i64, 0i64, 0i64);
    for i in 0..n {
        for j in i + 1..n {
            let (dx, dy) = (sign(x[i], x[j]), sign(y[i], y[j]));
            total += 1;
            s += dx * dy;
            tx += i64::from(dx == 0);
            ty += i64::from(dy == 0);
        }
    }
    if tx == total || ty == total {
        return None;
    }
    Some(s as f64 / (((total - tx) * (total - ty)) as f64).sqrt())
}

/// The two-sample Kolmogorov-Smirnov test of two samples of cosines.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct KsTest {
    /// Size of the first sample.
    pub n_from: usize,
    /// Size of the second sample.
    pub n_to: usize,
    /// D = max over x of |F_from(x) - F_to(x)|, empirical CDFs; equal to
    /// `scipy.stats.ks_2samp(from, to).statistic`.
    pub statistic: f64,
    /// Asymptotic two-sided p-value: the Kolmogorov distribution's survival
    /// function at sqrt(n m / (n + m)) D (`scipy.stats.kstwobign.sf`); not
    /// scipy's default (exact for small samples), and rough below ~50 values.
    pub p_value_asymptotic: f64,
}

/// Two-sample Kolmogorov-Smirnov statistic and asymptotic p-value.
pub fn ks_two_sample(a: &[f64], b: &[f64]) -> KsTest {
    assert!(
        !a.is_empty() && !b.is_empty(),
        "ks_two_sample of an empty sample"
    );
    let mut a = a.to_vec();
    let mut b = b.to_vec();
    a.sort_unstable_by(f64::total_cmp);
    b.sort_unstable_by(f64::total_cmp);
    let (n, m) = (a.len(), b.len());
    let (mut i, mut j) = (0, 0);
    let mut d = 0.0f64;
    // Walk the distinct values of both samples; after taking every copy of the
    // smallest remaining value, i/n and j/m are the two CDFs at that value.
    while i < n && j < m {
        let v = a[i].min(b[j]);
        while i < n && a[i] == v {
            i += 1;
        }
        while j < m && b[j] == v {
            j += 1;
        }
        d = d.max((i as f64 / n as f64 - j as f64 / m as f64).abs());
    }
    let en = (n * m) as f64 / (n + m) as f64;
    KsTest {
        n_from: n,
        n_to: m,
        statistic: d,
        p_value_asymptotic: kolmogorov_survival(en.sqrt() * d),
    }
}

/// P(K > lambda) for the Kolmogorov distribution: 2 sum_k (-1)^(k-1)
/// exp(-2 k^2 lambda^2), switching for small lambda to the Jacobi-theta form
/// 1 - sqrt(2 pi)/lambda sum_k exp(-(2k-1)^2 pi^2 / (8 lambda^2)), which
/// converges there.
fn kolmogorov_survival(lambda: f64) -> f64 {
    if lambda <= 0.0 {
        return 1.0;
    }
    if lambda < 1.0 {
        let mut sum = 0.0;
        for k in 1..=100 {
            let odd = (2 * k - 1) as f64;
            let term =
                (-(odd * odd) * std::f64::consts::PI.powi(2) / (8.0 * lambda * lambda)).exp();
            sum += term;
            if term < 1e-20 {
                break;
            }
        }
        (1.0 - (2.0 * std::f64::consts::PI).sqrt() / lambda * sum).clamp(0.0, 1.0)
    } else {
        let mut sum = 0.0;
        for k in 1..=100 {
            let kf = k as f64;
            let term = (-2.0 * kf * kf * lambda * lambda).exp();
            sum += if k % 2 == 1 { term } else { -term };
            if term < 1e-20 {
                break;
            }
        }
        (2.0 * sum).clamp(0.0, 1.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn average_ranks_share_ties() {
        // scipy.stats.rankdata([10, 20, 10, 30]) = [1.5, 3, 1.5, 4]
        assert_eq!(
            average_ranks(&[10.0, 20.0, 10.0, 30.0]),
            vec![1.5, 3.0, 1.5, 4.0]
        );
    }

    #[test]
    fn spearman_with_ties_worked_by_hand() {
        // x = [1, 2, 2, 3] -> ranks [1, 2.5, 2.5, 4]; y = [1, 3, 2, 4] -> [1, 3, 2, 4].
        // Centred: x' = [-1.5, 0, 0, 1.5], y' = [-1.5, 0.5, -0.5, 1.5];
        // sum x'y' = 4.5, sum x'^2 = 4.5, sum y'^2 = 5 -> rho = 4.5 / sqrt(22.5) = 0.9486833
        // (scipy.stats.spearmanr gives 0.9486832980505139).
        let rho = spearman_rho(&[1.0, 2.0, 2.0, 3.0], &[1.0, 3.0, 2.0, 4.0]).unwrap();
        assert!((rho - 4.5 / 22.5f64.sqrt()).abs() < 1e-12);
        assert_eq!(spearman_rho(&[1.0, 1.0], &[1.0, 2.0]), None);
    }

    #[test]
    fn kendall_tau_b_with_ties_worked_by_hand() {
        // x = [1, 2, 2, 3], y = [1, 3, 2, 4]; the 6 pairs:
        // (0,1) +, (0,2) +, (0,3) +, (1,2) tied in x, (1,3) +, (2,3) +
        // con 5, dis 0, x-ties 1, y-ties 0: tau_b = 5 / sqrt((6-1)(6-0)) = 5/sqrt(30)
        // (scipy.stats.kendalltau gives 0.912870929175277).
        let tau = kendall_tau_b(&[1.0, 2.0, 2.0, 3.0], &[1.0, 3.0, 2.0, 4.0]).unwrap();
        assert!((tau - 5.0 / 30f64.sqrt()).abs() < 1e-12);
        // Reversed order with a tie in both lists: x = [1, 2, 3, 3], y = [4, 3, 3, 1]:
        // (0,1) -, (0,2) -, (0,3) -, (1,2) tied y, (1,3) -, (2,3) tied x:
        // con 0, dis 4, x-ties 1, y-ties 1: tau_b = -4 / sqrt(5*5) = -0.8.
        let tau = kendall_tau_b(&[1.0, 2.0, 3.0, 3.0], &[4.0, 3.0, 3.0, 1.0]).unwrap();
        assert!((tau + 0.8).abs() < 1e-12);
        assert_eq!(kendall_tau_b(&[2.0, 2.0, 2.0], &[1.0, 2.0, 3.0]), None);
    }

    #[test]
    fn kendall_fenwick_agrees_with_quadratic_on_heavily_tied_data() {
        // Values on a coarse grid so that ties in x, in y and in both abound.
        let mut state = 0x9e3779b97f4a7c15u64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state % 7) as f64 / 4.0
        };
        let x: Vec<f64> = (0..300).map(|_| next()).collect();
        let y: Vec<f64> = x.iter().map(|&v| v + next() / 2.0).collect();
        let fast = kendall_tau_b(&x, &y).unwrap();
        let slow = kendall_tau_b_quadratic(&x, &y).unwrap();
        assert!((fast - slow).abs() < 1e-12, "{fast} vs {slow}");
    }

    #[test]
    fn ks_statistic_worked_by_hand() {
        // a = [1, 2, 3], b = [2, 4]: at 1: 1/3 - 0; at 2: 2/3 - 1/2; at 3: 1 - 1/2 = 1/2;
        // at 4: 1 - 1. D = 1/2 (scipy.stats.ks_2samp([1,2,3],[2,4]).statistic = 0.5).
        let t = ks_two_sample(&[3.0, 1.0, 2.0], &[4.0, 2.0]);
        assert!((t.statistic - 0.5).abs() < 1e-15);
        // Identical samples: D = 0, p = 1.
        let t = ks_two_sample(&[0.1, 0.2, 0.2], &[0.2, 0.1, 0.2]);
        assert_eq!(t.statistic, 0.0);
        assert_eq!(t.p_value_asymptotic, 1.0);
    }

    #[test]
    fn kolmogorov_survival_matches_tabulated_values() {
        // scipy 1.17 stats.kstwobign: sf(1.0) = 0.26999967167735456,
        // sf(0.5) = 0.9639452436648751, sf(3.0) = 3.045995948942526e-08,
        // isf(0.05) = 1.3580986393225507.
        assert!((kolmogorov_survival(1.0) - 0.26999967167735456).abs() < 1e-12);
        assert!((kolmogorov_survival(0.5) - 0.9639452436648751).abs() < 1e-12);
        assert!((kolmogorov_survival(3.0) - 3.045995948942526e-08).abs() < 1e-15);
        assert!((kolmogorov_survival(1.3580986393225507) - 0.05).abs() < 1e-9);
    }
}

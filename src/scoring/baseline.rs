//! Baselines for variance reduction and the advantages they give.

use serde::{Deserialize, Serialize};

/// A baseline, as requests name it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(rename_all = "kebab-case")]
pub enum Baseline {
    /// `b_i = 0`: the advantage is the reward.
    #[default]
    None,
    /// `b_i = sum_{j != i} r_j / (K - 1)` over the group's K samples (Luo 2020).
    MeanOfOthers,
    /// `b_i` = the reward of the group's greedy caption (Rennie et al. 2017).
    Greedy,
}

/// Why a baseline cannot be formed for a group.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum BaselineError {
    #[error("the mean-of-others baseline needs at least 2 captions in each group")]
    TooFewSamples,
    #[error("the greedy baseline needs a `greedy` caption in each group")]
    NoGreedy,
}

/// Advantages `r_i - b_i` of a group's rewards.
pub fn advantages(
    rewards: &[f32],
    baseline: Baseline,
    greedy_reward: Option<f32>,
) -> Result<Vec<f32>, BaselineError> {
    match baseline {
        Baseline::None => Ok(rewards.to_vec()),
        Baseline::MeanOfOthers => {
            let k = rewards.len();
            if k < 2 {
                return Err(BaselineError::TooFewSamples);
            }
            let total: f64 = rewards.iter().map(|&r| f64::from(r)).sum();
            Ok(rewards
                .iter()
                .map(|&r| {
                    let others = (total - f64::from(r)) / (k - 1) as f64;
                    (f64::from(r) - others) as f32
                })
                .collect())
        }
        Baseline::Greedy => {
            let b = greedy_reward.ok_or(BaselineError::NoGreedy)?;
            Ok(rewards.iter().map(|&r| r - b).collect())
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn mean_of_others_by_the_formula() {
        // r = (1, 2, 3, 6): b_1 = (2+3+6)/3 = 11/3, so A_1 = 1 - 11/3 = -8/3; A_4 = 6 - 2 = 4.
        let a = advantages(&[1.0, 2.0, 3.0, 6.0], Baseline::MeanOfOthers, None).unwrap();
        assert!((a[0] + 8.0 / 3.0).abs() < 1e-6 && (a[3] - 4.0).abs() < 1e-6);
        // r_i - b_i = K/(K-1) * (r_i - mean), so the advantages sum to 0.
        assert!(a.iter().sum::<f32>().abs() < 1e-5);
        let mean = 3.0;
        assert!((a[1] - 4.0 / 3.0 * (2.0 - mean)).abs() < 1e-6);
        assert_eq!(
            advantages(&[1.0], Baseline::MeanOfOthers, None),
            Err(BaselineError::TooFewSamples)
        );
    }

    #[test]
    fn greedy_and_none() {
        assert_eq!(
            advantages(&[0.5, 0.25], Baseline::Greedy, Some(0.25)).unwrap(),
            vec![0.25, 0.0]
        );
        assert_eq!(
            advantages(&[0.5], Baseline::Greedy, None),
            Err(BaselineError::NoGreedy)
        );
        assert_eq!(
            advantages(&[0.5, -1.0], Baseline::None, None).unwrap(),
            vec![0.5, -1.0]
        );
    }
}

//! How long a tower's queue takes to drain: an exponentially weighted mean of
//! the encoder's seconds per item over its recent runs, times the jobs
//! waiting, over the workers. The server admits new work by it (shedding
//! before a body is read) and tells clients how long to wait (`Retry-After`).

use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

/// Weight of the newest run in the mean: about the last ten runs count.
const NEWEST_WEIGHT: f64 = 0.2;

/// Seconds per item, as the bits of an `f64` (0 until a first run).
#[derive(Debug, Default)]
pub struct DrainRate {
    seconds_per_item: AtomicU64,
}

impl DrainRate {
    /// Takes in one run of `items` that took `took`.
    pub fn record(&self, items: usize, took: Duration) {
        if items == 0 {
            return;
        }
        let newest = took.as_secs_f64() / items as f64;
        // Lost updates between two workers only drop one sample: fine for an estimate.
        let old = f64::from_bits(self.seconds_per_item.load(Ordering::Relaxed));
        let mean = if old == 0.0 {
            newest
        } else {
            (1.0 - NEWEST_WEIGHT) * old + NEWEST_WEIGHT * newest
        };
        self.seconds_per_item
            .store(mean.to_bits(), Ordering::Relaxed);
    }

    /// Mean seconds per item; `None` before any run.
    pub fn seconds_per_item(&self) -> Option<f64> {
        let s = f64::from_bits(self.seconds_per_item.load(Ordering::Relaxed));
        (s > 0.0).then_some(s)
    }

    /// Time for `workers` to encode `waiting` items; zero before any run
    /// (nothing known yet: admit, the bounded queue still refuses floods).
    pub fn time_for(&self, waiting: usize, workers: usize) -> Duration {
        match self.seconds_per_item() {
            Some(s) => Duration::from_secs_f64(s * waiting as f64 / workers.max(1) as f64),
            None => Duration::ZERO,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_mean_follows_runs_with_the_documented_weight() {
        let rate = DrainRate::default();
        assert_eq!(rate.time_for(1000, 2), Duration::ZERO);
        rate.record(10, Duration::from_millis(10)); // 1 ms an item
        assert!((rate.seconds_per_item().unwrap() - 0.001).abs() < 1e-12);
        rate.record(10, Duration::from_millis(60)); // 6 ms an item
                                                    // 0.8 * 1 ms + 0.2 * 6 ms = 2 ms, worked by hand.
        assert!((rate.seconds_per_item().unwrap() - 0.002).abs() < 1e-12);
        // 1,000 items at 2 ms each over 2 workers: 1 s.
        assert!((rate.time_for(1000, 2).as_secs_f64() - 1.0).abs() < 1e-9);
        rate.record(0, Duration::from_secs(5)); // an empty run changes nothing
        assert!((rate.seconds_per_item().unwrap() - 0.002).abs() < 1e-12);
    }
}

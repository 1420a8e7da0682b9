//! Per-key rate limits: one token bucket a key (the GCRA of the `governor`
//! crate), so one trainer cannot starve the others.

use std::num::NonZeroU32;
use std::time::Duration;

use governor::clock::{Clock, DefaultClock};
use governor::{DefaultKeyedRateLimiter, Quota};

/// Requests a second a key may make when no rate is given: far above one
/// trainer's steady use, low enough that a runaway loop is held back.
pub const DEFAULT_KEY_RATE: u32 = 200;
/// Requests a key may make at once above its rate, when no burst is given.
pub const DEFAULT_KEY_BURST: u32 = 400;

/// The buckets of every key.
#[derive(Debug)]
pub struct KeyRates {
    limiter: DefaultKeyedRateLimiter<String>,
}

impl KeyRates {
    /// `per_second` requests a second with bursts of `burst`; `None` when
    /// `per_second` is 0 (no limit).
    pub fn new(per_second: u32, burst: u32) -> Option<KeyRates> {
        let rate = NonZeroU32::new(per_second)?;
        let burst = NonZeroU32::new(burst.max(1)).unwrap_or(NonZeroU32::MIN);
        Some(KeyRates {
            limiter: DefaultKeyedRateLimiter::keyed(Quota::per_second(rate).allow_burst(burst)),
        })
    }

    /// Takes one request from `key`'s bucket, or says how long until one is there.
    pub fn take(&self, key: &str) -> Result<(), Duration> {
        self.limiter
            .check_key(&key.to_string())
            .map_err(|not_until| not_until.wait_time_from(DefaultClock::default().now()))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_burst_is_allowed_then_the_next_waits_about_one_interval() {
        // At 1 request a second with a burst of 3, a fresh bucket lets 3 through
        // and the 4th waits up to one emission interval, 1 s (GCRA: the
        // bucket is full, one token returns every 1/rate seconds).
        let rates = KeyRates::new(1, 3).unwrap();
        for _ in 0..3 {
            assert!(rates.take("a").is_ok());
        }
        let wait = rates.take("a").unwrap_err();
        assert!(
            wait > Duration::from_millis(500) && wait <= Duration::from_secs(1),
            "{wait:?}"
        );
        // Another key has its own bucket.
        assert!(rates.take("b").is_ok());
        assert!(KeyRates::new(0, 10).is_none());
    }
}

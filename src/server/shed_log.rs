//! 503s are counted in `/metrics` per route; the log gets one summary line
//! every [`SUMMARY_EVERY`] at WARN instead of a line per refusal, so a
//! sustained overload does not flood it.

use std::collections::BTreeMap;
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// How often the refusals of the last period are summarised.
pub const SUMMARY_EVERY: Duration = Duration::from_secs(10);

struct Period {
    started: Option<Instant>,
    by_route: BTreeMap<String, u64>,
}

static PERIOD: Mutex<Period> = Mutex::new(Period {
    started: None,
    by_route: BTreeMap::new(),
});

impl Period {
    /// Counts one 503 on `route` at `now`; when the period that began with its
    /// first refusal is [`SUMMARY_EVERY`] old, hands back its counts and begins anew.
    fn count(&mut self, route: &str, now: Instant) -> Option<BTreeMap<String, u64>> {
        *self.by_route.entry(route.to_string()).or_insert(0) += 1;
        match self.started {
            None => {
                self.started = Some(now);
                None
            }
            Some(started) if now.duration_since(started) >= SUMMARY_EVERY => {
                self.started = Some(now);
                Some(std::mem::take(&mut self.by_route))
            }
            Some(_) => None,
        }
    }
}

/// Counts one 503 on `route`; logs the period's summary when it is over.
pub fn count_refusal(route: &str) {
    let summary = PERIOD
        .lock()
        .unwrap_or_else(|p| p.into_inner())
        .count(route, Instant::now());
    if let Some(by_route) = summary {
        let total: u64 = by_route.values().sum();
        tracing::warn!(
            total,
            ?by_route,
            "requests answered 503 (overloaded or not ready) in the last period; see befit_http_requests_total"
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_summary_a_period_with_every_refusal_counted() {
        let mut period = Period {
            started: None,
            by_route: BTreeMap::new(),
        };
        let t0 = Instant::now();
        // 33,000 refusals within one period: no line until the period is over.
        for i in 0..33_000u64 {
            let route = if i % 3 == 0 {
                "/v1/images"
            } else {
                "/v1/rewards"
            };
            let at = t0 + Duration::from_micros(i * 200);
            assert_eq!(period.count(route, at), None, "refusal {i}");
        }
        let summary = period
            .count("/v1/rewards", t0 + SUMMARY_EVERY)
            .expect("a summary once the period is over");
        assert_eq!(summary["/v1/images"], 11_000);
        assert_eq!(summary["/v1/rewards"], 22_001);
        // The next period starts empty.
        assert_eq!(period.count("/v1/images", t0 + SUMMARY_EVERY), None);
        assert_eq!(period.by_route["/v1/images"], 1);
    }
}

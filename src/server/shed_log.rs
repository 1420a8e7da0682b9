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

/// Counts one 503 on `route`; logs the period's summary when it is over.
pub fn count_refusal(route: &str) {
    let summary = {
        let mut period = PERIOD.lock().unwrap_or_else(|p| p.into_inner());
        let now = Instant::now();
        *period.by_route.entry(route.to_string()).or_insert(0) += 1;
        match period.started {
            None => {
                period.started = Some(now);
                None
            }
            Some(started) if now.duration_since(started) >= SUMMARY_EVERY => {
                period.started = Some(now);
                Some(std::mem::take(&mut period.by_route))
            }
            Some(_) => None,
        }
    };
    if let Some(by_route) = summary {
        let total: u64 = by_route.values().sum();
        tracing::warn!(
            total,
            ?by_route,
            "requests answered 503 (overloaded or not ready) in the last period; see befit_http_requests_total"
        );
    }
}

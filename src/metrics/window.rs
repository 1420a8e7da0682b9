//! What happened between two [`Sample`]s: rates per second from counter
//! differences, percentiles from bucket differences (Prometheus's
//! `histogram_quantile` over an increase), and the live page's answer
//! ([`Pulse`]): the last seconds, the time since start, and one window per
//! second of history.

use std::collections::BTreeMap;

use serde::Serialize;

use super::history::{History, Sample, SAMPLE_EVERY};
use super::{Registry, CAPTION_CACHE, IMAGE_CACHE};

/// Length of the "now" window: long enough to smooth a trainer's bursts,
/// short enough that a stall shows within seconds.
pub const CURRENT_SECONDS: u64 = 10;

/// One route over a window.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RouteWindow {
    pub requests: f64,
    pub requests_per_s: f64,
    pub overloaded_per_s: f64,
    /// Latency percentiles in milliseconds; null without requests.
    pub p50_ms: Option<f64>,
    pub p90_ms: Option<f64>,
    pub p99_ms: Option<f64>,
}

/// One encoder tower over a window.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TowerWindow {
    pub model: String,
    pub tower: String,
    pub items_per_s: f64,
    pub runs_per_s: f64,
    /// Items per encoder run; null without runs.
    pub batch_mean: Option<f64>,
    pub p50_ms: Option<f64>,
    pub p99_ms: Option<f64>,
    /// Jobs waiting at the window's end.
    pub queue_depth: f64,
}

/// One cache over a window.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct CacheWindow {
    pub hits: f64,
    pub misses: f64,
    /// hits / (hits + misses); null without lookups.
    pub hit_rate: Option<f64>,
}

/// Everything the live page shows for one stretch of time.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Window {
    /// When the window ended, milliseconds since the Unix epoch.
    pub end_unix_ms: u64,
    pub seconds: f64,
    /// Captions looked up in the caption cache (every caption scored or embedded).
    pub captions_per_s: f64,
    /// Images looked up in the in-memory image cache (every image resolved).
    pub images_per_s: f64,
    /// All routes together.
    pub requests_per_s: f64,
    pub overloaded_per_s: f64,
    pub routes: BTreeMap<String, RouteWindow>,
    pub towers: Vec<TowerWindow>,
    pub caches: BTreeMap<String, CacheWindow>,
}

fn ms(seconds: Option<f64>) -> Option<f64> {
    seconds.map(|s| s * 1000.0)
}

impl Window {
    /// What happened after `base` up to `end` (`end` taken later; series
    /// missing from `base` had not been touched and count from zero).
    pub fn between(base: &Sample, end: &Sample) -> Window {
        let seconds = end.at.saturating_duration_since(base.at).as_secs_f64();
        let per_s = |n: f64| if seconds > 0.0 { n / seconds } else { 0.0 };
        let routes: BTreeMap<String, RouteWindow> = end
            .routes
            .iter()
            .map(|(route, now)| {
                let before = base.routes.get(route);
                let seconds_hist = now.seconds.since(before.map(|b| &b.seconds));
                let requests = now.requests - before.map_or(0.0, |b| b.requests);
                let overloaded = now.overloaded - before.map_or(0.0, |b| b.overloaded);
                let window = RouteWindow {
                    requests,
                    requests_per_s: per_s(requests),
                    overloaded_per_s: per_s(overloaded),
                    p50_ms: ms(seconds_hist.quantile(0.5)),
                    p90_ms: ms(seconds_hist.quantile(0.9)),
                    p99_ms: ms(seconds_hist.quantile(0.99)),
                };
                (route.clone(), window)
            })
            .collect();
        let towers = end
            .towers
            .iter()
            .map(|((model, tower), now)| {
                let before = base.towers.get(&(model.clone(), tower.clone()));
                let batches = now.batches.since(before.map(|b| &b.batches));
                let runs = now.seconds.since(before.map(|b| &b.seconds));
                TowerWindow {
                    model: model.clone(),
                    tower: tower.clone(),
                    items_per_s: per_s(batches.sum),
                    runs_per_s: per_s(batches.count as f64),
                    batch_mean: (batches.count > 0).then(|| batches.sum / batches.count as f64),
                    p50_ms: ms(runs.quantile(0.5)),
                    p99_ms: ms(runs.quantile(0.99)),
                    queue_depth: now.queue,
                }
            })
            .collect();
        let caches: BTreeMap<String, CacheWindow> = end
            .caches
            .iter()
            .map(|(cache, now)| {
                let before = base.caches.get(cache).copied().unwrap_or_default();
                let hits = now.hits - before.hits;
                let misses = now.misses - before.misses;
                let lookups = hits + misses;
                let window = CacheWindow {
                    hits,
                    misses,
                    hit_rate: (lookups > 0.0).then(|| hits / lookups),
                };
                (cache.clone(), window)
            })
            .collect();
        let lookups = |cache: &str| caches.get(cache).map_or(0.0, |c| c.hits + c.misses);
        Window {
            end_unix_ms: end.unix_ms,
            seconds,
            captions_per_s: per_s(lookups(CAPTION_CACHE)),
            images_per_s: per_s(lookups(IMAGE_CACHE)),
            requests_per_s: routes.values().fold(0.0, |n, r| n + r.requests_per_s),
            overloaded_per_s: routes.values().fold(0.0, |n, r| n + r.overloaded_per_s),
            routes,
            towers,
            caches,
        }
    }
}

/// The live page's numbers at one moment.
#[derive(Debug, Clone, Serialize)]
pub struct Pulse {
    /// Milliseconds between history points.
    pub sample_every_ms: u64,
    /// The last [`CURRENT_SECONDS`] (fewer just after start).
    pub current: Window,
    /// Since the history began; its rates are averages over the whole time.
    pub since_start: Window,
    /// One window per sampling interval, oldest first.
    pub history: Vec<Window>,
}

impl History {
    /// Reads `registry` now and sets it against the history: the current
    /// window, the time since start, and the last `points` intervals.
    pub fn pulse(&self, registry: &Registry, points: usize) -> Pulse {
        let now = Sample::take(registry);
        let kept = self.last(usize::MAX);
        let horizon = now
            .at
            .checked_sub(std::time::Duration::from_secs(CURRENT_SECONDS));
        // The newest sample at least CURRENT_SECONDS old, else the oldest there is.
        let base = horizon
            .and_then(|h| kept.iter().rev().find(|s| s.at <= h))
            .or_else(|| kept.first())
            .map_or_else(|| self.start(), |s| Sample::clone(s));
        let recent = &kept[kept.len().saturating_sub(points.saturating_add(1))..];
        Pulse {
            sample_every_ms: SAMPLE_EVERY.as_millis() as u64,
            current: Window::between(&base, &now),
            since_start: Window::between(&self.start(), &now),
            history: recent
                .windows(2)
                .map(|pair| Window::between(&pair[0], &pair[1]))
                .collect(),
        }
    }
}

#[cfg(test)]
mod tests {
    use std::time::{Duration, Instant};

    use super::super::history::{Buckets, CacheCounts, RouteCounts, TowerCounts};
    use super::*;

    const BOUNDS: &[f64] = &[0.01, 0.1, 1.0];

    fn at(start: Instant, s: u64) -> Sample {
        Sample::empty(start + Duration::from_secs(s), 1000 * s)
    }

    fn buckets(cumulative: [u64; 3], count: u64, sum: f64) -> Buckets {
        Buckets {
            bounds: BOUNDS,
            cumulative: cumulative.to_vec(),
            count,
            sum,
        }
    }

    #[test]
    fn rates_and_percentiles_come_from_differences() {
        let t = Instant::now();
        let mut base = at(t, 0);
        let mut end = at(t, 4);
        base.routes.insert(
            "/v1/rewards".into(),
            RouteCounts {
                requests: 10.0,
                overloaded: 1.0,
                seconds: buckets([4, 9, 10], 10, 1.0),
            },
        );
        end.routes.insert(
            "/v1/rewards".into(),
            RouteCounts {
                requests: 30.0,
                overloaded: 3.0,
                seconds: buckets([4, 19, 30], 30, 9.0),
            },
        );
        base.caches.insert(
            CAPTION_CACHE.into(),
            CacheCounts {
                hits: 100.0,
                misses: 20.0,
            },
        );
        end.caches.insert(
            CAPTION_CACHE.into(),
            CacheCounts {
                hits: 130.0,
                misses: 30.0,
            },
        );
        end.caches.insert(
            IMAGE_CACHE.into(),
            CacheCounts {
                hits: 6.0,
                misses: 2.0,
            },
        );
        let w = Window::between(&base, &end);
        assert_eq!(w.seconds, 4.0);
        let r = &w.routes["/v1/rewards"];
        // Worked by hand: 20 requests and 2 refusals in 4 s.
        assert_eq!(
            (r.requests, r.requests_per_s, r.overloaded_per_s),
            (20.0, 5.0, 0.5)
        );
        // The window's own buckets: [0, 10, 20] of 20; the median's rank 10 is the
        // last of (0.01, 0.1]: 0.01 + 0.09 x 10/10 = 0.1 s. The 0.9 rank 18 lies in
        // (0.1, 1], 8 of its 10: 0.1 + 0.9 x 8/10 = 0.82 s.
        assert!((r.p50_ms.unwrap() - 100.0).abs() < 1e-9);
        assert!((r.p90_ms.unwrap() - 820.0).abs() < 1e-9);
        // 30 hits and 10 misses of the caption cache: 10 captions/s, hit rate 0.75;
        // the image cache first appears in `end`, so it counts from zero: 8 / 4 s.
        assert_eq!(w.captions_per_s, 10.0);
        assert_eq!(w.caches[CAPTION_CACHE].hit_rate, Some(0.75));
        assert_eq!(w.images_per_s, 2.0);
        assert_eq!(w.requests_per_s, 5.0);
    }

    #[test]
    fn batch_means_and_idle_towers() {
        let t = Instant::now();
        let base = at(t, 0);
        let mut end = at(t, 2);
        let key = ("blocks@v1".to_string(), "text".to_string());
        end.towers.insert(
            key,
            TowerCounts {
                batches: Buckets {
                    bounds: &[1.0, 2.0, 4.0, 8.0],
                    cumulative: vec![0, 1, 1, 3],
                    count: 3,
                    sum: 16.0,
                },
                seconds: Buckets::default(),
                queue: 5.0,
            },
        );
        let w = Window::between(&base, &end);
        let tower = &w.towers[0];
        // 16 items in 3 runs over 2 s.
        assert_eq!(tower.items_per_s, 8.0);
        assert_eq!(tower.runs_per_s, 1.5);
        assert!((tower.batch_mean.unwrap() - 16.0 / 3.0).abs() < 1e-12);
        assert_eq!(tower.p50_ms, None, "no timings, no percentile");
        assert_eq!(tower.queue_depth, 5.0);
    }

    #[test]
    fn the_pulse_counts_what_happened_since_the_history_began() {
        let r = Registry::default();
        let history = History::new(Sample::take(&r), 10);
        r.add("befit_cache_misses_total", &[("cache", CAPTION_CACHE)], 12);
        r.add("befit_cache_hits_total", &[("cache", CAPTION_CACHE)], 4);
        let pulse = history.pulse(&r, 60);
        assert!(pulse.history.is_empty(), "one sample is no interval yet");
        assert_eq!(pulse.since_start.caches[CAPTION_CACHE].hits, 4.0);
        assert_eq!(pulse.current.caches[CAPTION_CACHE].misses, 12.0);
        assert_eq!(pulse.current.caches[CAPTION_CACHE].hit_rate, Some(0.25));
        assert!(pulse.current.captions_per_s > 0.0);
    }
}

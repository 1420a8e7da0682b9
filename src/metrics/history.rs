//! A short in-memory history of the registry for the live page: a
//! [`Sampler`] thread reduces the registry to a [`Sample`] every second and
//! keeps the last [`HISTORY_SAMPLES`] in a ring. Rates and percentiles are
//! differences between samples ([`super::window`]); nothing is measured twice.

use std::collections::{BTreeMap, VecDeque};
use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use super::{label, HistogramRead, Reading, Registry};

/// Time between samples: the live page's resolution.
pub const SAMPLE_EVERY: Duration = Duration::from_secs(1);
/// Samples kept: ten minutes at [`SAMPLE_EVERY`], plus the one the first
/// interval starts from. A few hundred kilobytes, whatever the traffic.
pub const HISTORY_SAMPLES: usize = 601;

/// Cumulative bucket counts of one histogram, possibly merged over series.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Buckets {
    pub bounds: &'static [f64],
    pub cumulative: Vec<u64>,
    pub count: u64,
    pub sum: f64,
}

impl Buckets {
    fn add(&mut self, h: HistogramRead<'_>) {
        if self.cumulative.is_empty() {
            self.bounds = h.bounds;
            self.cumulative = vec![0; h.bounds.len()];
        }
        for (mine, theirs) in self.cumulative.iter_mut().zip(h.cumulative) {
            *mine += theirs;
        }
        self.count += h.count;
        self.sum += h.sum;
    }

    /// What was observed after `base` (an earlier reading of the same series).
    pub fn since(&self, base: Option<&Buckets>) -> Buckets {
        let Some(base) = base.filter(|b| b.cumulative.len() == self.cumulative.len()) else {
            return self.clone();
        };
        Buckets {
            bounds: self.bounds,
            cumulative: self
                .cumulative
                .iter()
                .zip(&base.cumulative)
                .map(|(a, b)| a.saturating_sub(*b))
                .collect(),
            count: self.count.saturating_sub(base.count),
            sum: self.sum - base.sum,
        }
    }

    /// The `q`-quantile (see [`super::quantile::histogram_quantile`]).
    pub fn quantile(&self, q: f64) -> Option<f64> {
        super::quantile::histogram_quantile(q, self.bounds, &self.cumulative, self.count)
    }
}

/// Requests of one matched route, all methods together.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RouteCounts {
    pub requests: f64,
    /// Answered 503 (overloaded or not ready).
    pub overloaded: f64,
    pub seconds: Buckets,
}

/// One encoder tower of one model.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct TowerCounts {
    /// Encoder runs and the items they encoded (count and sum of the batch sizes).
    pub batches: Buckets,
    pub seconds: Buckets,
    /// Jobs waiting, as last reported.
    pub queue: f64,
}

/// Lookups of one cache.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct CacheCounts {
    pub hits: f64,
    pub misses: f64,
}

/// The registry reduced to what the live page shows, at one moment.
#[derive(Debug, Clone, PartialEq)]
pub struct Sample {
    pub at: Instant,
    pub unix_ms: u64,
    pub routes: BTreeMap<String, RouteCounts>,
    /// By (model, tower).
    pub towers: BTreeMap<(String, String), TowerCounts>,
    pub caches: BTreeMap<String, CacheCounts>,
}

fn unix_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as u64)
}

impl Sample {
    /// Nothing counted yet, at `at`.
    pub fn empty(at: Instant, unix_ms: u64) -> Sample {
        Sample {
            at,
            unix_ms,
            routes: BTreeMap::new(),
            towers: BTreeMap::new(),
            caches: BTreeMap::new(),
        }
    }

    /// Reads the registry now.
    pub fn take(registry: &Registry) -> Sample {
        let mut sample = Sample::empty(Instant::now(), unix_ms());
        let tower_key = |labels: &[(&'static str, String)]| {
            (
                label(labels, "model").to_string(),
                label(labels, "tower").to_string(),
            )
        };
        let mut towers = BTreeMap::<(String, String), TowerCounts>::new();
        let mut routes = BTreeMap::<String, RouteCounts>::new();
        let mut caches = BTreeMap::<String, CacheCounts>::new();
        registry.read(|name, labels, reading| match (name, reading) {
            ("befit_http_requests_total", Reading::Value(v)) => {
                let route = routes
                    .entry(label(labels, "route").to_string())
                    .or_default();
                route.requests += v;
                if label(labels, "status") == "503" {
                    route.overloaded += v;
                }
            }
            ("befit_http_request_seconds", Reading::Histogram(h)) => routes
                .entry(label(labels, "route").to_string())
                .or_default()
                .seconds
                .add(h),
            ("befit_encoder_queue_depth", Reading::Value(v)) => {
                towers.entry(tower_key(labels)).or_default().queue = v;
            }
            ("befit_encoder_batch_size", Reading::Histogram(h)) => {
                towers.entry(tower_key(labels)).or_default().batches.add(h);
            }
            ("befit_encoder_seconds", Reading::Histogram(h)) => {
                towers.entry(tower_key(labels)).or_default().seconds.add(h);
            }
            ("befit_cache_hits_total", Reading::Value(v)) => {
                caches
                    .entry(label(labels, "cache").to_string())
                    .or_default()
                    .hits += v;
            }
            ("befit_cache_misses_total", Reading::Value(v)) => {
                caches
                    .entry(label(labels, "cache").to_string())
                    .or_default()
                    .misses += v;
            }
            _ => {}
        });
        sample.routes = routes;
        sample.towers = towers;
        sample.caches = caches;
        sample
    }
}

/// The last [`HISTORY_SAMPLES`] samples, oldest first.
#[derive(Debug)]
pub struct History {
    samples: Mutex<VecDeque<Arc<Sample>>>,
    capacity: usize,
    started: (Instant, u64),
}

impl History {
    /// A history holding at most `capacity` (at least 2) samples, starting with `first`.
    pub fn new(first: Sample, capacity: usize) -> History {
        let started = (first.at, first.unix_ms);
        let mut samples = VecDeque::with_capacity(capacity.max(2));
        samples.push_back(Arc::new(first));
        History {
            samples: Mutex::new(samples),
            capacity: capacity.max(2),
            started,
        }
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, VecDeque<Arc<Sample>>> {
        self.samples.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Adds a sample, dropping the oldest when full.
    pub fn record(&self, sample: Sample) {
        let mut samples = self.lock();
        if samples.len() == self.capacity {
            samples.pop_front();
        }
        samples.push_back(Arc::new(sample));
    }

    /// The newest `n` samples, oldest first.
    pub fn last(&self, n: usize) -> Vec<Arc<Sample>> {
        let samples = self.lock();
        samples
            .iter()
            .skip(samples.len().saturating_sub(n))
            .cloned()
            .collect()
    }

    /// Nothing counted, at the moment the history began.
    pub fn start(&self) -> Sample {
        Sample::empty(self.started.0, self.started.1)
    }
}

/// Samples a registry into a [`History`] on its own thread; the thread ends
/// when the sampler is dropped.
pub struct Sampler {
    history: Arc<History>,
    stop: Option<mpsc::Sender<()>>,
    thread: Option<JoinHandle<()>>,
}

impl Sampler {
    /// Takes the first sample now, then one every `every`.
    pub fn start(registry: Arc<Registry>, every: Duration) -> std::io::Result<Sampler> {
        let history = Arc::new(History::new(Sample::take(&registry), HISTORY_SAMPLES));
        let (stop, stopped) = mpsc::channel::<()>();
        let thread = {
            let history = Arc::clone(&history);
            std::thread::Builder::new()
                .name("befit-history".into())
                .spawn(move || {
                    // Only a timeout samples: a message or a dropped sender ends the thread.
                    while let Err(mpsc::RecvTimeoutError::Timeout) = stopped.recv_timeout(every) {
                        history.record(Sample::take(&registry));
                    }
                })?
        };
        Ok(Sampler {
            history,
            stop: Some(stop),
            thread: Some(thread),
        })
    }

    pub fn history(&self) -> &Arc<History> {
        &self.history
    }
}

impl Drop for Sampler {
    fn drop(&mut self) {
        drop(self.stop.take());
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_sample_sums_methods_and_separates_503s() {
        let r = Registry::default();
        let requests = "befit_http_requests_total";
        r.add(
            requests,
            &[("route", "/v1/bank"), ("method", "GET"), ("status", "200")],
            3,
        );
        r.add(
            requests,
            &[("route", "/v1/bank"), ("method", "POST"), ("status", "503")],
            2,
        );
        for v in [0.002, 0.02] {
            for method in ["GET", "POST"] {
                r.observe(
                    "befit_http_request_seconds",
                    &[("route", "/v1/bank"), ("method", method)],
                    v,
                );
            }
        }
        r.add("befit_cache_hits_total", &[("cache", CAPTION_CACHE)], 7);
        let s = Sample::take(&r);
        let bank = &s.routes["/v1/bank"];
        assert_eq!((bank.requests, bank.overloaded), (5.0, 2.0));
        // Four observations merged over both methods; two at or below 5 ms.
        assert_eq!(bank.seconds.count, 4);
        assert_eq!(bank.seconds.cumulative[3], 2, "le=0.005");
        assert_eq!(s.caches[CAPTION_CACHE].hits, 7.0);
    }

    use super::super::CAPTION_CACHE;

    #[test]
    fn the_ring_keeps_the_newest_samples() {
        let t = Instant::now();
        let h = History::new(Sample::empty(t, 0), 3);
        for ms in 1..=4 {
            h.record(Sample::empty(t, ms));
        }
        let kept: Vec<u64> = h.last(10).iter().map(|s| s.unix_ms).collect();
        assert_eq!(kept, vec![2, 3, 4]);
        assert_eq!(
            h.last(2).iter().map(|s| s.unix_ms).collect::<Vec<_>>(),
            vec![3, 4]
        );
        assert_eq!(h.start().unix_ms, 0, "the start outlives the ring");
    }

    #[test]
    fn dropping_the_sampler_ends_its_thread() {
        let sampler =
            Sampler::start(Arc::new(Registry::default()), Duration::from_secs(3600)).unwrap();
        let history = Arc::clone(sampler.history());
        drop(sampler);
        // The thread held the other reference; joined in drop, so only ours is left.
        assert_eq!(Arc::strong_count(&history), 1);
        assert_eq!(history.last(10).len(), 1, "only the first sample");
    }
}

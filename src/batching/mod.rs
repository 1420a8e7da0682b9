//! Dynamic batching: encode jobs from many concurrent requests are coalesced
//! into encoder runs on dedicated worker threads, and each result goes back to
//! exactly the job that asked, through its own oneshot channel.
//!
//! A worker takes the oldest waiting jobs as soon as `max_batch` of them are
//! queued or the oldest has waited `max_wait`. When jobs carry a cost (token
//! count), a taken batch is sorted by it and split where padding would waste
//! too much, so short captions are not padded to the longest one.
//! The queue is bounded: a full queue refuses new jobs at once (the server
//! answers 503) instead of letting latency grow without end.
//!
//! Written here rather than taken from a crate: batching by cost (token
//! length) with a padding-waste split, oneshot replies that skip a job whose
//! requester has gone, and the drain estimate the server admits work by are
//! the service's own policy, and a generic batching crate offers none of them.

use std::collections::VecDeque;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::{Arc, Condvar, Mutex, MutexGuard};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use tokio::sync::oneshot;

pub mod drain;
use drain::DrainRate;

/// Default largest number of items in one encoder run.
pub const DEFAULT_MAX_BATCH: usize = 64;
/// Default longest time the oldest job waits for company, in microseconds:
/// well under one encoder run, so a lone request is barely delayed.
pub const DEFAULT_MAX_WAIT_MICROS: u64 = 2_000;
/// Default bound of waiting jobs per tower.
pub const DEFAULT_QUEUE_DEPTH: usize = 65_536;
/// A batch sorted by cost is split when its padded cost exceeds the real cost by this factor.
const PADDING_WASTE_LIMIT: f64 = 1.3;
/// Runs smaller than this are never split further: the fixed cost of a run dominates.
const MIN_SPLIT_RUN: usize = 8;

/// How a batcher groups jobs.
#[derive(Debug, Clone, Copy)]
pub struct BatchSettings {
    pub max_batch: usize,
    pub max_wait: Duration,
    pub queue_depth: usize,
    /// Sort taken jobs by cost and split them to keep padding small.
    pub group_by_cost: bool,
}

impl Default for BatchSettings {
    fn default() -> Self {
        BatchSettings {
            max_batch: DEFAULT_MAX_BATCH,
            max_wait: Duration::from_micros(DEFAULT_MAX_WAIT_MICROS),
            queue_depth: DEFAULT_QUEUE_DEPTH,
            group_by_cost: false,
        }
    }
}

/// What can go wrong with one job.
#[derive(Debug, Clone, thiserror::Error)]
pub enum BatchError {
    #[error("the encoder queue is full ({0} jobs waiting)")]
    Full(usize),
    #[error("the encoder failed: {0}")]
    Run(String),
    #[error("the encoder is shutting down")]
    Closed,
}

/// Runs one batch of items; owned by exactly one worker thread.
pub trait BatchRunner: Send + 'static {
    type Item: Send + 'static;
    type Output: Send + 'static;
    /// One output per item, in order.
    fn run(&mut self, items: &[Self::Item]) -> Result<Vec<Self::Output>, String>;
}

/// Told about every run and every change of queue depth (for metrics).
pub trait BatchObserver: Send + Sync + 'static {
    fn on_run(&self, size: usize, seconds: f64);
    fn on_depth(&self, depth: usize);
    /// Jobs dropped unrun because nobody waits for their answer any more.
    fn on_abandoned(&self, _jobs: usize) {}
}

struct Job<I, O> {
    item: I,
    cost: usize,
    enqueued: Instant,
    reply: oneshot::Sender<Result<O, BatchError>>,
}

struct State<I, O> {
    jobs: VecDeque<Job<I, O>>,
    closed: bool,
}

struct Queue<I, O> {
    state: Mutex<State<I, O>>,
    wake: Condvar,
    settings: BatchSettings,
    observer: Arc<dyn BatchObserver>,
    drain: DrainRate,
}

impl<I, O> Queue<I, O> {
    fn lock(&self) -> MutexGuard<'_, State<I, O>> {
        self.state.lock().unwrap_or_else(|p| p.into_inner())
    }
}

/// A pool of worker threads, one runner each, fed from one bounded queue.
pub struct Batcher<I: Send + 'static, O: Send + 'static> {
    queue: Arc<Queue<I, O>>,
    workers: Vec<JoinHandle<()>>,
}

/// A pending result.
pub type Reply<O> = oneshot::Receiver<Result<O, BatchError>>;

impl<I: Send + 'static, O: Send + 'static> Batcher<I, O> {
    /// Starts one worker thread per runner.
    pub fn start<R>(
        name: &str,
        runners: Vec<R>,
        settings: BatchSettings,
        observer: Arc<dyn BatchObserver>,
    ) -> Self
    where
        R: BatchRunner<Item = I, Output = O>,
    {
        let settings = BatchSettings {
            max_batch: settings.max_batch.max(1),
            ..settings
        };
        let queue = Arc::new(Queue {
            state: Mutex::new(State {
                jobs: VecDeque::new(),
                closed: false,
            }),
            wake: Condvar::new(),
            settings,
            observer,
            drain: DrainRate::default(),
        });
        let workers = runners
            .into_iter()
            .enumerate()
            .map(|(i, runner)| {
                let queue = Arc::clone(&queue);
                std::thread::Builder::new()
                    .name(format!("{name}-{i}"))
                    .spawn(move || work(queue, runner))
                    .unwrap_or_else(|e| panic!("cannot start encoder thread: {e}"))
            })
            .collect();
        Batcher { queue, workers }
    }

    /// Queues items (with their costs) all together, or none when they do not fit.
    pub fn submit_many(&self, items: Vec<(I, usize)>) -> Result<Vec<Reply<O>>, BatchError> {
        let mut state = self.queue.lock();
        if state.closed {
            return Err(BatchError::Closed);
        }
        if state.jobs.len() + items.len() > self.queue.settings.queue_depth {
            return Err(BatchError::Full(state.jobs.len()));
        }
        let now = Instant::now();
        let replies = items
            .into_iter()
            .map(|(item, cost)| {
                let (reply, rx) = oneshot::channel();
                state.jobs.push_back(Job {
                    item,
                    cost,
                    enqueued: now,
                    reply,
                });
                rx
            })
            .collect();
        let depth = state.jobs.len();
        drop(state);
        self.queue.observer.on_depth(depth);
        self.queue.wake.notify_all();
        Ok(replies)
    }

    /// Jobs waiting now.
    pub fn depth(&self) -> usize {
        self.queue.lock().jobs.len()
    }

    /// Time the jobs waiting now will take, at the recent speed of the
    /// workers (zero before a first run).
    pub fn drain_time(&self) -> Duration {
        self.queue.drain.time_for(self.depth(), self.workers.len())
    }
}

impl<I: Send + 'static, O: Send + 'static> Drop for Batcher<I, O> {
    fn drop(&mut self) {
        self.queue.lock().closed = true;
        self.queue.wake.notify_all();
        for worker in self.workers.drain(..) {
            let _ = worker.join();
        }
    }
}

fn work<R: BatchRunner>(queue: Arc<Queue<R::Item, R::Output>>, mut runner: R) {
    let settings = queue.settings;
    loop {
        let mut state = queue.lock();
        let taken: Vec<Job<R::Item, R::Output>> = loop {
            if state.jobs.is_empty() {
                if state.closed {
                    return;
                }
                state = queue.wake.wait(state).unwrap_or_else(|p| p.into_inner());
                continue;
            }
            let deadline = state.jobs[0].enqueued + settings.max_wait;
            let now = Instant::now();
            if state.jobs.len() >= settings.max_batch || now >= deadline || state.closed {
                let n = state.jobs.len().min(settings.max_batch);
                break state.jobs.drain(..n).collect();
            }
            state = queue
                .wake
                .wait_timeout(state, deadline - now)
                .unwrap_or_else(|p| p.into_inner())
                .0;
        };
        let depth = state.jobs.len();
        drop(state);
        queue.observer.on_depth(depth);
        // A job whose asker has gone (client disconnected, request timed out)
        // is not worth an encoder run.
        let before = taken.len();
        let taken: Vec<_> = taken.into_iter().filter(|j| !j.reply.is_closed()).collect();
        if taken.len() < before {
            queue.observer.on_abandoned(before - taken.len());
        }
        if taken.is_empty() {
            continue;
        }
        for run in split_runs(taken, settings.group_by_cost) {
            let (items, started) = (run.len(), Instant::now());
            execute(&mut runner, run, queue.observer.as_ref());
            queue.drain.record(items, started.elapsed());
        }
    }
}

/// Sorts by cost and cuts where the padded cost would exceed the real one by
/// [`PADDING_WASTE_LIMIT`]; without grouping, one run in arrival order.
fn split_runs<I, O>(mut jobs: Vec<Job<I, O>>, group_by_cost: bool) -> Vec<Vec<Job<I, O>>> {
    if !group_by_cost {
        return vec![jobs];
    }
    jobs.sort_by_key(|j| j.cost);
    let mut runs: Vec<Vec<Job<I, O>>> = Vec::new();
    let mut current: Vec<Job<I, O>> = Vec::new();
    let mut real = 0usize;
    for job in jobs {
        let padded = job.cost * (current.len() + 1);
        let would_waste = padded as f64 > PADDING_WASTE_LIMIT * (real + job.cost) as f64;
        if would_waste && current.len() >= MIN_SPLIT_RUN {
            runs.push(std::mem::take(&mut current));
            real = 0;
        }
        real += job.cost;
        current.push(job);
    }
    if !current.is_empty() {
        runs.push(current);
    }
    runs
}

fn execute<R: BatchRunner>(
    runner: &mut R,
    run: Vec<Job<R::Item, R::Output>>,
    observer: &dyn BatchObserver,
) {
    let (items, replies): (Vec<R::Item>, Vec<_>) =
        run.into_iter().map(|j| (j.item, j.reply)).unzip();
    let started = Instant::now();
    // A panic inside the runtime library must fail this batch, not kill the worker.
    let result = catch_unwind(AssertUnwindSafe(|| runner.run(&items)))
        .unwrap_or_else(|_| Err("the encoder panicked; see the server log".to_string()));
    observer.on_run(items.len(), started.elapsed().as_secs_f64());
    match result {
        Ok(outputs) if outputs.len() == replies.len() => {
            for (reply, output) in replies.into_iter().zip(outputs) {
                // The asker may have gone (client disconnected); nothing to do then.
                let _ = reply.send(Ok(output));
            }
        }
        Ok(outputs) => {
            let message = format!(
                "encoder returned {} outputs for {} inputs",
                outputs.len(),
                replies.len()
            );
            for reply in replies {
                let _ = reply.send(Err(BatchError::Run(message.clone())));
            }
        }
        Err(message) => {
            for reply in replies {
                let _ = reply.send(Err(BatchError::Run(message.clone())));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::{AtomicUsize, Ordering};

    /// Doubles numbers and remembers the size of every run.
    struct Doubler {
        sizes: Arc<Mutex<Vec<usize>>>,
    }

    impl BatchRunner for Doubler {
        type Item = u64;
        type Output = u64;
        fn run(&mut self, items: &[u64]) -> Result<Vec<u64>, String> {
            self.sizes.lock().unwrap().push(items.len());
            if items.contains(&13) {
                return Err("unlucky".into());
            }
            std::thread::sleep(Duration::from_millis(2));
            Ok(items.iter().map(|x| x * 2).collect())
        }
    }

    #[derive(Default)]
    struct Counting {
        runs: AtomicUsize,
        abandoned: AtomicUsize,
    }

    impl BatchObserver for Counting {
        fn on_run(&self, _: usize, _: f64) {
            self.runs.fetch_add(1, Ordering::Relaxed);
        }
        fn on_depth(&self, _: usize) {}
        fn on_abandoned(&self, jobs: usize) {
            self.abandoned.fetch_add(jobs, Ordering::Relaxed);
        }
    }

    fn start(
        workers: usize,
        settings: BatchSettings,
    ) -> (Batcher<u64, u64>, Arc<Mutex<Vec<usize>>>) {
        let sizes = Arc::new(Mutex::new(Vec::new()));
        let runners = (0..workers)
            .map(|_| Doubler {
                sizes: Arc::clone(&sizes),
            })
            .collect();
        (
            Batcher::start("test", runners, settings, Arc::new(Counting::default())),
            sizes,
        )
    }

    #[test]
    fn every_job_gets_its_own_answer_under_concurrency() {
        let settings = BatchSettings {
            max_batch: 16,
            max_wait: Duration::from_millis(5),
            ..Default::default()
        };
        let (batcher, sizes) = start(2, settings);
        let batcher = Arc::new(batcher);
        let threads: Vec<_> = (0..8u64)
            .map(|t| {
                let batcher = Arc::clone(&batcher);
                std::thread::spawn(move || {
                    let items: Vec<(u64, usize)> =
                        (0..50u64).map(|i| (1000 * t + i + 100, 1)).collect();
                    let expect: Vec<u64> = items.iter().map(|(x, _)| x * 2).collect();
                    let replies = batcher.submit_many(items).unwrap();
                    let got: Vec<u64> = replies
                        .into_iter()
                        .map(|r| r.blocking_recv().unwrap().unwrap())
                        .collect();
                    assert_eq!(got, expect);
                })
            })
            .collect();
        for t in threads {
            t.join().unwrap();
        }
        let sizes = sizes.lock().unwrap();
        assert_eq!(sizes.iter().sum::<usize>(), 400);
        assert!(sizes.iter().all(|&s| s <= 16));
        // Coalescing happened: far fewer runs than jobs.
        assert!(sizes.len() < 100, "{} runs", sizes.len());
    }

    #[test]
    fn a_failed_run_fails_only_its_jobs() {
        let settings = BatchSettings {
            max_batch: 1,
            ..Default::default()
        };
        let (batcher, _) = start(1, settings);
        let replies = batcher.submit_many(vec![(13, 1), (4, 1)]).unwrap();
        let results: Vec<_> = replies
            .into_iter()
            .map(|r| r.blocking_recv().unwrap())
            .collect();
        assert!(matches!(&results[0], Err(BatchError::Run(m)) if m == "unlucky"));
        assert_eq!(results[1].as_ref().unwrap(), &8);
    }

    #[test]
    fn a_full_queue_refuses_at_once() {
        let settings = BatchSettings {
            queue_depth: 3,
            max_wait: Duration::from_secs(10),
            max_batch: 100,
            ..Default::default()
        };
        let (batcher, _) = start(1, settings);
        let _held = batcher.submit_many(vec![(1, 1), (2, 1)]).unwrap();
        assert!(matches!(
            batcher.submit_many(vec![(3, 1), (4, 1)]),
            Err(BatchError::Full(2))
        ));
    }

    /// Holds the worker inside its first run until released.
    struct Gated {
        entered: std::sync::mpsc::Sender<()>,
        release: Arc<Mutex<std::sync::mpsc::Receiver<()>>>,
        seen: Arc<Mutex<Vec<Vec<u64>>>>,
    }

    impl BatchRunner for Gated {
        type Item = u64;
        type Output = u64;
        fn run(&mut self, items: &[u64]) -> Result<Vec<u64>, String> {
            self.seen.lock().unwrap().push(items.to_vec());
            if items == [0] {
                let _ = self.entered.send(());
                let _ = self.release.lock().unwrap().recv();
            }
            Ok(items.to_vec())
        }
    }

    #[test]
    fn jobs_whose_asker_is_gone_are_not_run() {
        let (entered_tx, entered) = std::sync::mpsc::channel();
        let (release, release_rx) = std::sync::mpsc::channel();
        let seen = Arc::new(Mutex::new(Vec::new()));
        let observer = Arc::new(Counting::default());
        let runner = Gated {
            entered: entered_tx,
            release: Arc::new(Mutex::new(release_rx)),
            seen: Arc::clone(&seen),
        };
        let settings = BatchSettings {
            max_batch: 1,
            ..Default::default()
        };
        let batcher = Batcher::start("gated", vec![runner], settings, observer.clone());
        let gate = batcher.submit_many(vec![(0, 1)]).unwrap().remove(0);
        entered.recv().unwrap();
        // The worker is busy: these three wait; the askers of 1 and 2 then go away.
        let mut replies = batcher.submit_many(vec![(1, 1), (2, 1), (3, 1)]).unwrap();
        let kept = replies.pop().unwrap();
        drop(replies);
        release.send(()).unwrap();
        assert_eq!(gate.blocking_recv().unwrap().unwrap(), 0);
        assert_eq!(kept.blocking_recv().unwrap().unwrap(), 3);
        assert_eq!(*seen.lock().unwrap(), vec![vec![0], vec![3]]);
        assert_eq!(observer.abandoned.load(Ordering::Relaxed), 2);
    }

    #[test]
    fn grouping_splits_short_from_long() {
        let jobs: Vec<Job<u64, u64>> = [3usize, 30, 3, 3, 30, 3, 3, 3, 3, 3, 30, 3]
            .iter()
            .map(|&cost| Job {
                item: 0,
                cost,
                enqueued: Instant::now(),
                reply: oneshot::channel().0,
            })
            .collect();
        let runs = split_runs(jobs, true);
        let costs: Vec<Vec<usize>> = runs
            .iter()
            .map(|r| r.iter().map(|j| j.cost).collect())
            .collect();
        assert_eq!(costs, vec![vec![3; 9], vec![30; 3]]);
    }
}

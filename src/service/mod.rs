//! The service as a library: everything `befit serve` runs, without the HTTP
//! layer, so the binary and the tests build it the same way.
//!
//! - [`data_dir`]: every file of the data folder, and its exclusive lock.
//! - [`maps`]: the reward maps the server knows, each tied to its bundle.
//! - [`backfill`]: embedding the bank's captions for a newly loaded bundle.
//!
//! [`Service::open`] takes the data folder's lock and opens the image store,
//! the caption bank and the maps; [`Service::ready_with`] (or, in
//! [`Running`], a background load of the configured bundles) makes it ready.
//! [`Running`] owns the background work, the bank's dump timer and the
//! final dump, and stops it when stopped or dropped. The service itself owns
//! the metrics history's sampler, which stops when the last handle is dropped.

pub mod backfill;
pub mod data_dir;
pub mod high_water;
pub mod maps;

use std::path::PathBuf;
use std::sync::{Arc, OnceLock};
use std::time::Duration;

use crate::bank::index::{GraphOrigin, IndexBackend};
use crate::bank::{BankConfig, BankError, CaptionBank, IndexParams};
use crate::encoders::{load_bundles, Engine, LoadBundlesError, Model, ModelSettings};
use crate::intake::image_root::ImageRoot;
use crate::intake::limits::Limits;
use crate::metrics::history::{History, Sampler, SAMPLE_EVERY};
use crate::metrics::Registry;
use crate::runs::{RunError, RunWatch};
use crate::store::images::{ImageStore, StoreError};
use data_dir::{DataDir, DataDirError, DataDirLock};
use maps::{MapError, MapRegistry};

/// Seconds between dumps of the caption bank's index: appends since the last
/// dump are replayed from the store at start, so this only bounds start-up work.
pub const DEFAULT_BANK_DUMP_SECONDS: u64 = 60;

/// What the service is started with.
#[derive(Debug, Clone)]
pub struct ServiceConfig {
    /// Bundle folders; the first is the default model.
    pub bundles: Vec<PathBuf>,
    pub data_dir: PathBuf,
    /// Folder that images named by path must be in; none refuses paths.
    pub image_root: Option<PathBuf>,
    pub limits: Limits,
    pub models: ModelSettings,
    /// `--map NAME=FILE` pairs.
    pub maps: Vec<(String, PathBuf)>,
    pub bank_dump_every: Duration,
    /// Start even when a store holds fewer items than its high-water mark.
    pub accept_smaller_stores: bool,
    /// Graph library of the caption bank's index.
    pub bank_backend: IndexBackend,
}

impl ServiceConfig {
    /// Defaults for everything but the bundles and the data folder.
    pub fn new(bundles: Vec<PathBuf>, data_dir: PathBuf) -> ServiceConfig {
        ServiceConfig {
            bundles,
            data_dir,
            image_root: None,
            limits: Limits::default(),
            models: ModelSettings::default(),
            maps: Vec::new(),
            bank_dump_every: Duration::from_secs(DEFAULT_BANK_DUMP_SECONDS),
            accept_smaller_stores: false,
            bank_backend: IndexBackend::default(),
        }
    }
}

/// Why the service could not start.
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    #[error(transparent)]
    DataDir(#[from] DataDirError),
    #[error("--image-root {}: {source}", path.display())]
    ImageRoot {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("opening the image store: {0}")]
    Store(#[from] StoreError),
    #[error("opening the caption bank: {0}")]
    Bank(#[from] BankError),
    #[error("reward maps: {0}")]
    Maps(#[from] MapError),
    #[error("opening the run watch: {0}")]
    Runs(#[from] RunError),
    #[error(transparent)]
    Bundles(#[from] LoadBundlesError),
    #[error("the loading task failed: {0}")]
    Task(String),
    #[error("starting the metrics history thread: {0}")]
    Sampler(std::io::Error),
    #[error(transparent)]
    Marks(#[from] high_water::MarkError),
}

/// A route asked for what is still loading.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
#[error("bundles are still loading; retry shortly")]
pub struct NotReady;

/// Shared by every request; clone freely.
#[derive(Clone)]
pub struct Service {
    shared: Arc<Shared>,
}

struct Shared {
    engine: OnceLock<Arc<Engine>>,
    bank: OnceLock<CaptionBank>,
    opened_bank: CaptionBank,
    store: Arc<ImageStore>,
    image_root: Option<ImageRoot>,
    limits: Limits,
    metrics: Arc<Registry>,
    /// The live page's history of `metrics`; its thread stops with the service.
    sampler: Sampler,
    maps: MapRegistry,
    runs: RunWatch,
    backfills: backfill::Backfills,
    data_dir: DataDir,
    _lock: DataDirLock,
}

impl Service {
    /// Locks the data folder and opens what lives there; not ready yet.
    pub fn open(config: &ServiceConfig, metrics: Arc<Registry>) -> Result<Service, StartError> {
        let data_dir = DataDir::new(&config.data_dir);
        let lock = data_dir.lock(
            "befit serve",
            "stop that server, or give this one another --data-dir",
        )?;
        let image_root = match &config.image_root {
            Some(dir) => Some(
                ImageRoot::new(dir)
                    .map_err(|source| StartError::ImageRoot {
                        path: dir.clone(),
                        source,
                    })?
                    .max_file_bytes(config.limits.max_body_bytes as u64),
            ),
            None => None,
        };
        let store = Arc::new(ImageStore::open(&data_dir.images())?);
        let bank = CaptionBank::open(data_dir.root(), bank_config(config))?;
        let counts = high_water::Counts {
            images: store.image_count()?,
            captions: bank.store().caption_count().map_err(BankError::from)?,
        };
        high_water::check(data_dir.root(), counts, config.accept_smaller_stores)?;
        high_water::record(data_dir.root(), counts)?;
        let maps = MapRegistry::load(Some(data_dir.maps()), &config.maps)?;
        let runs = RunWatch::open(&data_dir.runs(), Arc::clone(&metrics))?;
        let sampler =
            Sampler::start(Arc::clone(&metrics), SAMPLE_EVERY).map_err(StartError::Sampler)?;
        let shared = Shared {
            engine: OnceLock::new(),
            bank: OnceLock::new(),
            opened_bank: bank,
            store,
            image_root,
            limits: config.limits.clone(),
            metrics,
            sampler,
            maps,
            runs,
            backfills: backfill::Backfills::default(),
            data_dir,
            _lock: lock,
        };
        Ok(Service {
            shared: Arc::new(shared),
        })
    }

    /// Makes the service ready with loaded `models` (the first is the
    /// default): the engine first, so rewards answer, then the bank's indexes.
    /// Blocking; a second call is ignored.
    pub fn ready_with(&self, models: Vec<Arc<Model>>) -> Result<(), StartError> {
        if models.is_empty() {
            return Err(LoadBundlesError::None.into());
        }
        let shared = &self.shared;
        let engine = Engine::new(
            models,
            Arc::clone(&shared.store),
            shared.image_root.clone(),
            &shared.limits,
            Arc::clone(&shared.metrics),
        );
        let engine = Arc::new(engine);
        let _ = shared.engine.set(Arc::clone(&engine));
        for model in engine.models() {
            let (_, report) = shared
                .opened_bank
                .model(&model.bundle.digest, model.dimension())?;
            match report {
                Some(r) => {
                    let origin = match &r.origin {
                        GraphOrigin::Loaded { dumped, replayed } => {
                            format!("from its dump ({dumped} rows, {replayed} replayed)")
                        }
                        GraphOrigin::Built { reason } => format!("rebuilt ({reason})"),
                        GraphOrigin::InMemory => "in memory".to_string(),
                    };
                    tracing::info!(model = %model.id, rows = r.rows, skipped = r.skipped, millis = r.millis, %origin, "caption bank index loaded");
                }
                None => tracing::info!(model = %model.id, "caption bank index loaded"),
            }
        }
        let _ = shared.bank.set(shared.opened_bank.clone());
        tracing::info!("ready");
        Ok(())
    }

    /// The engine, once bundles are loaded.
    pub fn engine(&self) -> Result<&Arc<Engine>, NotReady> {
        self.shared.engine.get().ok_or(NotReady)
    }

    /// Time the encoder work queued now takes to drain, over every model
    /// (zero before the models are loaded).
    pub fn queued_work(&self) -> Duration {
        self.engine()
            .map(|e| e.models().iter().map(|m| m.drain_time()).sum())
            .unwrap_or_default()
    }

    /// The caption bank, once its indexes are loaded.
    pub fn bank(&self) -> Result<&CaptionBank, NotReady> {
        self.shared.bank.get().ok_or(NotReady)
    }

    pub fn limits(&self) -> &Limits {
        &self.shared.limits
    }

    pub fn metrics(&self) -> &Arc<Registry> {
        &self.shared.metrics
    }

    /// The metrics' recent history, sampled every second while the service lives.
    pub fn history(&self) -> &History {
        self.shared.sampler.history()
    }

    pub fn maps(&self) -> &MapRegistry {
        &self.shared.maps
    }

    /// The run watch (blocking: call it off the async runtime).
    pub fn runs(&self) -> &RunWatch {
        &self.shared.runs
    }

    pub fn data_dir(&self) -> &DataDir {
        &self.shared.data_dir
    }

    /// Progress of embedding the bank's captions for newly loaded bundles.
    pub fn backfills(&self) -> &backfill::Backfills {
        &self.shared.backfills
    }

    /// Embeds the bank's captions that each loaded bundle has no vector for
    /// (blocking; searches answer meanwhile, marked partial).
    pub fn backfill(&self, runtime: tokio::runtime::Handle) -> Result<(), StartError> {
        let (Ok(engine), Ok(bank)) = (self.engine(), self.bank()) else {
            return Ok(());
        };
        for model in engine.models() {
            self.shared
                .backfills
                .run(bank, model, runtime.clone(), self.shared.limits.image())?;
        }
        Ok(())
    }

    /// Writes the bank's index dumps (blocking); nothing to do before it is loaded.
    /// Also writes the stores' high-water marks (see [`high_water`]).
    pub fn dump_bank(&self) -> Result<(), BankError> {
        if let Some(bank) = self.shared.bank.get() {
            bank.dump()?;
        }
        self.record_marks();
        Ok(())
    }

    /// The stores' counts as the new marks; a failure is logged (the data
    /// is safe; only the check at the next start is weaker).
    fn record_marks(&self) {
        let counts = self
            .shared
            .store
            .image_count()
            .ok()
            .zip(self.shared.opened_bank.store().caption_count().ok());
        let result = match counts {
            Some((images, captions)) => high_water::record(
                self.shared.data_dir.root(),
                high_water::Counts { images, captions },
            ),
            None => return tracing::warn!("could not count the stores for their high-water marks"),
        };
        if let Err(e) = result {
            tracing::warn!(error = %e, "could not write the stores' high-water marks");
        }
    }
}

/// The bank refuses what the server's limits refuse, naming the same flags,
/// and keeps its index with the configured backend.
pub fn bank_config(config: &ServiceConfig) -> BankConfig {
    BankConfig {
        index: IndexParams::for_backend(config.bank_backend),
        max_caption_bytes: config.limits.max_caption_bytes,
        max_append: config.limits.max_captions,
    }
}

/// A started service: bundles loading in the background, the bank dumped on a
/// timer. [`Running::stop`] ends both and writes the last dump; dropping it
/// ends the timer.
pub struct Running {
    service: Service,
    loading: Option<tokio::task::JoinHandle<Result<(), StartError>>>,
    dumper: tokio::task::JoinHandle<()>,
}

impl Running {
    /// Opens the service and starts loading `config.bundles` with `env`.
    /// Call inside a tokio runtime; returns before the bundles are loaded.
    pub fn start(
        config: ServiceConfig,
        env: &'static ort::environment::Environment,
        metrics: Arc<Registry>,
    ) -> Result<Running, StartError> {
        let service = Service::open(&config, Arc::clone(&metrics))?;
        let loading = {
            let service = service.clone();
            let runtime = tokio::runtime::Handle::current();
            tokio::task::spawn_blocking(move || {
                let models = load_bundles(&config.bundles, env, &config.models, &metrics)?;
                service.ready_with(models)?;
                service.backfill(runtime)
            })
        };
        let dumper = tokio::spawn(dump_every(service.clone(), config.bank_dump_every));
        Ok(Running {
            service,
            loading: Some(loading),
            dumper,
        })
    }

    pub fn service(&self) -> &Service {
        &self.service
    }

    /// Resolves only if loading fails, with why; pends forever once loaded.
    pub async fn failed(&mut self) -> StartError {
        let Some(loading) = self.loading.as_mut() else {
            return std::future::pending().await;
        };
        let outcome = loading.await;
        self.loading = None;
        match outcome {
            Ok(Ok(())) => std::future::pending().await,
            Ok(Err(e)) => e,
            Err(e) => StartError::Task(e.to_string()),
        }
    }

    /// Stops the background embedding after its batch and any index build,
    /// waits for loading to end, stops the timer and writes the last dump.
    pub async fn stop(mut self) {
        self.service.backfills().stop();
        // An index still building (a rebuild of a large bank at start) gives up
        // between two inserts; its rows are in the store and the next start builds it.
        self.service.shared.opened_bank.stop_builds();
        if let Some(loading) = self.loading.take() {
            let _ = loading.await;
        }
        self.dumper.abort();
        self.dump_now().await;
        tracing::info!("stopped");
    }

    /// Dumps the bank's indexes now: called when a stop is asked, before
    /// requests are drained, so an orchestrator's kill after its grace period
    /// cannot cost the dump ([`Running::stop`] dumps again what the drain appended).
    pub async fn dump_now(&self) {
        let service = self.service.clone();
        match tokio::task::spawn_blocking(move || service.dump_bank()).await {
            Ok(Ok(())) => {}
            Ok(Err(e)) => {
                tracing::error!(error = %e, "could not dump the caption bank index at shutdown; it will be rebuilt at start")
            }
            Err(e) => tracing::error!(error = %e, "the shutdown dump task failed"),
        }
    }
}

impl Drop for Running {
    fn drop(&mut self) {
        self.dumper.abort();
    }
}

async fn dump_every(service: Service, every: Duration) {
    let mut tick = tokio::time::interval(every);
    tick.tick().await;
    loop {
        tick.tick().await;
        let service = service.clone();
        match tokio::task::spawn_blocking(move || service.dump_bank()).await {
            Ok(Err(e)) => tracing::error!(error = %e, "caption bank dump failed"),
            Err(e) => tracing::error!(error = %e, "caption bank dump task failed"),
            Ok(Ok(())) => {}
        }
    }
}

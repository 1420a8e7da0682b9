//! `befit serve` and `befit check-bundle`.

use std::path::Path;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::Duration;

use anyhow::{bail, Context};

use super::args::{CheckBundleArgs, EncoderArgs, ServeArgs};
use super::ort_environment;
use crate::bank::{BankConfig, CaptionBank};
use crate::batching::BatchSettings;
use crate::bundle::Bundle;
use crate::encoders::{Engine, Model, ModelSettings};
use crate::intake::image_root::ImageRoot;
use crate::metrics::Registry;
use crate::server::state::{read_map, valid_map_name};
use crate::server::{AppState, Limits};
use crate::stats::ContinuityMap;
use crate::store::images::ImageStore;
use std::collections::BTreeMap;

/// Seconds between dumps of the caption bank's index: appends since the last
/// dump are replayed from the store at start, so this only bounds start-up work.
const BANK_DUMP_SECONDS: u64 = 60;

/// Encoder settings from the flags, checked.
pub(crate) fn model_settings(a: &EncoderArgs) -> anyhow::Result<ModelSettings> {
    let workers = a
        .workers
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()));
    if workers == 0
        || a.intra_threads == 0
        || a.max_batch == 0
        || a.max_image_batch == 0
        || a.queue_depth == 0
    {
        bail!("--workers, --intra-threads, --max-batch, --max-image-batch and --queue-depth must be at least 1");
    }
    let wait = Duration::from_micros(a.max_wait_micros);
    Ok(ModelSettings {
        workers,
        intra_threads: a.intra_threads,
        image_batch: BatchSettings {
            max_batch: a.max_image_batch,
            max_wait: wait,
            queue_depth: a.queue_depth,
            group_by_cost: false,
        },
        text_batch: BatchSettings {
            max_batch: a.max_batch,
            max_wait: wait,
            queue_depth: a.queue_depth,
            group_by_cost: true,
        },
        caption_cache: a.caption_cache,
        image_cache: a.image_cache,
    })
}

/// Opens, checks and loads bundles; two bundles with the same id are refused.
pub(crate) fn load_models(
    dirs: &[impl AsRef<Path>],
    env: &ort::environment::Environment,
    settings: &ModelSettings,
    metrics: &Arc<Registry>,
) -> anyhow::Result<Vec<Arc<Model>>> {
    let mut models: Vec<Arc<Model>> = Vec::new();
    for dir in dirs {
        let dir = dir.as_ref();
        let bundle =
            Bundle::open(dir).with_context(|| format!("opening bundle {}", dir.display()))?;
        if let Some(other) = models.iter().find(|m| m.id == bundle.id()) {
            bail!(
                "bundles {} and {} are both {}; give each a distinct name or version",
                other.bundle.dir.display(),
                dir.display(),
                bundle.id()
            );
        }
        let model = Model::load(bundle, env, settings, Arc::clone(metrics))
            .with_context(|| format!("loading bundle {}", dir.display()))?;
        tracing::info!(
            model = %model.id,
            dimension = model.dimension(),
            digest = %model.bundle.short_digest(),
            dir = %dir.display(),
            "bundle loaded"
        );
        models.push(Arc::new(model));
    }
    Ok(models)
}

pub fn serve(a: ServeArgs) -> anyhow::Result<ExitCode> {
    let settings = model_settings(&a.encoders)?;
    if a.max_inflight == 0 || a.max_groups == 0 || a.max_captions == 0 || a.max_images == 0 {
        bail!("--max-inflight, --max-groups, --max-captions and --max-images must be at least 1");
    }
    let limits = Limits {
        max_body_bytes: a.max_body_bytes,
        max_groups: a.max_groups,
        max_captions: a.max_captions,
        max_caption_bytes: a.max_caption_bytes,
        max_images: a.max_images,
        max_pixels: a.encoders.max_pixels,
        max_probe_rows: a.max_probe_rows,
        max_inflight: a.max_inflight,
        request_timeout: Duration::from_secs(a.request_timeout_secs.max(1)),
    };
    let env = ort_environment(a.runtime.ort_lib.clone())?;
    let image_root = match &a.image_root {
        Some(dir) => {
            Some(ImageRoot::new(dir).with_context(|| format!("--image-root {}", dir.display()))?)
        }
        None => None,
    };
    std::fs::create_dir_all(&a.data_dir)
        .with_context(|| format!("creating --data-dir {}", a.data_dir.display()))?;
    let store = Arc::new(ImageStore::open(&a.data_dir.join("images.sqlite"))?);
    let bank = CaptionBank::open(&a.data_dir, BankConfig::default())
        .context("opening the caption bank")?;
    let metrics = Arc::new(Registry::default());
    let maps_dir = a.data_dir.join("maps");
    let maps = load_maps(&maps_dir, &a.maps)?;
    let state = AppState::with_maps(limits.clone(), Arc::clone(&metrics), maps, Some(maps_dir));

    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    runtime.block_on(async move {
        let listener = tokio::net::TcpListener::bind(a.listen)
            .await
            .with_context(|| format!("binding {}", a.listen))?;
        let local = listener.local_addr()?;
        // Tests and scripts read this line to learn the port when asked for port 0.
        eprintln!("befit: listening on http://{local}");
        tracing::info!(%local, "listening; loading bundles");
        let (fail_tx, mut fail_rx) = tokio::sync::mpsc::channel::<anyhow::Error>(1);
        let loading = {
            let state = state.clone();
            let bundles = a.bundles.clone();
            tokio::task::spawn_blocking(move || {
                match load_models(&bundles, env, &settings, &metrics) {
                    Ok(models) => {
                        let digests: Vec<(String, usize)> =
                            models.iter().map(|m| (m.bundle.digest.clone(), m.dimension())).collect();
                        let engine =
                            Engine::new(models, store, image_root, limits.max_pixels, metrics);
                        state.set_engine(Arc::new(engine));
                        // The bank's indexes load (or rebuild) after the rewards routes are ready.
                        let loaded = digests.iter().try_for_each(|(digest, dim)| {
                            bank.model(digest, *dim).map(|(_, report)| {
                                tracing::info!(digest = %&digest[..12], ?report, "caption bank index loaded");
                            })
                        });
                        match loaded {
                            Ok(()) => {
                                state.set_bank(bank);
                                tracing::info!("ready");
                            }
                            Err(e) => {
                                let _ = fail_tx.try_send(anyhow::Error::new(e).context("loading the caption bank"));
                            }
                        }
                    }
                    Err(e) => {
                        let _ = fail_tx.try_send(e);
                    }
                }
            })
        };
        let dump_state = state.clone();
        let dumper = {
            let state = state.clone();
            tokio::spawn(async move {
                let mut tick = tokio::time::interval(Duration::from_secs(BANK_DUMP_SECONDS));
                tick.tick().await;
                loop {
                    tick.tick().await;
                    if let Some(bank) = state.loaded_bank() {
                        let bank = bank.clone();
                        match tokio::task::spawn_blocking(move || bank.dump()).await {
                            Ok(Err(e)) => tracing::error!(error = %e, "caption bank dump failed"),
                            Err(e) => tracing::error!(error = %e, "caption bank dump task failed"),
                            Ok(Ok(_)) => {}
                        }
                    }
                }
            })
        };
        let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(crate::server::run(listener, state, async move {
            let _ = stop_rx.await;
        }));
        let outcome = tokio::select! {
            _ = shutdown_signal() => Ok(()),
            Some(e) = fail_rx.recv() => Err(e),
        };
        let _ = stop_tx.send(());
        let _ = loading.await;
        server.await.context("server task")?.context("serving")?;
        dumper.abort();
        if let Some(bank) = dump_state.loaded_bank() {
            let bank = bank.clone();
            if let Err(e) = tokio::task::spawn_blocking(move || bank.dump()).await.unwrap_or(Ok(Vec::new())) {
                tracing::error!(error = %e, "could not dump the caption bank index at shutdown; it will be rebuilt at start");
            }
        }
        tracing::info!("stopped");
        outcome
    })?;
    Ok(ExitCode::SUCCESS)
}

/// Reward maps saved in the data folder, then those given with `--map NAME=FILE` (which win).
fn load_maps(dir: &Path, flags: &[String]) -> anyhow::Result<BTreeMap<String, ContinuityMap>> {
    let mut maps = BTreeMap::new();
    if dir.is_dir() {
        for entry in std::fs::read_dir(dir).with_context(|| format!("reading {}", dir.display()))? {
            let path = entry?.path();
            let Some(name) = path
                .file_name()
                .and_then(|n| n.to_str())
                .and_then(|n| n.strip_suffix(".json"))
            else {
                continue;
            };
            if valid_map_name(name) {
                maps.insert(name.to_string(), read_map(&path)?);
            }
        }
    }
    for flag in flags {
        let Some((name, file)) = flag.split_once('=') else {
            bail!("--map {flag:?}: give NAME=FILE");
        };
        if !valid_map_name(name) {
            bail!("--map {flag:?}: the name must match [A-Za-z0-9._-]+");
        }
        maps.insert(name.to_string(), read_map(Path::new(file))?);
    }
    Ok(maps)
}

async fn shutdown_signal() {
    let ctrl_c = tokio::signal::ctrl_c();
    #[cfg(unix)]
    {
        let mut term =
            match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
                Ok(term) => term,
                Err(_) => return std::future::pending().await,
            };
        tokio::select! {
            _ = ctrl_c => {},
            _ = term.recv() => {},
        }
    }
    #[cfg(not(unix))]
    let _ = ctrl_c.await;
}

pub fn check_bundle(a: CheckBundleArgs) -> anyhow::Result<ExitCode> {
    let env = ort_environment(a.runtime.ort_lib)?;
    let settings = ModelSettings {
        workers: 1,
        ..ModelSettings::default()
    };
    let metrics = Arc::new(Registry::default());
    let models = load_models(&[&a.bundle], env, &settings, &metrics)?;
    let m = &models[0];
    let out = serde_json::json!({
        "id": m.id,
        "dimension": m.dimension(),
        "digest": m.bundle.digest,
        "dir": m.bundle.dir,
    });
    println!("{}", serde_json::to_string_pretty(&out)?);
    Ok(ExitCode::SUCCESS)
}

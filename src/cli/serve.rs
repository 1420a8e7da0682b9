//! `befit serve` and `befit check-bundle`.

use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::Duration;

use anyhow::{anyhow, bail, Context};

use super::args::{CheckBundleArgs, EncoderArgs, ServeArgs, ServeEncoderArgs};
use super::ort_environment;
use crate::batching::BatchSettings;
use crate::encoders::{load_bundles, ModelSettings, ThreadLayout};
use crate::intake::limits::Limits;
use crate::metrics::Registry;
use crate::server::access::host::HostPolicy;
use crate::server::access::rate::KeyRates;
use crate::server::access::{Access, KeySet};
use crate::server::listen::{open_file_limit, ConnectionSettings, Tls};
use crate::service::{Running, ServiceConfig, DEFAULT_BANK_DUMP_SECONDS};

/// Encoder settings from the flags, checked (offline commands pass
/// `ServeEncoderArgs::default()` for the queueing and caching ones).
pub(crate) fn model_settings(
    a: &EncoderArgs,
    s: &ServeEncoderArgs,
) -> anyhow::Result<ModelSettings> {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    // Either flag fixes the layout (the other then defaults to its small-graph value);
    // neither lets each tower's graph size choose (`LARGE_GRAPH_BYTES`).
    let layout = match (a.workers, a.intra_threads) {
        (None, None) => ThreadLayout::BySize { cores },
        (workers, intra_threads) => ThreadLayout::Fixed {
            workers: workers.unwrap_or(cores),
            intra_threads: intra_threads.unwrap_or(1),
        },
    };
    if a.workers == Some(0)
        || a.intra_threads == Some(0)
        || a.max_batch == 0
        || a.max_image_batch == 0
        || s.queue_depth == 0
    {
        bail!("--workers, --intra-threads, --max-batch, --max-image-batch and --queue-depth must be at least 1");
    }
    let wait = Duration::from_micros(s.max_wait_micros);
    Ok(ModelSettings {
        layout,
        image_batch: BatchSettings {
            max_batch: a.max_image_batch,
            max_wait: wait,
            queue_depth: s.queue_depth,
            group_by_cost: false,
        },
        text_batch: BatchSettings {
            max_batch: a.max_batch,
            max_wait: wait,
            queue_depth: s.queue_depth,
            group_by_cost: true,
        },
        caption_cache: s.caption_cache,
        image_cache: s.image_cache,
    })
}

/// The service's configuration from the flags, checked.
fn service_config(a: &ServeArgs) -> anyhow::Result<ServiceConfig> {
    if a.bundles.is_empty() {
        bail!("give at least one --bundle DIR (or `bundle = [\"DIR\"]` in the --config file)");
    }
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
        max_decoded_bytes: a.encoders.max_decoded_bytes,
        max_probe_rows: a.max_probe_rows,
        max_inflight: a.max_inflight,
        request_timeout: Duration::from_secs(a.request_timeout_secs.max(1)),
        decode_budget_bytes: a.guards.decode_budget_bytes,
        body_timeout: Duration::from_secs(a.guards.body_timeout_secs.max(1)),
        min_body_rate: a.guards.min_body_rate,
        max_queue_wait: Duration::from_millis(a.guards.max_queue_wait_ms),
    };
    if limits.decode_budget_bytes < limits.max_decoded_bytes {
        bail!("--decode-budget-bytes must be at least --max-decoded-bytes ({}), or no image of that size could ever be decoded", limits.max_decoded_bytes);
    }
    let maps = a
        .maps
        .iter()
        .map(|flag| match flag.split_once('=') {
            Some((name, file)) => Ok((name.to_string(), PathBuf::from(file))),
            None => Err(anyhow!("--map {flag:?}: give NAME=FILE")),
        })
        .collect::<anyhow::Result<Vec<_>>>()?;
    Ok(ServiceConfig {
        bundles: a.bundles.clone(),
        data_dir: a.data_dir.clone(),
        image_root: a.image_root.clone(),
        limits,
        models: model_settings(&a.encoders, &a.serving)?,
        maps,
        bank_dump_every: Duration::from_secs(DEFAULT_BANK_DUMP_SECONDS),
        accept_smaller_stores: a.accept_smaller_stores,
        bank_backend: a.bank_index.bank_backend,
    })
}

/// How the server accepts and closes connections, from the flags, checked.
fn connection_settings(a: &ServeArgs) -> anyhow::Result<ConnectionSettings> {
    let open_files = open_file_limit();
    let settings = ConnectionSettings {
        header_timeout: Duration::from_secs(a.guards.header_timeout_secs.max(1)),
        max_connections: a
            .guards
            .max_connections
            .unwrap_or_else(|| ConnectionSettings::default_cap(open_files))
            .max(1),
        drain: Duration::from_secs(a.guards.drain_secs),
    };
    settings.check(open_files)?;
    Ok(settings)
}

/// Who may use the server, from the flags, checked: without keys, only a
/// loopback address unless the network is declared trusted.
fn access(a: &ServeArgs) -> anyhow::Result<Access> {
    let flags = &a.access;
    let keys = flags.keys.as_deref().map(KeySet::load).transpose()?;
    if keys.is_none() && !a.listen.ip().is_loopback() && !flags.trust_network {
        bail!(
            "--listen {} is not a loopback address and no --keys file is given: anyone who can \
             reach it could append to the caption bank, save reward maps and read image \
             embeddings. Give --keys FILE (`befit keys new` makes keys), or --trust-network if \
             every host that can reach this address is trusted",
            a.listen
        );
    }
    let hosts = HostPolicy::new(a.listen.ip(), &flags.allow_hosts);
    let rates = KeyRates::new(flags.key_rate, flags.key_burst);
    Ok(Access::new(keys, Some(hosts), rates))
}

pub fn serve(a: ServeArgs) -> anyhow::Result<ExitCode> {
    let config = service_config(&a)?;
    let connections = connection_settings(&a)?;
    let access = Arc::new(access(&a)?);
    let tls = Tls::from_files(a.access.tls_cert.as_deref(), a.access.tls_key.as_deref())?;
    let scheme = if tls.is_some() { "https" } else { "http" };
    let env = ort_environment(a.runtime.ort_lib.clone())?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    runtime.block_on(async move {
        let listener = tokio::net::TcpListener::bind(a.listen)
            .await
            .with_context(|| format!("binding {}", a.listen))?;
        let local = listener.local_addr()?;
        let mut running = Running::start(config, env, Arc::new(Registry::default()))?;
        // Tests and scripts read this line to learn the port when asked for port 0.
        eprintln!("befit: listening on {scheme}://{local}");
        tracing::info!(%local, keys = access.has_keys(), tls = tls.is_some(), "listening; loading bundles");
        let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
        let app = crate::server::app_with(running.service().clone(), access);
        let server = tokio::spawn(crate::server::listen::serve(
            listener,
            app,
            connections,
            tls,
            async move {
                let _ = stop_rx.await;
            },
        ));
        let outcome = tokio::select! {
            _ = shutdown_signal() => Ok(()),
            e = running.failed() => Err(anyhow::Error::new(e)),
        };
        running.dump_now().await;
        tracing::info!(
            drain_secs = connections.drain.as_secs(),
            "stopping: draining requests in flight"
        );
        let _ = stop_tx.send(());
        server.await.context("server task")?.context("serving")?;
        running.stop().await;
        outcome
    })?;
    Ok(ExitCode::SUCCESS)
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
    // One single-threaded session per tower is enough to check a bundle.
    let settings = ModelSettings::default();
    let metrics = Arc::new(Registry::default());
    let models = load_bundles(&[&a.bundle], env, &settings, &metrics)?;
    let m = &models[0];
    let out = serde_json::json!({
        "id": m.id,
        "dimension": m.dimension(),
        "digest": m.bundle.digest,
        "dir": m.bundle.dir,
        "fluency": m.bundle.manifest.fluency.as_ref().map(|f| &f.file),
    });
    println!("{}", serde_json::to_string_pretty(&out)?);
    Ok(ExitCode::SUCCESS)
}

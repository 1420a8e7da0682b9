//! `befit calibrate` and `befit drift`: statistics of bundles over a probe set,
//! as a report for people (`--report`, HTML), figures (`--json`), and the
//! export the reference cross-check reads (`--export`).

use std::path::Path;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context;
use indicatif::{ProgressBar, ProgressStyle};

use super::args::{CalibrateArgs, DriftArgs, EncoderArgs, RuntimeArgs};
use super::ort_environment;
use super::serve::{load_models, model_settings};
use crate::encoders::offline::ModelEmbedder;
use crate::encoders::Model;
use crate::metrics::Registry;
use crate::probe::{embed_probe, EmbedOptions, ImageFiles, LoadOptions, ProbeSet};
use crate::stats::{self, CalibrationOptions, DriftOptions, ProbeVectors};

/// A model for offline work and the runtime its batchers answer on.
pub(crate) struct OfflineModel {
    pub runtime: tokio::runtime::Runtime,
    pub model: Arc<Model>,
    pub max_pixels: u64,
}

impl OfflineModel {
    pub fn open(
        dir: &Path,
        runtime_args: &RuntimeArgs,
        encoders: &EncoderArgs,
    ) -> anyhow::Result<OfflineModel> {
        let env = ort_environment(runtime_args.ort_lib.clone())?;
        let settings = model_settings(encoders)?;
        let model = load_models(&[dir], env, &settings, &Arc::new(Registry::default()))?.remove(0);
        let runtime = tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()
            .context("starting the runtime")?;
        Ok(OfflineModel {
            runtime,
            model,
            max_pixels: encoders.max_pixels,
        })
    }

    pub fn embedder(&self) -> ModelEmbedder {
        ModelEmbedder {
            model: Arc::clone(&self.model),
            runtime: self.runtime.handle().clone(),
            max_pixels: self.max_pixels,
        }
    }
}

/// A progress bar with rate and time left, drawn on stderr (hidden when not a terminal).
pub(crate) fn progress_bar(label: &str) -> ProgressBar {
    let bar = ProgressBar::new(0);
    let style = ProgressStyle::with_template("{msg} [{bar:30}] {pos}/{len} {per_sec} eta {eta}")
        .unwrap_or_else(|_| ProgressStyle::default_bar())
        .progress_chars("=> ");
    bar.set_style(style);
    bar.set_message(label.to_string());
    bar
}

fn load_probe(path: &Path, skip_bad: bool) -> anyhow::Result<ProbeSet> {
    let loaded = ProbeSet::load(
        path,
        &LoadOptions {
            skip_bad,
            ..LoadOptions::default()
        },
    )?;
    for issue in &loaded.skipped {
        eprintln!("befit: warning: skipped {issue}");
    }
    Ok(loaded.set)
}

fn embed(model: &OfflineModel, set: &ProbeSet, skip_bad: bool) -> anyhow::Result<ProbeVectors> {
    let embedder = model.embedder();
    let bar = progress_bar(&format!("embedding with {}", model.model.id));
    let options = EmbedOptions {
        bundle: model.model.id.clone(),
        skip_bad,
        ..EmbedOptions::default()
    };
    let embedded = embed_probe(set, &ImageFiles(&embedder), &options, &mut |done, total| {
        bar.set_length(total as u64);
        bar.set_position(done as u64);
    });
    bar.finish_and_clear();
    let embedded = embedded?;
    for issue in &embedded.skipped {
        eprintln!("befit: warning: skipped {issue}");
    }
    Ok(embedded.vectors)
}

fn write_text(path: &Path, text: &str) -> anyhow::Result<()> {
    std::fs::write(path, text).with_context(|| format!("writing {}", path.display()))
}

pub fn calibrate(a: CalibrateArgs) -> anyhow::Result<ExitCode> {
    let options = CalibrationOptions {
        margin: a.margin,
        batch_images: a.batch_images,
        ..CalibrationOptions::default()
    };
    options.validate()?;
    let set = load_probe(&a.probe, a.skip_bad)?;
    let model = OfflineModel::open(&a.bundle, &a.runtime, &a.encoders)?;
    let vectors = embed(&model, &set, a.skip_bad)?;
    let report = stats::calibrate(&vectors, &options)?;
    if let Some(path) = &a.report {
        write_text(path, &stats::calibration_html(&report))?;
        eprintln!("befit: report written to {}", path.display());
    }
    if let Some(path) = &a.export {
        stats::write_json(path, &stats::calibration_export(&vectors, &options)?)?;
    }
    if a.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print!("{}", summary_of_calibration(&report)?);
    }
    Ok(ExitCode::SUCCESS)
}

pub fn drift(a: DriftArgs) -> anyhow::Result<ExitCode> {
    let calibration = CalibrationOptions {
        margin: a.margin,
        ..CalibrationOptions::default()
    };
    let options = DriftOptions {
        calibration,
        neighbour_k: a.k,
        moved_pairs: a.moved,
        ..DriftOptions::default()
    };
    options.validate()?;
    let set = load_probe(&a.probe, a.skip_bad)?;
    let (from, to) = {
        let old = OfflineModel::open(&a.from, &a.runtime, &a.encoders)?;
        let from = embed(&old, &set, a.skip_bad)?;
        drop(old);
        let new = OfflineModel::open(&a.to, &a.runtime, &a.encoders)?;
        (from, embed(&new, &set, a.skip_bad)?)
    };
    let report = stats::drift(&from, &to, &options)?;
    if let Some(path) = &a.report {
        write_text(path, &stats::drift_html(&report))?;
        eprintln!("befit: report written to {}", path.display());
    }
    if let Some(path) = &a.export {
        stats::write_json(path, &stats::drift_export(&from, &to, &options)?)?;
    }
    if let Some(path) = &a.save_map {
        let fit = if a.affine_map {
            &report.continuity.affine
        } else {
            &report.continuity.monotone
        };
        write_text(path, &serde_json::to_string_pretty(&fit.map)?)?;
        eprintln!(
            "befit: reward map written to {} (serve it with --map NAME={})",
            path.display(),
            path.display()
        );
    }
    if a.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print!("{}", summary_of_drift(&report)?);
    }
    Ok(ExitCode::SUCCESS)
}

/// A few headline lines for a terminal; `--json` has everything.
fn summary_of_calibration(report: &stats::CalibrationReport) -> anyhow::Result<String> {
    let v = serde_json::to_value(report)?;
    Ok(format!("{}\n", headline(&v, "calibration")))
}

fn summary_of_drift(report: &stats::DriftReport) -> anyhow::Result<String> {
    let v = serde_json::to_value(report)?;
    Ok(format!("{}\n", headline(&v, "drift")))
}

/// Numbers at the top level and one level down, flattened as `a.b = x`.
fn headline(v: &serde_json::Value, title: &str) -> String {
    let mut lines = vec![title.to_string()];
    if let Some(map) = v.as_object() {
        for (k, value) in map {
            match value {
                serde_json::Value::Number(n) => lines.push(format!("  {k} = {n}")),
                serde_json::Value::String(s) => lines.push(format!("  {k} = {s}")),
                serde_json::Value::Object(inner) => {
                    for (k2, v2) in inner {
                        if let serde_json::Value::Number(n) = v2 {
                            lines.push(format!("  {k}.{k2} = {n}"));
                        }
                    }
                }
                _ => {}
            }
        }
    }
    lines.push("  (--json prints every figure; --report FILE writes the HTML report)".into());
    lines.join("\n")
}

//! `befit calibrate` and `befit drift`: statistics of bundles over a probe set,
//! as a report for people (`--report`, HTML), figures (`--json`), and the
//! export the reference cross-check reads (`--export`).

use std::path::Path;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context;
use indicatif::{ProgressBar, ProgressStyle};

use super::args::{CalibrateArgs, DriftArgs, EncoderArgs, RuntimeArgs, ServeEncoderArgs};
use super::ort_environment;
use super::serve::model_settings;
use crate::encoders::load_bundles;
use crate::encoders::offline::ModelEmbedder;
use crate::encoders::Model;
use crate::intake::image_decode::ImageLimits;
use crate::metrics::Registry;
use crate::probe::thumbnails::read_offline;
use crate::probe::{self, embed_probe, EmbedOptions, ImageFiles, LoadOptions, ProbeSet};
use crate::stats::{self, CalibrationOptions, DriftOptions, ProbeVectors};

/// A model for offline work and the runtime its batchers answer on.
pub(crate) struct OfflineModel {
    pub runtime: tokio::runtime::Runtime,
    pub model: Arc<Model>,
    pub image_limits: ImageLimits,
}

impl OfflineModel {
    pub fn open(
        dir: &Path,
        runtime_args: &RuntimeArgs,
        encoders: &EncoderArgs,
    ) -> anyhow::Result<OfflineModel> {
        let env = ort_environment(runtime_args.ort_lib.clone())?;
        let settings = model_settings(encoders, &ServeEncoderArgs::default())?;
        let model = load_bundles(&[dir], env, &settings, &Arc::new(Registry::default()))?.remove(0);
        let runtime = tokio::runtime::Builder::new_multi_thread()
            .enable_all()
            .build()
            .context("starting the runtime")?;
        Ok(OfflineModel {
            runtime,
            model,
            image_limits: encoders.image_limits(),
        })
    }

    /// The bundle's id and digest, as a reward map names it.
    pub fn map_bundle(&self) -> stats::MapBundle {
        stats::MapBundle {
            id: self.model.id.clone(),
            digest: self.model.bundle.digest.clone(),
        }
    }

    pub fn embedder(&self) -> ModelEmbedder {
        ModelEmbedder {
            model: Arc::clone(&self.model),
            runtime: self.runtime.handle().clone(),
            image_limits: self.image_limits,
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

/// The probe file's provenance: sha256 of its bytes and its non-blank lines.
fn probe_provenance(
    path: &Path,
    bundles: Vec<stats::MapBundle>,
) -> anyhow::Result<stats::Provenance> {
    let bytes = std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
    let rows = bytes
        .split(|&b| b == b'\n')
        .filter(|line| line.iter().any(|b| !b.is_ascii_whitespace()))
        .count();
    Ok(stats::Provenance::now(
        bundles,
        stats::sha256_hex(&bytes),
        rows,
    ))
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
    let set = load_probe(&a.probe, a.output.skip_bad)?;
    let model = OfflineModel::open(&a.bundle, &a.runtime, &a.encoders)?;
    let bundle = model.map_bundle();
    let vectors = embed(&model, &set, a.output.skip_bad)?;
    let report = stats::calibrate(&vectors, &options)?;
    if let Some(warning) = stats::small_probe_warning(report.counts.images) {
        eprintln!("befit: warning: {warning}");
    }
    if let Some(path) = &a.output.report {
        let provenance = probe_provenance(&a.probe, vec![bundle])?;
        let lines = stats::calibration_example_lines(&report);
        let thumbnails = probe::thumbnails(&set, &lines, &read_offline, &a.encoders.image_limits());
        write_text(
            path,
            &stats::calibration_html(&report, &provenance, &thumbnails),
        )?;
        eprintln!("befit: report written to {}", path.display());
    }
    if let Some(path) = &a.output.export {
        stats::write_json(path, &stats::calibration_export(&vectors, &options)?)?;
    }
    if a.output.json {
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
    let set = load_probe(&a.probe, a.output.skip_bad)?;
    let (from, to, ends) = {
        let old = OfflineModel::open(&a.from, &a.runtime, &a.encoders)?;
        let from = embed(&old, &set, a.output.skip_bad)?;
        let lands_on = old.map_bundle();
        drop(old);
        let new = OfflineModel::open(&a.to, &a.runtime, &a.encoders)?;
        let applies_to = new.map_bundle();
        (
            from,
            embed(&new, &set, a.output.skip_bad)?,
            (applies_to, lands_on),
        )
    };
    let report = stats::drift(&from, &to, &options)?;
    if let Some(warning) = stats::small_probe_warning(from.images.nrows()) {
        eprintln!("befit: warning: {warning}");
    }
    if let Some(path) = &a.output.report {
        let provenance = probe_provenance(&a.probe, vec![ends.1.clone(), ends.0.clone()])?;
        let lines = stats::drift_example_lines(&report);
        let thumbnails = probe::thumbnails(&set, &lines, &read_offline, &a.encoders.image_limits());
        write_text(path, &stats::drift_html(&report, &provenance, &thumbnails))?;
        eprintln!("befit: report written to {}", path.display());
    }
    if let Some(path) = &a.output.export {
        stats::write_json(path, &stats::drift_export(&from, &to, &options)?)?;
    }
    if let Some(path) = &a.save_map {
        let fit = if a.affine_map {
            &report.continuity.affine
        } else {
            &report.continuity.monotone
        };
        let (applies_to, lands_on) = ends;
        let map = stats::RewardMap {
            applies_to,
            lands_on,
            map: fit.map.clone(),
        };
        write_text(path, &serde_json::to_string_pretty(&map)?)?;
        eprintln!(
            "befit: reward map written to {} (serve it with --map NAME={})",
            path.display(),
            path.display()
        );
    }
    if a.output.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print!("{}", summary_of_drift(&report)?);
    }
    Ok(ExitCode::SUCCESS)
}

/// A few headline lines for a terminal; `--json` has everything.
/// `a * c + b` as a person writes it: `1.8224 * c - 0.5876`, not `+ -0.5876`.
fn affine_text(a: f64, b: f64) -> String {
    let sign = if b < 0.0 { '-' } else { '+' };
    format!("{a:.4} * c {sign} {:.4}", b.abs())
}

fn summary_of_calibration(report: &stats::CalibrationReport) -> anyhow::Result<String> {
    let v = serde_json::to_value(report)?;
    let mut out = format!(
        "calibration of {} on {} images\n",
        text(&v, "/bundle"),
        num(&v, "/counts/images")
    );
    out += &retrieval_lines(&v, "");
    out += &format!(
        "  hinge (margin {}): sum {:.4}, max {:.4} over the whole set; margin violated by {:.1}% of positives\n",
        num(&v, "/hinge/margin"),
        num(&v, "/hinge/whole_set/sum_of_hinges"),
        num(&v, "/hinge/whole_set/max_of_hinges"),
        100.0 * num(&v, "/hinge/whole_set/violation_rate"),
    );
    out += &format!(
        "  cosine: true pairs mean {:.4}, hardest negatives mean {:.4}\n",
        num(&v, "/cosines/true_pairs/mean"),
        num(&v, "/cosines/hardest_negatives/mean"),
    );
    out += &format!(
        "  true beats contrast: {:.4}\n",
        num(&v, "/contrast/overall/rate")
    );
    out += &format!(
        "  suggested: affine {}; CLIP-S weight {:.4}\n",
        affine_text(
            num(&v, "/suggested/affine/a"),
            num(&v, "/suggested/affine/b")
        ),
        num(&v, "/suggested/clip_s_weight"),
    );
    out += "  (--json prints every figure; --report FILE writes the HTML report)\n";
    Ok(out)
}

fn summary_of_drift(report: &stats::DriftReport) -> anyhow::Result<String> {
    let v = serde_json::to_value(report)?;
    // The verdict first, in one sentence, as the HTML report's headline.
    let mut out = format!(
        "{}\ndrift from {} to {}\n",
        stats::drift_headline(report, &stats::HeadlineThresholds::default()),
        text(&v, "/from_bundle"),
        text(&v, "/to_bundle")
    );
    out += &format!(
        "  rank agreement of {} pairs: Spearman {:.4}, Kendall tau-b {:.4}\n",
        num(&v, "/agreement/all_pairs/pairs"),
        num(&v, "/agreement/all_pairs/spearman_rho"),
        num(&v, "/agreement/all_pairs/kendall_tau_b"),
    );
    out += &format!(
        "  KS D of true-pair cosines: {:.4}\n",
        num(&v, "/true_cosine_ks/statistic")
    );
    out += &format!(
        "  linear CKA: images {:.4}, texts {:.4}; neighbour overlap@{}: {:.4}\n",
        num(&v, "/cka/images"),
        num(&v, "/cka/texts"),
        num(&v, "/neighbour_overlap/k"),
        num(&v, "/neighbour_overlap/mean_jaccard"),
    );
    out += &format!(
        "  new-to-old map: affine {} (RMSE {:.4}); monotone RMSE {:.4}\n",
        affine_text(
            num(&v, "/continuity/affine/map/a"),
            num(&v, "/continuity/affine/map/b")
        ),
        num(&v, "/continuity/affine/rmse"),
        num(&v, "/continuity/monotone/rmse"),
    );
    out += "  old:\n";
    out += &retrieval_lines(&v, "/from");
    out += "  new:\n";
    out += &retrieval_lines(&v, "/to");
    out += "  (--json prints every figure; --report FILE writes the HTML report)\n";
    Ok(out)
}

fn retrieval_lines(v: &serde_json::Value, at: &str) -> String {
    let r = |dir: &str, k: &str| num(v, &format!("{at}/retrieval/{dir}/{k}"));
    format!(
        "  image->text R@1/5/10 {:.1} / {:.1} / {:.1}; text->image {:.1} / {:.1} / {:.1} (percent)\n",
        r("image_to_text", "r_at_1"),
        r("image_to_text", "r_at_5"),
        r("image_to_text", "r_at_10"),
        r("text_to_image", "r_at_1"),
        r("text_to_image", "r_at_5"),
        r("text_to_image", "r_at_10"),
    )
}

/// A number of the report (NaN when absent, e.g. CKA undefined).
fn num(v: &serde_json::Value, pointer: &str) -> f64 {
    v.pointer(pointer)
        .and_then(serde_json::Value::as_f64)
        .unwrap_or(f64::NAN)
}

fn text(v: &serde_json::Value, pointer: &str) -> String {
    v.pointer(pointer)
        .and_then(serde_json::Value::as_str)
        .unwrap_or("?")
        .to_string()
}

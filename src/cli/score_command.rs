//! `befit score`: the rewards of a file of groups, offline, through the same
//! checks and scoring as `POST /v1/rewards`. Scoring a checkpoint's sampled
//! captions after the fact is the same work as serving them.

use std::io::{BufRead, BufReader, BufWriter, Write};
use std::path::Path;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::{bail, Context};
use serde_json::json;

use super::args::{BaselineKind, ScaleKind, ScoreArgs};
use super::probe_commands::{progress_bar, OfflineModel};
use crate::encoders::Engine;
use crate::intake::image_root::ImageRoot;
use crate::intake::limits::Limits;
use crate::metrics::Registry;
use crate::scoring::{
    check_group, score_groups, Baseline, GroupJson, GroupScores, Guard, GuardJson, Remap,
    RewardGroup, RewardSpec, Scale,
};
use crate::service::maps::MapRegistry;
use crate::store::images::ImageStore;

fn spec(a: &ScoreArgs, model: &crate::encoders::Model) -> anyhow::Result<RewardSpec> {
    let scale = match a.scale {
        ScaleKind::Cosine => Scale::Cosine,
        ScaleKind::ClipS => Scale::ClipS { weight: a.weight },
        ScaleKind::RefClipS => Scale::RefClipS { weight: a.weight },
        ScaleKind::Affine => Scale::Affine {
            a: a.affine_a,
            b: a.affine_b,
        },
    };
    let baseline = match a.baseline {
        BaselineKind::None => Baseline::None,
        BaselineKind::MeanOfOthers => Baseline::MeanOfOthers,
        BaselineKind::Greedy => Baseline::Greedy,
    };
    let remap = match &a.remap {
        Some(file) => {
            let maps = MapRegistry::load(None, &[("remap".to_string(), file.clone())])?;
            let map = maps
                .for_model("remap", &model.id, &model.bundle.digest)
                .with_context(|| format!("--remap {}", file.display()))?;
            Some(map as Arc<dyn Remap>)
        }
        None => None,
    };
    let spec = RewardSpec::new(scale, baseline, remap)
        .map_err(|e| anyhow::anyhow!("--scale: {}", e.problem))?;
    match &a.guard {
        Some(text) => {
            let json: GuardJson = serde_json::from_str(text)
                .with_context(|| format!("--guard is not a guard object: {text}"))?;
            // Offline there is no bank; the bundle's fluency head, when it has one.
            let guard = Guard::new(json, model.fluency_head(), None)
                .map_err(|e| anyhow::anyhow!("--guard: {e}"))?;
            Ok(spec.with_guard(guard))
        }
        None => Ok(spec),
    }
}

/// A line of the input: its number and the group, or why it is bad.
type Parsed = (usize, Result<RewardGroup, String>);

fn parse_line(n: usize, text: &str, spec: &RewardSpec, limits: &Limits) -> Parsed {
    let group = serde_json::from_str::<GroupJson>(text)
        .map_err(|e| format!("not a group: {e}"))
        .and_then(|g| g.into_group("group").map_err(|e| e.to_string()))
        .and_then(|g| {
            check_group(&g, spec, limits, "group")
                .map(|()| g)
                .map_err(|e| e.to_string())
        });
    (n, group)
}

pub fn score(a: ScoreArgs) -> anyhow::Result<ExitCode> {
    if a.chunk == 0 {
        bail!("--chunk must be at least 1");
    }
    let input = std::fs::File::open(&a.input)
        .with_context(|| format!("reading --input {}", a.input.display()))?;
    let total_lines = BufReader::new(&input).lines().count() as u64;
    let input = std::fs::File::open(&a.input)?;
    let root_dir = match &a.image_root {
        Some(dir) => dir.clone(),
        None => a
            .input
            .parent()
            .filter(|p| !p.as_os_str().is_empty())
            .unwrap_or(Path::new("."))
            .to_path_buf(),
    };
    let root =
        ImageRoot::new(&root_dir).with_context(|| format!("image root {}", root_dir.display()))?;
    let offline = OfflineModel::open(&a.bundle, &a.runtime, &a.encoders)?;
    let model = Arc::clone(&offline.model);
    let spec = spec(&a, &model)?;
    let image_limits = a.encoders.image_limits();
    let limits = Limits {
        max_pixels: image_limits.max_pixels,
        max_decoded_bytes: image_limits.max_decoded_bytes,
        ..Limits::default()
    };
    let store = Arc::new(ImageStore::in_memory()?);
    let engine = Engine::new(
        vec![Arc::clone(&model)],
        store,
        Some(root),
        &limits,
        Arc::new(Registry::default()),
    );
    let mut out: Box<dyn Write> = match &a.output {
        Some(path) => Box::new(BufWriter::new(
            std::fs::File::create(path)
                .with_context(|| format!("creating --output {}", path.display()))?,
        )),
        None => Box::new(BufWriter::new(std::io::stdout().lock())),
    };
    let bar = progress_bar("scoring");
    bar.set_length(total_lines);
    let mut lines = BufReader::new(input).lines().enumerate();
    let (mut scored, mut bad) = (0usize, 0usize);
    loop {
        let mut chunk: Vec<Parsed> = Vec::with_capacity(a.chunk);
        for (i, line) in lines.by_ref() {
            let text = line.with_context(|| format!("reading line {}", i + 1))?;
            if text.trim().is_empty() {
                continue;
            }
            chunk.push(parse_line(i + 1, &text, &spec, &limits));
            if chunk.len() == a.chunk {
                break;
            }
        }
        if chunk.is_empty() {
            break;
        }
        if let Some((n, Err(why))) = chunk.iter().find(|(_, g)| g.is_err()) {
            if !a.skip_bad {
                bail!(
                    "{}: line {n}: {why} (fix it, or pass --skip-bad to go on without it)",
                    a.input.display()
                );
            }
        }
        let groups: Vec<RewardGroup> = chunk
            .iter()
            .filter_map(|(_, g)| g.as_ref().ok().cloned())
            .collect();
        let together = offline
            .runtime
            .block_on(score_groups(&engine, &model, &spec, &groups, "group"));
        let answers: Vec<Result<GroupScores, String>> = match together {
            Ok(answers) => answers.into_iter().map(Ok).collect(),
            // One group's image failed: with --skip-bad, find which by scoring each alone.
            Err(e) if a.skip_bad && e.field.is_some() => groups
                .iter()
                .map(|g| {
                    offline
                        .runtime
                        .block_on(score_groups(
                            &engine,
                            &model,
                            &spec,
                            std::slice::from_ref(g),
                            "group",
                        ))
                        .map(|mut one| one.remove(0))
                        .map_err(|e| format!("image: {e}"))
                })
                .collect(),
            Err(e) => {
                let (first, last) = (chunk[0].0, chunk[chunk.len() - 1].0);
                return Err(anyhow::Error::new(e)).context(format!(
                    "scoring lines {first} to {last} (pass --skip-bad to go on without a group whose image fails)"
                ));
            }
        };
        let mut answers = answers.into_iter();
        for (n, group) in &chunk {
            let answer = match group {
                Ok(_) => answers.next().context("one answer per group")?,
                Err(why) => Err(why.clone()),
            };
            let line = match answer {
                Ok(a) => {
                    scored += 1;
                    json!({"line": n, "image": a.image, "samples": a.samples, "greedy": a.greedy})
                }
                Err(why) => {
                    bad += 1;
                    json!({"line": n, "error": why})
                }
            };
            serde_json::to_writer(&mut out, &line)?;
            out.write_all(b"\n")?;
        }
        bar.set_position(chunk[chunk.len() - 1].0 as u64);
    }
    out.flush()?;
    bar.finish_and_clear();
    eprintln!(
        "befit: scored {scored} group(s) with {}{}",
        model.id,
        if bad > 0 {
            format!(", {bad} bad line(s) written as errors")
        } else {
            String::new()
        }
    );
    Ok(ExitCode::SUCCESS)
}

//! `befit bank import` and `befit bank query`: the caption bank from the command line.

use std::process::ExitCode;

use anyhow::{bail, Context};

use super::args::{BankEmbedMissingArgs, BankImportArgs, BankIndexArgs, BankQueryArgs};
use super::probe_commands::{progress_bar, OfflineModel};
use super::progress::ImportBar;
use crate::bank::import::import_jsonl;
use crate::bank::{BankConfig, BankQuery, CaptionBank, IndexParams, SearchMode};
use crate::service::data_dir::{DataDir, BANK_WRITE_ADVICE};
use crate::vectors::Embedder;

fn open_bank(data_dir: &std::path::Path, index: &BankIndexArgs) -> anyhow::Result<CaptionBank> {
    let config = BankConfig {
        index: IndexParams::for_backend(index.bank_backend),
        ..BankConfig::default()
    };
    CaptionBank::open(data_dir, config)
        .with_context(|| format!("opening the caption bank in {}", data_dir.display()))
}

pub fn import(a: BankImportArgs) -> anyhow::Result<ExitCode> {
    let total_bytes = std::fs::metadata(&a.from)
        .with_context(|| format!("reading {}", a.from.display()))?
        .len();
    let w = &a.write;
    // A running server would never see what this writes: refuse its data folder.
    let _lock = DataDir::new(&w.data_dir).lock("befit bank import", BANK_WRITE_ADVICE)?;
    let model = OfflineModel::open(&w.bundle, &w.runtime, &w.encoders)?;
    let bank = open_bank(&w.data_dir, &w.index)?;
    let (model_bank, _) = bank.model(&model.model.bundle.digest, model.model.dimension())?;
    let embedder = model.embedder();
    let bar = ImportBar::new(total_bytes);
    let report = import_jsonl(
        &model_bank,
        &embedder,
        &a.from,
        a.tag.as_deref(),
        w.batch_size,
        &mut |p| bar.update(p),
    );
    let report = match report {
        Ok(report) => report,
        Err(e) => {
            // What was committed before the failure stays; running again carries on from there.
            let _ = bank.dump();
            return Err(e).context("importing captions (what was committed is kept; run the same command again to carry on)");
        }
    };
    bar.finish(&report);
    bank.dump().context("writing the bank index")?;
    for bad in report.bad_lines.iter().take(20) {
        eprintln!("befit: warning: line {}: {}", bad.line, bad.reason);
    }
    println!("{}", serde_json::to_string_pretty(&report)?);
    Ok(ExitCode::SUCCESS)
}

pub fn query(a: BankQueryArgs) -> anyhow::Result<ExitCode> {
    if a.image.is_some() == a.text.is_some() {
        bail!("give exactly one of --image PATH or --text \"...\"");
    }
    if a.k == 0 {
        bail!("-k must be at least 1");
    }
    let model = OfflineModel::open(&a.bundle, &a.runtime, &a.encoders)?;
    let bank = open_bank(&a.data_dir, &a.index)?;
    let (model_bank, _) = bank.model(&model.model.bundle.digest, model.model.dimension())?;
    let embedder = model.embedder();
    let query = match (&a.image, &a.text) {
        (Some(path), _) => embedder.embed_image_files(std::slice::from_ref(path))?,
        (_, Some(text)) => embedder.embed_texts(std::slice::from_ref(text))?,
        _ => unreachable!("checked above"),
    };
    let mode = if a.exact {
        SearchMode::Exact
    } else {
        SearchMode::Auto
    };
    let answer = model_bank.search(
        query.row(0).as_slice().unwrap_or(&[]),
        &BankQuery {
            k: a.k,
            ef_search: a.ef_search,
            tag: a.tag.clone(),
            mode,
        },
    )?;
    if a.json {
        println!("{}", serde_json::to_string_pretty(&answer)?);
    } else {
        for hit in &answer.hits {
            let tags = if hit.tags.is_empty() {
                String::new()
            } else {
                format!("  [{}]", hit.tags.join(", "))
            };
            println!("{:>8.4}  {}{}", hit.cosine, hit.text, tags);
        }
        if answer.hits.is_empty() {
            println!(
                "(the bank has no captions for this bundle; add some with `befit bank import`)"
            );
        }
    }
    Ok(ExitCode::SUCCESS)
}

pub fn embed_missing(a: BankEmbedMissingArgs) -> anyhow::Result<ExitCode> {
    let w = &a.write;
    let _lock = DataDir::new(&w.data_dir).lock("befit bank embed-missing", BANK_WRITE_ADVICE)?;
    let model = OfflineModel::open(&w.bundle, &w.runtime, &w.encoders)?;
    let bank = open_bank(&w.data_dir, &w.index)?;
    let digest = &model.model.bundle.digest;
    let (model_bank, _) = bank.model(digest, model.model.dimension())?;
    let missing = crate::service::backfill::missing_captions(&bank, digest)?;
    let bar = progress_bar("embedding");
    bar.set_length(missing);
    let embedded =
        crate::bank::embed_missing(&model_bank, &model.embedder(), w.batch_size, &mut |n| {
            bar.set_position(n)
        });
    bar.finish_and_clear();
    let embedded = match embedded {
        Ok(n) => n,
        Err(e) => {
            let _ = bank.dump();
            return Err(e).context("embedding captions (what was committed is kept; run the same command again to carry on)");
        }
    };
    bank.dump().context("writing the bank index")?;
    println!(
        "{}",
        serde_json::to_string_pretty(
            &serde_json::json!({"model": model.model.id, "embedded": embedded})
        )?
    );
    Ok(ExitCode::SUCCESS)
}

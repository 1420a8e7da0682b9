use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;

use super::import::DEFAULT_IMPORT_BATCH;
use super::synthetic::SceneEmbedder;
use super::*;
use crate::vectors::{EmbedError, Embedder};

const DIGEST: &str = "0123456789abcdef0123456789abcdef0123456789abcdef0123456789abcdef";
const DIM: usize = 32;

fn open(dir: &Path) -> (CaptionBank, Arc<ModelBank>) {
    let bank = CaptionBank::open(dir, BankConfig::default()).unwrap();
    let (model, _) = bank.model(DIGEST, DIM).unwrap();
    (bank, model)
}

fn write_lines(dir: &Path, name: &str, lines: &[String]) -> PathBuf {
    let path = dir.join(name);
    let mut f = std::fs::File::create(&path).unwrap();
    for l in lines {
        writeln!(f, "{l}").unwrap();
    }
    path
}

fn captions_file(dir: &Path, n: usize) -> PathBuf {
    let lines: Vec<String> = (0..n)
        .map(|i| match i % 3 {
            0 => serde_json::json!({"text": format!("scene{} caption number {i}", i / 4)}).to_string(),
            1 => serde_json::json!({"text": format!("scene{} caption number {i}", i / 4), "tag": "tabletop", "extra": 1}).to_string(),
            _ => serde_json::json!(format!("scene{} caption number {i}", i / 4)).to_string(),
        })
        .collect();
    write_lines(dir, "captions.jsonl", &lines)
}

/// Everything a bank holds for the digest: (id, text, tags, vector).
fn snapshot(bank: &CaptionBank, model: &ModelBank) -> Vec<(RowId, String, Vec<String>, Vec<f32>)> {
    let mut out = Vec::new();
    let mut id = 1;
    while let Some(c) = bank.caption(id).unwrap() {
        out.push((
            c.id,
            c.text,
            c.tags,
            model.index().vector(id).unwrap_or_default(),
        ));
        id += 1;
    }
    out
}

/// Fails every call after the first `ok_batches`.
struct FailingAfter {
    inner: SceneEmbedder,
    ok_batches: usize,
    calls: AtomicUsize,
}

impl Embedder for FailingAfter {
    fn dimension(&self) -> usize {
        DIM
    }
    fn embed_texts(&self, texts: &[String]) -> Result<ndarray::Array2<f32>, EmbedError> {
        if self.calls.fetch_add(1, Ordering::SeqCst) >= self.ok_batches {
            return Err(EmbedError::encoder("encoder went away"));
        }
        self.inner.embed_texts(texts)
    }
    fn embed_image_files(&self, p: &[PathBuf]) -> Result<ndarray::Array2<f32>, EmbedError> {
        self.inner.embed_image_files(p)
    }
}

/// Counts the captions it embeds.
struct Counting {
    inner: SceneEmbedder,
    embedded: AtomicUsize,
}

impl Embedder for Counting {
    fn dimension(&self) -> usize {
        DIM
    }
    fn embed_texts(&self, texts: &[String]) -> Result<ndarray::Array2<f32>, EmbedError> {
        self.embedded.fetch_add(texts.len(), Ordering::SeqCst);
        self.inner.embed_texts(texts)
    }
    fn embed_image_files(&self, p: &[PathBuf]) -> Result<ndarray::Array2<f32>, EmbedError> {
        self.inner.embed_image_files(p)
    }
}

#[test]
fn importing_twice_gives_the_same_bank_and_embeds_nothing_the_second_time() {
    let dir = tempfile::tempdir().unwrap();
    let file = captions_file(dir.path(), 700);
    let (bank, model) = open(dir.path());
    let embedder = Counting {
        inner: SceneEmbedder::new(DIM, 200),
        embedded: AtomicUsize::new(0),
    };
    let mut seen: Vec<(u64, u64, u64, u64)> = Vec::new();
    let first = import_jsonl(&model, &embedder, &file, Some("mine"), 100, &mut |p| {
        seen.push((p.lines, p.added, p.bytes_read, p.total_bytes))
    })
    .unwrap();
    assert_eq!(
        (first.lines, first.added, first.present, first.bad),
        (700, 700, 0, 0)
    );
    assert_eq!(first.batches, 7);
    // One report after each committed batch of 100 lines, and a last one at the end of the file.
    let counts: Vec<(u64, u64)> = seen.iter().map(|s| (s.0, s.1)).collect();
    let mut want: Vec<(u64, u64)> = (1..=7).map(|b| (100 * b, 100 * b)).collect();
    want.push((700, 700));
    assert_eq!(counts, want);
    let size = std::fs::metadata(&file).unwrap().len();
    assert_eq!(seen.last().map(|s| (s.2, s.3)), Some((size, size)));
    let once = snapshot(&bank, &model);
    assert_eq!(once.len(), 700);
    // Lines without their own tag get the import's.
    assert_eq!(once[0].2, vec!["mine".to_string()]);
    assert_eq!(once[1].2, vec!["tabletop".to_string()]);

    let second = import_jsonl(&model, &embedder, &file, Some("mine"), 100, &mut |_| {}).unwrap();
    assert_eq!((second.added, second.present), (0, 700));
    assert_eq!(
        embedder.embedded.load(Ordering::SeqCst),
        700,
        "nothing re-embedded"
    );
    assert_eq!(snapshot(&bank, &model), once);
}

#[test]
fn an_interrupted_import_resumes_to_the_same_bank_as_an_uninterrupted_one() {
    let whole = tempfile::tempdir().unwrap();
    let file = captions_file(whole.path(), 1_000);
    let (bank, model) = open(whole.path());
    import_jsonl(
        &model,
        &SceneEmbedder::new(DIM, 200),
        &file,
        None,
        128,
        &mut |_| {},
    )
    .unwrap();
    let expected = snapshot(&bank, &model);

    let broken = tempfile::tempdir().unwrap();
    let (bank, model) = open(broken.path());
    let failing = FailingAfter {
        inner: SceneEmbedder::new(DIM, 200),
        ok_batches: 3,
        calls: AtomicUsize::new(0),
    };
    let err = import_jsonl(&model, &failing, &file, None, 128, &mut |_| {}).unwrap_err();
    assert!(
        matches!(
            err,
            ImportError::Embed {
                first_line: 385,
                last_line: 512,
                ..
            }
        ),
        "{err}"
    );
    assert_eq!(
        snapshot(&bank, &model).len(),
        3 * 128,
        "three batches committed"
    );
    drop((bank, model));

    // A new process: reopen and run the same import again.
    let (bank, model) = open(broken.path());
    let embedder = Counting {
        inner: SceneEmbedder::new(DIM, 200),
        embedded: AtomicUsize::new(0),
    };
    let resumed = import_jsonl(&model, &embedder, &file, None, 128, &mut |_| {}).unwrap();
    assert_eq!((resumed.added, resumed.present), (1_000 - 384, 384));
    assert_eq!(embedder.embedded.load(Ordering::SeqCst), 1_000 - 384);
    assert_eq!(snapshot(&bank, &model), expected);
}

#[test]
fn bad_lines_are_reported_with_their_numbers_and_skipped() {
    let dir = tempfile::tempdir().unwrap();
    let lines = vec![
        "\u{feff}{\"text\": \"scene1 a red cube\"}\r".to_string(),
        "not json".to_string(),
        String::new(),
        r#"{"text": ""}"#.to_string(),
        r#"{"txt": "typo"}"#.to_string(),
        r#"{"text": "scene1 a red cube", "tag": 5}"#.to_string(),
        format!("\"{}\"", "x".repeat(3000)),
        r#""scene2 two blue rings""#.to_string(),
        r#"{"text": "scene2 two blue rings"}"#.to_string(),
    ];
    let file = write_lines(dir.path(), "mixed.jsonl", &lines);
    let (_bank, model) = open(dir.path());
    let report = import_jsonl(
        &model,
        &SceneEmbedder::new(DIM, 10),
        &file,
        None,
        DEFAULT_IMPORT_BATCH,
        &mut |_| {},
    )
    .unwrap();
    let bad: Vec<u64> = report.bad_lines.iter().map(|b| b.line).collect();
    assert_eq!(bad, vec![2, 4, 5, 6, 7]);
    assert!(
        report.bad_lines[2].reason.contains("\"text\""),
        "{:?}",
        report.bad_lines[2]
    );
    assert!(
        report.bad_lines[4].reason.contains("2048"),
        "{:?}",
        report.bad_lines[4]
    );
    assert_eq!(
        (report.lines, report.added, report.present, report.bad),
        (9, 2, 1, 5)
    );
}

#[test]
fn appended_captions_are_found_and_stored_once() {
    let dir = tempfile::tempdir().unwrap();
    let (bank, model) = open(dir.path());
    let e = SceneEmbedder::new(DIM, 10);
    let new = |text: &str, tag: Option<&str>| NewCaption {
        text: text.into(),
        tag: tag.map(str::to_string),
        vector: e.vector(text),
    };
    let out = model
        .append(&[
            new("scene1 a red cube", Some("a")),
            new("scene1 a red cube", Some("b")),
            new("scene2 rings", None),
        ])
        .unwrap();
    assert!(out[0].new && !out[1].new && out[2].new);
    assert_eq!(out[0].id, out[1].id);
    let answer = model
        .search(
            &e.vector("scene1 a red cube"),
            &BankQuery {
                k: 2,
                ..Default::default()
            },
        )
        .unwrap();
    assert_eq!(answer.hits[0].text, "scene1 a red cube");
    assert_eq!(answer.hits[0].tags, vec!["a".to_string(), "b".to_string()]);
    assert!((answer.hits[0].cosine - 1.0).abs() < 1e-5);
    let tagged = model
        .search(
            &e.vector("scene1 a red cube"),
            &BankQuery {
                k: 5,
                tag: Some("zzz".into()),
                ..Default::default()
            },
        )
        .unwrap();
    assert!(tagged.hits.is_empty(), "an unknown tag matches nothing");
    let only_b = model
        .exact(&e.vector("scene2 rings"), 5, Some("b"))
        .unwrap();
    assert_eq!(only_b.hits.len(), 1);
    assert_eq!(only_b.hits[0].id, out[0].id);

    let err = model
        .append(&[NewCaption {
            text: " ".into(),
            tag: None,
            vector: vec![1.0; DIM],
        }])
        .unwrap_err();
    assert!(
        err.to_string()
            .contains("captions[0]: the caption is empty"),
        "{err}"
    );
    let err = model
        .append(&[NewCaption {
            text: "x".into(),
            tag: None,
            vector: vec![1.0; 3],
        }])
        .unwrap_err();
    assert!(err.to_string().contains("3 numbers"), "{err}");

    let stats = bank.stats().unwrap();
    assert_eq!(stats.captions, 2);
    assert_eq!(stats.models[0].rows, 2);
    assert_eq!(stats.tags, vec![("a".to_string(), 1), ("b".to_string(), 1)]);
    assert!(matches!(
        bank.model(DIGEST, DIM + 1),
        Err(BankError::DimensionClash { .. })
    ));
}

#[test]
fn a_reopened_bank_replays_appends_made_after_its_last_dump() {
    let dir = tempfile::tempdir().unwrap();
    let e = SceneEmbedder::new(DIM, 50);
    let caption = |i: usize| {
        let text = format!("scene{} caption {i}", i % 50);
        NewCaption {
            vector: e.vector(&text),
            text,
            tag: None,
        }
    };
    {
        let (bank, model) = open(dir.path());
        model
            .append(&(0..300).map(caption).collect::<Vec<_>>())
            .unwrap();
        bank.dump().unwrap();
        model
            .append(&(300..400).map(caption).collect::<Vec<_>>())
            .unwrap();
        // No dump: as after a kill.
    }
    let bank = CaptionBank::open(dir.path(), BankConfig::default()).unwrap();
    let (model, report) = bank.model(DIGEST, DIM).unwrap();
    assert_eq!(
        report.unwrap().origin,
        index::GraphOrigin::Loaded {
            dumped: 300,
            replayed: 100
        }
    );
    for i in (0..400).step_by(37) {
        let c = caption(i);
        let q = BankQuery {
            k: 1,
            mode: SearchMode::Index,
            ..Default::default()
        };
        assert_eq!(model.search(&c.vector, &q).unwrap().hits[0].text, c.text);
    }
    assert_eq!(
        bank.store().integrity_check().unwrap(),
        vec!["ok".to_string()]
    );
}

#[test]
fn a_new_bundle_embeds_what_the_bank_has_and_builds_its_own_index() {
    let dir = tempfile::tempdir().unwrap();
    let file = captions_file(dir.path(), 200);
    let (bank, model) = open(dir.path());
    import_jsonl(
        &model,
        &SceneEmbedder::new(DIM, 60),
        &file,
        None,
        64,
        &mut |_| {},
    )
    .unwrap();
    bank.dump().unwrap();
    let other = "f".repeat(64);
    let (new_model, report) = bank.model(&other, 16).unwrap();
    assert!(matches!(
        report.unwrap().origin,
        index::GraphOrigin::Built { .. }
    ));
    assert!(new_model.index().is_empty());
    let mut seen = 0;
    let n = embed_missing(&new_model, &SceneEmbedder::new(16, 60), 64, &mut |d| {
        seen = d
    })
    .unwrap();
    assert_eq!((n, seen), (200, 200));
    assert_eq!(new_model.index().len(), 200);
    assert_eq!(
        embed_missing(&new_model, &SceneEmbedder::new(16, 60), 64, &mut |_| {}).unwrap(),
        0
    );
}

#[test]
fn appends_on_one_thread_while_another_searches_lose_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let (_bank, model) = open(dir.path());
    let e = SceneEmbedder::new(DIM, 100);
    let stop = Arc::new(std::sync::atomic::AtomicBool::new(false));
    let searcher = {
        let (model, stop, e) = (model.clone(), stop.clone(), e.clone());
        std::thread::spawn(move || {
            let mut n = 0u64;
            while !stop.load(Ordering::SeqCst) {
                let q = BankQuery {
                    k: 5,
                    mode: SearchMode::Index,
                    ..Default::default()
                };
                model
                    .search(&e.vector(&format!("scene{} probe", n % 100)), &q)
                    .unwrap();
                n += 1;
            }
            n
        })
    };
    for batch in 0..40 {
        let captions: Vec<NewCaption> = (0..25)
            .map(|i| {
                let text = format!("scene{} caption {batch}-{i}", (batch * 25 + i) % 100);
                NewCaption {
                    vector: e.vector(&text),
                    text,
                    tag: Some("t".into()),
                }
            })
            .collect();
        let appended = model.append(&captions).unwrap();
        for (a, c) in appended.iter().zip(&captions) {
            assert_eq!(
                model.get(a.id).unwrap().unwrap().text,
                c.text,
                "exact-id lookup"
            );
            let q = BankQuery {
                k: 1,
                mode: SearchMode::Index,
                ..Default::default()
            };
            assert_eq!(
                model.search(&c.vector, &q).unwrap().hits[0].id,
                a.id,
                "found by the index"
            );
        }
    }
    stop.store(true, Ordering::SeqCst);
    assert!(searcher.join().unwrap() > 0);
    assert_eq!(model.stats().indexed, 1_000);
}

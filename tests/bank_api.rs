//! The caption bank through its public API, the way the CLI and the routes
//! call it: open, load a bundle's bank, import with a progress bar, search,
//! stats, dump, and a restart that loads the dump instead of rebuilding.

use std::io::Write;

use befit::bank::index::GraphOrigin;
use befit::bank::synthetic::SceneEmbedder;
use befit::bank::{import_jsonl, BankConfig, BankQuery, CaptionBank, SearchMode};
use befit::cli::progress::ImportBar;

const DIGEST: &str = "1111111111111111111111111111111111111111111111111111111111111111";
const DIM: usize = 48;

#[test]
fn import_search_dump_and_restart() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("captions.jsonl");
    let mut f = std::fs::File::create(&file).unwrap();
    for i in 0..1_500 {
        writeln!(
            f,
            "{}",
            serde_json::json!({"text": format!("scene{} piece {i}", i % 300)})
        )
        .unwrap();
    }
    drop(f);
    let embedder = SceneEmbedder::new(DIM, 300);

    let bank = CaptionBank::open(dir.path(), BankConfig::default()).unwrap();
    let (model, report) = bank.model(DIGEST, DIM).unwrap();
    assert!(matches!(report.unwrap().origin, GraphOrigin::Built { .. }));
    let bar = ImportBar::new(std::fs::metadata(&file).unwrap().len());
    let report = import_jsonl(&model, &embedder, &file, Some("set-a"), 200, &mut |p| {
        bar.update(p)
    })
    .unwrap();
    bar.finish(&report);
    assert_eq!((report.added, report.bad), (1_500, 0));

    let query = embedder.vector("scene7 piece 7");
    let exact = model.exact(&query, 10, None).unwrap();
    assert_eq!(exact.hits[0].text, "scene7 piece 7");
    assert_eq!(exact.hits[0].tags, vec!["set-a".to_string()]);
    let graph = model
        .search(
            &query,
            &BankQuery {
                k: 10,
                mode: SearchMode::Index,
                ..Default::default()
            },
        )
        .unwrap();
    assert_eq!(graph.hits[0].id, exact.hits[0].id);
    assert!(graph.hits.iter().all(|h| h.text.starts_with("scene")));

    let stats = bank.stats().unwrap();
    assert_eq!(stats.captions, 1_500);
    assert_eq!(stats.models[0].rows, 1_500);
    assert_eq!(stats.tags, vec![("set-a".to_string(), 1_500)]);
    let dumps = bank.dump().unwrap();
    assert_eq!(dumps[0].1.rows, 1_500);
    drop((model, bank));

    let bank = CaptionBank::open(dir.path(), BankConfig::default()).unwrap();
    let (model, report) = bank.model(DIGEST, DIM).unwrap();
    assert_eq!(
        report.unwrap().origin,
        GraphOrigin::Loaded {
            dumped: 1_500,
            replayed: 0
        }
    );
    let again = model
        .search(
            &query,
            &BankQuery {
                k: 10,
                mode: SearchMode::Index,
                ..Default::default()
            },
        )
        .unwrap();
    assert_eq!(
        again, graph,
        "the reloaded index answers as before the restart"
    );
}

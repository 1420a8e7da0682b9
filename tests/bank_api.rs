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
    // 300 scene names with five captions each.
    let texts: Vec<String> = (0..1_500)
        .map(|i| format!("scene{} piece {i}", i % 300))
        .collect();
    let mut f = std::fs::File::create(&file).unwrap();
    for text in &texts {
        writeln!(f, "{}", serde_json::json!({ "text": text })).unwrap();
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

    // The truth for each query, computed here: the cosine of the query with every caption's
    // vector, in f64, sorted best first (the vectors are unit length, so the dot product is the
    // cosine). The queries are not in the bank, and captions of other scene names can land near a
    // query's scene (the embedder maps 300 names onto 300 centres by a hash, with collisions), so
    // "the hits share the query's first word" would be neither necessary nor sufficient.
    let vectors: Vec<Vec<f32>> = texts.iter().map(|t| embedder.vector(t)).collect();
    let dot = |a: &[f32], b: &[f32]| -> f64 {
        a.iter()
            .zip(b)
            .map(|(x, y)| f64::from(*x) * f64::from(*y))
            .sum()
    };
    let truth = |query: &[f32]| -> Vec<(f64, &str)> {
        let mut all: Vec<(f64, &str)> = vectors
            .iter()
            .zip(&texts)
            .map(|(v, t)| (dot(v, query), t.as_str()))
            .collect();
        all.sort_by(|a, b| b.0.total_cmp(&a.0));
        all.truncate(10);
        all
    };
    let queries: Vec<Vec<f32>> = [7, 41, 150, 299, 0, 233]
        .iter()
        .map(|scene| embedder.vector(&format!("scene{scene} a query not in the bank")))
        .collect();
    let ten_by_graph = BankQuery {
        k: 10,
        mode: SearchMode::Index,
        ..Default::default()
    };
    let mut found = 0usize;
    for query in &queries {
        let want = truth(query);
        let exact = model.exact(query, 10, None).unwrap();
        let got: Vec<&str> = exact.hits.iter().map(|h| h.text.as_str()).collect();
        let want_texts: Vec<&str> = want.iter().map(|w| w.1).collect();
        assert_eq!(got, want_texts, "the exact scan's ten nearest, in order");
        for (hit, (cosine, _)) in exact.hits.iter().zip(&want) {
            // An f32 dot product of 48 unit-vector components is within 48 * 2^-24 = 2.9e-6 of
            // the exact one (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed.,
            // eq. 3.5: |error| <= n u sum|a_i b_i| <= n u for unit vectors).
            assert!(
                (f64::from(hit.cosine) - cosine).abs() < 1e-5,
                "{hit:?} vs {cosine}"
            );
            assert_eq!(hit.tags, vec!["set-a".to_string()]);
        }
        let graph = model.search(query, &ten_by_graph).unwrap();
        // A hit counts when its true cosine reaches the true 10th one (ann-benchmarks'
        // knn_threshold rule, as befit::bank::recall): captions of colliding scene names can
        // tie, and either of two tied captions is a right answer.
        let tenth = want[9].0 - 1e-6;
        found += graph
            .hits
            .iter()
            .filter(|h| {
                let i = texts.iter().position(|t| *t == h.text).unwrap();
                dot(&vectors[i], query) >= tenth
            })
            .count();
        // Whatever the graph returns, each hit carries its own text's cosine with the query.
        for hit in &graph.hits {
            let i = texts.iter().position(|t| *t == hit.text).unwrap();
            let cosine = dot(&vectors[i], query);
            assert!(
                (f64::from(hit.cosine) - cosine).abs() < 1e-5,
                "{hit:?} vs {cosine}"
            );
        }
    }
    // Recall@10 of the graph against the truth over the queries; with 1,500 captions the default
    // search breadth finds them all (measured 1.0; the bank's own bar for real probe banks is 0.98).
    let recall = found as f64 / (10 * queries.len()) as f64;
    eprintln!("recall@10 of the graph against the scan computed here: {recall:.3}");
    assert!(recall >= 0.98, "recall@10 {recall}");
    let query = queries[0].clone();
    let graph = model.search(&query, &ten_by_graph).unwrap();

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
    let again = model.search(&query, &ten_by_graph).unwrap();
    assert_eq!(
        again, graph,
        "the reloaded index answers as before the restart"
    );
}

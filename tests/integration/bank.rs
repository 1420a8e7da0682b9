//! The caption bank with the real blocks encoders: retrieval quality, HNSW
//! recall against the exact scan, the HTTP routes, and crash safety of the
//! real binary under SIGKILL.

use std::collections::HashSet;
use std::sync::Arc;

use befit::bank::{
    BankConfig, BankQuery, CaptionBank, IndexBackend, IndexParams, NewCaption, SearchMode,
};
use serde_json::{json, Value};

use crate::util::*;

/// Every probe caption (true ones), embedded with blocks-v1, in a fresh bank
/// whose index uses `backend`.
fn probe_bank(
    backend: IndexBackend,
) -> (Arc<befit::bank::ModelBank>, Vec<ProbeRow>, Vec<Vec<f32>>) {
    let model = model("blocks-v1");
    let rows = probe_rows("probe.jsonl");
    let texts: Vec<String> = rows.iter().flat_map(|r| r.captions.clone()).collect();
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let vectors = runtime.block_on(model.caption_vectors(&texts)).unwrap();
    let config = BankConfig {
        index: IndexParams::for_backend(backend),
        ..Default::default()
    };
    let bank = CaptionBank::open(&scratch_dir("probe-bank"), config).unwrap();
    let (mb, _) = bank.model(&model.bundle.digest, model.dimension()).unwrap();
    let new: Vec<NewCaption> = texts
        .iter()
        .zip(&vectors)
        .map(|(t, v)| NewCaption {
            text: t.clone(),
            tag: Some("probe".into()),
            vector: v.vector.clone(),
        })
        .collect();
    for chunk in new.chunks(2000) {
        mb.append(chunk).unwrap();
    }
    let images: Vec<std::path::PathBuf> = rows.iter().map(|r| probe_dir().join(&r.image)).collect();
    let embedder = befit::encoders::offline::ModelEmbedder {
        model: Arc::clone(&model),
        runtime: runtime.handle().clone(),
        image_limits: Default::default(),
    };
    let image_vectors = befit::vectors::Embedder::embed_image_files(&embedder, &images).unwrap();
    let image_vectors = image_vectors
        .rows()
        .into_iter()
        .map(|r| r.to_vec())
        .collect();
    (mb, rows, image_vectors)
}

/// Recall@10 of the graph against the exact scan for the probe images, by
/// the threshold rule (`befit::bank::recall`), and the share of the exact
/// ids the graph returned; each query answered at the default breadth.
fn probe_recall(bank: &befit::bank::ModelBank, images: &[Vec<f32>]) -> (f64, f64) {
    let (mut exact_cosines, mut graph_cosines) = (Vec::new(), Vec::new());
    let mut overlap = 0usize;
    for query in images {
        let ask = |mode| {
            bank.search(
                query,
                &BankQuery {
                    k: 10,
                    mode,
                    ..Default::default()
                },
            )
            .unwrap()
        };
        let (graph, exact) = (ask(SearchMode::Index), ask(SearchMode::Exact));
        let truth: HashSet<u64> = exact.hits.iter().map(|h| h.id).collect();
        overlap += graph.hits.iter().filter(|h| truth.contains(&h.id)).count();
        exact_cosines.push(exact.hits.iter().map(|h| h.cosine).collect());
        graph_cosines.push(graph.hits.iter().map(|h| h.cosine).collect());
    }
    let recall = befit::bank::recall::mean_recall(&exact_cosines, &graph_cosines, 10);
    (recall, overlap as f64 / (10 * images.len()) as f64)
}

#[test]
fn every_backend_finds_the_probe_images_nearest_captions() {
    for backend in [IndexBackend::HnswRs, IndexBackend::Usearch] {
        let (bank, _, images) = probe_bank(backend);
        let (recall, same_ids) = probe_recall(&bank, &images);
        eprintln!(
            "probe bank, {backend:?}: recall@10 {recall:.4}, exact ids returned {same_ids:.4}"
        );
        // The issue asks recall >= 0.98 at the default breadth (threshold rule).
        assert!(recall >= 0.98, "{backend:?}: recall@10 {recall}");
    }
}

#[test]
fn what_the_nearest_captions_say() {
    let (bank, rows, images) = probe_bank(IndexBackend::default());
    // How many of an image's 5 nearest captions are its own true captions, and how often at least
    // one is. Captions of other scenes may describe the image as well (many scenes share a
    // description), so neither is 1 even for a perfect encoder; chance is 5/5000 = 0.001.
    let (mut own, mut any) = (0usize, 0usize);
    for (row, query) in rows.iter().zip(&images) {
        let exact = bank
            .search(
                query,
                &BankQuery {
                    k: 5,
                    mode: SearchMode::Exact,
                    ..Default::default()
                },
            )
            .unwrap();
        let mine: HashSet<&str> = row.captions.iter().map(String::as_str).collect();
        let hits = exact
            .hits
            .iter()
            .filter(|h| mine.contains(h.text.as_str()))
            .count();
        own += hits;
        any += usize::from(hits > 0);
    }
    let own_rate = own as f64 / (5 * rows.len()) as f64;
    let any_rate = any as f64 / rows.len() as f64;
    eprintln!("probe bank: own captions among the 5 nearest {own_rate:.3}; images with one of their own among the 5 nearest {any_rate:.3}");
    // Measured with blocks-v1: 0.962 and 0.715. The floors sit below that by the few images whose
    // near-tied captions a different CPU's float rounding could reorder, and far above chance.
    assert!(
        any_rate >= 0.9,
        "images with an own caption in the nearest 5: {any_rate}"
    );
    assert!(own_rate >= 0.6, "own-caption rate {own_rate}");
}

#[tokio::test(flavor = "multi_thread")]
async fn bank_routes_append_report_and_answer() {
    let state = state();
    let row = &probe_rows("probe.jsonl")[11];
    let other = &probe_rows("probe.jsonl")[12];
    let mut captions: Vec<Value> = row.captions.iter().map(|c| json!(c)).collect();
    captions.extend(
        other
            .captions
            .iter()
            .map(|c| json!({"text": c, "tag": "other"})),
    );
    let (status, r) = post_json(
        &state,
        "/v1/bank",
        &json!({"tag": "mine", "captions": captions}),
    )
    .await;
    assert_eq!(status, 200, "{r}");
    assert_eq!(r["captions"].as_array().unwrap().len(), 10);
    assert!(r["captions"]
        .as_array()
        .unwrap()
        .iter()
        .all(|c| c["new"] == true));
    let (_, again) = post_json(&state, "/v1/bank", &json!({"captions": [row.captions[0]]})).await;
    assert_eq!(again["captions"][0]["new"], false);
    assert_eq!(again["captions"][0]["id"], r["captions"][0]["id"]);

    let (status, _, stats) = call(&state, "GET", "/v1/bank", "", vec![]).await;
    assert_eq!(status, 200);
    assert_eq!(stats["captions"], 10);
    assert_eq!(stats["tags"]["mine"], 5);

    let (status, n) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"image": {"path": row.image}, "k": 5, "tag": "mine"}),
    )
    .await;
    assert_eq!(status, 200, "{n}");
    let texts: Vec<&str> = n["neighbors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|h| h["text"].as_str().unwrap())
        .collect();
    assert_eq!(texts.len(), 5);
    assert!(texts.iter().all(|t| row.captions.iter().any(|c| c == t)));
    let (_, n) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"text": row.captions[0], "k": 1}),
    )
    .await;
    assert_eq!(n["neighbors"][0]["text"], row.captions[0]);
    assert!((n["neighbors"][0]["cosine"].as_f64().unwrap() - 1.0).abs() < 1e-4);
    // Registered images can be searched for a caption too.
    post_json(
        &state,
        "/v1/images",
        &json!({"images": [{"path": row.image}, {"path": other.image}]}),
    )
    .await;
    let (_, imgs) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"text": other.captions[0], "k": 2, "among": "images"}),
    )
    .await;
    let (_, reg) = post_json(
        &state,
        "/v1/images",
        &json!({"images": [{"path": other.image}]}),
    )
    .await;
    assert_eq!(imgs["neighbors"][0]["id"], reg["images"][0]["id"], "{imgs}");

    let (status, e) = post_json(&state, "/v1/neighbors", &json!({"k": 0, "text": "a"})).await;
    assert_eq!(
        (status.as_u16(), e["error"]["field"].as_str()),
        (400, Some("k"))
    );
    let (status, e) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"k": 3, "text": "a", "vector": [1.0]}),
    )
    .await;
    assert_eq!(status, 400, "{e}");
    let (status, e) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"k": 3, "vector": vec![0.0; 64]}),
    )
    .await;
    assert_eq!(status, 400, "{e}");
    let (status, e) = post_json(&state, "/v1/bank", &json!({"captions": [" "]})).await;
    assert_eq!(
        (status.as_u16(), e["error"]["field"].as_str()),
        (400, Some("captions[0]"))
    );
}

/// Same captions (ids, texts, tags) in the same order, cosines within 1e-6.
fn same_neighbours(a: &Value, b: &Value) {
    let (a, b) = (a.as_array().unwrap(), b.as_array().unwrap());
    assert_eq!(a.len(), b.len(), "{a:?} vs {b:?}");
    for (x, y) in a.iter().zip(b) {
        assert_eq!(
            (&x["id"], &x["text"], &x["tags"]),
            (&y["id"], &y["text"], &y["tags"])
        );
        let gap = (x["cosine"].as_f64().unwrap() - y["cosine"].as_f64().unwrap()).abs();
        assert!(gap < 1e-6, "{x} vs {y}");
    }
}

/// A batch of queries (`texts`, `images`, `vectors`) answers, in order,
/// what each query sent alone answers: the same captions in the same order.
/// Cosines are compared to 1e-6, not bit for bit: the encoder run on a batch
/// of texts can move the last bit of an embedding (the bank's own batched
/// and single searches agree bit for bit on equal vectors, see
/// `bank::exact` and `bank::index` unit tests).
#[tokio::test(flavor = "multi_thread")]
async fn batched_neighbours_answer_as_single_queries_do() {
    let state = state();
    let rows = probe_rows("probe.jsonl");
    let rows = &rows[20..26];
    let captions: Vec<Value> = rows
        .iter()
        .enumerate()
        .flat_map(|(i, r)| {
            let tag = if i % 2 == 0 { "even" } else { "odd" };
            r.captions
                .iter()
                .map(move |c| json!({"text": c, "tag": tag}))
        })
        .collect();
    let (status, r) = post_json(&state, "/v1/bank", &json!({"captions": captions})).await;
    assert_eq!(status, 200, "{r}");
    let texts: Vec<&str> = rows.iter().map(|r| r.captions[1].as_str()).collect();
    for extra in [json!({}), json!({"tag": "odd"}), json!({"exact": true})] {
        let mut body = json!({"texts": texts, "k": 4});
        for (key, v) in extra.as_object().unwrap() {
            body[key] = v.clone();
        }
        let (status, batch) = post_json(&state, "/v1/neighbors", &body).await;
        assert_eq!(status, 200, "{batch}");
        let results = batch["results"].as_array().unwrap();
        assert_eq!(results.len(), texts.len());
        for (text, got) in texts.iter().zip(results) {
            let mut one = body.clone();
            one.as_object_mut().unwrap().remove("texts");
            one["text"] = json!(text);
            let (_, single) = post_json(&state, "/v1/neighbors", &one).await;
            same_neighbours(&got["neighbors"], &single["neighbors"]);
            assert_eq!(got["answered"], single["answered"]);
            assert_eq!(got["neighbors"].as_array().unwrap().len(), 4);
        }
    }
    // Vectors of the same texts (from /v1/vectors) answer as the texts do.
    let (_, embedded) = post_json(&state, "/v1/vectors", &json!({"texts": texts})).await;
    let vectors: Vec<Value> = embedded["texts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t["vector"].clone())
        .collect();
    let (_, by_text) = post_json(&state, "/v1/neighbors", &json!({"texts": texts, "k": 3})).await;
    let (status, by_vector) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"vectors": vectors, "k": 3}),
    )
    .await;
    assert_eq!(status, 200, "{by_vector}");
    for (a, b) in by_text["results"]
        .as_array()
        .unwrap()
        .iter()
        .zip(by_vector["results"].as_array().unwrap())
    {
        same_neighbours(&a["neighbors"], &b["neighbors"]);
    }
    // Images, in order.
    let images: Vec<Value> = rows.iter().map(|r| json!({"path": r.image})).collect();
    let (status, batch) =
        post_json(&state, "/v1/neighbors", &json!({"images": images, "k": 2})).await;
    assert_eq!(status, 200, "{batch}");
    for (image, got) in images.iter().zip(batch["results"].as_array().unwrap()) {
        let (_, single) =
            post_json(&state, "/v1/neighbors", &json!({"image": image, "k": 2})).await;
        same_neighbours(&got["neighbors"], &single["neighbors"]);
    }
    // Faults name the query at fault.
    let mut bad = vectors.clone();
    bad[1] = json!([1.0, 2.0]);
    for (body, field) in [
        (json!({"vectors": bad, "k": 3}), "vectors[1]"),
        (json!({"vectors": [], "k": 3}), "vectors"),
        (json!({"texts": ["a", " "], "k": 3}), "texts[1]"),
        (json!({"texts": ["a"], "text": "a", "k": 3}), "text"),
    ] {
        let (status, e) = post_json(&state, "/v1/neighbors", &body).await;
        assert_eq!(
            (status.as_u16(), e["error"]["field"].as_str()),
            (400, Some(field)),
            "{body} -> {e}"
        );
    }
}

#[test]
fn every_acknowledged_append_survives_sigkill() {
    let data = scratch_dir("crash");
    let bundle = bundle_dir("blocks-v1");
    let args = [
        "--bundle",
        bundle.to_str().unwrap(),
        "--data-dir",
        data.to_str().unwrap(),
    ];
    let mut server = Server::start(&args);
    let client = reqwest::blocking::Client::new();
    let url = format!("{}/v1/bank", server.url);
    let acked = Arc::new(std::sync::Mutex::new(Vec::<(u64, String, u64)>::new()));
    // A rendezvous channel: the writer waits after each acknowledged append until the test has
    // taken note of it, so the two move in step.
    let (announce, announced) = std::sync::mpsc::sync_channel::<u64>(0);
    let writer = {
        let acked = Arc::clone(&acked);
        std::thread::spawn(move || {
            for i in 0..100_000u64 {
                let texts: Vec<String> = (0..5)
                    .map(|j| format!("a red ring and {} blue squares, batch {i} item {j}", i % 7))
                    .collect();
                match client
                    .post(&url)
                    .json(&json!({"captions": texts, "tag": format!("b{i}")}))
                    .send()
                {
                    Ok(r) if r.status() == 200 => {
                        let body: Value = r.json().unwrap();
                        let mut a = acked.lock().unwrap();
                        for (c, t) in body["captions"].as_array().unwrap().iter().zip(&texts) {
                            a.push((c["id"].as_u64().unwrap(), t.clone(), i));
                        }
                        drop(a);
                        // After the kill nobody listens; the next request then fails.
                        announce.send(i).ok();
                    }
                    _ => return,
                }
            }
        })
    };
    // Killed after the writer's 30th acknowledged append, while it sends the 31st: a state the
    // test waits for, not a guessed time. The wait is bounded so a stalled server fails the test.
    for n in 0..30u64 {
        announced
            .recv_timeout(std::time::Duration::from_secs(60))
            .unwrap_or_else(|e| panic!("append {n} not acknowledged: {e}"));
    }
    server.kill(); // SIGKILL
    drop(announced);
    writer.join().unwrap();
    let acked = acked.lock().unwrap().clone();
    // The 30 appends waited for, and the 31st if it was answered before the kill landed.
    assert!(
        (150..=155).contains(&acked.len()),
        "{} captions acknowledged",
        acked.len()
    );

    let conn = rusqlite::Connection::open(data.join("bank.sqlite")).unwrap();
    let integrity: String = conn
        .query_row("PRAGMA integrity_check", [], |r| r.get(0))
        .unwrap();
    assert_eq!(integrity, "ok");
    drop(conn);

    let server = Server::start(&args);
    let client = reqwest::blocking::Client::new();
    for (id, text, batch) in acked
        .iter()
        .step_by((acked.len() / 40).max(1))
        .chain(acked.last())
    {
        let got: Value = client
            .get(format!("{}/v1/bank?id={id}", server.url))
            .send()
            .unwrap()
            .json()
            .unwrap();
        assert_eq!(got["text"], text.as_str(), "caption {id} lost");
        // Captions differing only in words the tokenizer does not know embed alike, so the
        // index is asked within the append's own tag: all five of that append must be found.
        let body = json!({"text": text, "k": 5, "tag": format!("b{batch}")});
        let n: Value = client
            .post(format!("{}/v1/neighbors", server.url))
            .json(&body)
            .send()
            .unwrap()
            .json()
            .unwrap();
        let ids: Vec<u64> = n["neighbors"]
            .as_array()
            .unwrap()
            .iter()
            .map(|h| h["id"].as_u64().unwrap())
            .collect();
        assert!(
            ids.contains(id),
            "caption {id} not answered by the index: {n}"
        );
    }
    eprintln!(
        "{} acknowledged captions all present after SIGKILL",
        acked.len()
    );
}

//! `/v1/rewards`, `/v1/images`, `/v1/vectors` and `/v1/models` through the router,
//! with rewards recomputed here from the raw vectors by the published formulas.

use serde_json::{json, Value};

use crate::util::*;

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap()
}

fn vector(v: &Value) -> Vec<f32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap() as f32)
        .collect()
}

fn dot(a: &[f32], b: &[f32]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| f64::from(*x) * f64::from(*y))
        .sum()
}

#[tokio::test(flavor = "multi_thread")]
async fn rewards_follow_the_formulas_for_every_scale_and_baseline() {
    let state = state();
    let row = &probe_rows("probe.jsonl")[3];
    let (status, reg) = post_json(
        &state,
        "/v1/images",
        &json!({"images": [{"path": row.image}]}),
    )
    .await;
    assert_eq!(status, 200, "{reg}");
    let id = reg["images"][0]["id"].as_str().unwrap().to_string();
    assert_eq!(reg["images"][0]["width"], 64);

    let captions: Vec<String> = vec![
        row.captions[0].clone(),
        row.contrasts[0].caption.clone(),
        "a purple ring".into(),
    ];
    let references: Vec<String> = row.captions[1..3].to_vec();
    let greedy = row.captions[4].clone();
    let mut texts = captions.clone();
    texts.extend(references.iter().cloned());
    texts.push(greedy.clone());
    let (status, vecs) = post_json(
        &state,
        "/v1/vectors",
        &json!({"images": [{"id": id}], "texts": texts}),
    )
    .await;
    assert_eq!(status, 200, "{vecs}");
    let image = vector(&vecs["images"][0]["vector"]);
    let t: Vec<Vec<f32>> = vecs["texts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| vector(&t["vector"]))
        .collect();
    let cos: Vec<f64> = t.iter().map(|v| dot(v, &image)).collect();

    let ask = |scale: Value, baseline: &str| {
        json!({"scale": scale, "baseline": baseline, "groups": [{"image": {"id": id}, "captions": captions,
               "references": references, "greedy": greedy}]})
    };
    // Cosine, no baseline: the advantage is the reward is the cosine.
    let (status, r) = post_json(
        &state,
        "/v1/rewards",
        &ask(json!({"kind": "cosine"}), "none"),
    )
    .await;
    assert_eq!(status, 200, "{r}");
    assert_eq!(r["model"]["id"], "blocks@v1");
    assert_eq!(r["model"]["digest"].as_str().unwrap().len(), 64);
    let samples = r["groups"][0]["samples"].as_array().unwrap();
    for (i, s) in samples.iter().enumerate() {
        assert!((f(&s["cosine"]) - cos[i]).abs() < 1e-5);
        assert!((f(&s["advantage"]) - cos[i]).abs() < 1e-5);
    }
    // The true caption should fit better than the made-up one.
    assert!(cos[0] > cos[2], "{cos:?}");

    // CLIP-S (Hessel et al. 2021, eq. 1) with the mean-of-others baseline (Luo 2020).
    let (_, r) = post_json(
        &state,
        "/v1/rewards",
        &ask(json!({"kind": "clip-s", "weight": 2.5}), "mean-of-others"),
    )
    .await;
    let rewards: Vec<f64> = (0..3).map(|i| 2.5 * cos[i].max(0.0)).collect();
    let samples = r["groups"][0]["samples"].as_array().unwrap();
    for i in 0..3 {
        let others: f64 = (0..3).filter(|&j| j != i).map(|j| rewards[j]).sum::<f64>() / 2.0;
        assert!((f(&samples[i]["reward"]) - rewards[i]).abs() < 1e-5);
        assert!((f(&samples[i]["advantage"]) - (rewards[i] - others)).abs() < 1e-5);
    }

    // RefCLIP-S (eq. 2): harmonic mean of CLIP-S and the best reference cosine; greedy baseline (Rennie et al. 2017).
    let (_, r) = post_json(
        &state,
        "/v1/rewards",
        &ask(json!({"kind": "ref-clip-s"}), "greedy"),
    )
    .await;
    let ref_score = |v: &[f32], c: f64| {
        let clip_s = 2.5 * c.max(0.0);
        let best = dot(v, &t[3]).max(dot(v, &t[4])).max(0.0);
        if clip_s + best == 0.0 {
            0.0
        } else {
            2.0 * clip_s * best / (clip_s + best)
        }
    };
    let greedy_reward = ref_score(&t[5], cos[5]);
    assert!((f(&r["groups"][0]["greedy"]["reward"]) - greedy_reward).abs() < 1e-5);
    let samples = r["groups"][0]["samples"].as_array().unwrap();
    for i in 0..3 {
        let reward = ref_score(&t[i], cos[i]);
        assert!((f(&samples[i]["reward"]) - reward).abs() < 1e-5);
        assert!((f(&samples[i]["advantage"]) - (reward - greedy_reward)).abs() < 1e-5);
    }

    // Affine.
    let (_, r) = post_json(
        &state,
        "/v1/rewards",
        &ask(json!({"kind": "affine", "a": 2.0, "b": -0.5}), "none"),
    )
    .await;
    assert!((f(&r["groups"][0]["samples"][1]["reward"]) - (2.0 * cos[1] - 0.5)).abs() < 1e-5);
}

#[tokio::test(flavor = "multi_thread")]
async fn images_register_idempotently_from_raw_base64_and_path() {
    let state = state();
    let row = &probe_rows("probe.jsonl")[0];
    let bytes = read(probe_dir().join(&row.image));
    let (status, _, raw) = call(&state, "POST", "/v1/images", "image/png", bytes.clone()).await;
    assert_eq!(status, 200, "{raw}");
    assert_eq!(raw["images"][0]["new"], true);
    // sha256 of the file's bytes is its id (FIPS 180-4), recomputed here independently of befit's store.
    let expect = {
        use sha2::Digest;
        hex::encode(sha2::Sha256::digest(&bytes))
    };
    assert_eq!(raw["images"][0]["id"], expect);
    let (_, again) = post_json(
        &state,
        "/v1/images",
        &json!({"images": [{"base64": b64(&bytes)}, {"path": row.image}]}),
    )
    .await;
    assert_eq!(again["images"][0]["id"], expect);
    assert_eq!(again["images"][0]["new"], false);
    assert_eq!(again["images"][1]["new"], false);
    // An image named inline in a rewards request gets the same id and the same vector.
    let ask = |image: Value| json!({"groups": [{"image": image, "captions": [row.captions[0]]}]});
    let (_, by_id) = post_json(&state, "/v1/rewards", &ask(json!({"id": expect}))).await;
    let (_, inline) = post_json(&state, "/v1/rewards", &ask(json!({"base64": b64(&bytes)}))).await;
    assert_eq!(by_id["groups"][0]["image"], expect);
    // The same image vector; the caption is encoded anew each time (no caption
    // cache), in batches whose padding depends on concurrent tests, which moves
    // float32 sums in the last bits only.
    let cosine = |v: &Value| v["groups"][0]["samples"][0]["cosine"].as_f64().unwrap();
    assert!(
        (cosine(&inline) - cosine(&by_id)).abs() < 1e-6,
        "{inline} vs {by_id}"
    );
}

#[tokio::test(flavor = "multi_thread")]
async fn models_and_metrics_report_what_happened() {
    let state = state();
    let (status, _, models) = call(&state, "GET", "/v1/models", "", vec![]).await;
    assert_eq!(status, 200);
    assert_eq!(models["default"], "blocks@v1");
    assert_eq!(models["models"][0]["dimension"], 64);
    assert!(models["models"][0]["card"].is_object());
    let row = &probe_rows("probe.jsonl")[1];
    let body = json!({"groups": [{"image": {"path": row.image}, "captions": [row.captions[0], row.captions[0]]}]});
    let (status, _) = post_json(&state, "/v1/rewards", &body).await;
    assert_eq!(status, 200);
    let (status, headers, _) = call(&state, "GET", "/metrics", "", vec![]).await;
    assert_eq!(status, 200);
    assert!(headers["content-type"]
        .to_str()
        .unwrap()
        .starts_with("text/plain; version=0.0.4"));
    let metrics = state.metrics().render();
    assert!(
        metrics.contains(
            "befit_http_requests_total{route=\"/v1/rewards\",method=\"POST\",status=\"200\"} 1"
        ),
        "{metrics}"
    );
    // Encoder and caption-cache series live in the registry the model was loaded with
    // (the binary's one /metrics); the end-to-end test reads them there.
    assert!(
        metrics.contains("befit_cache_hits_total{cache=\"image_memory\"} 1"),
        "{metrics}"
    );
}

#[tokio::test(flavor = "multi_thread")]
async fn truncation_is_reported_per_caption() {
    let state = state();
    let max_tokens = model("blocks-v1").bundle.manifest.text.max_tokens;
    let long = vec!["red"; max_tokens + 10].join(" ");
    let row = &probe_rows("probe.jsonl")[2];
    let body =
        json!({"groups": [{"image": {"path": row.image}, "captions": [long, row.captions[0]]}]});
    let (status, r) = post_json(&state, "/v1/rewards", &body).await;
    assert_eq!(status, 200, "{r}");
    assert_eq!(r["groups"][0]["samples"][0]["truncated"], true);
    assert_eq!(r["groups"][0]["samples"][1]["truncated"], false);
}

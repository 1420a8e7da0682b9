//! `/v1/calibration` and `/v1/drift` through the router, and a saved reward
//! map used as `remap` by `/v1/rewards`.

use serde_json::{json, Value};

use crate::util::*;

#[tokio::test(flavor = "multi_thread")]
async fn a_bundle_against_itself_has_not_drifted() {
    // With the caption cache on, both sides get the very same vectors; without it, other tests'
    // captions sharing encoder batches could move a cosine by float rounding and break ties.
    let state = state_with(&["blocks-v1+cache"], befit::server::Limits::default());
    let body = json!({"from": "blocks@v1", "to": "blocks@v1", "probe": probe_json(120)});
    let (status, r) = post_json(&state, "/v1/drift", &body).await;
    assert_eq!(status, 200, "{r}");
    let report = &r["report"];
    // Identical inputs: Spearman rho = Kendall tau = 1, KS D = 0, linear CKA = 1, Procrustes residual 0.
    assert!(
        (report["agreement"]["all_pairs"]["spearman_rho"]
            .as_f64()
            .unwrap()
            - 1.0)
            .abs()
            < 1e-9
    );
    assert!(
        (report["agreement"]["all_pairs"]["kendall_tau_b"]
            .as_f64()
            .unwrap()
            - 1.0)
            .abs()
            < 1e-9
    );
    assert_eq!(report["true_cosine_ks"]["statistic"].as_f64().unwrap(), 0.0);
    assert!((report["cka"]["images"].as_f64().unwrap() - 1.0).abs() < 1e-9);
    assert!((report["cka"]["texts"].as_f64().unwrap() - 1.0).abs() < 1e-9);
    assert!(
        (report["neighbour_overlap"]["mean_jaccard"]
            .as_f64()
            .unwrap()
            - 1.0)
            .abs()
            < 1e-12
    );
}

#[tokio::test(flavor = "multi_thread")]
async fn calibration_of_the_probe_set_is_plausible_and_bad_rows_are_named() {
    let state = state();
    let (status, r) = post_json(
        &state,
        "/v1/calibration",
        &json!({"probe": probe_json(200)}),
    )
    .await;
    assert_eq!(status, 200, "{r}");
    let report = &r["report"];
    assert_eq!(r["model"]["id"], "blocks@v1");
    assert_eq!(report["counts"]["images"], 200);
    let r1 = report["retrieval"]["image_to_text"]["r_at_1"]
        .as_f64()
        .unwrap();
    let r10 = report["retrieval"]["image_to_text"]["r_at_10"]
        .as_f64()
        .unwrap();
    assert!(r1 > 0.2 && r10 >= r1, "R@1 {r1}, R@10 {r10}");
    assert!(
        report["contrast"]["overall"]["rate"].as_f64().unwrap() > 0.8,
        "{}",
        report["contrast"]
    );

    let mut rows = probe_json(5);
    rows[2] = json!({"image": "images/00002.png", "captions": []});
    let (status, e) = post_json(&state, "/v1/calibration", &json!({"probe": rows.clone()})).await;
    assert_eq!(status, 400, "{e}");
    assert!(
        e["error"]["message"].as_str().unwrap().contains("line 3"),
        "{e}"
    );
    let (status, ok) = post_json(
        &state,
        "/v1/calibration",
        &json!({"probe": rows, "skip_bad": true}),
    )
    .await;
    assert_eq!(status, 200, "{ok}");
    assert_eq!(ok["report"]["counts"]["images"], 4);
    assert_eq!(ok["skipped"].as_array().unwrap().len(), 1);
}

#[tokio::test(flavor = "multi_thread")]
async fn a_saved_drift_map_rescales_rewards() {
    let state = state_with(
        &["blocks-v1", "blocks-v2"],
        befit::server::Limits::default(),
    );
    let body = json!({"from": "blocks@v1", "to": "blocks@v2", "probe": probe_json(150),
                      "save_map": {"name": "v2-on-v1", "kind": "affine"}});
    let (status, r) = post_json(&state, "/v1/drift", &body).await;
    assert_eq!(status, 200, "{r}");
    assert_eq!(r["saved_map"], "v2-on-v1");
    let map = &r["report"]["continuity"]["affine"]["map"];
    let (a, b) = (map["a"].as_f64().unwrap(), map["b"].as_f64().unwrap());
    let row = &probe_rows("probe.jsonl")[7];
    let ask = |remap: Value| json!({"model": "blocks@v2", "remap": remap, "groups": [{"image": {"path": row.image}, "captions": [row.captions[0], row.contrasts[0].caption]}]});
    let (status, plain) = post_json(&state, "/v1/rewards", &ask(Value::Null)).await;
    assert_eq!(status, 200, "{plain}");
    let (status, mapped) = post_json(&state, "/v1/rewards", &ask(json!("v2-on-v1"))).await;
    assert_eq!(status, 200, "{mapped}");
    for i in 0..2 {
        let cosine = plain["groups"][0]["samples"][i]["cosine"].as_f64().unwrap();
        assert_eq!(
            mapped["groups"][0]["samples"][i]["cosine"]
                .as_f64()
                .unwrap(),
            cosine
        );
        let reward = mapped["groups"][0]["samples"][i]["reward"]
            .as_f64()
            .unwrap();
        assert!(
            (reward - (a * cosine + b)).abs() < 1e-5,
            "{reward} vs {a} * {cosine} + {b}"
        );
    }
    let (status, e) = post_json(&state, "/v1/rewards", &ask(json!("nope"))).await;
    assert_eq!(status, 404);
    assert!(
        e["error"]["message"].as_str().unwrap().contains("v2-on-v1"),
        "{e}"
    );
}

#[tokio::test(flavor = "multi_thread")]
async fn html_format_answers_the_report_page_with_its_provenance() {
    let state = state();
    let rows = probe_json(30);
    let body = json!({"probe": rows.clone(), "format": "html"});
    let (status, headers, _) = call(
        &state,
        "POST",
        "/v1/calibration",
        "application/json",
        serde_json::to_vec(&body).unwrap(),
    )
    .await;
    assert_eq!(status, 200);
    assert_eq!(headers["content-type"], "text/html; charset=utf-8");
    let page = html(&state, "/v1/calibration", &body).await;
    assert!(page.starts_with("<!DOCTYPE html>"), "{page}");
    assert!(page.contains("Calibration of blocks@v1"));
    // Provenance: the sha256 of the rows as JSON Lines (compact JSON, keys
    // sorted as serde_json writes a parsed object, newline after each),
    // computed here with sha2 independently of the route, and the row count.
    let mut lines = String::new();
    for row in &rows {
        lines.push_str(&serde_json::to_string(row).unwrap());
        lines.push('\n');
    }
    let digest = befit::stats::sha256_hex(lines.as_bytes());
    assert!(page.contains(&digest), "probe sha256 {digest} missing");
    assert!(page.contains("30 rows"));
    assert!(page.contains(env!("CARGO_PKG_VERSION")));
    // Every example row shows its image (files under the image root): as many
    // thumbnails as the JSON answer lists example pairs.
    let (status, json_answer) =
        post_json(&state, "/v1/calibration", &json!({"probe": rows.clone()})).await;
    assert_eq!(status, 200, "{json_answer}");
    let examples = &json_answer["report"]["examples"];
    let listed = examples["lowest_true"].as_array().unwrap().len()
        + examples["lost_contrasts"].as_array().unwrap().len();
    assert!(listed > 0);
    assert_eq!(
        page.matches("<img class=\"thumb\" src=\"data:image/jpeg;base64,")
            .count(),
        listed
    );

    let body = json!({"from": "blocks@v1", "to": "blocks@v1", "probe": rows, "format": "html"});
    let page = html(&state, "/v1/drift", &body).await;
    assert!(
        page.contains("class=\"headline\">Rewards move by"),
        "{page}"
    );
    assert_eq!(page.matches("<details>").count(), 2);

    // An unknown format is a field error, in JSON.
    let (status, e) = post_json(
        &state,
        "/v1/calibration",
        &json!({"probe": probe_json(3), "format": "pdf"}),
    )
    .await;
    assert_eq!(status, 400, "{e}");
    assert!(e["error"]["message"].to_string().contains("format"), "{e}");
}

async fn html(state: &befit::service::Service, uri: &str, body: &Value) -> String {
    let (status, text) = post_text(state, uri, body).await;
    assert_eq!(status, 200, "{text}");
    text
}

//! The bank's limits and faults through the router: `k` and `ef_search`
//! bounds come from the index's parameters (`befit::bank::index`), and every
//! caller fault the bank or its index finds is a 400 naming its field.

use befit::bank::index::{MAX_EF_SEARCH, MAX_K};
use serde_json::{json, Value};

use crate::util::*;

/// Vector length of the blocks-v1 bundle.
const DIM: usize = 64;

/// A unit query vector along the first axis.
fn axis() -> Vec<f32> {
    let mut v = vec![0.0; DIM];
    v[0] = 1.0;
    v
}

/// Status, error code and field of an answer.
fn fault(status: axum::http::StatusCode, body: &Value) -> (u16, Option<&str>, Option<&str>) {
    (
        status.as_u16(),
        body["error"]["code"].as_str(),
        body["error"]["field"].as_str(),
    )
}

#[tokio::test]
async fn k_and_ef_search_outside_the_index_bounds_are_400_with_their_field() {
    let state = state();
    let cases = [
        (json!({"vector": axis(), "k": 0}), "k"),
        (json!({"vector": axis(), "k": MAX_K + 1}), "k"),
        (json!({"text": "a red cube", "k": MAX_K + 1}), "k"),
        (json!({"vector": axis(), "k": 0, "among": "images"}), "k"),
        (
            json!({"vector": axis(), "k": 5, "ef_search": 0}),
            "ef_search",
        ),
        (
            json!({"vector": axis(), "k": 5, "ef_search": MAX_EF_SEARCH + 1}),
            "ef_search",
        ),
    ];
    for (body, field) in cases {
        let (status, e) = post_json(&state, "/v1/neighbors", &body).await;
        assert_eq!(
            fault(status, &e),
            (400, Some("invalid_field"), Some(field)),
            "{body} -> {e}"
        );
    }
    // The message states the bound the domain holds, not a copy of it.
    let (_, e) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"vector": axis(), "k": MAX_K + 1}),
    )
    .await;
    let message = e["error"]["message"].as_str().unwrap_or_default();
    assert!(message.contains(&MAX_K.to_string()), "{message}");
}

#[tokio::test]
async fn the_bounds_themselves_are_accepted() {
    let state = state();
    let (status, answer) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"vector": axis(), "k": MAX_K, "ef_search": MAX_EF_SEARCH}),
    )
    .await;
    assert_eq!(status, 200, "{answer}");
    // A fresh data folder: the bank is empty, so no hits at any k.
    assert_eq!(answer["neighbors"], json!([]), "{answer}");
    let (status, answer) = post_json(
        &state,
        "/v1/neighbors",
        &json!({"vector": axis(), "k": 1, "ef_search": 1}),
    )
    .await;
    assert_eq!(status, 200, "{answer}");
}

#[tokio::test]
async fn unusable_query_vectors_are_400_on_vector() {
    let state = state();
    let cases = [
        json!({"vector": [1.0, 0.0], "k": 3}),
        json!({"vector": vec![0.0; DIM], "k": 3}),
        json!({"vector": vec![0.0; DIM + 1], "k": 3, "among": "images"}),
    ];
    for body in cases {
        let (status, e) = post_json(&state, "/v1/neighbors", &body).await;
        assert_eq!(
            fault(status, &e),
            (400, Some("invalid_field"), Some("vector")),
            "{body} -> {e}"
        );
    }
}

#[tokio::test]
async fn the_bank_refuses_bad_captions_and_tags_by_field() {
    let state = state();
    let cases = [
        // A NUL passes the request limits; the bank's own check refuses it.
        (json!({"captions": ["a red\u{0}cube"]}), "captions[0]"),
        (
            json!({"captions": ["a red cube", {"text": "two blue rings", "tag": ""}]}),
            "captions[1].tag",
        ),
        (
            json!({"captions": [{"text": "a green cone", "tag": "x".repeat(129)}]}),
            "captions[0].tag",
        ),
        (
            json!({"tag": "bad\ttag", "captions": ["a red cube"]}),
            "tag",
        ),
    ];
    for (body, field) in cases {
        let (status, e) = post_json(&state, "/v1/bank", &body).await;
        assert_eq!(
            fault(status, &e),
            (400, Some("invalid_field"), Some(field)),
            "{body} -> {e}"
        );
    }
    // Nothing of the refused appends was stored.
    let (status, _, stats) = call(&state, "GET", "/v1/bank", "application/json", Vec::new()).await;
    assert_eq!(
        (status.as_u16(), &stats["captions"]),
        (200, &json!(0)),
        "{stats}"
    );
}

//! Every error row of `proto-free-api.md`: status, code, a message that helps,
//! and the server still answering afterwards.

use serde_json::{json, Value};

use befit::server::Limits;

use crate::util::*;

// Each call reads as one row of the API's error table, so its columns stay arguments.
#[allow(clippy::too_many_arguments)]
async fn expect(
    state: &befit::service::Service,
    method: &str,
    uri: &str,
    ctype: &str,
    body: Vec<u8>,
    status: u16,
    code: &str,
    needle: &str,
) -> Value {
    let (got, headers, json) = call(state, method, uri, ctype, body).await;
    assert_eq!(got.as_u16(), status, "{uri}: {json}");
    assert_eq!(json["error"]["code"], code, "{uri}: {json}");
    let message = json["error"]["message"].as_str().unwrap();
    assert!(
        message.contains(needle),
        "{uri}: message {message:?} should mention {needle:?}"
    );
    if status == 503 {
        assert_eq!(headers["retry-after"], "1");
    }
    json
}

fn j(v: Value) -> Vec<u8> {
    serde_json::to_vec(&v).unwrap()
}

#[tokio::test(flavor = "multi_thread")]
async fn every_error_row_has_its_status_and_a_useful_message() {
    let limits = Limits {
        max_body_bytes: 64 * 1024,
        max_groups: 4,
        max_captions: 8,
        max_caption_bytes: 100,
        ..Limits::default()
    };
    let state = state_with(&["blocks-v1"], limits);
    let row = &probe_rows("probe.jsonl")[0];
    let good_image = json!({"path": row.image});
    let s = &state;
    let ct = "application/json";

    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        b"{not json".to_vec(),
        400,
        "bad_json",
        "not valid JSON",
    )
    .await;
    let e = expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": good_image, "captions": "a red ring"}]})),
        400,
        "bad_json",
        "groups[0].captions",
    )
    .await;
    assert_eq!(e["error"]["field"], "groups[0].captions");
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [], "colour": 1})),
        400,
        "bad_json",
        "colour",
    )
    .await;
    let e = expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": good_image, "captions": []}]})),
        400,
        "invalid_field",
        "at least one caption",
    )
    .await;
    assert_eq!(e["error"]["field"], "groups[0].captions");
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": good_image, "captions": ["  "]}]})),
        400,
        "invalid_field",
        "empty",
    )
    .await;
    expect(s, "POST", "/v1/rewards", ct, j(json!({"baseline": "mean-of-others", "groups": [{"image": good_image, "captions": ["a"]}]})), 400, "invalid_field", "at least 2").await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"baseline": "greedy", "groups": [{"image": good_image, "captions": ["a"]}]})),
        400,
        "invalid_field",
        "greedy",
    )
    .await;
    expect(s, "POST", "/v1/rewards", ct, j(json!({"scale": {"kind": "ref-clip-s"}, "groups": [{"image": good_image, "captions": ["a"]}]})), 400, "invalid_field", "reference").await;
    expect(s, "POST", "/v1/rewards", ct, j(json!({"scale": {"kind": "clip-s", "weight": -1}, "groups": [{"image": good_image, "captions": ["a"]}]})), 400, "invalid_field", "positive").await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": {"id": "abc"}, "captions": ["a"]}]})),
        400,
        "invalid_field",
        "not an image id",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": {"id": "ab", "path": "x"}, "captions": ["a"]}]})),
        400,
        "invalid_field",
        "exactly one",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": {"base64": "@@@"}, "captions": ["a"]}]})),
        400,
        "invalid_field",
        "base64",
    )
    .await;
    // Limits, each naming its flag.
    let five: Vec<Value> = (0..5)
        .map(|_| json!({"image": good_image, "captions": ["a"]}))
        .collect();
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": five})),
        400,
        "over_limit",
        "--max-groups",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": good_image, "captions": vec!["a"; 9]}]})),
        400,
        "over_limit",
        "--max-captions",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": good_image, "captions": ["x".repeat(101)]}]})),
        400,
        "over_limit",
        "--max-caption-bytes",
    )
    .await;
    // Paths.
    let e = expect(s, "POST", "/v1/rewards", ct, j(json!({"groups": [{"image": {"path": "../models/blocks-v1/bundle.toml"}, "captions": ["a"]}]})), 403, "path_refused", "leaves the image root").await;
    assert_eq!(e["error"]["field"], "groups[0].image");
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": {"path": "images/none.png"}, "captions": ["a"]}]})),
        422,
        "bad_image",
        "no image file",
    )
    .await;
    // Unknowns.
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": {"id": "0".repeat(64)}, "captions": ["a"]}]})),
        404,
        "unknown_image",
        "register it first",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"model": "nope", "groups": [{"image": good_image, "captions": ["a"]}]})),
        404,
        "unknown_model",
        "blocks@v1",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"remap": "old", "groups": [{"image": good_image, "captions": ["a"]}]})),
        404,
        "unknown_map",
        "old",
    )
    .await;
    expect(
        s,
        "GET",
        "/v1/nothing",
        "",
        vec![],
        404,
        "not_found",
        "no such route",
    )
    .await;
    expect(
        s,
        "GET",
        "/v1/rewards",
        "",
        vec![],
        405,
        "method_not_allowed",
        "method",
    )
    .await;
    // Size and type.
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        vec![b' '; 70 * 1024],
        413,
        "body_too_large",
        "--max-body-bytes",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/images",
        "image/png",
        vec![0u8; 70 * 1024],
        413,
        "body_too_large",
        "--max-body-bytes",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        "text/plain",
        j(json!({})),
        415,
        "unsupported_media_type",
        "application/json",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/images",
        "text/plain",
        b"x".to_vec(),
        415,
        "unsupported_media_type",
        "image/png",
    )
    .await;
    // Images that are not images, or too large.
    expect(
        s,
        "POST",
        "/v1/images",
        "image/png",
        b"definitely not a png".to_vec(),
        422,
        "bad_image",
        "not a PNG, JPEG or WebP",
    )
    .await;
    let huge = png_declaring(50_000, 50_000, 8);
    expect(
        s,
        "POST",
        "/v1/images",
        "image/png",
        huge.clone(),
        422,
        "image_too_large",
        "--max-pixels",
    )
    .await;
    expect(
        s,
        "POST",
        "/v1/rewards",
        ct,
        j(json!({"groups": [{"image": {"base64": b64(&huge)}, "captions": ["a"]}]})),
        422,
        "image_too_large",
        "2500000000",
    )
    .await;

    // Still answering, and correctly.
    let (status, ok) = post_json(
        s,
        "/v1/rewards",
        &json!({"groups": [{"image": good_image, "captions": [row.captions[0]]}]}),
    )
    .await;
    assert_eq!(status, 200, "{ok}");
    // The same cosine as the two vectors /v1/vectors gives, summed here in f64:
    // sum(a b) / (|a| |b|).
    let (status, v) = post_json(
        s,
        "/v1/vectors",
        &json!({"images": [good_image], "texts": [row.captions[0]]}),
    )
    .await;
    assert_eq!(status, 200, "{v}");
    let numbers = |x: &Value| -> Vec<f64> {
        x.as_array()
            .unwrap()
            .iter()
            .map(|n| n.as_f64().unwrap())
            .collect()
    };
    let (a, b) = (
        numbers(&v["images"][0]["vector"]),
        numbers(&v["texts"][0]["vector"]),
    );
    assert_eq!((a.len(), b.len()), (64, 64), "blocks-v1 has 64 dimensions");
    let dot = |x: &[f64], y: &[f64]| -> f64 { x.iter().zip(y).map(|(p, q)| p * q).sum() };
    let by_hand = dot(&a, &b) / (dot(&a, &a).sqrt() * dot(&b, &b).sqrt());
    let cosine = ok["groups"][0]["samples"][0]["cosine"].as_f64().unwrap();
    // befit sums in f32: for unit vectors of n = 64 components the rounding error of a dot product
    // is at most n u = 64 * 2^-24 = 3.8e-6 (Higham, Accuracy and Stability of Numerical Algorithms,
    // 2nd ed., eq. 3.5), and JSON carries each f32 to within half an f32 ulp; 1e-5 covers both.
    // Different captions of one image differ by 1e-2 and more, so a wrong pairing fails.
    assert!((cosine - by_hand).abs() < 1e-5, "{cosine} vs {by_hand}");
}

#[tokio::test(flavor = "multi_thread")]
async fn paths_are_refused_without_an_image_root() {
    let mut no_root = config(Limits::default());
    no_root.image_root = None;
    let state = ready(&no_root, &["blocks-v1"]);
    let body = j(json!({"groups": [{"image": {"path": "images/00000.png"}, "captions": ["a"]}]}));
    expect(
        &state,
        "POST",
        "/v1/rewards",
        "application/json",
        body,
        403,
        "path_refused",
        "--image-root",
    )
    .await;
}

#[tokio::test(flavor = "multi_thread")]
async fn not_ready_until_the_engine_is_set() {
    let state = unready(&config(Limits::default()));
    expect(
        &state,
        "GET",
        "/readyz",
        "",
        vec![],
        503,
        "not_ready",
        "loading",
    )
    .await;
    let (status, _, _) = call(&state, "GET", "/healthz", "", vec![]).await;
    assert_eq!(status, 200);
}

/// Query strings and path segments the framework cannot read get the API's
/// error body, not its plain-text rejection (found by the schema fuzzing of
/// `tests/api/schema_fuzz.py`: `GET /v1/bank?id=-1` answered text/plain).
#[tokio::test(flavor = "multi_thread")]
async fn unreadable_queries_and_paths_get_the_error_body() {
    let state = state_with(&["blocks-v1"], Limits::default());
    let s = &state;
    let json = expect(
        s,
        "GET",
        "/v1/bank?id=-1",
        "",
        vec![],
        400,
        "invalid_field",
        "id",
    )
    .await;
    assert_eq!(json["error"]["field"], "id");
    expect(
        s,
        "GET",
        "/v1/bank?id=x",
        "",
        vec![],
        400,
        "invalid_field",
        "whole number",
    )
    .await;
    let json = expect(
        s,
        "GET",
        "/v1/runs/%FF",
        "",
        vec![],
        400,
        "invalid_field",
        "run name",
    )
    .await;
    assert_eq!(json["error"]["field"], "name");
}

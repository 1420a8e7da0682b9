//! Batch routing: 32 concurrent clients with mixed batches get the results
//! that sequential single-caption requests get.

use std::sync::Arc;

use serde_json::{json, Value};

use crate::util::*;

fn cosines(r: &Value) -> Vec<f64> {
    r["groups"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|g| {
            g["samples"]
                .as_array()
                .unwrap()
                .iter()
                .map(|s| s["cosine"].as_f64().unwrap())
        })
        .collect()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn concurrent_mixed_batches_match_sequential_singles() {
    let state = state();
    let rows = probe_rows("probe.jsonl");
    // 32 clients, each a different mix: 1 to 4 groups of 1 to 9 captions, true and contrast ones.
    let requests: Vec<Value> = (0..32usize)
        .map(|c| {
            let groups: Vec<Value> = (0..1 + c % 4)
                .map(|g| {
                    let row = &rows[(c * 7 + g * 3) % 40];
                    let mut captions: Vec<String> =
                        row.captions.iter().take(1 + (c + g) % 5).cloned().collect();
                    captions.extend(
                        row.contrasts
                            .iter()
                            .take((c * 3 + g) % 5)
                            .map(|x| x.caption.clone()),
                    );
                    json!({"image": {"path": row.image}, "captions": captions})
                })
                .collect();
            json!({"groups": groups})
        })
        .collect();

    // Sequential: one caption of one group per request.
    let mut expected: Vec<Vec<f64>> = Vec::new();
    for request in &requests {
        let mut one = Vec::new();
        for group in request["groups"].as_array().unwrap() {
            for caption in group["captions"].as_array().unwrap() {
                let (status, r) = post_json(
                    &state,
                    "/v1/rewards",
                    &json!({"groups": [{"image": group["image"], "captions": [caption]}]}),
                )
                .await;
                assert_eq!(status, 200, "{r}");
                one.push(cosines(&r)[0]);
            }
        }
        expected.push(one);
    }

    // Concurrent: all 32 at once, twice over, so their captions share encoder batches.
    let state = Arc::new(state);
    let tasks: Vec<_> = requests
        .iter()
        .chain(requests.iter())
        .cloned()
        .map(|request| {
            let state = Arc::clone(&state);
            tokio::spawn(async move { post_json(&state, "/v1/rewards", &request).await })
        })
        .collect();
    let mut worst = 0f64;
    for (i, task) in tasks.into_iter().enumerate() {
        let (status, r) = task.await.unwrap();
        assert_eq!(status, 200, "{r}");
        let got = cosines(&r);
        let want = &expected[i % 32];
        assert_eq!(got.len(), want.len());
        for (g, w) in got.iter().zip(want) {
            worst = worst.max((g - w).abs());
        }
    }
    // Batched and single runs of the same graph differ only by float summation order (padding is
    // masked), far below the gap between different captions of one image (~1e-2 and more).
    assert!(worst < 1e-5, "largest difference {worst}");
    // Every request was counted once under its matched route: one per caption sequentially,
    // then 2 x 32 concurrent ones.
    let sequential: usize = expected.iter().map(Vec::len).sum();
    let runs = state.metrics().render();
    let counted = runs
        .lines()
        .find(|l| {
            l.starts_with("befit_http_requests_total{")
                && l.contains(r#"route="/v1/rewards""#)
                && l.contains(r#"status="200""#)
        })
        .and_then(|l| l.rsplit(' ').next())
        .and_then(|n| n.parse::<usize>().ok());
    assert_eq!(counted, Some(sequential + 64), "{runs}");
}

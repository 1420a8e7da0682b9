//! Batch routing: 32 concurrent clients with mixed batches get the results
//! that sequential single-caption requests get, and every request is counted
//! once under its matched route.

use std::collections::BTreeMap;
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

/// `befit_http_requests_total` by (route, method, status), read back from the text exposition
/// format the way a Prometheus scraper reads it: `name{k="v",...} value`.
fn http_requests(state: &befit::service::Service) -> BTreeMap<(String, String, String), u64> {
    let text = state.metrics().render();
    let mut out = BTreeMap::new();
    for line in text.lines() {
        let Some(rest) = line.strip_prefix("befit_http_requests_total{") else {
            continue;
        };
        let (labels, value) = rest.rsplit_once("} ").unwrap();
        let labels: BTreeMap<&str, &str> = labels
            .split("\",")
            .map(|pair| {
                let (k, v) = pair.split_once("=\"").unwrap();
                (k, v.trim_end_matches('"'))
            })
            .collect();
        assert_eq!(labels.len(), 3, "{line}");
        let key = |k: &str| {
            labels
                .get(k)
                .unwrap_or_else(|| panic!("{line}"))
                .to_string()
        };
        out.insert(
            (key("route"), key("method"), key("status")),
            value.parse().unwrap(),
        );
    }
    out
}

/// What the counters gained between two readings, zero entries left out.
fn delta(
    before: &BTreeMap<(String, String, String), u64>,
    after: &BTreeMap<(String, String, String), u64>,
) -> BTreeMap<(String, String, String), u64> {
    after
        .iter()
        .map(|(k, v)| (k.clone(), v - before.get(k).copied().unwrap_or(0)))
        .filter(|(_, d)| *d > 0)
        .collect()
}

fn series(route: &str, method: &str, status: u16, n: u64) -> ((String, String, String), u64) {
    (
        (route.to_string(), method.to_string(), status.to_string()),
        n,
    )
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

    // Sequential: one caption of one group per request, each with its own query string, so a
    // counter labelled by the raw URI would grow a series per request.
    let start = http_requests(&state);
    let mut expected: Vec<Vec<f64>> = Vec::new();
    for request in &requests {
        let mut one = Vec::new();
        for group in request["groups"].as_array().unwrap() {
            for caption in group["captions"].as_array().unwrap() {
                let sent: usize = expected.iter().map(Vec::len).sum::<usize>() + one.len();
                let (status, r) = post_json(
                    &state,
                    &format!("/v1/rewards?request={sent}"),
                    &json!({"groups": [{"image": group["image"], "captions": [caption]}]}),
                )
                .await;
                assert_eq!(status, 200, "{r}");
                one.push(cosines(&r)[0]);
            }
        }
        expected.push(one);
    }
    let sequential: u64 = expected.iter().map(|e| e.len() as u64).sum();
    let after_sequential = http_requests(&state);
    assert_eq!(
        delta(&start, &after_sequential),
        BTreeMap::from([series("/v1/rewards", "POST", 200, sequential)]),
        "one series for the matched route, however many URIs"
    );

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
    // The 2 x 32 concurrent requests, counted once each under the same series.
    let after_concurrent = http_requests(&state);
    assert_eq!(
        delta(&after_sequential, &after_concurrent),
        BTreeMap::from([series("/v1/rewards", "POST", 200, 64)])
    );
    // Paths no route matches are counted as "unmatched", never under their own URI; a wrong
    // method on a known route is counted under that route.
    for uri in ["/v1/rewards/extra", "/v2/rewards?x=1", "/v1/nowhere"] {
        let (status, _) = post_json(&state, uri, &json!({})).await;
        assert_eq!(status, 404, "{uri}");
    }
    let (status, _, _) = call(&state, "GET", "/v1/rewards?x=1", "", vec![]).await;
    assert_eq!(status, 405);
    assert_eq!(
        delta(&after_concurrent, &http_requests(&state)),
        BTreeMap::from([
            series("/v1/rewards", "GET", 405, 1),
            series("unmatched", "POST", 404, 3),
        ])
    );
}

//! The run watch: aggregates per run and step through the router, recomputed
//! here from the captions sent and the rewards answered; warnings; the
//! routes' errors; and every acknowledged step kept through SIGKILL of the
//! real binary. `tests/client/test_guards.py` recomputes distinct-n and
//! repetition with an independent Python computation.

use std::collections::{BTreeMap, HashSet};

use serde_json::{json, Value};

use crate::util::*;

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap()
}

fn words(text: &str) -> Vec<String> {
    text.split(|c: char| !c.is_alphanumeric())
        .filter(|w| !w.is_empty())
        .map(str::to_lowercase)
        .collect()
}

async fn get(state: &befit::service::Service, uri: &str) -> (u16, Value) {
    let (status, _, body) = call(state, "GET", uri, "application/json", Vec::new()).await;
    (status.as_u16(), body)
}

/// The signals of a list of warnings, in order.
fn signals(warnings: &Value) -> Vec<&str> {
    warnings
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w["signal"].as_str().unwrap())
        .collect()
}

fn rewards_body(run: Value, captions: &[&str]) -> Value {
    let row = &probe_rows("probe.jsonl")[2];
    let mut body = json!({"scale": {"kind": "clip-s"},
        "groups": [{"image": {"path": row.image}, "captions": captions}]});
    for (k, v) in run.as_object().unwrap() {
        body[k] = v.clone();
    }
    body
}

#[tokio::test(flavor = "multi_thread")]
async fn steps_aggregate_what_was_sent_and_warn_past_thresholds() {
    let state = state();
    let step0 = [
        "a large yellow cross left of a little blue hoop",
        "the small blue ring is to the right of the big yellow cross",
    ];
    let step1 = [
        "cross cross cross cross",
        "cross cross cross cross",
        "a cross",
    ];
    let mut rewards: BTreeMap<u64, Vec<f64>> = BTreeMap::new();
    let mut sent: BTreeMap<u64, Vec<&str>> = BTreeMap::new();
    // Step 0 in two requests, step 1 in one; thresholds sent once stay with the run.
    for (step, captions, thresholds) in [
        (0u64, &step0[..1], Some(json!({"min_samples": 2}))),
        (0, &step0[1..], None),
        (1, &step1[..], None),
    ] {
        let mut run = json!({"run": "exp-1", "step": step});
        if let Some(t) = thresholds {
            run["run_thresholds"] = t;
        }
        let (status, body) = post_json(&state, "/v1/rewards", &rewards_body(run, captions)).await;
        assert_eq!(status, 200, "{body}");
        assert_eq!(body["run"]["name"], "exp-1");
        for s in body["groups"][0]["samples"].as_array().unwrap() {
            rewards.entry(step).or_default().push(f(&s["reward"]));
        }
        sent.entry(step).or_default().extend(captions);
        let warned = signals(&body["warnings"]);
        if step == 1 {
            // Mean repeated-word share (3/4 + 3/4 + 0) / 3 = 0.5 > 0.3; bigrams
            // (2/3 + 2/3 + 0) / 3 = 0.444 > 0.2; distinct-2 2/7 = 0.286 >= 0.1.
            assert_eq!(warned, ["repeated_words", "repeated_bigrams"], "{body}");
        } else {
            assert!(warned.is_empty(), "{body}");
        }
    }
    let (status, list) = get(&state, "/v1/runs").await;
    assert_eq!(status, 200, "{list}");
    assert_eq!(list["runs"][0]["name"], "exp-1");
    assert_eq!(list["runs"][0]["latest_step"], 1);
    assert_eq!(list["runs"][0]["samples"], 5);
    assert_eq!(list["runs"][0]["thresholds"]["min_samples"], 2);

    let (status, run) = get(&state, "/v1/runs/exp-1").await;
    assert_eq!(status, 200, "{run}");
    let series = run["series"].as_array().unwrap();
    assert_eq!(series.len(), 2);
    for s in series {
        let step = s["step"].as_u64().unwrap();
        let (r, texts) = (&rewards[&step], &sent[&step]);
        let n = r.len() as f64;
        let mean = r.iter().sum::<f64>() / n;
        let std = (r.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n).sqrt();
        assert!((f(&s["reward"]["mean"]) - mean).abs() < 1e-6, "{s}");
        assert!((f(&s["reward"]["std"]) - std).abs() < 1e-5, "{s}");
        // distinct-n (Li et al. 2016): distinct n-grams over all n-grams of the step.
        let w: Vec<Vec<String>> = texts.iter().map(|t| words(t)).collect();
        let unigrams: Vec<&String> = w.iter().flatten().collect();
        let bigrams: Vec<(&String, &String)> = w
            .iter()
            .flat_map(|x| x.windows(2).map(|p| (&p[0], &p[1])))
            .collect();
        let d1 = unigrams.iter().collect::<HashSet<_>>().len();
        let d2 = bigrams.iter().collect::<HashSet<_>>().len();
        assert!((f(&s["distinct_1"]) - d1 as f64 / unigrams.len() as f64).abs() < 1e-12);
        assert!((f(&s["distinct_2"]) - d2 as f64 / bigrams.len() as f64).abs() < 1e-12);
        assert_eq!(s["vocabulary"], d1);
        assert!((f(&s["mean_words"]) - unigrams.len() as f64 / n).abs() < 1e-12);
        assert_eq!(s["guarded"], 0);
    }
    let (_, only) = get(&state, "/v1/runs/exp-1?from=1&to=1").await;
    assert_eq!(only["series"].as_array().unwrap().len(), 1);
    assert_eq!(only["series"][0]["step"], 1);

    // The live page's pulse carries the same run: its steps as /v1/runs/NAME
    // gives them, and the warnings the latest step's answer carried.
    let (status, pulse) = get(&state, "/v1/pulse").await;
    assert_eq!(status, 200, "{pulse}");
    let shown = &pulse["runs"][0];
    assert_eq!(shown["name"], "exp-1");
    assert_eq!(shown["samples"], 5);
    assert_eq!(shown["series"], run["series"]);
    let warned = signals(&shown["warnings"]);
    assert_eq!(warned, ["repeated_words", "repeated_bigrams"], "{shown}");
}

#[tokio::test(flavor = "multi_thread")]
async fn guard_flags_and_bank_copies_are_counted() {
    let state = state();
    let (status, _) = post_json(
        &state,
        "/v1/bank",
        &json!({"captions": ["a little blue hoop"]}),
    )
    .await;
    assert_eq!(status, 200);
    let body = rewards_body(
        json!({"run": "guarded", "step": 4,
               "guard": {"penalties": {"length": {"below": 5, "weight": 1}}}}),
        &[
            "a little blue hoop",
            "a large yellow cross left of a little blue hoop",
        ],
    );
    let (status, answer) = post_json(&state, "/v1/rewards", &body).await;
    assert_eq!(status, 200, "{answer}");
    let (_, run) = get(&state, "/v1/runs/guarded").await;
    let s = &run["series"][0];
    assert_eq!(s["guarded"], 2);
    // One of two is shorter than 5 tokens; one of two is a bank caption.
    assert_eq!(s["flagged"]["length"], 0.5);
    assert_eq!(s["flagged"]["repeated_words"], 0.0);
    assert_eq!(s["bank_equal"], 0.5);
}

#[tokio::test(flavor = "multi_thread")]
async fn run_fields_and_routes_refuse_bad_input() {
    let state = state();
    let caps = ["a red ring"];
    let cases = [
        (json!({"run": "has space", "step": 1}), "run"),
        (json!({"step": 1}), "run"),
        (json!({"run": "r"}), "step"),
        (
            json!({"run": "r", "step": 1, "run_thresholds": {"distinct_2_below": 2.0}}),
            "run_thresholds.distinct_2_below",
        ),
    ];
    for (run, field) in cases {
        let (status, body) = post_json(&state, "/v1/rewards", &rewards_body(run, &caps)).await;
        assert_eq!(status, 400, "{body}");
        assert_eq!(body["error"]["field"], field, "{body}");
    }
    let (status, _) = post_json(
        &state,
        "/v1/rewards",
        &rewards_body(json!({"run": "r", "step": 100}), &caps),
    )
    .await;
    assert_eq!(status, 200);
    let back = 99 - befit::runs::STEP_WINDOW;
    let (status, body) = post_json(
        &state,
        "/v1/rewards",
        &rewards_body(json!({"run": "r", "step": back}), &caps),
    )
    .await;
    assert_eq!(
        (status.as_u16(), &body["error"]["field"]),
        (400, &json!("step")),
        "{body}"
    );
    let (status, body) = get(&state, "/v1/runs/nobody").await;
    assert_eq!((status, &body["error"]["code"]), (404, &json!("not_found")));
    let (status, body) = get(&state, "/v1/runs/r?from=5&to=2").await;
    assert_eq!(
        (status, &body["error"]["field"]),
        (400, &json!("from")),
        "{body}"
    );
    let (status, body) = get(&state, "/v1/runs/r?from=-1").await;
    assert_eq!(
        (status, &body["error"]["code"]),
        (400, &json!("invalid_field")),
        "{body}"
    );
}

#[test]
fn every_acknowledged_step_survives_sigkill() {
    let data = scratch_dir("runs-crash");
    let bundle = bundle_dir("blocks-v1");
    let probe = probe_dir();
    let args = [
        "--bundle",
        bundle.to_str().unwrap(),
        "--data-dir",
        data.to_str().unwrap(),
        "--image-root",
        probe.to_str().unwrap(),
    ];
    let image = probe_rows("probe.jsonl")[1].image.clone();
    let mut server = Server::start(&args);
    let url = format!("{}/v1/rewards", server.url);
    let (announce, announced) = std::sync::mpsc::sync_channel::<u64>(0);
    // Each step gets 3 samples in one request; the writer waits after each
    // acknowledgement until the test has noted it, so the kill lands mid-run.
    let writer = std::thread::spawn(move || {
        let client = reqwest::blocking::Client::new();
        for step in 0..100_000u64 {
            let body = json!({"run": "crash", "step": step,
                "groups": [{"image": {"path": image},
                            "captions": ["a red ring", "two pieces", format!("step {step}")]}]});
            match client.post(&url).json(&body).send() {
                Ok(r) if r.status() == 200 => {
                    if announce.send(step).is_err() {
                        return;
                    }
                }
                _ => return,
            }
        }
    });
    let mut acked = Vec::new();
    for _ in 0..25 {
        acked.push(
            announced
                .recv_timeout(std::time::Duration::from_secs(60))
                .expect("a rewards request was not acknowledged"),
        );
    }
    server.kill(); // SIGKILL
    drop(announced);
    writer.join().unwrap();

    let server = Server::start(&args);
    let run: Value = reqwest::blocking::get(format!("{}/v1/runs/crash", server.url))
        .unwrap()
        .json()
        .unwrap();
    let kept: BTreeMap<u64, u64> = run["series"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| (s["step"].as_u64().unwrap(), s["samples"].as_u64().unwrap()))
        .collect();
    for step in &acked {
        assert_eq!(kept.get(step), Some(&3), "step {step} lost: {run}");
    }
    // At most the one request in flight at the kill was kept beyond those acknowledged.
    assert!(kept.len() <= acked.len() + 1, "{run}");
    eprintln!(
        "{} acknowledged steps all present after SIGKILL",
        acked.len()
    );
}

//! Reward guards through the router: answers without a guard unchanged,
//! every signal and the combined reward recomputed here (by hand for the
//! text signals, from raw vectors for the bank cosine), and the guard's
//! field errors. `tests/client/test_guards.py` checks the same signals with
//! an independent Python computation against the real binary.

use serde_json::{json, Value};

use crate::util::*;

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap()
}

/// Equal JSON, numbers compared as f32.
fn same(a: &Value, b: &Value) -> bool {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => {
            x.as_f64().unwrap() as f32 == y.as_f64().unwrap() as f32
        }
        (Value::Array(x), Value::Array(y)) => {
            x.len() == y.len() && x.iter().zip(y).all(|(x, y)| same(x, y))
        }
        (Value::Object(x), Value::Object(y)) => {
            x.len() == y.len() && x.iter().all(|(k, v)| y.get(k).is_some_and(|w| same(v, w)))
        }
        _ => a == b,
    }
}

/// Removes every `guard` key, wherever it is.
fn strip_guard(v: &mut Value) {
    match v {
        Value::Object(map) => {
            map.remove("guard");
            map.values_mut().for_each(strip_guard);
        }
        Value::Array(items) => items.iter_mut().for_each(strip_guard),
        _ => {}
    }
}

fn image_request(extra: Value, captions: &[&str]) -> Value {
    let row = &probe_rows("probe.jsonl")[0];
    let mut body = json!({
        "scale": {"kind": "clip-s", "weight": 2.5},
        "baseline": "mean-of-others",
        "groups": [{"image": {"path": row.image}, "captions": captions,
                    "greedy": "a big yellow square"}],
    });
    for (k, v) in extra.as_object().unwrap() {
        body[k] = v.clone();
    }
    body
}

#[tokio::test(flavor = "multi_thread")]
async fn without_a_guard_the_answer_is_what_it_was() {
    let state = state();
    let captions = ["a big yellow square and a big purple cross", "cross cross"];
    let (status, plain) =
        post_text(&state, "/v1/rewards", &image_request(json!({}), &captions)).await;
    assert_eq!(status, 200, "{plain}");
    // The fields and their order before guards existed, and nothing else.
    for new in ["\"guard\"", "\"run\"", "\"warnings\"", "\"flagged\""] {
        assert!(!plain.contains(new), "{new} in {plain}");
    }
    let at = |key: &str| plain.find(&format!("\"{key}\":")).unwrap();
    let top = ["model", "scale", "baseline", "remap", "groups"].map(at);
    assert!(top.windows(2).all(|w| w[0] < w[1]), "{plain}");
    let sample = ["cosine", "reward", "advantage", "truncated"].map(at);
    assert!(sample.windows(2).all(|w| w[0] < w[1]), "{plain}");
    // A guard with no penalties changes no number: the guarded answer with
    // its guard keys removed is the unguarded answer.
    let (status, guarded) = post_text(
        &state,
        "/v1/rewards",
        &image_request(json!({"guard": {}}), &captions),
    )
    .await;
    assert_eq!(status, 200, "{guarded}");
    let mut guarded: Value = serde_json::from_str(&guarded).unwrap();
    assert_eq!(guarded["guard"]["fluency_weight"], 0.0);
    assert!(guarded["groups"][0]["greedy"]["guard"].is_object());
    strip_guard(&mut guarded);
    assert_eq!(guarded, serde_json::from_str::<Value>(&plain).unwrap());
}

#[tokio::test(flavor = "multi_thread")]
async fn signals_and_the_combined_reward_follow_their_formulas() {
    let state = state();
    // Hand counts (words are runs of letters and digits, lower-cased; the
    // blocks tokenizer splits on whitespace and punctuation, unknown -> [UNK]):
    // 0 "a big yellow square, a big purple cross": 8 words, "a" and "big" repeat
    //   -> 2/8; bigrams (a big) repeats -> 1/7; 9 tokens (the comma), 0 unknown.
    // 1 "cross cross cross cross": 3/4 words, bigrams 2/3; 4 tokens.
    // 2 "a zorb square": 0 repeats; 3 tokens, "zorb" unknown -> 1/3.
    let captions = [
        "a big yellow square, a big purple cross",
        "cross cross cross cross",
        "a zorb square",
    ];
    let want: [(f64, f64, u64, f64); 3] = [
        (2.0 / 8.0, 1.0 / 7.0, 9, 0.0),
        (0.75, 2.0 / 3.0, 4, 0.0),
        (0.0, 0.0, 3, 1.0 / 3.0),
    ];
    let guard = json!({"penalties": {
        "repeated_words": {"above": 0.3, "weight": 2.0},
        "repeated_bigrams": {"above": 0.5, "weight": 1.0},
        "unknown_tokens": {"above": 0.0, "weight": 0.5},
        "length": {"below": 5, "weight": 1.0}}});
    let (status, plain) =
        post_json(&state, "/v1/rewards", &image_request(json!({}), &captions)).await;
    assert_eq!(status, 200, "{plain}");
    let (status, body) = post_json(
        &state,
        "/v1/rewards",
        &image_request(json!({"guard": guard}), &captions),
    )
    .await;
    assert_eq!(status, 200, "{body}");
    // The guard is echoed with its defaults filled in.
    assert_eq!(body["guard"]["penalties"], guard["penalties"]);
    assert_eq!(
        (
            &body["guard"]["fluency_weight"],
            &body["guard"]["nearest_bank"]
        ),
        (&json!(0.0), &json!(false))
    );
    let samples = body["groups"][0]["samples"].as_array().unwrap();
    let mut rewards = Vec::new();
    for (i, (s, (rw, rb, tokens, unk))) in samples.iter().zip(want).enumerate() {
        let g = &s["guard"];
        assert!((f(&g["repeated_words"]) - rw).abs() < 1e-6, "{i}: {g}");
        assert!((f(&g["repeated_bigrams"]) - rb).abs() < 1e-6, "{i}: {g}");
        assert_eq!(g["tokens"], tokens, "{i}: {g}");
        assert!((f(&g["unknown_tokens"]) - unk).abs() < 1e-6, "{i}: {g}");
        // blocks-v1 has a fluency head: its probability is measured even at
        // weight 0, and then moves no reward.
        assert!(g.get("bank_cosine").is_none());
        assert!((0.0..=1.0).contains(&f(&g["fluency"])), "{i}: {g}");
        // penalty = sum over crossed rules of weight * (s - above) / (1 - above);
        // length: weight * (below - tokens) / below.
        let mut penalty = 0.0;
        let mut flags = Vec::new();
        if rw > 0.3 {
            penalty += 2.0 * (rw - 0.3) / 0.7;
            flags.push("repeated_words");
        }
        if rb > 0.5 {
            penalty += (rb - 0.5) / 0.5;
            flags.push("repeated_bigrams");
        }
        if unk > 0.0 {
            penalty += 0.5 * unk;
            flags.push("unknown_tokens");
        }
        if tokens < 5 {
            penalty += (5.0 - tokens as f64) / 5.0;
            flags.push("length");
        }
        assert!((f(&g["penalty"]) - penalty).abs() < 1e-5, "{i}: {g}");
        assert_eq!(g["flagged"], json!(flags), "{i}");
        // CLIP-S (Hessel et al. 2021, eq. 1) from the unguarded answer, minus the penalty.
        let scaled = f(&plain["groups"][0]["samples"][i]["reward"]);
        assert!((f(&g["scaled"]) - scaled).abs() < 1e-6);
        let reward = scaled - penalty;
        assert!((f(&s["reward"]) - reward).abs() < 1e-5, "{i}: {s}");
        rewards.push(reward);
    }
    // The greedy caption is guarded too ("a big yellow square": 4 tokens -> length 1/5),
    // but the baseline is mean-of-others (Luo 2020) over the guarded rewards.
    let greedy = &body["groups"][0]["greedy"];
    assert!(
        (f(&greedy["guard"]["penalty"]) - 0.2).abs() < 1e-6,
        "{greedy}"
    );
    for (i, s) in samples.iter().enumerate() {
        let others: f64 = rewards
            .iter()
            .enumerate()
            .filter(|(j, _)| *j != i)
            .map(|(_, r)| r)
            .sum();
        let advantage = rewards[i] - others / 2.0;
        assert!((f(&s["advantage"]) - advantage).abs() < 1e-5, "{i}: {s}");
    }
}

#[tokio::test(flavor = "multi_thread")]
async fn the_bank_cosine_is_the_nearest_bank_caption() {
    let state = state();
    let captions = [
        "a big yellow square and a big purple cross",
        "a small red ring",
    ];
    let asked = json!({"guard": {"nearest_bank": true,
        "penalties": {"bank_cosine": {"above": 0.9, "weight": 1.0}}}});
    // An empty bank: nothing to be near, so no signal and no penalty.
    let (status, body) = post_json(
        &state,
        "/v1/rewards",
        &image_request(asked.clone(), &captions),
    )
    .await;
    assert_eq!(status, 200, "{body}");
    let g = &body["groups"][0]["samples"][0]["guard"];
    assert!(g.get("bank_cosine").is_none(), "{g}");
    assert_eq!(g["penalty"], 0.0);

    let bank = [
        "a big yellow square and a big purple cross",
        "three objects on the table",
        "a little blue hoop",
    ];
    let (status, added) = post_json(&state, "/v1/bank", &json!({"captions": bank})).await;
    assert_eq!(status, 200, "{added}");
    let (status, body) = post_json(&state, "/v1/rewards", &image_request(asked, &captions)).await;
    assert_eq!(status, 200, "{body}");
    let mut texts: Vec<&str> = captions.to_vec();
    texts.extend(bank);
    let (status, vecs) = post_json(&state, "/v1/vectors", &json!({"texts": texts})).await;
    assert_eq!(status, 200, "{vecs}");
    let v: Vec<Vec<f32>> = vecs["texts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| {
            t["vector"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
                .collect()
        })
        .collect();
    for (i, s) in body["groups"][0]["samples"]
        .as_array()
        .unwrap()
        .iter()
        .enumerate()
    {
        // The exact nearest: the largest cosine over the bank, computed here.
        let nearest = v[2..]
            .iter()
            .map(|b| cosine(&v[i], b))
            .fold(f64::MIN, f64::max);
        let g = &s["guard"];
        assert!(
            (f(&g["bank_cosine"]) - nearest).abs() < 1e-5,
            "{i}: {g} vs {nearest}"
        );
        let penalty = if nearest > 0.9 {
            (nearest - 0.9) / 0.1
        } else {
            0.0
        };
        assert!((f(&g["penalty"]) - penalty).abs() < 1e-4, "{i}: {g}");
    }
    // The first caption is in the bank: cosine 1, the full penalty.
    let first = &body["groups"][0]["samples"][0]["guard"];
    assert!((f(&first["bank_cosine"]) - 1.0).abs() < 1e-5);
    assert_eq!(first["flagged"], json!(["bank_cosine"]));
}

/// Golden texts of the fluency head with PyTorch's probabilities
/// (`fixtures/golden/blocks-v1/fluency.json`): a true caption, a word
/// repeated, a caption cut short and two templates spliced.
fn fluency_goldens() -> Vec<(String, f64)> {
    let golden: Value =
        serde_json::from_slice(&read(fixtures().join("golden/blocks-v1/fluency.json"))).unwrap();
    let texts = golden["texts"].as_array().unwrap();
    ["true", "repeat", "cut", "splice"]
        .iter()
        .map(|set| {
            let t = texts.iter().find(|t| t["set"] == *set).unwrap();
            (
                t["text"].as_str().unwrap().to_string(),
                f(&t["probability"]),
            )
        })
        .collect()
}

#[tokio::test(flavor = "multi_thread")]
async fn the_fluency_term_is_the_heads_probability_times_its_weight() {
    let state = state();
    let golden = fluency_goldens();
    let captions: Vec<&str> = golden.iter().map(|(t, _)| t.as_str()).collect();
    let row = &probe_rows("probe.jsonl")[1];
    let lambda = 0.7;
    let (status, body) = post_json(
        &state,
        "/v1/rewards",
        &json!({"scale": {"kind": "clip-s", "weight": 2.5}, "baseline": "mean-of-others",
                "guard": {"fluency_weight": lambda},
                "groups": [{"image": {"path": row.image}, "captions": captions}]}),
    )
    .await;
    assert_eq!(status, 200, "{body}");
    assert_eq!(body["guard"]["fluency_weight"], json!(lambda));
    let (status, vecs) = post_json(
        &state,
        "/v1/vectors",
        &json!({"images": [{"path": row.image}], "texts": captions}),
    )
    .await;
    assert_eq!(status, 200, "{vecs}");
    let as_vec = |v: &Value| -> Vec<f32> {
        v.as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap() as f32)
            .collect()
    };
    let image = as_vec(&vecs["images"][0]["vector"]);
    let mut rewards = Vec::new();
    let samples = body["groups"][0]["samples"].as_array().unwrap();
    for (i, (s, (text, p))) in samples.iter().zip(&golden).enumerate() {
        let g = &s["guard"];
        // The head as befit runs it gives PyTorch's probability (parity.rs
        // checks the same to 1e-5 on the head alone).
        assert!((f(&g["fluency"]) - p).abs() < 1e-5, "{text:?}: {g} vs {p}");
        // reward = CLIP-S (Hessel et al. 2021, eq. 1: 2.5 * max(cos, 0)) of
        // the raw cosine + lambda * fluency (Cho et al. 2022); no penalties.
        let cos = cosine(&as_vec(&vecs["texts"][i]["vector"]), &image);
        let reward = 2.5 * cos.max(0.0) + lambda * p;
        assert!(
            (f(&s["reward"]) - reward).abs() < 1e-4,
            "{i}: {s} vs {reward}"
        );
        assert_eq!(
            (g["penalty"].as_f64(), &g["flagged"]),
            (Some(0.0), &json!([]))
        );
        rewards.push(reward);
    }
    // The true caption is well-formed, the edited ones are not.
    assert!(golden[0].1 > 0.9, "{golden:?}");
    assert!(golden[1..].iter().all(|(_, p)| *p < 0.1), "{golden:?}");
    // Mean-of-others (Luo 2020) over the combined rewards.
    let n = rewards.len() as f64;
    for (i, s) in samples.iter().enumerate() {
        let others = (rewards.iter().sum::<f64>() - rewards[i]) / (n - 1.0);
        assert!(
            (f(&s["advantage"]) - (rewards[i] - others)).abs() < 1e-4,
            "{i}: {s}"
        );
    }
}

#[tokio::test(flavor = "multi_thread")]
async fn a_fluency_weight_needs_a_bundle_with_a_head() {
    let state = state_with(
        &["blocks-v1", "clip-tiny"],
        befit::server::Limits::default(),
    );
    let row = &probe_rows("probe.jsonl")[0];
    let ask = |model: &str| {
        json!({"model": model, "guard": {"fluency_weight": 0.5},
               "groups": [{"image": {"path": row.image}, "captions": ["a red ring", "a cube"]}]})
    };
    let (status, body) = post_json(&state, "/v1/rewards", &ask("clip-tiny")).await;
    assert_eq!(status, 400, "{body}");
    assert_eq!(body["error"]["code"], "invalid_field");
    assert_eq!(body["error"]["field"], "guard.fluency_weight", "{body}");
    let (status, body) = post_json(&state, "/v1/rewards", &ask("blocks")).await;
    assert_eq!(status, 200, "{body}");
}

#[tokio::test(flavor = "multi_thread")]
async fn guard_fields_out_of_range_are_answered_with_their_field() {
    let state = state();
    let cases = [
        (json!({"fluency_weight": 10.5}), "guard.fluency_weight"),
        (
            json!({"penalties": {"bank_cosine": {"above": 0.9, "weight": 1}}}),
            "guard.penalties.bank_cosine",
        ),
        (
            json!({"penalties": {"repeated_words": {"above": 0.2, "weight": 10.5}}}),
            "guard.penalties.repeated_words",
        ),
        (
            json!({"penalties": {"length": {"below": 0, "weight": 1}}}),
            "guard.penalties.length",
        ),
    ];
    for (guard, field) in cases {
        let (status, body) = post_json(
            &state,
            "/v1/rewards",
            &image_request(json!({"guard": guard}), &["a red ring", "a cube"]),
        )
        .await;
        assert_eq!(status, 400, "{body}");
        assert_eq!(body["error"]["code"], "invalid_field");
        assert_eq!(body["error"]["field"], field, "{body}");
    }
    let (status, body) = post_json(
        &state,
        "/v1/rewards",
        &image_request(json!({"guard": {"penalty": {}}}), &["a", "b"]),
    )
    .await;
    assert_eq!(
        (status.as_u16(), &body["error"]["code"]),
        (400, &json!("bad_json"))
    );
}

#[tokio::test(flavor = "multi_thread")]
async fn befit_score_applies_the_same_guard_as_the_route() {
    let state = state();
    let row = &probe_rows("probe.jsonl")[1];
    let group = json!({"image": {"path": row.image},
        "captions": [row.captions[0], "ring ring ring ring", "a zorb"]});
    let guard = json!({"fluency_weight": 0.8,
        "penalties": {"repeated_words": {"above": 0.2, "weight": 1.5},
        "unknown_tokens": {"above": 0.1, "weight": 1.0}}});
    let (status, http) = post_json(
        &state,
        "/v1/rewards",
        &json!({"scale": {"kind": "clip-s"}, "baseline": "mean-of-others",
                "guard": guard, "groups": [group]}),
    )
    .await;
    assert_eq!(status, 200, "{http}");
    let dir = scratch_dir("score-guard");
    let input = dir.join("groups.jsonl");
    std::fs::write(&input, format!("{group}\n")).unwrap();
    let stdout = stdout_of(
        std::process::Command::new(env!("CARGO_BIN_EXE_befit"))
            .args(["score", "--bundle"])
            .arg(bundle_dir("blocks-v1"))
            .arg("--input")
            .arg(&input)
            .arg("--image-root")
            .arg(probe_dir())
            .args([
                "--scale",
                "clip-s",
                "--baseline",
                "mean-of-others",
                "--guard",
            ])
            .arg(guard.to_string())
            .arg("--ort-lib")
            .arg(ort_lib()),
    );
    let line: Value = serde_json::from_slice(&stdout).unwrap();
    // The command writes f32s widened to f64; the same numbers as f32.
    assert!(
        same(&line["samples"], &http["groups"][0]["samples"]),
        "{line} vs {http}"
    );
    assert!(line["samples"][1]["guard"]["penalty"].as_f64().unwrap() > 0.0);
    // Each reward by hand: scaled + 0.8 * fluency - penalty; the true caption
    // is well-formed and the repeated word is not.
    for s in line["samples"].as_array().unwrap() {
        let g = &s["guard"];
        let reward = f(&g["scaled"]) + 0.8 * f(&g["fluency"]) - f(&g["penalty"]);
        assert!((f(&s["reward"]) - reward).abs() < 1e-5, "{s}");
    }
    let fluency = |i: usize| f(&line["samples"][i]["guard"]["fluency"]);
    assert!(fluency(0) > 0.9 && fluency(1) < 0.1, "{line}");
    // A guard out of range stops the command with the field named.
    let bad = std::process::Command::new(env!("CARGO_BIN_EXE_befit"))
        .args(["score", "--bundle"])
        .arg(bundle_dir("blocks-v1"))
        .arg("--input")
        .arg(&input)
        .args(["--guard", "{\"fluency_weight\": 11}", "--ort-lib"])
        .arg(ort_lib())
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&bad.stderr);
    assert!(
        !bad.status.success() && stderr.contains("guard.fluency_weight"),
        "{stderr}"
    );
    // A fluency weight on a bundle without a head (clip-tiny) is refused too.
    let headless = std::process::Command::new(env!("CARGO_BIN_EXE_befit"))
        .args(["score", "--bundle"])
        .arg(bundle_dir("clip-tiny"))
        .arg("--input")
        .arg(&input)
        .args(["--guard", "{\"fluency_weight\": 1}", "--ort-lib"])
        .arg(ort_lib())
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&headless.stderr);
    assert!(
        !headless.status.success() && stderr.contains("no fluency head"),
        "{stderr}"
    );
}

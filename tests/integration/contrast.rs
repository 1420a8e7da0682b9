//! On the probe contrast set served through HTTP, the true caption's reward
//! beats the one-fact-changed caption at the rate the bundle's card reports.

use serde_json::{json, Value};

use crate::util::*;

#[tokio::test(flavor = "multi_thread")]
async fn true_captions_beat_contrasts_at_the_card_rate() {
    let state = state();
    let rows = probe_rows("probe.jsonl");
    let (mut wins, mut total) = (0usize, 0usize);
    for chunk in rows.chunks(50) {
        let groups: Vec<Value> = chunk
            .iter()
            .filter(|r| !r.contrasts.is_empty())
            .map(|r| {
                let mut captions: Vec<String> = r.captions.clone();
                captions.extend(r.contrasts.iter().map(|c| c.caption.clone()));
                json!({"image": {"path": r.image}, "captions": captions, "n_true": r.captions.len()})
            })
            .collect();
        let request = json!({"groups": groups.iter().map(|g| json!({"image": g["image"], "captions": g["captions"]})).collect::<Vec<_>>()});
        let (status, r) = post_json(&state, "/v1/rewards", &request).await;
        assert_eq!(status, 200, "{r}");
        let rows_with = chunk.iter().filter(|r| !r.contrasts.is_empty());
        for (row, group) in rows_with.zip(r["groups"].as_array().unwrap()) {
            let rewards: Vec<f64> = group["samples"]
                .as_array()
                .unwrap()
                .iter()
                .map(|s| s["reward"].as_f64().unwrap())
                .collect();
            for (k, contrast) in row.contrasts.iter().enumerate() {
                total += 1;
                if rewards[contrast.from] > rewards[row.captions.len() + k] {
                    wins += 1;
                }
            }
        }
    }
    let rate = wins as f64 / total as f64;
    let card: Value =
        serde_json::from_slice(&read(bundle_dir("blocks-v1").join("card.json"))).unwrap();
    let card_rate = card_contrast_rate(&card);
    eprintln!("true beats contrast through HTTP: {wins}/{total} = {rate:.4}; card: {card_rate:.4}");
    // Same pairs, same model: only float differences between ONNX Runtime builds and PyTorch can move a pair.
    assert!(
        (rate - card_rate).abs() <= 0.005,
        "HTTP rate {rate} vs card {card_rate}"
    );
}

/// The card's overall true-beats-contrast rate on the probe set.
fn card_contrast_rate(card: &Value) -> f64 {
    card["held_out"]["contrast"]["true_beats_contrast"]
        .as_f64()
        .unwrap_or_else(|| panic!("card.json has no held_out.contrast.true_beats_contrast: {card}"))
}

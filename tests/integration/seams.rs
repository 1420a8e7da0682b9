//! The bugs that lived in the seams between the HTTP layer and the domain,
//! each pinned: maps on the wrong model, paths in probe rows without an image
//! root, the bank's limits from the server's flags, a second process on a
//! locked data folder, `among: images` finding images registered later,
//! `befit score` answering what `/v1/rewards` answers, and a store emptied
//! behind the service's back.

use std::process::Command;

use befit::server::Limits;
use serde_json::{json, Value};

use crate::util::*;

#[tokio::test(flavor = "multi_thread")]
async fn a_map_is_refused_on_a_model_it_was_not_fitted_for() {
    let state = state_with(&["blocks-v1", "blocks-v2"], Limits::default());
    let body = json!({"from": "blocks@v1", "to": "blocks@v2", "probe": probe_json(60),
                      "save_map": {"name": "v2-on-v1"}});
    let (status, r) = post_json(&state, "/v1/drift", &body).await;
    assert_eq!(status, 200, "{r}");
    let ask = |model: &str| {
        json!({"model": model, "remap": "v2-on-v1",
               "groups": [{"image": {"path": "images/00000.png"}, "captions": ["a red ring"]}]})
    };
    let (status, ok) = post_json(&state, "/v1/rewards", &ask("blocks@v2")).await;
    assert_eq!(status, 200, "{ok}");
    // The map takes blocks-v2 cosines; on blocks-v1 it would silently corrupt the rewards.
    let (status, e) = post_json(&state, "/v1/rewards", &ask("blocks@v1")).await;
    assert_eq!(status, 409, "{e}");
    assert_eq!(e["error"]["code"], "map_mismatch");
    assert_eq!(e["error"]["field"], "remap");
    let message = e["error"]["message"].as_str().unwrap();
    assert!(
        message.contains("blocks@v2") && message.contains("blocks@v1"),
        "{message}"
    );
    // The saved file names both bundles by digest.
    let saved: Value =
        serde_json::from_slice(&read(state.data_dir().maps().join("v2-on-v1.json"))).unwrap();
    let v2 = model("blocks-v2");
    assert_eq!(saved["applies_to"]["digest"], v2.bundle.digest.as_str());
    assert_eq!(saved["lands_on"]["id"], "blocks@v1");
    // Saving again under the name is refused before the drift is run, unless replaced.
    let (status, e) = post_json(&state, "/v1/drift", &body).await;
    assert_eq!(status, 409, "{e}");
    assert_eq!(e["error"]["code"], "map_exists");
    assert_eq!(e["error"]["field"], "save_map.name");
    let mut replace = body.clone();
    replace["save_map"]["replace"] = json!(true);
    let (status, r) = post_json(&state, "/v1/drift", &replace).await;
    assert_eq!(status, 200, "{r}");
    // A damaged map file does not stop a restart on the same folder: it is unusable, said in /readyz.
    std::fs::write(state.data_dir().maps().join("torn.json"), "{").unwrap();
    let config = state.data_dir().root().to_path_buf();
    drop(state);
    let again = ready(
        &befit::service::ServiceConfig {
            image_root: Some(probe_dir()),
            ..befit::service::ServiceConfig::new(Vec::new(), config)
        },
        &["blocks-v1", "blocks-v2"],
    );
    let (status, _, ready) = call(&again, "GET", "/readyz", "", vec![]).await;
    assert_eq!(status, 200, "{ready}");
    assert!(ready["maps_unusable"]["torn"].is_string(), "{ready}");
    let (status, ok) = post_json(&again, "/v1/rewards", &ask("blocks@v2")).await;
    assert_eq!(status, 200, "the readable map still serves: {ok}");
}

#[tokio::test(flavor = "multi_thread")]
async fn probe_paths_without_an_image_root_are_refused_not_internal() {
    let mut no_root = config(Limits::default());
    no_root.image_root = None;
    let state = ready(&no_root, &["blocks-v1", "blocks-v2"]);
    for (route, body) in [
        ("/v1/calibration", json!({"probe": probe_json(3)})),
        (
            "/v1/drift",
            json!({"from": "blocks@v1", "to": "blocks@v2", "probe": probe_json(3)}),
        ),
    ] {
        let (status, e) = post_json(&state, route, &body).await;
        // proto-free-api.md: 403 path_refused for a path while the server has no --image-root.
        assert_eq!(status, 403, "{route}: {e}");
        assert_eq!(e["error"]["code"], "path_refused", "{route}");
        assert_eq!(e["error"]["field"], "probe[0].image", "{route}");
        assert!(e["error"]["message"]
            .as_str()
            .unwrap()
            .contains("--image-root"));
    }
}

#[tokio::test(flavor = "multi_thread")]
async fn the_bank_refuses_what_the_server_flags_refuse() {
    let limits = Limits {
        max_caption_bytes: 20,
        max_captions: 3,
        ..Limits::default()
    };
    let state = state_with(&["blocks-v1"], limits);
    let (status, ok) = post_json(&state, "/v1/bank", &json!({"captions": ["a red ring"]})).await;
    assert_eq!(status, 200, "{ok}");
    let long = "a big yellow square below"; // 25 bytes, over the 20 set above
    let (status, e) = post_json(
        &state,
        "/v1/bank",
        &json!({"captions": ["a red ring", long]}),
    )
    .await;
    assert_eq!(status, 400, "{e}");
    assert_eq!(e["error"]["code"], "over_limit");
    assert_eq!(e["error"]["field"], "captions[1]");
    assert!(e["error"]["message"]
        .as_str()
        .unwrap()
        .contains("--max-caption-bytes"));
    let (status, e) = post_json(
        &state,
        "/v1/bank",
        &json!({"captions": ["a", "b", "c", "d"]}),
    )
    .await;
    assert_eq!(
        (status.as_u16(), e["error"]["code"].as_str()),
        (400, Some("over_limit"))
    );
    assert!(e["error"]["message"]
        .as_str()
        .unwrap()
        .contains("--max-captions"));
    // The bank itself, not only the route, holds the flags' values.
    let bank = state.bank().unwrap();
    assert_eq!(bank.config().max_caption_bytes, 20);
    assert_eq!(bank.config().max_append, 3);
}

#[test]
fn bank_import_refuses_a_data_folder_a_server_holds() {
    let config = config(Limits::default());
    let service = unready(&config);
    let captions = scratch_dir("import").join("captions.jsonl");
    std::fs::write(&captions, "\"a red ring left of a blue cube\"\n").unwrap();
    let import = || {
        Command::new(env!("CARGO_BIN_EXE_befit"))
            .args(["bank", "import", "--bundle"])
            .arg(bundle_dir("blocks-v1"))
            .arg("--from")
            .arg(&captions)
            .arg("--data-dir")
            .arg(&config.data_dir)
            .arg("--ort-lib")
            .arg(ort_lib())
            .output()
            .unwrap()
    };
    let out = import();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success(), "{stderr}");
    assert!(stderr.contains("befit serve (process "), "{stderr}");
    assert!(stderr.contains("POST /v1/bank"), "{stderr}");
    drop(service);
    // Released (as when the server stops, or is killed): the import goes through.
    let out = import();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let report: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(report["added"], 1, "{report}");
}

#[tokio::test(flavor = "multi_thread")]
async fn images_registered_after_a_search_are_found_among_images() {
    let state = state();
    // The test models are shared, and so is their memory cache of image vectors: bytes no
    // other test sends (a PNG with bytes after its end chunk, which decoders ignore) make
    // sure these images go through this service's store.
    let register = |path: &str| {
        let mut bytes = read(probe_dir().join(path));
        bytes.extend_from_slice(b"among-images");
        json!({"images": [{"base64": b64(&bytes)}], "model": "blocks@v1"})
    };
    let (_, first) = post_json(&state, "/v1/images", &register("images/00000.png")).await;
    let ask = |id: &Value| json!({"image": {"id": id}, "k": 5, "among": "images"});
    let id0 = &first["images"][0]["id"];
    let (status, r) = post_json(&state, "/v1/neighbors", &ask(id0)).await;
    assert_eq!(status, 200, "{r}");
    assert_eq!(r["neighbors"].as_array().unwrap().len(), 1);
    let (_, second) = post_json(&state, "/v1/images", &register("images/00001.png")).await;
    let id1 = &second["images"][0]["id"];
    let (_, r) = post_json(&state, "/v1/neighbors", &ask(id1)).await;
    let hits = r["neighbors"].as_array().unwrap();
    assert_eq!(hits.len(), 2, "{r}");
    // An image is its own nearest neighbour: cosine 1 up to f32 rounding.
    assert_eq!(&hits[0]["id"], id1);
    assert!((hits[0]["cosine"].as_f64().unwrap() - 1.0).abs() < 1e-5);
    let vectors = post_json(
        &state,
        "/v1/vectors",
        &json!({"images": [{"id": id0}, {"id": id1}]}),
    )
    .await
    .1;
    let v = |i: usize| -> Vec<f64> {
        vectors["images"][i]["vector"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect()
    };
    // The other hit's cosine is the dot product of the two unit vectors, summed here by hand.
    let by_hand: f64 = v(0).iter().zip(v(1)).map(|(a, b)| a * b).sum();
    assert!((hits[1]["cosine"].as_f64().unwrap() - by_hand).abs() < 1e-5);
}

#[tokio::test(flavor = "multi_thread")]
async fn offline_scores_are_the_routes_scores() {
    let rows = probe_rows("probe.jsonl");
    let groups: Vec<Value> = rows[..6]
        .iter()
        .map(|r| json!({"image": {"path": r.image}, "captions": [r.captions[0], r.contrasts[0].caption, "a small green circle"]}))
        .collect();
    let dir = scratch_dir("score");
    let input = dir.join("groups.jsonl");
    let mut text: String = groups.iter().map(|g| format!("{g}\n")).collect();
    text.push_str("{\"image\": {\"path\": \"images/00000.png\"}, \"captions\": []}\n");
    std::fs::write(&input, text).unwrap();
    let output = dir.join("rewards.jsonl");
    let run = |extra: &[&str]| {
        Command::new(env!("CARGO_BIN_EXE_befit"))
            .args(["score", "--bundle"])
            .arg(bundle_dir("blocks-v1"))
            .arg("--input")
            .arg(&input)
            .arg("--image-root")
            .arg(probe_dir())
            .arg("--output")
            .arg(&output)
            .args([
                "--scale",
                "clip-s",
                "--baseline",
                "mean-of-others",
                "--ort-lib",
            ])
            .arg(ort_lib())
            .args(extra)
            .output()
            .unwrap()
    };
    let stopped = run(&[]);
    let stderr = String::from_utf8_lossy(&stopped.stderr);
    assert!(!stopped.status.success());
    assert!(
        stderr.contains("line 7") && stderr.contains("--skip-bad"),
        "{stderr}"
    );
    let done = run(&["--skip-bad"]);
    assert!(
        done.status.success(),
        "{}",
        String::from_utf8_lossy(&done.stderr)
    );
    let lines: Vec<Value> = std::fs::read_to_string(&output)
        .unwrap()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 7);
    assert_eq!(lines[6]["line"], 7);
    assert!(
        lines[6]["error"].as_str().unwrap().contains("captions"),
        "{}",
        lines[6]
    );
    let state = state_with(&["blocks-v1+cache"], Limits::default());
    let body = json!({"scale": {"kind": "clip-s"}, "baseline": "mean-of-others", "groups": groups});
    let (status, served) = post_json(&state, "/v1/rewards", &body).await;
    assert_eq!(status, 200, "{served}");
    for (g, line) in lines[..6].iter().enumerate() {
        assert_eq!(line["line"], g + 1);
        let want = &served["groups"][g];
        assert_eq!(line["image"], want["image"]);
        for (ours, theirs) in line["samples"]
            .as_array()
            .unwrap()
            .iter()
            .zip(want["samples"].as_array().unwrap())
        {
            for key in ["cosine", "reward", "advantage"] {
                let (a, b) = (ours[key].as_f64().unwrap(), theirs[key].as_f64().unwrap());
                // Batches differ between the runs; float rounding of one encoder pass (common practice: 1e-5).
                assert!((a - b).abs() < 1e-5, "group {g} {key}: {a} vs {b}");
            }
        }
    }
}

const SCENE_CAPTIONS: [&str; 5] = [
    "a red ring left of a blue cube",
    "a small green circle",
    "the big yellow square is below the big violet cross",
    "two blue triangles on a table",
    "a violet ring above a red square",
];

#[tokio::test(flavor = "multi_thread")]
async fn a_new_bundle_embeds_the_banks_captions_at_start() {
    let config = config(Limits::default());
    {
        let old = ready(&config, &["blocks-v1"]);
        let (status, r) = post_json(&old, "/v1/bank", &json!({"captions": SCENE_CAPTIONS})).await;
        assert_eq!(status, 200, "{r}");
        old.dump_bank().unwrap();
    }
    let new = ready(&config, &["blocks-v2"]);
    let ask = json!({"text": "a red ring", "k": 3});
    let (_, before) = post_json(&new, "/v1/neighbors", &ask).await;
    // blocks-v2 has seen none of the captions yet.
    assert_eq!(before["neighbors"].as_array().unwrap().len(), 0, "{before}");
    let runtime = tokio::runtime::Handle::current();
    let filler = new.clone();
    tokio::task::spawn_blocking(move || filler.backfill(runtime))
        .await
        .unwrap()
        .unwrap();
    let (status, _, stats) = call(&new, "GET", "/v1/bank", "", vec![]).await;
    assert_eq!(status, 200, "{stats}");
    let backfill = &stats["models"][0]["backfill"];
    assert_eq!(backfill["phase"], "done", "{stats}");
    assert_eq!(
        (backfill["missing"].as_u64(), backfill["embedded"].as_u64()),
        (Some(5), Some(5))
    );
    let (_, after) = post_json(&new, "/v1/neighbors", &ask).await;
    assert_eq!(after["neighbors"].as_array().unwrap().len(), 3, "{after}");
    assert_eq!(after["partial"], false);
}

#[test]
fn embed_missing_on_the_command_line_fills_a_second_bundle_once() {
    let data = scratch_dir("embed-missing");
    let captions = data.join("captions.jsonl");
    let lines: String = SCENE_CAPTIONS
        .iter()
        .map(|c| format!("\"{c}\"\n"))
        .collect();
    std::fs::write(&captions, lines).unwrap();
    let befit = |args: &[&str], bundle: &str| {
        let stdout = stdout_of(
            Command::new(env!("CARGO_BIN_EXE_befit"))
                .args(["bank"])
                .args(args)
                .arg("--bundle")
                .arg(bundle_dir(bundle))
                .arg("--data-dir")
                .arg(data.join("d"))
                .arg("--ort-lib")
                .arg(ort_lib()),
        );
        serde_json::from_slice::<Value>(&stdout).unwrap()
    };
    let from = captions.to_str().unwrap();
    assert_eq!(befit(&["import", "--from", from], "blocks-v1")["added"], 5);
    assert_eq!(befit(&["embed-missing"], "blocks-v2")["embedded"], 5);
    // Nothing is left to do the second time, and blocks-v1 never missed any.
    assert_eq!(befit(&["embed-missing"], "blocks-v2")["embedded"], 0);
    assert_eq!(befit(&["embed-missing"], "blocks-v1")["embedded"], 0);
}

/// An earlier server answered 500 and blamed the encoder when `skip_bad` left
/// no row because every row's image was missing: the rows are to blame.
#[tokio::test(flavor = "multi_thread")]
async fn every_image_missing_is_the_rows_fault_not_the_encoders() {
    let state = state_with(&["blocks-v1", "blocks-v2"], Limits::default());
    let rows: Vec<Value> = (0..4)
        .map(|i| json!({"image": {"path": format!("images/missing-{i}.png")}, "captions": ["a red ring"]}))
        .collect();
    for (route, body) in [
        ("/v1/calibration", json!({"probe": rows, "skip_bad": true})),
        (
            "/v1/drift",
            json!({"from": "blocks@v1", "to": "blocks@v2", "probe": rows, "skip_bad": true}),
        ),
    ] {
        let (status, e) = post_json(&state, route, &body).await;
        assert_eq!(status, 400, "{route}: {e}");
        assert_eq!(e["error"]["code"], "invalid_field", "{route}: {e}");
        assert!(
            e["error"]["message"]
                .as_str()
                .unwrap()
                .contains("no usable rows"),
            "{route}: {e}"
        );
    }
}

#[tokio::test]
async fn a_store_emptied_behind_our_back_stops_the_start_unless_accepted() {
    let mut config = config(Limits::default());
    // A registered image, then a clean stop: the marks now say 1 image.
    {
        let service = ready(&config, &["blocks-v1"]);
        let png = read(probe_dir().join("images/00000.png"));
        let body = json!({"images": [{"base64": b64(&png)}]});
        let (status, answer) = post_json(&service, "/v1/images", &body).await;
        assert_eq!(status, 200, "{answer}");
        service.dump_bank().unwrap();
    }
    // The store file truncated to 0 bytes, as a bad copy leaves it.
    let images = config.data_dir.join(befit::service::data_dir::IMAGES_FILE);
    for suffix in ["-wal", "-shm"] {
        let _ = std::fs::remove_file(format!("{}{suffix}", images.display()));
    }
    std::fs::File::create(&images).unwrap();
    let err = match befit::service::Service::open(&config, Default::default()) {
        Ok(_) => panic!("a store that lost its images must not start"),
        Err(e) => e.to_string(),
    };
    assert!(
        err.contains("images.sqlite holds 0 images but held 1")
            && err.contains("--accept-smaller-stores"),
        "{err}"
    );
    // Told to, it starts with what is there, and the marks start anew.
    config.accept_smaller_stores = true;
    befit::service::Service::open(&config, Default::default()).unwrap();
    config.accept_smaller_stores = false;
    befit::service::Service::open(&config, Default::default()).unwrap();
}

//! End-to-end against the real `befit` binary on port 0.

use std::process::Command;

use serde_json::{json, Value};

use crate::util::*;

fn post(url: &str, path: &str, body: &Value) -> (u16, Value) {
    let r = reqwest::blocking::Client::new()
        .post(format!("{url}{path}"))
        .json(body)
        .send()
        .unwrap();
    let status = r.status().as_u16();
    (status, r.json().unwrap_or(Value::Null))
}

#[test]
fn registered_images_survive_a_restart() {
    let data = tempfile::tempdir().unwrap();
    let bundle = bundle_dir("blocks-v1");
    let args = [
        "--bundle",
        bundle.to_str().unwrap(),
        "--data-dir",
        data.path().to_str().unwrap(),
    ];
    let row = &probe_rows("probe.jsonl")[5];
    let bytes = read(probe_dir().join(&row.image));
    let (id, cosine) = {
        let server = Server::start(&args);
        let (status, reg) = post(
            &server.url,
            "/v1/images",
            &json!({"images": [{"base64": b64(&bytes)}]}),
        );
        assert_eq!(status, 200, "{reg}");
        let id = reg["images"][0]["id"].as_str().unwrap().to_string();
        let (_, r) = post(
            &server.url,
            "/v1/rewards",
            &json!({"groups": [{"image": {"id": id}, "captions": [row.captions[0]]}]}),
        );
        (id, r["groups"][0]["samples"][0]["cosine"].as_f64().unwrap())
    };
    let server = Server::start(&args);
    let (status, r) = post(
        &server.url,
        "/v1/rewards",
        &json!({"groups": [{"image": {"id": id}, "captions": [row.captions[0]]}]}),
    );
    assert_eq!(status, 200, "{r}");
    assert_eq!(
        r["groups"][0]["samples"][0]["cosine"].as_f64().unwrap(),
        cosine
    );
    let (_, again) = post(
        &server.url,
        "/v1/images",
        &json!({"images": [{"base64": b64(&bytes)}]}),
    );
    assert_eq!(again["images"][0]["new"], false);
    // The restarted server found the vector in the store, not by encoding the image again.
    let metrics = reqwest::blocking::get(format!("{}/metrics", server.url))
        .unwrap()
        .text()
        .unwrap();
    assert!(
        metrics.contains("befit_cache_hits_total{cache=\"image_store\"} 1"),
        "{metrics}"
    );
    assert!(
        metrics.contains("befit_encoder_batch_size_count{model=\"blocks@v1\",tower=\"text\"} 1"),
        "{metrics}"
    );
    assert!(
        !metrics.contains("tower=\"image\"} 1"),
        "the image was encoded again:\n{metrics}"
    );
}

#[test]
fn a_bundle_that_disagrees_with_its_graph_names_file_and_field() {
    let dir = tempfile::tempdir().unwrap();
    let src = bundle_dir("blocks-v1");
    for entry in std::fs::read_dir(&src).unwrap() {
        let entry = entry.unwrap();
        std::fs::copy(entry.path(), dir.path().join(entry.file_name())).unwrap();
    }
    let manifest = std::fs::read_to_string(dir.path().join("bundle.toml")).unwrap();
    let dimension_line = manifest
        .lines()
        .find(|l| l.trim_start().starts_with("dimension"))
        .unwrap()
        .to_string();
    std::fs::write(
        dir.path().join("bundle.toml"),
        manifest.replace(&dimension_line, "dimension = 65"),
    )
    .unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_befit"))
        .args([
            "check-bundle",
            dir.path().to_str().unwrap(),
            "--ort-lib",
            ort_lib().to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("bundle.toml: field `image.output`") && stderr.contains("expected 65"),
        "{stderr}"
    );

    let good = Command::new(env!("CARGO_BIN_EXE_befit"))
        .args([
            "check-bundle",
            src.to_str().unwrap(),
            "--ort-lib",
            ort_lib().to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert!(
        good.status.success(),
        "{}",
        String::from_utf8_lossy(&good.stderr)
    );
    let report: Value = serde_json::from_slice(&good.stdout).unwrap();
    assert_eq!(report["id"], "blocks@v1");
    assert_eq!(report["fluency"], "fluency.onnx");
}

#[test]
fn a_fluency_head_that_disagrees_with_its_section_names_the_field() {
    let src = bundle_dir("blocks-v1");
    let manifest = std::fs::read_to_string(src.join("bundle.toml")).unwrap();
    let cases = [
        // An output the graph does not have.
        (
            manifest.replace("output = \"probability\"", "output = \"p\""),
            "field `fluency.output`: the graph has no output named \"p\"",
        ),
        // The text tower as the head: its output is [batch, 64], not [batch].
        (
            manifest.replace(
                "file = \"fluency.onnx\"\nids_input = \"input_ids\"\nmask_input = \"attention_mask\"\noutput = \"probability\"",
                "file = \"text.onnx\"\nids_input = \"input_ids\"\nmask_input = \"attention_mask\"\noutput = \"embedding\"",
            ),
            "field `fluency.output`: output \"embedding\" has rank 2",
        ),
        // The mask the graph needs left out of the section.
        (
            manifest.replace("mask_input = \"attention_mask\"\noutput = \"probability\"", "output = \"probability\""),
            "field `fluency.mask_input`: the graph",
        ),
    ];
    for (text, want) in cases {
        assert_ne!(text, manifest, "the case did not change the manifest");
        let dir = tempfile::tempdir().unwrap();
        for entry in std::fs::read_dir(&src).unwrap() {
            let entry = entry.unwrap();
            std::fs::copy(entry.path(), dir.path().join(entry.file_name())).unwrap();
        }
        std::fs::write(dir.path().join("bundle.toml"), text).unwrap();
        let out = Command::new(env!("CARGO_BIN_EXE_befit"))
            .args(["check-bundle", dir.path().to_str().unwrap(), "--ort-lib"])
            .arg(ort_lib())
            .output()
            .unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(1), "{stderr}");
        assert!(stderr.contains(want), "{want:?} not in {stderr}");
    }
}

/// An earlier server waited forever at SIGTERM while one client stalled
/// mid-body, so an orchestrator's SIGKILL came before the bank's dump. Now it
/// dumps first and drains for at most --drain-secs.
#[test]
fn shutdown_drains_within_its_deadline_despite_a_stalled_client() {
    use std::io::Write;
    let data = tempfile::tempdir().unwrap();
    let bundle = bundle_dir("blocks-v1");
    let mut server = Server::start(&[
        "--bundle",
        bundle.to_str().unwrap(),
        "--data-dir",
        data.path().to_str().unwrap(),
        "--drain-secs",
        "1",
    ]);
    let (status, _) = post(
        &server.url,
        "/v1/bank",
        &json!({"captions": ["a red cube left of a blue ball"], "tag": "table-a"}),
    );
    assert_eq!(status, 200);
    let addr = server.url.trim_start_matches("http://").to_string();
    let mut stalled = std::net::TcpStream::connect(&addr).unwrap();
    stalled
        .write_all(b"POST /v1/rewards HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\nContent-Length: 1000\r\n\r\n{")
        .unwrap();
    let pid = server.child.id().to_string();
    assert!(Command::new("kill")
        .args(["-TERM", &pid])
        .status()
        .unwrap()
        .success());
    let started = std::time::Instant::now();
    let status = loop {
        if let Some(status) = server.child.try_wait().unwrap() {
            break status;
        }
        assert!(
            started.elapsed() < std::time::Duration::from_secs(20),
            "still running 20 s after SIGTERM with --drain-secs 1"
        );
        std::thread::sleep(std::time::Duration::from_millis(50));
    };
    assert!(status.success(), "{status:?}");
    // The bank's index was dumped on the way out: its folder holds files.
    let index = befit::service::data_dir::DataDir::new(data.path()).bank_index();
    let files = walk(&index);
    assert!(
        !files.is_empty(),
        "no index dump under {} after SIGTERM",
        index.display()
    );
    drop(stalled);
}

/// Every file under `dir`, recursively (none when it does not exist).
fn walk(dir: &std::path::Path) -> Vec<std::path::PathBuf> {
    let mut files = Vec::new();
    for entry in std::fs::read_dir(dir).into_iter().flatten().flatten() {
        let path = entry.path();
        if path.is_dir() {
            files.extend(walk(&path));
        } else {
            files.push(path);
        }
    }
    files
}

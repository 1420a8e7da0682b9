//! What a new user meets first: the limits a client can read, clear errors for
//! a wrong runtime library, quiet ends of piped output, a warning on probe sets
//! too small to mean much, and command flags that agree between commands.

use std::io::Read;
use std::process::{Command, Stdio};

use axum::http::StatusCode;
use befit::server::Limits;

use crate::util::{bundle_dir, call, ort_lib, probe_dir, scratch_dir, state_with};

fn befit() -> Command {
    Command::new(env!("CARGO_BIN_EXE_befit"))
}

fn help(args: &[&str]) -> String {
    let out = befit().args(args).arg("--help").output().unwrap();
    assert!(out.status.success(), "{args:?}");
    String::from_utf8(out.stdout).unwrap()
}

#[tokio::test]
async fn the_limits_route_answers_the_flags_in_force_not_the_defaults() {
    let limits = Limits {
        max_groups: 7,
        max_captions: 99,
        max_caption_bytes: 300,
        max_images: 5,
        max_body_bytes: 123_456,
        ..Limits::default()
    };
    let state = state_with(&["blocks-v1"], limits.clone());
    let (status, _, body) = call(&state, "GET", "/v1/limits", "", vec![]).await;
    assert_eq!(status, StatusCode::OK, "{body}");
    assert_eq!(body["max_groups"], 7);
    assert_eq!(body["max_captions"], 99);
    assert_eq!(body["max_caption_bytes"], 300);
    assert_eq!(body["max_images"], 5);
    assert_eq!(body["max_body_bytes"], 123_456);
    assert_eq!(body["max_probe_rows"], limits.max_probe_rows);
    assert_eq!(body["max_k"], befit::bank::index::MAX_K);
    assert_eq!(
        body["request_timeout_secs"],
        limits.request_timeout.as_secs_f64()
    );
}

/// `befit check-bundle` on blocks-v1 with `--ort-lib library`: its exit code and stderr.
fn check_bundle_with(library: &str) -> (Option<i32>, String) {
    let out = befit()
        .args(["check-bundle", bundle_dir("blocks-v1").to_str().unwrap()])
        .args(["--ort-lib", library])
        .output()
        .unwrap();
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn a_missing_runtime_library_is_a_clear_error() {
    let (code, stderr) = check_bundle_with("/nowhere/libonnxruntime.so");
    assert_eq!(code, Some(1));
    assert!(
        stderr.contains("ONNX Runtime library not found") && stderr.contains("make ort"),
        "{stderr}"
    );
}

#[test]
fn a_library_that_is_not_onnx_runtime_is_named_as_such() {
    // The C library this test runs with: a real shared library, not ONNX Runtime.
    let maps = std::fs::read_to_string("/proc/self/maps").unwrap();
    let libc = maps
        .lines()
        .filter_map(|line| line.split_whitespace().nth(5))
        .find(|path| path.contains("/libc.so"))
        .unwrap()
        .to_string();
    let (code, stderr) = check_bundle_with(&libc);
    assert_eq!(code, Some(1));
    assert!(
        stderr.contains("not ONNX Runtime") && stderr.contains("make ort"),
        "{stderr}"
    );
    assert!(!stderr.contains("panicked"), "{stderr}");
}

#[test]
fn output_closed_early_ends_the_command_without_a_panic() {
    let mut child = befit()
        .args(["check-bundle", bundle_dir("blocks-v1").to_str().unwrap()])
        .arg("--ort-lib")
        .arg(ort_lib())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Close the reading end before the bundle is loaded and the report printed (`| head -0`).
    drop(child.stdout.take());
    let mut stderr = String::new();
    child
        .stderr
        .take()
        .unwrap()
        .read_to_string(&mut stderr)
        .unwrap();
    let status = child.wait().unwrap();
    assert!(!stderr.contains("panicked"), "{stderr}");
    use std::os::unix::process::ExitStatusExt;
    assert_eq!(
        status.signal(),
        Some(13),
        "ended by SIGPIPE, as `cat` would: {status:?}"
    );
}

/// A probe file of the bundled probe set's first `n` rows, its images beside it.
fn first_probe_rows(n: usize, what: &str) -> std::path::PathBuf {
    let dir = scratch_dir(what);
    let rows: Vec<String> = std::fs::read_to_string(probe_dir().join("probe.jsonl"))
        .unwrap()
        .lines()
        .take(n)
        .map(str::to_string)
        .collect();
    let probe = dir.join("probe.jsonl");
    std::fs::write(&probe, rows.join("\n")).unwrap();
    std::os::unix::fs::symlink(probe_dir().join("images"), dir.join("images")).unwrap();
    probe
}

#[test]
fn a_tiny_probe_set_gets_a_small_sample_warning() {
    let probe = first_probe_rows(3, "tiny-probe");
    let out = befit()
        .args([
            "calibrate",
            "--bundle",
            bundle_dir("blocks-v1").to_str().unwrap(),
        ])
        .arg("--probe")
        .arg(&probe)
        .arg("--ort-lib")
        .arg(ort_lib())
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stderr}");
    assert!(
        stderr.contains("warning: only 3 probe images") && stderr.contains("1/3 = 33.3%"),
        "{stderr}"
    );
}

#[test]
fn both_commands_with_a_k_take_it_the_same_way() {
    for command in [&["bank", "query"][..], &["drift"][..]] {
        let text = help(command);
        assert!(text.contains("-k, --k <K>"), "{command:?}: {text}");
    }
}

#[test]
fn offline_commands_do_not_offer_the_servers_queue_and_cache_flags() {
    let serving = [
        "--queue-depth",
        "--caption-cache",
        "--image-cache",
        "--max-wait-micros",
    ];
    let serve = help(&["serve"]);
    for flag in serving {
        assert!(serve.contains(flag), "serve lacks {flag}");
    }
    for command in [
        &["bank", "import"][..],
        &["bank", "query"][..],
        &["bank", "embed-missing"][..],
        &["calibrate"][..],
        &["drift"][..],
        &["score"][..],
    ] {
        let text = help(command);
        assert!(
            text.contains("--workers"),
            "{command:?} keeps the encoder flags"
        );
        for flag in serving {
            assert!(!text.contains(flag), "{command:?} lists {flag}");
        }
    }
}

#[test]
fn drift_opens_with_its_verdict_in_one_sentence() {
    // 40 probe rows: enough for every figure, quick for a test.
    let probe = first_probe_rows(40, "drift-verdict");
    let drift = |to: &str, json: bool| {
        let mut command = befit();
        command
            .args(["drift", "--from", bundle_dir("blocks-v1").to_str().unwrap()])
            .args(["--to", bundle_dir(to).to_str().unwrap()])
            .arg("--probe")
            .arg(&probe)
            .arg("--ort-lib")
            .arg(ort_lib());
        if json {
            command.arg("--json");
        }
        let out = command.output().unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8(out.stdout).unwrap()
    };
    for to in ["blocks-v1", "blocks-v2"] {
        let text = drift(to, false);
        let first = text.lines().next().unwrap();
        let report: befit::stats::DriftReport = serde_json::from_str(&drift(to, true)).unwrap();
        // The sentence the HTML report is headed by, from the same figures.
        let headline =
            befit::stats::drift_headline(&report, &befit::stats::HeadlineThresholds::default());
        assert_eq!(first, headline);
        assert!(
            first.starts_with("Rewards move by") && first.ends_with('.'),
            "{first}"
        );
        // A bundle against itself moves nothing and is safe; the verdict is in the sentence.
        if to == "blocks-v1" {
            assert!(first.contains("the swap looks safe"), "{first}");
        }
        assert!(text.lines().nth(1).unwrap().starts_with("drift from"));
    }
}

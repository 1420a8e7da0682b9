//! Shared set-up: fixtures, ONNX Runtime, models, an in-process router, and
//! the real binary on port 0.

#![allow(dead_code)]

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, OnceLock};
use std::time::{Duration, Instant};

use axum::body::Body;
use axum::http::{Request, StatusCode};
use befit::bundle::Bundle;
use befit::encoders::{Model, ModelSettings};
use befit::metrics::Registry;
use befit::runtime::LibrarySearch;
use befit::server::Limits;
use befit::service::{Service, ServiceConfig};
use http_body_util::BodyExt;
use serde_json::Value;
use tower::ServiceExt;

pub fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

pub fn fixtures() -> PathBuf {
    repo().join("fixtures")
}

pub fn bundle_dir(name: &str) -> PathBuf {
    fixtures().join("models").join(name)
}

pub fn probe_dir() -> PathBuf {
    fixtures().join("probe")
}

/// The ONNX Runtime library, as the binary would find it from the repository.
pub fn ort_lib() -> PathBuf {
    let env = std::env::var_os("ORT_DYLIB_PATH")
        .filter(|v| !v.is_empty())
        .map(PathBuf::from);
    LibrarySearch {
        flag: None,
        env,
        roots: vec![repo()],
        exe_dir: None,
    }
    .locate()
    .unwrap_or_else(|e| panic!("{e}"))
}

pub fn ort_env() -> &'static ort::environment::Environment {
    befit::runtime::environment(&ort_lib()).unwrap_or_else(|e| panic!("{e}"))
}

/// One loaded model per bundle and settings, shared by the tests of this binary.
/// The caption cache is off so that every request encodes; `NAME+cache` loads
/// the bundle NAME with the server's default caption cache instead.
pub fn model(name: &str) -> Arc<Model> {
    type Loaded = std::sync::Mutex<Vec<(String, Arc<Model>)>>;
    static MODELS: OnceLock<Loaded> = OnceLock::new();
    let cache = MODELS.get_or_init(Default::default);
    // A test that failed while loading another bundle must not fail every later test.
    let mut cache = cache.lock().unwrap_or_else(|p| p.into_inner());
    if let Some((_, m)) = cache.iter().find(|(n, _)| n == name) {
        return Arc::clone(m);
    }
    let (dir, cached) = name
        .split_once('+')
        .map_or((name, false), |(dir, _)| (dir, true));
    let bundle = Bundle::open(&bundle_dir(dir)).unwrap_or_else(|e| panic!("{e}"));
    let defaults = ModelSettings::default();
    let settings = ModelSettings {
        layout: befit::encoders::ThreadLayout::Fixed {
            workers: 2,
            intra_threads: 1,
        },
        caption_cache: if cached { defaults.caption_cache } else { 0 },
        ..defaults
    };
    let m =
        Arc::new(Model::load(bundle, ort_env(), &settings, Arc::new(Registry::default())).unwrap());
    cache.push((name.to_string(), Arc::clone(&m)));
    m
}

/// The service's configuration for tests: a fresh data folder, the probe folder as image root.
pub fn config(limits: Limits) -> ServiceConfig {
    // The shared test models serve concurrent tests: their queues hold other
    // tests' work, which must not shed this test's requests. A test that asks
    // for another queue wait (the shedding tests, on a model of their own)
    // keeps it.
    let limits = if limits.max_queue_wait == Limits::default().max_queue_wait {
        Limits {
            max_queue_wait: std::time::Duration::from_secs(3600),
            ..limits
        }
    } else {
        limits
    };
    ServiceConfig {
        image_root: Some(probe_dir()),
        limits,
        ..ServiceConfig::new(Vec::new(), scratch_dir("data"))
    }
}

/// A service opened as `befit serve` opens it, not ready yet.
pub fn unready(config: &ServiceConfig) -> Service {
    Service::open(config, Arc::new(Registry::default())).unwrap_or_else(|e| panic!("{e}"))
}

/// A service made ready with the shared test models (the same start-up as the binary's).
pub fn ready(config: &ServiceConfig, models: &[&str]) -> Service {
    let service = unready(config);
    service
        .ready_with(models.iter().map(|n| model(n)).collect())
        .unwrap_or_else(|e| panic!("{e}"));
    service
}

/// A ready service over a fresh data folder, with the probe folder as image root.
pub fn state_with(models: &[&str], limits: Limits) -> Service {
    ready(&config(limits), models)
}

/// A fresh folder under the system's temporary folder, left for the OS to clean.
pub fn scratch_dir(what: &str) -> PathBuf {
    static COUNTER: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
    let n = COUNTER.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let dir = std::env::temp_dir().join(format!("befit-test-{}-{what}-{n}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

pub fn state() -> Service {
    state_with(&["blocks-v1"], Limits::default())
}

/// A POST of `body` as JSON through the router; status and the body as text
/// (for answers whose bytes matter: key order, HTML).
pub async fn post_text(state: &Service, uri: &str, body: &Value) -> (u16, String) {
    let (status, bytes) = post_bytes(state, uri, body).await;
    (status.as_u16(), String::from_utf8(bytes).unwrap())
}

async fn post_bytes(state: &Service, uri: &str, body: &Value) -> (StatusCode, Vec<u8>) {
    let body = serde_json::to_vec(body).unwrap();
    let (status, _, bytes) = call_raw(state, "POST", uri, "application/json", body).await;
    (status, bytes)
}

/// Runs `command`, which must succeed (else its stderr is the failure); its stdout.
pub fn stdout_of(command: &mut std::process::Command) -> Vec<u8> {
    let out = command.output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    out.stdout
}

/// Sends one request through the router; returns status, headers and body bytes.
pub async fn call_raw(
    state: &Service,
    method: &str,
    uri: &str,
    content_type: &str,
    body: Vec<u8>,
) -> (StatusCode, axum::http::HeaderMap, Vec<u8>) {
    let request = Request::builder()
        .method(method)
        .uri(uri)
        .header("content-type", content_type)
        .body(Body::from(body))
        .unwrap();
    let response = befit::server::app(state.clone())
        .oneshot(request)
        .await
        .unwrap();
    let status = response.status();
    let headers = response.headers().clone();
    let bytes = response.into_body().collect().await.unwrap().to_bytes();
    (status, headers, bytes.to_vec())
}

/// Sends one request through the router; returns status, headers and JSON body (Null when not JSON).
pub async fn call(
    state: &Service,
    method: &str,
    uri: &str,
    content_type: &str,
    body: Vec<u8>,
) -> (StatusCode, axum::http::HeaderMap, Value) {
    let (status, headers, bytes) = call_raw(state, method, uri, content_type, body).await;
    let json = serde_json::from_slice(&bytes).unwrap_or(Value::Null);
    (status, headers, json)
}

pub async fn post_json(state: &Service, uri: &str, body: &Value) -> (StatusCode, Value) {
    let (status, bytes) = post_bytes(state, uri, body).await;
    (
        status,
        serde_json::from_slice(&bytes).unwrap_or(Value::Null),
    )
}

/// One probe row.
#[derive(Debug, Clone, serde::Deserialize)]
pub struct ProbeRow {
    pub image: String,
    pub captions: Vec<String>,
    #[serde(default)]
    pub contrasts: Vec<Contrast>,
}

#[derive(Debug, Clone, serde::Deserialize)]
pub struct Contrast {
    pub caption: String,
    pub changed: String,
    pub from: usize,
}

/// The first `n` rows of the bundled probe set, as JSON.
pub fn probe_json(n: usize) -> Vec<Value> {
    let text = std::fs::read_to_string(probe_dir().join("probe.jsonl")).unwrap();
    text.lines()
        .take(n)
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

pub fn probe_rows(file: &str) -> Vec<ProbeRow> {
    let text = std::fs::read_to_string(probe_dir().join(file)).unwrap();
    text.lines()
        .filter(|l| !l.trim().is_empty())
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

/// The real binary, serving on a free port; killed on drop.
pub struct Server {
    pub child: Child,
    pub url: String,
}

impl Server {
    pub fn start(args: &[&str]) -> Server {
        let mut child = Command::new(env!("CARGO_BIN_EXE_befit"))
            .arg("serve")
            .args(["--listen", "127.0.0.1:0", "--ort-lib"])
            .arg(ort_lib())
            .args(args)
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .expect("start befit");
        let stderr = child.stderr.take().unwrap();
        let (tx, rx) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            let mut sent = false;
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                if !sent {
                    if let Some(url) = line.strip_prefix("befit: listening on ") {
                        let _ = tx.send(url.to_string());
                        sent = true;
                    }
                }
            }
        });
        let url = rx
            .recv_timeout(Duration::from_secs(30))
            .expect("befit did not print its address");
        let server = Server { child, url };
        server.wait_ready();
        server
    }

    fn wait_ready(&self) {
        let client = reqwest::blocking::Client::new();
        let deadline = Instant::now() + Duration::from_secs(60);
        while Instant::now() < deadline {
            if let Ok(r) = client.get(format!("{}/readyz", self.url)).send() {
                if r.status() == 200 {
                    return;
                }
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        panic!("befit did not become ready");
    }

    pub fn kill(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        self.kill();
    }
}

pub fn read(path: impl AsRef<Path>) -> Vec<u8> {
    std::fs::read(path.as_ref()).unwrap_or_else(|e| panic!("{}: {e}", path.as_ref().display()))
}

pub fn b64(bytes: &[u8]) -> String {
    use base64::Engine as _;
    base64::engine::general_purpose::STANDARD.encode(bytes)
}

/// Cosine of two vectors in f64, computed here rather than with befit's own function, so an error
/// in `befit::vectors::cosine` cannot hide one elsewhere: `sum(a b) / (|a| |b|)`.
pub fn cosine(a: &[f32], b: &[f32]) -> f64 {
    assert_eq!(a.len(), b.len());
    let (mut ab, mut aa, mut bb) = (0f64, 0f64, 0f64);
    for (&x, &y) in a.iter().zip(b) {
        let (x, y) = (f64::from(x), f64::from(y));
        ab += x * y;
        aa += x * x;
        bb += y * y;
    }
    ab / (aa.sqrt() * bb.sqrt())
}

/// A PNG whose IHDR declares `w x h` RGB pixels of `bit_depth` bits per sample
/// with an empty image stream: a few dozen bytes claiming any size.
///
/// Section numbers are those of "Portable Network Graphics (PNG) Specification
/// (Second Edition)", W3C Recommendation 10 November 2003 = ISO/IEC 15948:2003
/// (quoted from memory): the signature (5.2); chunks of length, type, data and
/// CRC (5.3), the CRC-32 of ISO 3309 over type and data (5.5); IHDR (11.2.2):
/// width, height, bit depth, colour type 2 (truecolour), compression 0, filter
/// 0, no interlace. The IDAT holds zlib header 78 9c (RFC 1950, 2.2), one final
/// fixed-Huffman block with only the end-of-block code (RFC 1951, 3.2.3 and
/// 3.2.6: bytes 03 00) and the Adler-32 of no bytes, 1 (RFC 1950, 8.2); Python's
/// `zlib.compress(b"")` gives these bytes.
pub fn png_declaring(w: u32, h: u32, bit_depth: u8) -> Vec<u8> {
    let mut ihdr = w.to_be_bytes().to_vec();
    ihdr.extend_from_slice(&h.to_be_bytes());
    ihdr.extend_from_slice(&[bit_depth, 2, 0, 0, 0]);
    let mut png = b"\x89PNG\r\n\x1a\n".to_vec();
    for (kind, data) in [
        (&b"IHDR"[..], &ihdr[..]),
        (
            b"IDAT",
            &[0x78, 0x9c, 0x03, 0x00, 0x00, 0x00, 0x00, 0x01][..],
        ),
        (b"IEND", &[][..]),
    ] {
        let mut chunk = kind.to_vec();
        chunk.extend_from_slice(data);
        png.extend_from_slice(&(data.len() as u32).to_be_bytes());
        png.extend_from_slice(&chunk);
        png.extend_from_slice(&crc32fast::hash(&chunk).to_be_bytes());
    }
    png
}

//! The server under abuse: slow bodies and headers, probes under overload,
//! body limits at their edge, image bombs, metric labels. Each test shows a
//! defect that an earlier server had (named beside it) and is bounded in time.

use std::io::{Read, Write};
use std::net::TcpStream;
use std::time::Duration;

use serde_json::{json, Value};

use befit::intake::image_decode::{
    decode_rgb, read_header, DecodeError, ImageLimits, DEFAULT_MAX_DECODED_BYTES,
};
use befit::server::listen::ConnectionSettings;
use befit::server::Limits;

use crate::util::*;

/// Serves `state` in-process on a free loopback port; stops when the returned sender is dropped.
async fn serve(
    state: befit::service::Service,
    settings: ConnectionSettings,
) -> (String, tokio::sync::oneshot::Sender<()>) {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap().to_string();
    let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
    tokio::spawn(befit::server::run(listener, state, settings, async move {
        let _ = stopped.await;
    }));
    (addr, stop)
}

/// Reads an answer's status line and headers (up to the blank line), or what
/// came before `limit` passed.
fn read_head(stream: &mut TcpStream, limit: Duration) -> String {
    stream.set_read_timeout(Some(limit)).unwrap();
    let mut answer = Vec::new();
    let mut byte = [0u8; 1];
    while !answer.ends_with(b"\r\n\r\n") {
        match stream.read(&mut byte) {
            Ok(1) => answer.push(byte[0]),
            _ => break,
        }
    }
    String::from_utf8_lossy(&answer).into_owned()
}

/// Reads what the server sends on `stream` until it closes or `limit` passes.
fn read_all(stream: &mut TcpStream, limit: Duration) -> String {
    stream.set_read_timeout(Some(limit)).unwrap();
    let mut answer = Vec::new();
    let _ = stream.read_to_end(&mut answer);
    String::from_utf8_lossy(&answer).into_owned()
}

fn rewards_body() -> Value {
    let row = &probe_rows("probe.jsonl")[0];
    json!({"groups": [{"image": {"path": row.image}, "captions": [row.captions[0]]}]})
}

/// An earlier server let 512 connections trickling 1 byte a second hold every
/// request slot: every other client got 503 for a minute.
#[tokio::test(flavor = "multi_thread")]
async fn slow_bodies_hold_no_request_slot_and_are_cut_off() {
    let limits = Limits {
        max_inflight: 2,
        body_timeout: Duration::from_secs(2),
        ..Limits::default()
    };
    let (addr, _stop) = serve(
        state_with(&["blocks-v1"], limits),
        ConnectionSettings::default(),
    )
    .await;
    let before = befit::server::body::bodies_reading();
    let slow: Vec<TcpStream> = (0..4)
        .map(|_| {
            let mut s = TcpStream::connect(&addr).unwrap();
            s.write_all(
                b"POST /v1/rewards HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\nContent-Length: 1000\r\n\r\n{",
            )
            .unwrap();
            s
        })
        .collect();
    // Wait, by state rather than by a guessed time, until all four are being read.
    let mut tries = 0;
    while befit::server::body::bodies_reading() < before + 4 {
        tries += 1;
        assert!(tries < 500, "the slow bodies never reached the server");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    let client = reqwest::Client::new();
    for _ in 0..3 {
        let answer = client
            .post(format!("http://{addr}/v1/rewards"))
            .json(&rewards_body())
            .send()
            .await
            .unwrap();
        assert_eq!(answer.status(), 200, "{:?}", answer.text().await);
    }
    // Each slow body is refused once its deadline passes: 408 slow_body.
    for mut s in slow {
        let answer = tokio::task::spawn_blocking(move || read_all(&mut s, Duration::from_secs(10)))
            .await
            .unwrap();
        assert!(answer.starts_with("HTTP/1.1 408"), "{answer}");
        assert!(answer.contains("slow_body"), "{answer}");
    }
}

/// An earlier server never closed a connection that sent half its headers.
#[tokio::test(flavor = "multi_thread")]
async fn a_connection_that_never_finishes_its_headers_is_closed() {
    let settings = ConnectionSettings {
        header_timeout: Duration::from_secs(1),
        ..ConnectionSettings::default()
    };
    let (addr, _stop) = serve(state(), settings).await;
    let answer = tokio::task::spawn_blocking(move || {
        let mut s = TcpStream::connect(&addr).unwrap();
        s.write_all(b"GET /healthz HTTP/1.1\r\nHost: x\r\n")
            .unwrap();
        let started = std::time::Instant::now();
        let answer = read_all(&mut s, Duration::from_secs(20));
        (answer, started.elapsed())
    })
    .await
    .unwrap();
    // Closed by the server (end of stream well before our own 20 s read limit).
    assert!(answer.1 < Duration::from_secs(15), "{answer:?}");
    assert!(!answer.0.contains("200 OK"), "{answer:?}");
}

/// An earlier server put /healthz, /readyz and /metrics behind the request
/// limiter: under load they answered 503 like the rest.
#[tokio::test(flavor = "multi_thread")]
async fn probes_answer_when_no_request_slot_is_free() {
    // No slot at all: every API route is shed, the probes are not.
    let state = state_with(
        &["blocks-v1"],
        Limits {
            max_inflight: 0,
            ..Limits::default()
        },
    );
    let (status, _, _) = call(&state, "GET", "/v1/models", "", vec![]).await;
    assert_eq!(status, 503);
    for probe in ["/healthz", "/readyz", "/metrics"] {
        let (status, _, _) = call(&state, "GET", probe, "", vec![]).await;
        assert_eq!(status, 200, "{probe}");
    }
}

/// Every body-taking route honours --max-body-bytes exactly: limit bytes are
/// read, limit + 1 are refused with 413 naming the flag. (An earlier
/// `/v1/images` stopped at the framework's 2 MiB whatever the flag said.)
#[tokio::test(flavor = "multi_thread")]
async fn every_route_takes_its_limit_and_refuses_one_byte_more() {
    let limit = 4096;
    let state = state_with(
        &["blocks-v1"],
        Limits {
            max_body_bytes: limit,
            ..Limits::default()
        },
    );
    let padded = |n: usize| {
        let mut body = b"{}".to_vec();
        body.resize(n, b' ');
        body
    };
    for route in [
        "/v1/images",
        "/v1/rewards",
        "/v1/vectors",
        "/v1/bank",
        "/v1/neighbors",
        "/v1/calibration",
        "/v1/drift",
    ] {
        let (status, _, json) =
            call(&state, "POST", route, "application/json", padded(limit)).await;
        assert_ne!(status, 413, "{route} at the limit: {json}");
        assert_eq!(
            status.as_u16() / 100,
            4,
            "{route}: an empty object is a client error: {json}"
        );
        let (status, _, json) =
            call(&state, "POST", route, "application/json", padded(limit + 1)).await;
        assert_eq!(status, 413, "{route} over the limit: {json}");
        assert!(json["error"]["message"]
            .as_str()
            .unwrap()
            .contains("--max-body-bytes"));
    }
    // At the default body limit, a 3 MiB registration is read (it was 413 at 2 MiB).
    let state = state_with(
        &["blocks-v1"],
        Limits {
            max_images: 100_000,
            ..Limits::default()
        },
    );
    let image = read(probe_dir().join(&probe_rows("probe.jsonl")[0].image));
    let copies = 3 * 1024 * 1024 / (image.len() * 4 / 3) + 1;
    let images: Vec<Value> = (0..copies)
        .map(|_| json!({"base64": b64(&image)}))
        .collect();
    let body = serde_json::to_vec(&json!({"images": images})).unwrap();
    assert!(body.len() > 3 * 1024 * 1024);
    let (status, _, json) = call(&state, "POST", "/v1/images", "application/json", body).await;
    assert_eq!(status, 200, "{json}");
}

/// A 40-megapixel PNG of 16-bit RGB is a few hundred bytes here and 240 MB
/// decoded; an earlier server decoded a dozen at once (5.3 GB). It is refused
/// from its header now, as is the widest width a PNG may declare.
#[tokio::test(flavor = "multi_thread")]
async fn image_bombs_are_refused_from_their_header() {
    let state = state();
    for (png, needle) in [
        (png_declaring(4000, 10_000, 16), "--max-decoded-bytes"),
        (png_declaring(2_147_483_647, 1, 8), "--max-pixels"),
    ] {
        let groups: Vec<Value> = (0..12)
            .map(|_| json!({"image": {"base64": b64(&png)}, "captions": ["a red cube"]}))
            .collect();
        let (status, json) = post_json(&state, "/v1/rewards", &json!({"groups": groups})).await;
        assert_eq!(status, 422, "{json}");
        assert_eq!(json["error"]["code"], "image_too_large", "{json}");
        assert!(
            json["error"]["message"].as_str().unwrap().contains(needle),
            "{json}"
        );
    }
}

/// A file under --image-root larger than a body could carry is refused from
/// its size, before it is read (an earlier server read a 2 GB file whole).
#[tokio::test(flavor = "multi_thread")]
async fn oversized_files_under_the_image_root_are_not_read() {
    let root = scratch_dir("root");
    std::fs::write(root.join("big.png"), vec![0u8; 70 * 1024]).unwrap();
    let config = befit::service::ServiceConfig {
        image_root: Some(root),
        limits: Limits {
            max_body_bytes: 64 * 1024,
            ..Limits::default()
        },
        ..befit::service::ServiceConfig::new(Vec::new(), scratch_dir("data"))
    };
    let state = ready(&config, &["blocks-v1"]);
    let (status, json) = post_json(
        &state,
        "/v1/images",
        &json!({"images": [{"path": "big.png"}]}),
    )
    .await;
    assert_eq!(status, 422, "{json}");
    assert_eq!(json["error"]["code"], "image_too_large");
    assert!(
        json["error"]["message"]
            .as_str()
            .unwrap()
            .contains("71680 bytes"),
        "{json}"
    );
}

/// An earlier server labelled request metrics with the raw method: 32,000
/// random methods made /metrics 80 MB.
#[tokio::test(flavor = "multi_thread")]
async fn unknown_methods_do_not_become_metric_labels() {
    let state = state();
    for i in 0..20 {
        call(&state, &format!("XMETHOD{i}"), "/v1/models", "", vec![]).await;
    }
    let request = axum::http::Request::builder()
        .uri("/metrics")
        .body(axum::body::Body::empty())
        .unwrap();
    let response = tower::ServiceExt::oneshot(befit::server::app(state.clone()), request)
        .await
        .unwrap();
    let text = http_body_util::BodyExt::collect(response.into_body())
        .await
        .unwrap()
        .to_bytes();
    let text = String::from_utf8_lossy(&text);
    assert!(!text.contains("XMETHOD"), "raw methods leaked into labels");
    assert!(
        text.contains("method=\"other\""),
        "unknown methods are counted as other"
    );
}

#[test]
fn decode_limits_are_read_from_the_header() {
    let limits = ImageLimits::default();
    let huge = png_declaring(50_000, 50_000, 8);
    assert_eq!(read_header(&huge).unwrap().width, 50_000);
    match decode_rgb(&huge, &limits) {
        Err(DecodeError::TooLarge { pixels, .. }) => assert_eq!(pixels, 2_500_000_000),
        other => panic!("expected TooLarge, got {other:?}"),
    }
    // 2^31 - 1 is the largest width the PNG specification allows (ISO/IEC
    // 15948:2003, 11.2.2 IHDR): a valid header, refused for its size, not as corrupt.
    match decode_rgb(&png_declaring(2_147_483_647, 1, 8), &limits) {
        Err(e @ DecodeError::TooLarge { .. }) => assert!(e.is_too_large()),
        other => panic!("expected TooLarge, got {other:?}"),
    }
    // 16-bit RGB: 3 channels x 2 bytes a pixel (same section: colour type 2, bit depth 16).
    let deep = png_declaring(4000, 10_000, 16);
    assert_eq!(read_header(&deep).unwrap().decoded_bytes, 4000 * 10_000 * 6);
    match decode_rgb(&deep, &limits) {
        Err(DecodeError::TooManyBytes { bytes, limit, .. }) => {
            assert_eq!((bytes, limit), (240_000_000, DEFAULT_MAX_DECODED_BYTES))
        }
        other => panic!("expected TooManyBytes, got {other:?}"),
    }
    // 8-bit RGB of the same size stays under it: 120 MB.
    let eight = read_header(&png_declaring(4000, 10_000, 8)).unwrap();
    assert_eq!(eight.decoded_bytes, 120_000_000);
    assert!(eight.check(&limits).is_ok());
    // A small header with no pixel data is corrupt, not too large.
    assert!(matches!(
        decode_rgb(&png_declaring(4, 4, 8), &limits),
        Err(DecodeError::Corrupt { .. })
    ));
}

/// Defect: shedding came after reading, parsing and tokenising (each 503 took
/// ~1.2 s under 3x load) and always said `Retry-After: 1`. Now new work is
/// refused before its body is read once the queued encoding exceeds
/// `--max-queue-wait-ms`, and `Retry-After` is the queue's drain time.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn queued_work_sheds_new_work_at_once_with_its_drain_time() {
    let limits = Limits {
        max_queue_wait: Duration::ZERO, // any queued work sheds: no timing to race
        ..Limits::default()
    };
    // A model of its own (the shared ones serve concurrent tests, which this
    // queue must not shed), one worker, one caption per run: the queue drains
    // slowly enough that nothing here races it.
    let settings = befit::encoders::ModelSettings {
        caption_cache: 0,
        text_batch: befit::batching::BatchSettings {
            max_batch: 1,
            ..befit::encoders::ModelSettings::default().text_batch
        },
        ..befit::encoders::ModelSettings::default()
    };
    let bundle = befit::bundle::Bundle::open(&bundle_dir("blocks-v1")).unwrap();
    let model = befit::encoders::Model::load(bundle, ort_env(), &settings, Default::default());
    let state = unready(&config(limits));
    state
        .ready_with(vec![std::sync::Arc::new(model.unwrap())])
        .unwrap();
    // One big request of new captions fills the text queue.
    let captions: Vec<String> = (0..16_000)
        .map(|i| {
            format!(
                "{} small red circles left of {} big blue squares",
                i % 97,
                i
            )
        })
        .collect();
    let big = json!({"groups": [{"image": {"path": "images/00000.png"}, "captions": captions}]});
    let filler = {
        let state = state.clone();
        tokio::spawn(async move { post_json(&state, "/v1/rewards", &big).await.0 })
    };
    let waited = std::time::Instant::now();
    while state.queued_work().is_zero() {
        assert!(
            waited.elapsed() < Duration::from_secs(60),
            "the queue never filled"
        );
        tokio::time::sleep(Duration::from_millis(1)).await;
    }
    let queued = state.queued_work();
    // Headers announcing a body that never comes: the answer can only come
    // before the body is read (else it would wait --body-timeout-secs, 30 s).
    let (addr, _stop) = serve(state.clone(), ConnectionSettings::default()).await;
    let head = tokio::task::spawn_blocking(move || {
        let mut s = TcpStream::connect(&addr).unwrap();
        s.write_all(
            b"POST /v1/rewards HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\nContent-Length: 100000\r\n\r\n",
        )
        .unwrap();
        read_head(&mut s, Duration::from_secs(10))
    })
    .await
    .unwrap();
    assert!(head.starts_with("HTTP/1.1 503"), "{head:?}");
    let retry: u64 = head
        .lines()
        .find_map(|l| {
            l.to_ascii_lowercase()
                .strip_prefix("retry-after: ")
                .map(str::to_string)
        })
        .unwrap_or_else(|| panic!("no Retry-After in {head:?}"))
        .trim()
        .parse()
        .unwrap();
    // The drain time behind it moves with the encoders' recent speed, so only
    // its form is checked here; its rounding is unit-tested in server::error.
    assert!(retry >= 1, "{retry} vs {queued:?}");
    // Reads are not shed, and once the queue has drained, work is admitted again.
    let (status, _, _) = call(&state, "GET", "/v1/models", "", vec![]).await;
    assert_eq!(status, 200);
    assert_eq!(filler.await.unwrap(), 200);
    assert!(state.queued_work().is_zero());
    let (status, body) = post_json(&state, "/v1/rewards", &rewards_body()).await;
    assert_eq!(status, 200, "{body}");
}

/// Defect: a drift timed out at 10 s kept a core busy 30 s more. Now the
/// embedding of a request that is gone stops before its next encoder batch:
/// after the timeout's answer, the model's encoder runs stop growing.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_timed_out_drift_stops_encoding() {
    // The timeout must fire once encoding has begun: 400 ms does on a quiet
    // machine; on a loaded one the probe's parsing alone can take longer, so
    // the timeout doubles until a timed-out drift had started encoding.
    for timeout_ms in [400, 800, 1600, 3200, 6400] {
        if timed_out_drift_stopped(Duration::from_millis(timeout_ms)).await {
            return;
        }
    }
    panic!("no drift had started encoding when its request timed out, even at 6.4 s");
}

/// Sends a drift that times out after `timeout`; false when it had not
/// started encoding by then (nothing to check), else checks that encoding
/// stopped with the request.
async fn timed_out_drift_stopped(timeout: Duration) -> bool {
    let limits = Limits {
        request_timeout: timeout,
        ..Limits::default()
    };
    // A model of its own, so the encoder runs counted are this test's only.
    let registry = std::sync::Arc::new(befit::metrics::Registry::default());
    let settings = befit::encoders::ModelSettings {
        caption_cache: 0,
        ..befit::encoders::ModelSettings::default()
    };
    let bundle = befit::bundle::Bundle::open(&bundle_dir("blocks-v1")).unwrap();
    let model = befit::encoders::Model::load(bundle, ort_env(), &settings, registry.clone());
    let state = unready(&config(limits));
    let model = std::sync::Arc::new(model.unwrap());
    state.ready_with(vec![model]).unwrap();
    let runs = || {
        let mut n = 0;
        registry.read(|name, _, reading| {
            if let ("befit_encoder_batch_size", befit::metrics::Reading::Histogram(h)) =
                (name, reading)
            {
                n += h.count;
            }
        });
        n
    };
    // The whole probe set twice over (two models' worth of work on one): seconds of encoding.
    let body = json!({"from": "blocks@v1", "to": "blocks@v1", "probe": probe_json(1000)});
    let (status, answer) = post_json(&state, "/v1/drift", &body).await;
    assert_eq!(status, 503, "{answer}");
    assert!(
        answer["error"]["message"]
            .to_string()
            .contains("--request-timeout-secs"),
        "{answer}"
    );
    let at_answer = runs();
    if at_answer == 0 {
        return false;
    }
    tokio::time::sleep(Duration::from_millis(1500)).await;
    // At most what the probe batch in flight when the request went still
    // asks of the encoders (256 captions, split into runs of 64 or fewer);
    // without the flag, hundreds of runs follow.
    let later = runs();
    assert!(
        later <= at_answer + 16,
        "encoder runs went on after the answer: {at_answer} then {later}"
    );
    true
}

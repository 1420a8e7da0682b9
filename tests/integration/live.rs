//! The live page and `GET /v1/pulse` through the router: the page's files and
//! their Content-Security-Policy, the pulse's shape, its numbers moving after
//! reward requests, and the watch routes answering while the work routes are
//! saturated.

use serde_json::{json, Value};

use crate::util::*;

async fn get(state: &befit::service::Service, uri: &str) -> (u16, axum::http::HeaderMap, Value) {
    let (status, headers, json) = call(state, "GET", uri, "application/json", Vec::new()).await;
    (status.as_u16(), headers, json)
}

/// A blocks-world scene of this test's own: an orange square on a pale table.
fn orange_square_png() -> Vec<u8> {
    let scene = image::RgbImage::from_fn(64, 64, |x, y| {
        if (20..44).contains(&x) && (20..44).contains(&y) {
            image::Rgb([213, 94, 0])
        } else {
            image::Rgb([236, 231, 220])
        }
    });
    let mut png = std::io::Cursor::new(Vec::new());
    scene
        .write_to(&mut png, image::ImageFormat::Png)
        .expect("encode a PNG in memory");
    png.into_inner()
}

fn f(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

#[tokio::test(flavor = "multi_thread")]
async fn the_page_and_its_files_come_from_befit_alone() {
    let state = state();
    let (status, headers, _) = get(&state, "/").await;
    assert_eq!(status, 200);
    assert_eq!(headers["content-type"], "text/html; charset=utf-8");
    let csp = headers["content-security-policy"].to_str().unwrap();
    assert!(csp.starts_with("default-src 'none';"), "{csp}");
    for allowed in [
        "script-src 'self'",
        "style-src 'self'",
        "connect-src 'self'",
    ] {
        assert!(csp.contains(allowed), "{csp}");
    }
    for (uri, kind) in [
        ("/page/live.js", "text/javascript; charset=utf-8"),
        ("/page/live.css", "text/css; charset=utf-8"),
        ("/page/icon.svg", "image/svg+xml"),
    ] {
        let (status, headers, _) = get(&state, uri).await;
        assert_eq!(
            (status, headers["content-type"].to_str().unwrap()),
            (200, kind),
            "{uri}"
        );
    }
    let response = tower::ServiceExt::oneshot(
        befit::server::app(state.clone()),
        axum::http::Request::get("/page/live.css")
            .body(axum::body::Body::empty())
            .unwrap(),
    )
    .await
    .unwrap();
    let css = http_body_util::BodyExt::collect(response.into_body())
        .await
        .unwrap()
        .to_bytes();
    // The reports' palette leads the style: Okabe and Ito (2008), "Color
    // Universal Design", blue #0072B2 and vermillion #D55E00 (from memory).
    let css = String::from_utf8(css.to_vec()).unwrap();
    assert!(
        css.starts_with(":root{--s0:#0072B2;--s1:#D55E00;"),
        "{}",
        &css[..80]
    );
}

#[tokio::test(flavor = "multi_thread")]
async fn the_pulse_names_the_models_and_counts_reward_requests() {
    let state = state();
    let (status, _, before) = get(&state, "/v1/pulse").await;
    assert_eq!(status, 200, "{before}");
    assert_eq!(before["status"], "ready");
    let (_, _, listed) = get(&state, "/v1/models").await;
    assert_eq!(before["models"][0]["id"], "blocks@v1");
    assert_eq!(before["models"][0]["digest"], listed["models"][0]["digest"]);
    assert_eq!(before["models"][0]["ready"], true);
    assert_eq!(before["bank"]["captions"], 0);
    assert_eq!(before["bank"]["models"][0]["model"]["id"], "blocks@v1");
    let (_, _, bank) = get(&state, "/v1/bank").await;
    assert_eq!(
        before["bank"], bank,
        "the page's bank numbers are GET /v1/bank's"
    );
    assert_eq!(before["sample_every_ms"], 1000);
    assert!(before["history"].is_array());
    assert!(
        before["since_start"]["routes"].get("/v1/rewards").is_none(),
        "no reward request yet"
    );

    let row = &probe_json(1)[0];
    let image = json!({"base64": b64(&orange_square_png())});
    let body =
        json!({"groups": [{"image": image, "captions": [row["captions"][0], row["captions"][1]]}]});
    for _ in 0..3 {
        let (status, answer) = post_json(&state, "/v1/rewards", &body).await;
        assert_eq!(status, 200, "{answer}");
    }
    let (_, _, after) = get(&state, "/v1/pulse?seconds=5").await;
    let since = &after["since_start"];
    let rewards = &since["routes"]["/v1/rewards"];
    assert_eq!(f(&rewards["requests"]), 3.0);
    assert!(f(&rewards["requests_per_s"]) > 0.0);
    assert!(f(&rewards["p50_ms"]) > 0.0 && f(&rewards["p50_ms"]) <= f(&rewards["p99_ms"]));
    // One image no other test sends (the model's memory cache is shared by
    // the tests), three times: the first lookup misses memory and the store
    // and is encoded; the next two hit memory.
    assert_eq!(
        since["caches"]["image_memory"],
        json!({"hits": 2.0, "misses": 1.0, "hit_rate": 2.0 / 3.0})
    );
    assert_eq!(f(&since["caches"]["image_store"]["misses"]), 1.0);
    assert!(f(&since["images_per_s"]) > 0.0);
    // The current window holds the same requests (it began at or before the start).
    assert_eq!(
        f(&after["current"]["routes"]["/v1/rewards"]["requests"]),
        3.0
    );
    assert!(after["history"].as_array().unwrap().len() <= 5);
}

#[tokio::test(flavor = "multi_thread")]
async fn the_pulse_refuses_a_history_it_does_not_keep() {
    let state = state();
    for uri in [
        "/v1/pulse?seconds=0",
        "/v1/pulse?seconds=601",
        "/v1/pulse?seconds=ten",
    ] {
        let (status, _, answer) = get(&state, uri).await;
        assert_eq!(status, 400, "{uri}: {answer}");
        assert_eq!(answer["error"]["code"], "invalid_field");
        assert_eq!(answer["error"]["field"], "seconds");
    }
}

#[tokio::test(flavor = "multi_thread")]
async fn watching_works_while_the_work_routes_are_saturated() {
    // No request may be in flight: every work route is shed at once.
    let limits = befit::server::Limits {
        max_inflight: 0,
        ..befit::server::Limits::default()
    };
    let state = state_with(&["blocks-v1"], limits);
    let row = &probe_json(1)[0];
    let body =
        json!({"groups": [{"image": {"path": row["image"]}, "captions": [row["captions"][0]]}]});
    let (status, answer) = post_json(&state, "/v1/rewards", &body).await;
    assert_eq!(status, 503, "{answer}");
    assert_eq!(answer["error"]["code"], "overloaded");
    for uri in ["/", "/v1/pulse", "/healthz", "/readyz", "/metrics"] {
        let (status, _, _) = get(&state, uri).await;
        assert_eq!(status, 200, "{uri}");
    }
    let (_, _, pulse) = get(&state, "/v1/pulse").await;
    assert!(f(&pulse["since_start"]["routes"]["/v1/rewards"]["overloaded_per_s"]) > 0.0);
    assert!(f(&pulse["since_start"]["overloaded_per_s"]) > 0.0);
}

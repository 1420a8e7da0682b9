//! Hand-written code beside the well-kept crates that could replace it, timed in one run.
//!
//! 1. Metrics: befit's registry (`befit::metrics::Registry`) against `prometheus-client`
//!    with the same families and label sets: counter increments and histogram observations
//!    from two threads (the request path), and rendering the exposition (a `/metrics` scrape).
//! 2. Dot product: befit's AVX2 + FMA kernel with its portable fallback
//!    (`befit::bank::distance::dot`) against `simsimd` (runtime dispatch over AVX2,
//!    AVX-512, NEON, SVE) at 64 and 512 dimensions, one pair and a scan of 100k rows.
//! 3. Resampling: befit's Pillow-compatible bicubic resize of a 640x480 image to
//!    224x168 (`befit::intake::resample::resize`); `run.py` times Pillow on the same size.
//! 4. A whole image intake on one core: a 640x480 JPEG (`target/libraries/scene.jpg`, which
//!    `run.py` writes with Pillow) decoded, brought to 224 px by shorter side and centre crop
//!    (bicubic) and normalised with CLIP's mean and std, as a CLIP-layout bundle asks
//!    (`befit::intake::image_tensor::tensor_from_bytes`); `run.py` does the same with Pillow
//!    and numpy.
//!
//! Prints one JSON line per figure; `bench/libraries/run.py` prints the ratios.
//! `cargo bench --bench libraries`

use std::hint::black_box;
use std::sync::Arc;
use std::time::Instant;

use befit::bank::distance::dot;
use befit::bundle::{Filter, ImageSpec, ResizeRule};
use befit::intake::image_decode::ImageLimits;
use befit::intake::image_tensor::tensor_from_bytes;
use befit::intake::resample::resize;
use befit::metrics::Registry;
use prometheus_client::encoding::text::encode;
use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::histogram::Histogram;
use simsimd::SpatialSimilarity;

/// Routes and statuses of a busy server: the label sets one scrape sees.
const ROUTES: &[&str] = &[
    "/v1/rewards",
    "/v1/images",
    "/v1/vectors",
    "/v1/neighbors",
    "/v1/bank",
    "/v1/calibration",
    "/v1/drift",
    "/healthz",
];
const STATUSES: &[&str] = &["200", "400", "413", "503"];
const SECONDS: &[f64] = &[
    0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0,
];

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct RequestLabels {
    route: String,
    method: String,
    status: String,
}

#[derive(Clone, Debug, Hash, PartialEq, Eq, EncodeLabelSet)]
struct RouteLabels {
    route: String,
}

struct Client {
    registry: prometheus_client::registry::Registry,
    requests: Family<RequestLabels, Counter>,
    seconds: Family<RouteLabels, Histogram>,
}

fn client_registry() -> Client {
    let mut registry = prometheus_client::registry::Registry::default();
    let requests = Family::<RequestLabels, Counter>::default();
    let seconds = Family::<RouteLabels, Histogram>::new_with_constructor(
        (|| Histogram::new(SECONDS.iter().copied())) as fn() -> Histogram,
    );
    registry.register(
        "befit_http_requests",
        "HTTP requests answered, by matched route, method and status.",
        requests.clone(),
    );
    registry.register(
        "befit_http_request_seconds",
        "HTTP request latency in seconds, by matched route.",
        seconds.clone(),
    );
    Client {
        registry,
        requests,
        seconds,
    }
}

fn json(what: &str, fields: &[(&str, f64)]) {
    let body: Vec<String> = fields.iter().map(|(k, v)| format!("\"{k}\":{v}")).collect();
    println!("{{\"what\":\"{what}\",{}}}", body.join(","));
}

/// Seconds per call of `f` over `n` calls, best of three rounds.
fn per_call(n: usize, mut f: impl FnMut(usize)) -> f64 {
    (0..3)
        .map(|_| {
            let start = Instant::now();
            for i in 0..n {
                f(i);
            }
            start.elapsed().as_secs_f64() / n as f64
        })
        .fold(f64::INFINITY, f64::min)
}

/// One request's bookkeeping on two threads at once: a counter and a histogram.
fn two_threads(record: Arc<dyn Fn(usize) + Send + Sync>, n: usize) -> f64 {
    (0..3)
        .map(|_| {
            let start = Instant::now();
            let workers: Vec<_> = (0..2)
                .map(|t| {
                    let record = Arc::clone(&record);
                    std::thread::spawn(move || (0..n).for_each(|i| record(i * 2 + t)))
                })
                .collect();
            workers.into_iter().for_each(|w| w.join().expect("worker"));
            start.elapsed().as_secs_f64() / (2 * n) as f64
        })
        .fold(f64::INFINITY, f64::min)
}

fn metrics() {
    let n = 200_000;
    let ours = Arc::new(Registry::default());
    let record_ours = {
        let ours = Arc::clone(&ours);
        Arc::new(move |i: usize| {
            let route = ROUTES[i % ROUTES.len()];
            let status = STATUSES[i % STATUSES.len()];
            ours.add(
                "befit_http_requests_total",
                &[("route", route), ("method", "POST"), ("status", status)],
                1,
            );
            ours.observe(
                "befit_http_request_seconds",
                &[("route", route)],
                (i % 1000) as f64 * 1e-4,
            );
        })
    };
    let theirs = Arc::new(client_registry());
    let record_theirs = {
        let theirs = Arc::clone(&theirs);
        Arc::new(move |i: usize| {
            let route = ROUTES[i % ROUTES.len()];
            let status = STATUSES[i % STATUSES.len()];
            theirs
                .requests
                .get_or_create(&RequestLabels {
                    route: route.to_string(),
                    method: "POST".to_string(),
                    status: status.to_string(),
                })
                .inc();
            theirs
                .seconds
                .get_or_create(&RouteLabels {
                    route: route.to_string(),
                })
                .observe((i % 1000) as f64 * 1e-4);
        })
    };
    let ours_record = two_threads(record_ours, n);
    let theirs_record = two_threads(record_theirs, n);
    json(
        "metrics_record",
        &[
            ("befit_ns", ours_record * 1e9),
            ("prometheus_client_ns", theirs_record * 1e9),
        ],
    );

    let renders = 2_000;
    let ours_render = per_call(renders, |_| {
        black_box(ours.render());
    });
    let theirs_render = per_call(renders, |_| {
        let mut out = String::new();
        encode(&mut out, &theirs.registry).expect("encode");
        black_box(out);
    });
    json(
        "metrics_render",
        &[
            ("befit_us", ours_render * 1e6),
            ("prometheus_client_us", theirs_render * 1e6),
            (
                "series",
                (ROUTES.len() * STATUSES.len() + ROUTES.len()) as f64,
            ),
        ],
    );
}

/// Seeded unit-length rows (a fixed linear congruential sequence: no dependency needed).
fn rows(n: usize, dim: usize, seed: u64) -> Vec<f32> {
    let mut state = seed;
    let mut out: Vec<f32> = (0..n * dim)
        .map(|_| {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            ((state >> 40) as f32 / (1u64 << 24) as f32) - 0.5
        })
        .collect();
    for row in out.chunks_exact_mut(dim) {
        let norm = row.iter().map(|x| x * x).sum::<f32>().sqrt();
        row.iter_mut().for_each(|x| *x /= norm);
    }
    out
}

fn dots() {
    for dim in [64usize, 512] {
        let bank_rows = 100_000;
        let bank = rows(bank_rows, dim, 7);
        let query = rows(1, dim, 11);
        // Same answers first: a faster kernel that disagrees is no candidate.
        let worst = bank
            .chunks_exact(dim)
            .map(|row| {
                let theirs = f32::dot(&query, row).expect("same length") as f32;
                (dot(&query, row) - theirs).abs()
            })
            .fold(0.0f32, f32::max);
        let scan = |kernel: &dyn Fn(&[f32], &[f32]) -> f32| {
            per_call(20, |_| {
                let mut best = f32::MIN;
                for row in bank.chunks_exact(dim) {
                    best = best.max(kernel(&query, row));
                }
                black_box(best);
            })
        };
        let ours = scan(&|a, b| dot(a, b));
        let theirs = scan(&|a, b| f32::dot(a, b).expect("same length") as f32);
        json(
            "dot_scan",
            &[
                ("dim", dim as f64),
                ("rows", bank_rows as f64),
                ("befit_ms", ours * 1e3),
                ("simsimd_ms", theirs * 1e3),
                ("max_abs_difference", f64::from(worst)),
            ],
        );
    }
}

fn resampling() {
    let (w, h) = (640u32, 480u32);
    let pixels = rows(1, (w * h * 3) as usize, 3);
    let image = image::RgbImage::from_fn(w, h, |x, y| {
        let i = ((y * w + x) * 3) as usize;
        image::Rgb([0, 1, 2].map(|c| ((pixels[i + c] + 0.1) * 1200.0).clamp(0.0, 255.0) as u8))
    });
    let seconds = per_call(100, |_| {
        black_box(resize(&image, 224, 168, Filter::Bicubic));
    });
    json(
        "resize_bicubic_640x480_to_224x168",
        &[("befit_ms", seconds * 1e3)],
    );
}

fn intake() {
    let path = std::path::Path::new("target/libraries/scene.jpg");
    let Ok(jpeg) = std::fs::read(path) else {
        eprintln!(
            "{} missing (bench/libraries/run.py writes it): intake not timed",
            path.display()
        );
        return;
    };
    let spec = ImageSpec {
        file: String::new(),
        input: String::new(),
        output: String::new(),
        size: 224,
        resize: ResizeRule::ShorterThenCrop,
        filter: Filter::Bicubic,
        mean: [0.481_454_66, 0.457_827_5, 0.408_210_73],
        std: [0.268_629_54, 0.261_302_6, 0.275_777_1],
    };
    let limits = ImageLimits::default();
    let seconds = per_call(50, |_| {
        black_box(tensor_from_bytes(&jpeg, &limits, &spec).expect("a readable JPEG"));
    });
    json("intake_jpeg_640x480_to_224", &[("befit_ms", seconds * 1e3)]);
}

fn main() {
    metrics();
    dots();
    resampling();
    intake();
}

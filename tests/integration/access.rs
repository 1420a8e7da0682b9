//! Who may use the server: keys and scopes on every route, the Host check
//! against DNS rebinding, cross-site writes, per-key rate limits, the audit
//! log, loopback by default, and TLS against the real binary.

use std::io::Write;
use std::path::Path;
use std::process::{Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use axum::body::Body;
use axum::http::{Request, StatusCode};
use befit::server::access::host::HostPolicy;
use befit::server::access::keys::add_key;
use befit::server::access::rate::KeyRates;
use befit::server::access::{need, Access, KeySet, Need, Scope};
use befit::service::Service;
use http_body_util::BodyExt;
use serde_json::{json, Value};
use tower::ServiceExt;

use crate::util::*;

/// One key per scope, and one with statistics and admin; their tokens by name.
struct Keys {
    set: KeySet,
    tokens: Vec<(&'static str, String)>,
}

impl Keys {
    fn make() -> Keys {
        let path = scratch_dir("keys").join("keys");
        let made = [
            ("scoring", vec![Scope::Scoring]),
            ("bank-write", vec![Scope::BankWrite]),
            ("statistics", vec![Scope::Statistics]),
            ("admin", vec![Scope::Admin]),
            ("stats-admin", vec![Scope::Statistics, Scope::Admin]),
        ];
        let tokens = made
            .iter()
            .map(|(id, scopes)| (*id, add_key(&path, Some(id), scopes).unwrap().token))
            .collect();
        Keys {
            set: KeySet::load(&path).unwrap(),
            tokens,
        }
    }

    fn token(&self, id: &str) -> &str {
        &self.tokens.iter().find(|(k, _)| *k == id).unwrap().1
    }
}

const HOST: &str = "127.0.0.1:7878";

fn loopback_hosts() -> Option<HostPolicy> {
    Some(HostPolicy::new("127.0.0.1".parse().unwrap(), &[]))
}

struct Answer {
    status: StatusCode,
    headers: axum::http::HeaderMap,
    json: Value,
}

impl Answer {
    fn code(&self) -> &str {
        self.json["error"]["code"].as_str().unwrap_or("")
    }
}

async fn send(router: &axum::Router, request: Request<Body>) -> Answer {
    let response = router.clone().oneshot(request).await.unwrap();
    let status = response.status();
    let headers = response.headers().clone();
    let bytes = response.into_body().collect().await.unwrap().to_bytes();
    Answer {
        status,
        headers,
        json: serde_json::from_slice(&bytes).unwrap_or(Value::Null),
    }
}

fn request(method: &str, path: &str, token: Option<&str>, body: &Value) -> Request<Body> {
    let mut builder = Request::builder()
        .method(method)
        .uri(path)
        .header("host", HOST);
    if let Some(token) = token {
        builder = builder.header("authorization", format!("Bearer {token}"));
    }
    if method == "POST" {
        builder = builder.header("content-type", "application/json");
        builder.body(Body::from(body.to_string())).unwrap()
    } else {
        builder.body(Body::empty()).unwrap()
    }
}

/// Every route of the API with what it needs (the table of proto-free-api.md's
/// "Keys and scopes"), and a body that gets past the access checks.
fn routes() -> Vec<(&'static str, &'static str, Need, Value)> {
    let caption = json!({"image": {"path": "images/00000.png"}, "captions": ["a red cube"]});
    vec![
        ("GET", "/healthz", Need::Open, Value::Null),
        ("GET", "/readyz", Need::Open, Value::Null),
        ("GET", "/", Need::Open, Value::Null),
        ("GET", "/page/live.js", Need::Open, Value::Null),
        ("GET", "/page/live.css", Need::Open, Value::Null),
        ("GET", "/page/icon.svg", Need::Open, Value::Null),
        ("GET", "/metrics", Need::AnyKey, Value::Null),
        ("GET", "/v1/pulse", Need::AnyKey, Value::Null),
        ("GET", "/v1/models", Need::AnyKey, Value::Null),
        ("GET", "/v1/limits", Need::AnyKey, Value::Null),
        ("GET", "/v1/no-such-route", Need::AnyKey, Value::Null),
        (
            "POST",
            "/v1/images",
            Need::Scope(Scope::Scoring),
            json!({"images": []}),
        ),
        (
            "POST",
            "/v1/rewards",
            Need::Scope(Scope::Scoring),
            json!({"groups": [caption]}),
        ),
        (
            "POST",
            "/v1/vectors",
            Need::Scope(Scope::Scoring),
            json!({"texts": ["a red cube"]}),
        ),
        (
            "POST",
            "/v1/neighbors",
            Need::Scope(Scope::Scoring),
            json!({"text": "a red cube"}),
        ),
        ("GET", "/v1/bank", Need::Scope(Scope::Scoring), Value::Null),
        (
            "POST",
            "/v1/bank",
            Need::Scope(Scope::BankWrite),
            json!({"captions": []}),
        ),
        (
            "POST",
            "/v1/calibration",
            Need::Scope(Scope::Statistics),
            json!({"probe": []}),
        ),
        (
            "POST",
            "/v1/drift",
            Need::Scope(Scope::Statistics),
            json!({"from": "blocks@v1", "to": "blocks@v1", "probe": []}),
        ),
    ]
}

fn secured(state: &Service, keys: &Keys, rates: Option<KeyRates>) -> axum::Router {
    let access = Access::new(Some(keys.set.clone()), loopback_hosts(), rates);
    befit::server::app_with(state.clone(), Arc::new(access))
}

#[tokio::test]
async fn every_route_refuses_a_caller_without_the_right_scope() {
    let state = state();
    let keys = Keys::make();
    let router = secured(&state, &keys, None);
    for (method, path, want, body) in routes() {
        // The table here and the server's own rule agree.
        let m = axum::http::Method::from_bytes(method.as_bytes()).unwrap();
        let matched = (path != "/v1/no-such-route").then_some(path);
        assert_eq!(need(&m, matched), want, "{method} {path}");
        let anonymous = send(&router, request(method, path, None, &body)).await;
        let wrong_token = send(&router, request(method, path, Some("bft_not-a-key"), &body)).await;
        if want == Need::Open {
            assert_ne!(
                anonymous.status,
                StatusCode::UNAUTHORIZED,
                "{method} {path}"
            );
            assert!(
                anonymous.status.is_success(),
                "{method} {path}: {}",
                anonymous.status
            );
            continue;
        }
        for answer in [&anonymous, &wrong_token] {
            assert_eq!(answer.status, StatusCode::UNAUTHORIZED, "{method} {path}");
            assert_eq!(answer.code(), "key_required", "{method} {path}");
            // RFC 6750 §3: a 401 carries the Bearer challenge.
            assert_eq!(answer.headers["www-authenticate"], "Bearer");
        }
        for (id, token) in &keys.tokens {
            let answer = send(&router, request(method, path, Some(token), &body)).await;
            let allowed = match want {
                Need::Scope(scope) => keys.set.verify(token).unwrap().allows(scope),
                _ => true,
            };
            if allowed {
                assert!(
                    !matches!(
                        answer.status,
                        StatusCode::UNAUTHORIZED | StatusCode::FORBIDDEN
                    ),
                    "{method} {path} with key {id}: {} {}",
                    answer.status,
                    answer.json
                );
            } else {
                assert_eq!(
                    answer.status,
                    StatusCode::FORBIDDEN,
                    "{method} {path} with key {id}"
                );
                assert_eq!(
                    answer.code(),
                    "scope_missing",
                    "{method} {path} with key {id}"
                );
                let message = answer.json["error"]["message"].as_str().unwrap();
                assert!(
                    message.contains(id) && !message.contains(token.as_str()),
                    "{message}"
                );
            }
        }
    }
}

#[tokio::test]
async fn saving_a_reward_map_needs_the_admin_scope() {
    let state = state();
    let keys = Keys::make();
    let router = secured(&state, &keys, None);
    let body = json!({"from": "blocks@v1", "to": "blocks@v1", "probe": probe_json(4),
                      "save_map": {"name": "by-stats"}});
    let refused = send(
        &router,
        request("POST", "/v1/drift", Some(keys.token("statistics")), &body),
    )
    .await;
    assert_eq!(refused.status, StatusCode::FORBIDDEN, "{}", refused.json);
    assert_eq!(refused.code(), "scope_missing");
    assert!(refused.json["error"]["message"]
        .as_str()
        .unwrap()
        .contains("`admin`"));
    let saved = send(
        &router,
        request("POST", "/v1/drift", Some(keys.token("stats-admin")), &body),
    )
    .await;
    assert_eq!(saved.status, StatusCode::OK, "{}", saved.json);
    assert_eq!(saved.json["saved_map"], "by-stats");
}

#[tokio::test]
async fn a_rebinding_host_is_refused_and_the_servers_own_names_are_served() {
    // The issue's case: a loopback server without keys, asked for /v1/bank
    // under another site's name.
    let state = state();
    let access = Access::new(None, loopback_hosts(), None);
    let router = befit::server::app_with(state.clone(), Arc::new(access));
    for (method, body) in [
        ("GET", Value::Null),
        ("POST", json!({"captions": ["a red cube"]})),
    ] {
        let mut r = request(method, "/v1/bank", None, &body);
        r.headers_mut()
            .insert("host", "evil.example".parse().unwrap());
        let answer = send(&router, r).await;
        assert_eq!(answer.status, StatusCode::MISDIRECTED_REQUEST, "{method}");
        assert_eq!(answer.code(), "host_refused");
        assert!(answer.json["error"]["message"]
            .as_str()
            .unwrap()
            .contains("--allow-host"));
    }
    for host in ["127.0.0.1:7878", "localhost:7878", "[::1]:7878"] {
        let mut r = request("GET", "/v1/bank", None, &Value::Null);
        r.headers_mut().insert("host", host.parse().unwrap());
        assert_eq!(send(&router, r).await.status, StatusCode::OK, "{host}");
    }
    // Probes answer whatever the Host: an orchestrator's names are its own.
    let mut r = request("GET", "/healthz", None, &Value::Null);
    r.headers_mut()
        .insert("host", "evil.example".parse().unwrap());
    assert_eq!(send(&router, r).await.status, StatusCode::OK);
    // A name the operator configured is served.
    let access = Access::new(
        None,
        Some(HostPolicy::new(
            "127.0.0.1".parse().unwrap(),
            &["befit-bank".into()],
        )),
        None,
    );
    let router = befit::server::app_with(state, Arc::new(access));
    let mut r = request("GET", "/v1/bank", None, &Value::Null);
    r.headers_mut()
        .insert("host", "befit-bank:7878".parse().unwrap());
    assert_eq!(send(&router, r).await.status, StatusCode::OK);
}

#[tokio::test]
async fn cross_site_writes_are_refused_and_no_cors_is_granted() {
    let state = state();
    let access = Access::new(None, loopback_hosts(), None);
    let router = befit::server::app_with(state, Arc::new(access));
    // A preflight from another site gets no Access-Control-Allow-* header
    // (the Fetch standard's CORS check then fails in the browser).
    let preflight = Request::builder()
        .method("OPTIONS")
        .uri("/v1/bank")
        .header("host", HOST)
        .header("origin", "http://evil.example")
        .header("access-control-request-method", "POST")
        .body(Body::empty())
        .unwrap();
    let answer = send(&router, preflight).await;
    assert!(!answer.status.is_success(), "{}", answer.status);
    assert!(answer
        .headers
        .keys()
        .all(|k| !k.as_str().starts_with("access-control-")));
    // A simple cross-site post (a form or text/plain needs no preflight) is refused by Origin.
    let post = |origin: &str, content_type: &str| {
        Request::builder()
            .method("POST")
            .uri("/v1/bank")
            .header("host", HOST)
            .header("origin", origin)
            .header("content-type", content_type)
            .body(Body::from(r#"{"captions": ["a red cube"]}"#))
            .unwrap()
    };
    for origin in ["http://evil.example", "null", "http://127.0.0.1:9999"] {
        let answer = send(&router, post(origin, "text/plain")).await;
        assert_eq!(answer.status, StatusCode::FORBIDDEN, "{origin}");
        assert_eq!(answer.code(), "cross_origin", "{origin}");
    }
    // The server's own page may write (same origin).
    let answer = send(&router, post("http://127.0.0.1:7878", "application/json")).await;
    assert_eq!(answer.status, StatusCode::OK, "{}", answer.json);
}

#[tokio::test]
async fn a_key_over_its_rate_gets_429_with_retry_after_and_others_do_not() {
    let state = state();
    let keys = Keys::make();
    // 1 request a second, bursts of 2: the third at once is over.
    let router = secured(&state, &keys, KeyRates::new(1, 2));
    let models = |id: &str| request("GET", "/v1/models", Some(keys.token(id)), &Value::Null);
    assert_eq!(
        send(&router, models("scoring")).await.status,
        StatusCode::OK
    );
    assert_eq!(
        send(&router, models("scoring")).await.status,
        StatusCode::OK
    );
    let over = send(&router, models("scoring")).await;
    assert_eq!(over.status, StatusCode::TOO_MANY_REQUESTS);
    assert_eq!(over.code(), "rate_limited");
    // One token returns each second: the wait is 1 s, rounded up (RFC 9110 §10.2.3 delta-seconds).
    assert_eq!(over.headers["retry-after"], "1");
    assert_eq!(send(&router, models("admin")).await.status, StatusCode::OK);
    // Probes are never limited.
    for _ in 0..5 {
        let r = request("GET", "/healthz", Some(keys.token("scoring")), &Value::Null);
        assert_eq!(send(&router, r).await.status, StatusCode::OK);
    }
}

/// A `tracing` writer into a shared buffer.
#[derive(Clone, Default)]
struct Captured(Arc<Mutex<Vec<u8>>>);

impl Write for Captured {
    fn write(&mut self, buf: &[u8]) -> std::io::Result<usize> {
        self.0.lock().unwrap().extend_from_slice(buf);
        Ok(buf.len())
    }
    fn flush(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

#[tokio::test]
async fn every_write_leaves_an_audit_line_naming_the_key_never_the_token() {
    let state = state();
    let keys = Keys::make();
    let router = secured(&state, &keys, None);
    let captured = Captured::default();
    let writer = captured.clone();
    let subscriber = tracing_subscriber::fmt()
        .with_ansi(false)
        .with_env_filter("off,befit::audit=info")
        .with_writer(move || writer.clone())
        .finish();
    // The test runtime has one thread, so the handlers log to this subscriber.
    let _guard = tracing::subscriber::set_default(subscriber);
    let token = keys.token("bank-write");
    let body = json!({"captions": ["a red cube on a blue block", "a green ball"]});
    let answer = send(&router, request("POST", "/v1/bank", Some(token), &body)).await;
    assert_eq!(answer.status, StatusCode::OK, "{}", answer.json);
    let image = b64(&read(probe_dir().join("images/00000.png")));
    let body = json!({"images": [{"base64": image}]});
    let answer = send(
        &router,
        request("POST", "/v1/images", Some(keys.token("scoring")), &body),
    )
    .await;
    assert_eq!(answer.status, StatusCode::OK, "{}", answer.json);
    // Reads leave no audit line.
    let answer = send(
        &router,
        request("GET", "/v1/bank", Some(keys.token("scoring")), &Value::Null),
    )
    .await;
    assert_eq!(answer.status, StatusCode::OK);
    let log = String::from_utf8(captured.0.lock().unwrap().clone()).unwrap();
    let lines: Vec<&str> = log.lines().collect();
    assert_eq!(lines.len(), 2, "{log}");
    assert!(
        lines[0].contains("befit::audit") && lines[0].contains("who=\"bank-write\""),
        "{log}"
    );
    assert!(
        lines[0].contains("what=\"bank.append\"") && lines[0].contains("count=2"),
        "{log}"
    );
    assert!(
        lines[1].contains("who=\"scoring\"") && lines[1].contains("what=\"images.register\""),
        "{log}"
    );
    assert!(lines[1].contains("count=1"), "{log}");
    for (_, token) in &keys.tokens {
        assert!(!log.contains(&token[4..]), "a token was logged: {log}");
    }
}

#[test]
fn without_keys_a_non_loopback_address_is_refused_unless_trusted() {
    let out = Command::new(env!("CARGO_BIN_EXE_befit"))
        .args(["serve", "--listen", "0.0.0.0:0", "--bundle"])
        .arg(bundle_dir("blocks-v1"))
        .arg("--data-dir")
        .arg(scratch_dir("open"))
        .arg("--ort-lib")
        .arg(ort_lib())
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .output()
        .unwrap();
    assert!(!out.status.success());
    let text = String::from_utf8_lossy(&out.stderr);
    assert!(text.contains("not a loopback address"), "{text}");
    assert!(
        text.contains("--keys FILE") && text.contains("--trust-network"),
        "{text}"
    );
}

/// `befit keys new` through the binary: the token on standard output, its hash in the file.
fn new_key_by_binary(file: &Path, scope: &str, id: &str) -> String {
    let stdout = stdout_of(
        Command::new(env!("CARGO_BIN_EXE_befit"))
            .args(["keys", "new", "--keys"])
            .arg(file)
            .args(["--scope", scope, "--id", id]),
    );
    let token = String::from_utf8(stdout).unwrap().trim().to_string();
    let text = std::fs::read_to_string(file).unwrap();
    assert!(
        text.contains(&format!("{id} {scope} sha256:")) && !text.contains(&token),
        "{text}"
    );
    token
}

/// One HTTP/1.1 request over TLS, trusting only `cert`; the status and body.
async fn tls_get(
    addr: &str,
    cert: &rcgen::Certificate,
    path: &str,
    token: Option<&str>,
) -> (u16, String) {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    use tokio_rustls::rustls;
    let mut roots = rustls::RootCertStore::empty();
    roots.add(cert.der().clone()).unwrap();
    let config = rustls::ClientConfig::builder_with_provider(Arc::new(
        rustls::crypto::ring::default_provider(),
    ))
    .with_safe_default_protocol_versions()
    .unwrap()
    .with_root_certificates(roots)
    .with_no_client_auth();
    let connector = tokio_rustls::TlsConnector::from(Arc::new(config));
    let tcp = tokio::net::TcpStream::connect(addr).await.unwrap();
    let name = rustls::pki_types::ServerName::try_from("localhost").unwrap();
    let mut tls = connector.connect(name, tcp).await.unwrap();
    let auth = token.map_or_else(String::new, |t| format!("Authorization: Bearer {t}\r\n"));
    let head = format!("GET {path} HTTP/1.1\r\nHost: localhost\r\n{auth}Connection: close\r\n\r\n");
    tls.write_all(head.as_bytes()).await.unwrap();
    let mut answer = Vec::new();
    let _ = tls.read_to_end(&mut answer).await;
    let text = String::from_utf8_lossy(&answer).into_owned();
    let status = text
        .split_whitespace()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(0);
    let body = text
        .split_once("\r\n\r\n")
        .map_or("", |(_, b)| b)
        .to_string();
    (status, body)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_binary_serves_tls_with_keys_made_by_its_keys_command() {
    let dir = scratch_dir("tls");
    let keys = dir.join("keys");
    let scoring = new_key_by_binary(&keys, "scoring", "trainer");
    // A certificate made here for localhost (rcgen, self-signed).
    let made = rcgen::generate_simple_self_signed(vec!["localhost".to_string()]).unwrap();
    std::fs::write(dir.join("cert.pem"), made.cert.pem()).unwrap();
    std::fs::write(dir.join("key.pem"), made.key_pair.serialize_pem()).unwrap();
    let mut child = tokio::process::Command::new(env!("CARGO_BIN_EXE_befit"))
        .args(["serve", "--listen", "127.0.0.1:0", "--bundle"])
        .arg(bundle_dir("blocks-v1"))
        .arg("--data-dir")
        .arg(dir.join("data"))
        .arg("--ort-lib")
        .arg(ort_lib())
        .arg("--keys")
        .arg(&keys)
        .arg("--tls-cert")
        .arg(dir.join("cert.pem"))
        .arg("--tls-key")
        .arg(dir.join("key.pem"))
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .kill_on_drop(true)
        .spawn()
        .unwrap();
    let stderr = child.stderr.take().unwrap();
    let mut lines = tokio::io::AsyncBufReadExt::lines(tokio::io::BufReader::new(stderr));
    let addr = tokio::time::timeout(Duration::from_secs(30), async {
        while let Some(line) = lines.next_line().await.unwrap() {
            if let Some(url) = line.strip_prefix("befit: listening on https://") {
                return url.to_string();
            }
        }
        panic!("befit ended without printing its address");
    })
    .await
    .expect("befit did not print an https address");
    tokio::spawn(async move { while let Ok(Some(_)) = lines.next_line().await {} });
    let deadline = tokio::time::Instant::now() + Duration::from_secs(60);
    while tls_get(&addr, &made.cert, "/readyz", None).await.0 != 200 {
        assert!(tokio::time::Instant::now() < deadline, "not ready over TLS");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    let (status, body) = tls_get(&addr, &made.cert, "/v1/models", Some(&scoring)).await;
    assert_eq!(status, 200, "{body}");
    assert!(body.contains("blocks@v1"), "{body}");
    let (status, body) = tls_get(&addr, &made.cert, "/v1/models", None).await;
    assert_eq!(status, 401, "{body}");
    assert!(body.contains("key_required"), "{body}");
    // Plain HTTP on the TLS port gets no answer of the API.
    let plain = reqwest::Client::new()
        .get(format!("http://{addr}/readyz"))
        .timeout(Duration::from_secs(5))
        .send()
        .await;
    assert!(plain.map(|r| r.status() != 200).unwrap_or(true));
    child.kill().await.unwrap();
}

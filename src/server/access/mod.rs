//! Who may use the server: the `Host` check against DNS rebinding
//! ([`host`]), cross-site writes refused by `Origin`, API keys and their
//! scopes ([`keys`]), per-key rate limits ([`rate`]), and the audit log of
//! writes.
//!
//! [`guard`] runs on every route before its body is read. The watching
//! routes a probe or the live page's files need ([`Need::Open`]) take no key;
//! `/metrics`, `/v1/pulse`, `/v1/models` and `/v1/limits` take any valid key;
//! every other route names its [`Scope`] in [`need`]. Without a keys file every
//! caller may do everything (the server then binds loopback unless told the
//! network is trusted; `cli/serve.rs` enforces that).

pub mod host;
pub mod keys;
pub mod rate;

use std::sync::Arc;
use std::time::Duration;

use axum::extract::{MatchedPath, Request, State};
use axum::http::{header, HeaderValue, Method};
use axum::middleware::Next;
use axum::response::{IntoResponse, Response};

use super::error::{ApiError, ErrorCode};
use host::HostPolicy;
pub use keys::{KeySet, Scope};
use rate::KeyRates;

/// The `tracing` target of the audit log, so it can be routed apart from
/// request logs (`RUST_LOG=befit::audit=info`).
pub const AUDIT_TARGET: &str = "befit::audit";

/// What a route asks of its caller.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Need {
    /// Nothing: health probes, the API document and the live page's static files (they hold no data).
    Open,
    /// Any valid key.
    AnyKey,
    /// A key with this scope.
    Scope(Scope),
}

/// The need of each route, by method and matched route (`None`: no route matched).
pub fn need(method: &Method, route: Option<&str>) -> Need {
    let get = method == Method::GET || method == Method::HEAD;
    let post = method == Method::POST;
    match route {
        Some(
            "/healthz" | "/readyz" | "/openapi.json" | "/" | "/page/live.js" | "/page/live.css"
            | "/page/icon.svg",
        ) if get => Need::Open,
        Some("/v1/images" | "/v1/rewards" | "/v1/vectors" | "/v1/neighbors") if post => {
            Need::Scope(Scope::Scoring)
        }
        Some("/v1/bank") if get => Need::Scope(Scope::Scoring),
        Some("/v1/bank") if post => Need::Scope(Scope::BankWrite),
        Some("/v1/calibration" | "/v1/drift") if post => Need::Scope(Scope::Statistics),
        _ => Need::AnyKey,
    }
}

/// The server's access rules.
#[derive(Debug, Default)]
pub struct Access {
    keys: Option<KeySet>,
    hosts: Option<HostPolicy>,
    rates: Option<KeyRates>,
}

impl Access {
    /// Rules with `keys` (`None`: no keys asked), `hosts` (`None`: any Host,
    /// for in-process use) and per-key `rates`.
    pub fn new(keys: Option<KeySet>, hosts: Option<HostPolicy>, rates: Option<KeyRates>) -> Access {
        Access {
            keys: keys.filter(|k| !k.is_empty()),
            hosts,
            rates,
        }
    }

    pub fn has_keys(&self) -> bool {
        self.keys.is_some()
    }

    /// Who is calling, or the answer refusing them.
    fn caller(&self, request: &Request, need: Need) -> Result<Caller, ApiError> {
        let Some(keys) = &self.keys else {
            return Ok(Caller::open());
        };
        let token = request
            .headers()
            .get(header::AUTHORIZATION)
            .and_then(|v| v.to_str().ok())
            .and_then(|v| {
                let (scheme, token) = v.trim().split_once(' ')?;
                // The scheme is case-insensitive (RFC 9110 §11.1).
                scheme.eq_ignore_ascii_case("bearer").then(|| token.trim())
            });
        let key = match (token, need) {
            (_, Need::Open) => return Ok(Caller::open()),
            (None, _) => {
                return Err(ApiError::new(
                    ErrorCode::KeyRequired,
                    "this server needs an API key: send `Authorization: Bearer TOKEN` (tokens come from `befit keys new`)",
                ))
            }
            (Some(token), _) => keys.verify(token).ok_or_else(|| {
                ApiError::new(
                    ErrorCode::KeyRequired,
                    "the API key is not one of this server's (--keys file); check the token",
                )
            })?,
        };
        if let Need::Scope(scope) = need {
            if !key.allows(scope) {
                return Err(scope_missing(&key.id, scope));
            }
        }
        Ok(Caller {
            key: Some((key.id.clone(), key.scopes.clone())),
        })
    }
}

fn scope_missing(id: &str, scope: Scope) -> ApiError {
    ApiError::new(
        ErrorCode::ScopeMissing,
        format!("key {id:?} lacks the `{scope}` scope this needs; make a key with `befit keys new --scope {scope}`"),
    )
}

/// Who made a request, as handlers see it (a request extension).
#[derive(Debug, Clone)]
pub struct Caller {
    /// The key's id and scopes; `None` on a server without keys.
    key: Option<(String, Vec<Scope>)>,
}

impl Caller {
    fn open() -> Caller {
        Caller { key: None }
    }

    /// Refuses a caller whose key lacks `scope` (a server without keys refuses no one).
    pub fn require(&self, scope: Scope) -> Result<(), ApiError> {
        match &self.key {
            Some((id, scopes)) if !scopes.contains(&scope) => Err(scope_missing(id, scope)),
            _ => Ok(()),
        }
    }

    /// The key id for logs (`-` without keys); never the token.
    pub fn who(&self) -> &str {
        self.key.as_ref().map_or("-", |(id, _)| id.as_str())
    }
}

/// Refuses `caller` without `scope`; `None` (a router without [`guard`], as
/// in-process tests build it) refuses no one.
pub fn require(caller: Option<&Caller>, scope: Scope) -> Result<(), ApiError> {
    caller.map_or(Ok(()), |c| c.require(scope))
}

/// One line of the audit log: who (key id), what, how many.
pub fn audit(caller: Option<&Caller>, what: &str, count: usize) {
    tracing::info!(
        target: AUDIT_TARGET,
        who = caller.map_or("-", Caller::who),
        what,
        count,
        "write"
    );
}

/// Checks `Host`, `Origin` on writes, the key and its scope, and the key's
/// rate, before anything else happens to a request.
pub async fn guard(
    State(access): State<Arc<Access>>,
    mut request: Request,
    next: Next,
) -> Response {
    let route = request
        .extensions()
        .get::<MatchedPath>()
        .map(|p| p.as_str().to_string());
    let need = need(request.method(), route.as_deref());
    let probe = matches!(route.as_deref(), Some("/healthz" | "/readyz"));
    let host = request
        .headers()
        .get(header::HOST)
        .and_then(|v| v.to_str().ok())
        .map(str::to_string)
        .or_else(|| request.uri().authority().map(|a| a.to_string()));
    if let (Some(policy), false) = (&access.hosts, probe) {
        if !host.as_deref().is_some_and(|h| policy.allows(h)) {
            return ApiError::new(
                ErrorCode::HostRefused,
                format!(
                    "this server does not answer to Host {:?}; connect by its address, or add the name with --allow-host",
                    host.as_deref().unwrap_or("")
                ),
            )
            .into_response();
        }
    }
    let writes = !matches!(
        *request.method(),
        Method::GET | Method::HEAD | Method::OPTIONS
    );
    if let (true, Some(origin)) = (writes, request.headers().get(header::ORIGIN)) {
        let origin = origin.to_str().unwrap_or("null");
        if !host
            .as_deref()
            .is_some_and(|h| host::same_origin(origin, h))
        {
            return ApiError::new(
                ErrorCode::CrossOrigin,
                format!("a write from the web page at {origin:?} is refused: this API takes no cross-site requests"),
            )
            .into_response();
        }
    }
    let caller = match access.caller(&request, need) {
        Ok(caller) => caller,
        Err(e) => return e.into_response(),
    };
    if let (Some(rates), Some((id, _))) = (&access.rates, &caller.key) {
        if let Err(wait) = rates.take(id) {
            return rate_limited(id, wait);
        }
    }
    request.extensions_mut().insert(caller);
    next.run(request).await
}

fn rate_limited(id: &str, wait: Duration) -> Response {
    let seconds = wait.as_secs_f64().ceil().max(1.0) as u64;
    let mut response = ApiError::new(
        ErrorCode::RateLimited,
        format!("key {id:?} is over its rate (--key-rate, --key-burst); retry after {seconds} s"),
    )
    .into_response();
    response
        .headers_mut()
        .insert(header::RETRY_AFTER, HeaderValue::from(seconds));
    response
}

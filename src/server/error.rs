//! The one error type of the HTTP API: a closed set of codes mirroring the
//! table in `proto-free-api.md`, the JSON form
//! `{"error": {"code", "message", "field"?}}`, and the conversion of every
//! domain error into it, in this one place.
//!
//! Client errors are answered and not logged; server errors are logged once
//! with their details and answered with a generic message.

use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};
use serde::Serialize;

use crate::bank::{BankError, EntryProblem, IndexError};
use crate::encoders::{EncodeError, EngineError};
use crate::intake::image_root::PathError;
use crate::intake::validation::{Invalid, Problem};
use crate::probe::ProbeError;
use crate::runs::RunError;
use crate::scoring::ScoreError;
use crate::service::maps::MapError;
use crate::service::NotReady;
use crate::stats::StatsError;

/// Seconds a client is told to wait after a 503 when nothing better is known
/// (a shed by queued work says how long the queue takes to drain instead).
pub const RETRY_AFTER_SECONDS: u64 = 1;

/// Every code an answer can carry; `proto-free-api.md` has the same table.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, utoipa::ToSchema)]
#[serde(rename_all = "snake_case")]
pub enum ErrorCode {
    BadJson,
    InvalidField,
    OverLimit,
    KeyRequired,
    ScopeMissing,
    CrossOrigin,
    PathRefused,
    UnknownImage,
    UnknownModel,
    UnknownMap,
    NotFound,
    MethodNotAllowed,
    MapMismatch,
    MapExists,
    SlowBody,
    BodyTooLarge,
    UnsupportedMediaType,
    HostRefused,
    BadImage,
    ImageTooLarge,
    RateLimited,
    Overloaded,
    NotReady,
    StorageFull,
    Internal,
}

impl ErrorCode {
    /// Every code, in the order of the API doc's table.
    pub const ALL: [ErrorCode; 25] = [
        ErrorCode::BadJson,
        ErrorCode::InvalidField,
        ErrorCode::OverLimit,
        ErrorCode::KeyRequired,
        ErrorCode::ScopeMissing,
        ErrorCode::CrossOrigin,
        ErrorCode::PathRefused,
        ErrorCode::UnknownImage,
        ErrorCode::UnknownModel,
        ErrorCode::UnknownMap,
        ErrorCode::NotFound,
        ErrorCode::MethodNotAllowed,
        ErrorCode::MapMismatch,
        ErrorCode::MapExists,
        ErrorCode::SlowBody,
        ErrorCode::BodyTooLarge,
        ErrorCode::UnsupportedMediaType,
        ErrorCode::HostRefused,
        ErrorCode::BadImage,
        ErrorCode::ImageTooLarge,
        ErrorCode::RateLimited,
        ErrorCode::Overloaded,
        ErrorCode::NotReady,
        ErrorCode::StorageFull,
        ErrorCode::Internal,
    ];

    /// The HTTP status answered with the code.
    pub fn status(self) -> StatusCode {
        match self {
            ErrorCode::BadJson | ErrorCode::InvalidField | ErrorCode::OverLimit => {
                StatusCode::BAD_REQUEST
            }
            ErrorCode::KeyRequired => StatusCode::UNAUTHORIZED,
            ErrorCode::ScopeMissing | ErrorCode::CrossOrigin | ErrorCode::PathRefused => {
                StatusCode::FORBIDDEN
            }
            ErrorCode::HostRefused => StatusCode::MISDIRECTED_REQUEST,
            ErrorCode::RateLimited => StatusCode::TOO_MANY_REQUESTS,
            ErrorCode::UnknownImage
            | ErrorCode::UnknownModel
            | ErrorCode::UnknownMap
            | ErrorCode::NotFound => StatusCode::NOT_FOUND,
            ErrorCode::MethodNotAllowed => StatusCode::METHOD_NOT_ALLOWED,
            ErrorCode::MapMismatch | ErrorCode::MapExists => StatusCode::CONFLICT,
            ErrorCode::SlowBody => StatusCode::REQUEST_TIMEOUT,
            ErrorCode::BodyTooLarge => StatusCode::PAYLOAD_TOO_LARGE,
            ErrorCode::UnsupportedMediaType => StatusCode::UNSUPPORTED_MEDIA_TYPE,
            ErrorCode::BadImage | ErrorCode::ImageTooLarge => StatusCode::UNPROCESSABLE_ENTITY,
            ErrorCode::Overloaded | ErrorCode::NotReady => StatusCode::SERVICE_UNAVAILABLE,
            ErrorCode::StorageFull => StatusCode::INSUFFICIENT_STORAGE,
            ErrorCode::Internal => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }

    /// The code as answers spell it.
    pub fn as_str(self) -> &'static str {
        match self {
            ErrorCode::BadJson => "bad_json",
            ErrorCode::InvalidField => "invalid_field",
            ErrorCode::OverLimit => "over_limit",
            ErrorCode::KeyRequired => "key_required",
            ErrorCode::ScopeMissing => "scope_missing",
            ErrorCode::CrossOrigin => "cross_origin",
            ErrorCode::HostRefused => "host_refused",
            ErrorCode::RateLimited => "rate_limited",
            ErrorCode::PathRefused => "path_refused",
            ErrorCode::UnknownImage => "unknown_image",
            ErrorCode::UnknownModel => "unknown_model",
            ErrorCode::UnknownMap => "unknown_map",
            ErrorCode::NotFound => "not_found",
            ErrorCode::MethodNotAllowed => "method_not_allowed",
            ErrorCode::MapMismatch => "map_mismatch",
            ErrorCode::MapExists => "map_exists",
            ErrorCode::SlowBody => "slow_body",
            ErrorCode::BodyTooLarge => "body_too_large",
            ErrorCode::UnsupportedMediaType => "unsupported_media_type",
            ErrorCode::BadImage => "bad_image",
            ErrorCode::ImageTooLarge => "image_too_large",
            ErrorCode::Overloaded => "overloaded",
            ErrorCode::NotReady => "not_ready",
            ErrorCode::StorageFull => "storage_full",
            ErrorCode::Internal => "internal",
        }
    }
}

/// An answer that is not a success.
#[derive(Debug, Clone)]
pub struct ApiError {
    pub code: ErrorCode,
    pub message: String,
    pub field: Option<String>,
    /// `Retry-After` of a 503, in seconds, when known; else [`RETRY_AFTER_SECONDS`].
    pub retry_after: Option<u64>,
}

/// The body of every answer that is not a success.
#[derive(Serialize, utoipa::ToSchema)]
pub struct ErrorBody {
    #[schema(inline)]
    error: ErrorDetail,
}

#[derive(Serialize, utoipa::ToSchema)]
struct ErrorDetail {
    code: ErrorCode,
    /// What was wrong and how to fix it.
    message: String,
    /// The request's field to blame (`groups[2].captions[0]`), when there is one.
    #[serde(skip_serializing_if = "Option::is_none")]
    field: Option<String>,
}

impl ApiError {
    pub fn new(code: ErrorCode, message: impl Into<String>) -> ApiError {
        ApiError {
            code,
            message: message.into(),
            field: None,
            retry_after: None,
        }
    }

    pub fn status(&self) -> StatusCode {
        self.code.status()
    }

    pub fn not_ready() -> ApiError {
        ApiError::new(
            ErrorCode::NotReady,
            "bundles are still loading; retry shortly",
        )
    }

    pub fn overloaded(message: impl Into<String>) -> ApiError {
        ApiError::new(ErrorCode::Overloaded, message)
    }

    /// 503 for work that would wait `queued` behind what is already queued:
    /// `Retry-After` is that time, rounded up to whole seconds.
    pub fn queue_full_for(queued: std::time::Duration) -> ApiError {
        let seconds = queued.as_secs_f64().ceil().max(1.0) as u64;
        ApiError {
            retry_after: Some(seconds),
            ..ApiError::overloaded(format!(
                "the encoders have {:.1} s of work queued, over --max-queue-wait-ms; retry after it drains",
                queued.as_secs_f64()
            ))
        }
    }

    /// 413, naming the flag.
    pub fn body_too_large() -> ApiError {
        ApiError::new(
            ErrorCode::BodyTooLarge,
            "request body is over the server's limit (raise it with --max-body-bytes, or send fewer items per request)",
        )
    }

    /// A fault of ours: logged here with its details, answered without them.
    pub fn internal(details: impl std::fmt::Display) -> ApiError {
        tracing::error!(error = %details, "internal error");
        ApiError::new(
            ErrorCode::Internal,
            "internal error; the server log has details",
        )
    }

    /// A fault of the server's side: 507 `storage_full` when the disk under
    /// the data folder is full (a write failed for want of space; reads go
    /// on), else [`ApiError::internal`].
    pub fn server_fault(error: &(dyn std::error::Error + 'static)) -> ApiError {
        if is_storage_full(error) {
            tracing::warn!(error = %error, "a write failed: the data folder's disk is full");
            return ApiError::new(
                ErrorCode::StorageFull,
                "the server's disk is full: writes are refused until space is freed; reads go on",
            );
        }
        ApiError::internal(error)
    }

    /// Sets the field to blame, unless one is already set.
    pub fn at(mut self, field: impl Into<String>) -> ApiError {
        if self.field.is_none() {
            self.field = Some(field.into());
        }
        self
    }
}

/// True when `error`, or any error under it, says the disk or quota is full:
/// SQLite's `SQLITE_FULL`, or an I/O error `ENOSPC` / `EDQUOT`.
pub fn is_storage_full(error: &(dyn std::error::Error + 'static)) -> bool {
    let mut next = Some(error);
    while let Some(e) = next {
        if let Some(sqlite) = e.downcast_ref::<rusqlite::Error>() {
            if sqlite.sqlite_error_code() == Some(rusqlite::ErrorCode::DiskFull) {
                return true;
            }
        }
        if let Some(io) = e.downcast_ref::<std::io::Error>() {
            if io.kind() == std::io::ErrorKind::StorageFull
                || io.kind() == std::io::ErrorKind::QuotaExceeded
                || matches!(io.raw_os_error(), Some(libc::ENOSPC) | Some(libc::EDQUOT))
            {
                return true;
            }
        }
        next = e.source();
    }
    false
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let status = self.status();
        let retry_after = self.retry_after;
        let body = ErrorBody {
            error: ErrorDetail {
                code: self.code,
                message: self.message,
                field: self.field,
            },
        };
        let mut response = (status, axum::Json(body)).into_response();
        if status == StatusCode::SERVICE_UNAVAILABLE {
            response.headers_mut().insert(
                header::RETRY_AFTER,
                HeaderValue::from(retry_after.unwrap_or(RETRY_AFTER_SECONDS)),
            );
        }
        if status == StatusCode::UNAUTHORIZED {
            // The challenge RFC 6750 §3 asks a 401 to carry.
            response
                .headers_mut()
                .insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
        }
        response
    }
}

impl From<NotReady> for ApiError {
    fn from(_: NotReady) -> ApiError {
        ApiError::not_ready()
    }
}

impl From<Invalid> for ApiError {
    fn from(e: Invalid) -> ApiError {
        let code = if e.problem.is_over_limit() {
            ErrorCode::OverLimit
        } else {
            ErrorCode::InvalidField
        };
        let message = match &e.problem {
            Problem::OverLimit { .. } => e.problem.to_string(),
            _ => e.to_string(),
        };
        ApiError::new(code, message).at(e.field)
    }
}

impl From<EngineError> for ApiError {
    fn from(e: EngineError) -> ApiError {
        let message = e.to_string();
        let code = match e {
            EngineError::UnknownModel { .. } => {
                return ApiError::new(ErrorCode::UnknownModel, message).at("model")
            }
            EngineError::UnknownImage(_) => ErrorCode::UnknownImage,
            EngineError::Decode(ref d) if d.is_too_large() => ErrorCode::ImageTooLarge,
            EngineError::Decode(_) => ErrorCode::BadImage,
            EngineError::Path(PathError::NoRoot | PathError::Escapes(_)) => ErrorCode::PathRefused,
            EngineError::Path(PathError::FileTooLarge { .. }) => ErrorCode::ImageTooLarge,
            EngineError::Path(_) => ErrorCode::BadImage,
            EngineError::Encode(EncodeError::Overloaded { .. }) | EngineError::Busy(_) => {
                ErrorCode::Overloaded
            }
            EngineError::Encode(EncodeError::Caption { .. }) => ErrorCode::InvalidField,
            EngineError::Store(ref store) => return ApiError::server_fault(store),
            EngineError::Encode(EncodeError::Failed { .. }) | EngineError::Task(_) => {
                return ApiError::internal(message)
            }
        };
        ApiError::new(code, message)
    }
}

impl From<EncodeError> for ApiError {
    fn from(e: EncodeError) -> ApiError {
        ApiError::from(EngineError::Encode(e))
    }
}

impl From<ScoreError> for ApiError {
    fn from(e: ScoreError) -> ApiError {
        let error = ApiError::from(e.source);
        match e.field {
            Some(field) => error.at(field),
            None => error,
        }
    }
}

impl From<RunError> for ApiError {
    fn from(e: RunError) -> ApiError {
        let field = e.field();
        match e {
            RunError::UnknownRun(_) => ApiError::new(ErrorCode::NotFound, e.to_string()),
            RunError::Store(_) | RunError::Task(_) => ApiError::internal(e),
            _ => {
                let error = ApiError::new(ErrorCode::InvalidField, e.to_string());
                match field {
                    Some(f) => error.at(f),
                    None => error,
                }
            }
        }
    }
}

impl From<MapError> for ApiError {
    fn from(e: MapError) -> ApiError {
        let message = e.to_string();
        match e {
            MapError::Unknown { .. } => ApiError::new(ErrorCode::UnknownMap, message).at("remap"),
            MapError::WrongModel { .. } => {
                ApiError::new(ErrorCode::MapMismatch, message).at("remap")
            }
            MapError::BadName { .. } => ApiError::new(ErrorCode::InvalidField, message),
            MapError::Unusable { .. } => ApiError::new(ErrorCode::UnknownMap, message).at("remap"),
            MapError::Exists { .. } => ApiError::new(ErrorCode::MapExists, message),
            MapError::Write { .. } => ApiError::server_fault(&e),
            MapError::Read { .. } | MapError::NoDigests { .. } => ApiError::internal(message),
        }
    }
}

impl From<IndexError> for ApiError {
    fn from(e: IndexError) -> ApiError {
        match e {
            // Search bounds: `name` is the request field (`k`, `ef_search`).
            IndexError::Setting { name, min, max, .. } => Invalid::new(
                name,
                Problem::OutOfRange {
                    what: name,
                    min: min as u64,
                    max: max as u64,
                },
            )
            .into(),
            IndexError::Dimension { got, expected, .. } => Invalid::new(
                "vector",
                Problem::VectorLength {
                    got,
                    want: expected,
                },
            )
            .into(),
            IndexError::NotFinite { .. } | IndexError::Zero => {
                Invalid::new("vector", Problem::VectorValues).into()
            }
            other => ApiError::server_fault(&other),
        }
    }
}

impl From<BankError> for ApiError {
    fn from(e: BankError) -> ApiError {
        match e {
            BankError::Invalid { ref problem, .. } => {
                let code = match problem {
                    EntryProblem::CaptionTooLong { .. } => ErrorCode::OverLimit,
                    _ => ErrorCode::InvalidField,
                };
                let field = e.field().unwrap_or_else(|| "captions".into());
                ApiError::new(code, e.to_string()).at(field)
            }
            BankError::Index(index) => index.into(),
            BankError::TooMany { .. } => {
                ApiError::new(ErrorCode::OverLimit, e.to_string()).at("captions")
            }
            BankError::NotLoaded(_) => ApiError::not_ready(),
            other => ApiError::server_fault(&other),
        }
    }
}

impl From<ProbeError> for ApiError {
    fn from(e: ProbeError) -> ApiError {
        match e {
            ProbeError::Encoder { .. } | ProbeError::Shape { .. } => ApiError::internal(e),
            // Seen only by a request already answered by its timeout (or whose client left).
            ProbeError::Cancelled => {
                ApiError::overloaded("the request took longer than --request-timeout-secs")
            }
            other => ApiError::new(ErrorCode::InvalidField, other.to_string()).at("probe"),
        }
    }
}

impl From<StatsError> for ApiError {
    fn from(e: StatsError) -> ApiError {
        ApiError::new(ErrorCode::InvalidField, e.to_string()).at("options")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The table of `proto-free-api.md` lists exactly these codes with these statuses.
    #[test]
    fn the_api_doc_table_matches_the_codes() {
        let doc = include_str!("../../proto-free-api.md");
        let mut rows = Vec::new();
        for line in doc.lines() {
            let cells: Vec<&str> = line.split('|').map(str::trim).collect();
            if cells.len() > 3 && cells[1].parse::<u16>().is_ok() && cells[2].starts_with('`') {
                rows.push((
                    cells[1].parse::<u16>().unwrap(),
                    cells[2].trim_matches('`').to_string(),
                ));
            }
        }
        let ours: Vec<(u16, String)> = ErrorCode::ALL
            .iter()
            .map(|c| (c.status().as_u16(), c.as_str().to_string()))
            .collect();
        let mut sorted_doc = rows.clone();
        sorted_doc.sort();
        let mut sorted_ours = ours.clone();
        sorted_ours.sort();
        assert_eq!(sorted_doc, sorted_ours);
        // serde spelling and as_str agree.
        for code in ErrorCode::ALL {
            assert_eq!(serde_json::to_value(code).unwrap(), code.as_str());
        }
    }

    /// SQLite's own "database or disk is full", made for real by capping the
    /// file's pages (SQLite's `max_page_count` pragma), reaches the client
    /// as 507 `storage_full` through the store's and the engine's errors.
    #[test]
    fn a_full_disk_is_507_storage_full_not_500() {
        let conn = rusqlite::Connection::open_in_memory().unwrap();
        conn.execute_batch("PRAGMA max_page_count = 2; CREATE TABLE t (b BLOB);")
            .unwrap();
        let full = (0..100)
            .find_map(|_| {
                conn.execute("INSERT INTO t VALUES (zeroblob(4096))", [])
                    .err()
            })
            .expect("the capped database fills up");
        assert_eq!(
            full.sqlite_error_code(),
            Some(rusqlite::ErrorCode::DiskFull)
        );
        let answer = ApiError::from(EngineError::Store(
            crate::store::images::StoreError::Sqlite(full),
        ));
        assert_eq!(answer.code, ErrorCode::StorageFull);
        assert_eq!(answer.status(), StatusCode::INSUFFICIENT_STORAGE);
        // ENOSPC from a file write (a saved map) is the same fault.
        let enospc = MapError::Write {
            path: "maps/x.json".into(),
            source: std::io::Error::from_raw_os_error(libc::ENOSPC),
        };
        assert_eq!(ApiError::from(enospc).code, ErrorCode::StorageFull);
        // Any other store failure stays internal.
        let other = rusqlite::Error::InvalidQuery;
        let answer = ApiError::from(EngineError::Store(
            crate::store::images::StoreError::Sqlite(other),
        ));
        assert_eq!(answer.code, ErrorCode::Internal);
    }

    /// A shed by queued work tells the drain time, rounded up to whole
    /// seconds (RFC 9110 section 10.2.3: Retry-After is whole seconds), at least 1.
    #[test]
    fn a_shed_by_queued_work_carries_its_drain_time() {
        use std::time::Duration;
        let retry_after = |d| {
            ApiError::queue_full_for(d)
                .into_response()
                .headers()
                .get(header::RETRY_AFTER)
                .map(|v| v.to_str().unwrap().to_string())
        };
        assert_eq!(
            retry_after(Duration::from_millis(2300)).as_deref(),
            Some("3")
        );
        assert_eq!(
            retry_after(Duration::from_millis(4000)).as_deref(),
            Some("4")
        );
        assert_eq!(
            retry_after(Duration::from_millis(200)).as_deref(),
            Some("1")
        );
        // Other 503s keep the constant.
        let other = ApiError::overloaded("x").into_response();
        assert_eq!(other.headers()[header::RETRY_AFTER], "1");
    }
}

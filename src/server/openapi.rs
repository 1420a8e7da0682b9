//! The API as an OpenAPI 3.1 document, generated from the request and answer
//! types and the handlers' annotations, served at `GET /openapi.json` and
//! committed as `docs/openapi.json` (a test keeps the two equal).
//!
//! Each operation's security requirement comes from [`access::need`], the
//! same table the server enforces, so the document cannot promise a scope
//! the server does not ask for.

use std::sync::LazyLock;

use axum::http::Method;
use axum::response::{IntoResponse, Response};
use utoipa::openapi::path::{HttpMethod, Operation};
use utoipa::openapi::security::{HttpAuthScheme, HttpBuilder, SecurityRequirement, SecurityScheme};
use utoipa::{Modify, OpenApi};

use super::access::{self, Need};
use super::routes;

/// The name of the bearer-key scheme in the document.
const KEY_SCHEME: &str = "api_key";

#[derive(OpenApi)]
#[openapi(
    info(
        title = "befit",
        description = "How well a caption fits an image: rewards, vectors, nearest captions, \
                       calibration and drift over ONNX dual encoders. The prose reference is \
                       proto-free-api.md; the error codes and their statuses are its table."
    ),
    paths(
        routes::health::healthz,
        routes::health::readyz,
        routes::health::metrics,
        routes::live::pulse,
        routes::models::list,
        routes::limits::list,
        routes::images::register,
        routes::rewards::score,
        routes::runs::list,
        routes::runs::series,
        routes::vectors::embed,
        routes::bank::append,
        routes::bank::stats,
        routes::bank::neighbors,
        routes::statistics::calibration,
        routes::statistics::drift,
    ),
    components(schemas(crate::server::error::ErrorCode)),
    modifiers(&Security),
    tags(
        (name = "scoring", description = "Images, vectors and rewards"),
        (name = "bank", description = "The caption bank and nearest captions"),
        (name = "statistics", description = "Calibration and drift over a probe set"),
        (name = "runs", description = "The run watch"),
        (name = "models", description = "Loaded models and the limits in force"),
        (name = "watch", description = "Health, readiness, metrics and the live page's feed"),
    )
)]
struct ApiDoc;

/// Adds the bearer-key scheme and each operation's requirement from the access table.
struct Security;

impl Modify for Security {
    fn modify(&self, doc: &mut utoipa::openapi::OpenApi) {
        let components = doc.components.get_or_insert_with(Default::default);
        components.add_security_scheme(
            KEY_SCHEME,
            SecurityScheme::Http(
                HttpBuilder::new()
                    .scheme(HttpAuthScheme::Bearer)
                    .description(Some(
                        "A token from `befit keys new`; asked only when the server runs with `--keys`.",
                    ))
                    .build(),
            ),
        );
        for (path, item) in doc.paths.paths.iter_mut() {
            let operations = [
                (Method::GET, HttpMethod::Get, &mut item.get),
                (Method::POST, HttpMethod::Post, &mut item.post),
            ];
            for (method, _, operation) in operations {
                if let Some(operation) = operation {
                    secure(operation, access::need(&method, Some(path)));
                }
            }
        }
    }
}

fn secure(operation: &mut Operation, need: Need) {
    let requirement = match need {
        Need::Open => SecurityRequirement::default(),
        Need::AnyKey => SecurityRequirement::new::<_, _, &str>(KEY_SCHEME, []),
        Need::Scope(scope) => SecurityRequirement::new(KEY_SCHEME, [scope.as_str()]),
    };
    operation.security = Some(vec![requirement]);
}

/// The document, built once.
static DOCUMENT: LazyLock<String> = LazyLock::new(|| {
    let mut text = ApiDoc::openapi()
        .to_pretty_json()
        .expect("the API document is plain data and always serialises");
    text.push('\n');
    text
});

/// The document as `docs/openapi.json` holds it: pretty JSON ending in a newline.
pub fn document() -> &'static str {
    &DOCUMENT
}

/// `GET /openapi.json`.
pub async fn serve() -> Response {
    (
        [(axum::http::header::CONTENT_TYPE, "application/json")],
        document(),
    )
        .into_response()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `docs/openapi.json` is what the code generates. To refresh it after a
    /// change of the API: `cargo run -- openapi > docs/openapi.json`.
    #[test]
    fn the_committed_document_is_the_generated_one() {
        let committed = include_str!("../../docs/openapi.json");
        assert!(
            committed == document(),
            "docs/openapi.json is out of date: run `cargo run -- openapi > docs/openapi.json`"
        );
    }

    #[test]
    fn every_work_route_is_documented_with_its_scope() {
        let doc: serde_json::Value = serde_json::from_str(document()).unwrap();
        assert_eq!(doc["openapi"], "3.1.0");
        let rewards = &doc["paths"]["/v1/rewards"]["post"];
        assert_eq!(rewards["security"][0][KEY_SCHEME][0], "scoring");
        let append = &doc["paths"]["/v1/bank"]["post"];
        assert_eq!(append["security"][0][KEY_SCHEME][0], "bank-write");
        let drift = &doc["paths"]["/v1/drift"]["post"];
        assert_eq!(drift["security"][0][KEY_SCHEME][0], "statistics");
        // Health probes need no key: an empty requirement.
        let health = &doc["paths"]["/healthz"]["get"];
        assert_eq!(health["security"][0], serde_json::json!({}));
        // Failures carry the error body, its code one of the error table's.
        let refused = &rewards["responses"]["4XX"]["content"]["application/json"]["schema"];
        let code = &refused["properties"]["error"]["properties"]["code"]["$ref"];
        assert_eq!(code, "#/components/schemas/ErrorCode", "{refused}");
        let codes = &doc["components"]["schemas"]["ErrorCode"]["enum"];
        assert_eq!(
            codes.as_array().map(Vec::len),
            Some(crate::server::error::ErrorCode::ALL.len())
        );
    }
}

//! The OpenAPI 3.1 document, generated from the handlers and the wire types themselves so that
//! it cannot drift from what the service accepts and answers.

use utoipa::OpenApi;

use super::routes;

/// The service's OpenAPI description.
#[derive(OpenApi)]
#[openapi(
    info(
        title = "Oddsmith",
        description = "Answers about absorbing Markov chains — where a random process ends up, \
                       how long it takes and how that varies — exactly in rational arithmetic for \
                       small chains and in floating point for large ones. Every number in an \
                       answer is `{\"value\", \"exact\"?}`; every error is an RFC 9457 problem \
                       document with JSON pointers into the request.",
        license(name = "MIT OR Apache-2.0")
    ),
    paths(routes::solve, routes::tune, routes::healthz, routes::readyz, routes::openapi_json),
    tags(
        (name = "solve", description = "Solving chains"),
        (name = "operations", description = "Liveness, readiness and this document")
    )
)]
pub struct ApiDoc;

/// Each documented path with the methods it accepts, upper-case.
#[must_use]
pub fn routes(document: &utoipa::openapi::OpenApi) -> Vec<(String, Vec<String>)> {
    document
        .paths
        .paths
        .iter()
        .map(|(path, item)| {
            let methods = serde_json::to_value(item)
                .ok()
                .and_then(|v| v.as_object().cloned())
                .map(|object| {
                    [
                        "get", "put", "post", "delete", "options", "head", "patch", "trace",
                    ]
                    .iter()
                    .filter(|m| object.contains_key(**m))
                    .map(|m| m.to_ascii_uppercase())
                    .collect()
                })
                .unwrap_or_default();
            (path.clone(), methods)
        })
        .collect()
}

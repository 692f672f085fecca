//! Route handlers: read the body, hand the work to the core on the blocking pool, write the
//! answer. No mathematics here.

use std::sync::Arc;
use std::time::Duration;

use actix_web::http::header;
use actix_web::{get, post, web, HttpRequest, HttpResponse};
use futures_util::StreamExt;
use oddsmith_client::types::{Problem, SolveAnswer, SolveRequest, TuneRequest, TuneResponse};
use serde::de::DeserializeOwned;
use serde::Serialize;
use tokio::sync::Semaphore;

use super::problem::ApiError;
use crate::model::validate::{pointer_token, Issue};
use crate::solve::budget::Budget;
use crate::solve::SolveError;
use crate::sweep::answer;
use crate::tune::tune as tune_parameter;

/// What the handlers share.
pub struct AppState {
    /// Budgets of one computation.
    pub limits: Limits,
    /// Largest body accepted, after decompression.
    pub max_body_bytes: usize,
    /// One permit per computation allowed at once.
    pub permits: Arc<Semaphore>,
    /// The OpenAPI document, serialised once.
    pub openapi_json: String,
    /// Each documented path with the methods it accepts (for 404 versus 405).
    pub routes: Vec<(String, Vec<String>)>,
}

/// The budgets of one computation.
#[derive(Clone, Copy, Debug)]
pub struct Limits {
    /// Time.
    pub time: Duration,
    /// Working memory.
    pub memory_bytes: usize,
    /// Size of the JSON answer.
    pub response_bytes: usize,
}

/// Reads a JSON body: checks the media type, enforces the size limit on the decompressed bytes.
async fn read_body(
    request: &HttpRequest,
    payload: web::Payload,
    limit: usize,
) -> Result<web::BytesMut, ApiError> {
    let content_type = request
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("");
    let essence = content_type
        .split(';')
        .next()
        .unwrap_or("")
        .trim()
        .to_ascii_lowercase();
    if essence != "application/json" && !essence.ends_with("+json") {
        return Err(ApiError::UnsupportedMediaType(if essence.is_empty() {
            "the body must be sent with Content-Type: application/json".into()
        } else {
            format!("the body must be application/json, not {essence}")
        }));
    }
    let declared = request
        .headers()
        .get(header::CONTENT_LENGTH)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.parse::<usize>().ok());
    let compressed = request.headers().contains_key(header::CONTENT_ENCODING);
    if !compressed && declared.is_some_and(|length| length > limit) {
        return Err(ApiError::PayloadTooLarge { limit });
    }
    let mut stream =
        actix_web::dev::Decompress::from_headers(payload.into_inner(), request.headers());
    let mut body = web::BytesMut::new();
    while let Some(chunk) = stream.next().await {
        let chunk = chunk.map_err(|e| ApiError::MalformedJson(format!("unreadable body: {e}")))?;
        if body.len() + chunk.len() > limit {
            return Err(ApiError::PayloadTooLarge { limit });
        }
        body.extend_from_slice(&chunk);
    }
    Ok(body)
}

/// Parses JSON into a wire type. Syntax errors are 400; well-formed JSON of the wrong shape is
/// 422 with the JSON pointer of the offending value.
fn parse_json<T: DeserializeOwned>(body: &[u8]) -> Result<T, ApiError> {
    let mut deserializer = serde_json::Deserializer::from_slice(body);
    let parsed: T = serde_path_to_error::deserialize(&mut deserializer).map_err(|error| {
        let pointer: String = error
            .path()
            .iter()
            .filter_map(|segment| match segment {
                serde_path_to_error::Segment::Seq { index } => Some(format!("/{index}")),
                serde_path_to_error::Segment::Map { key } => {
                    Some(format!("/{}", pointer_token(key)))
                }
                serde_path_to_error::Segment::Enum { .. }
                | serde_path_to_error::Segment::Unknown => None,
            })
            .collect();
        let inner = error.into_inner();
        // A shape error may come before a syntax error later in the body: syntax is reported first.
        if let Err(syntax) = serde_json::from_slice::<serde::de::IgnoredAny>(body) {
            return ApiError::MalformedJson(syntax.to_string());
        }
        match inner.classify() {
            serde_json::error::Category::Data => ApiError::Invalid(vec![Issue {
                pointer,
                detail: strip_position(&inner.to_string()),
            }]),
            _ => ApiError::MalformedJson(inner.to_string()),
        }
    })?;
    deserializer
        .end()
        .map_err(|e| ApiError::MalformedJson(e.to_string()))?;
    Ok(parsed)
}

/// Drops serde_json's " at line L column C" suffix where a JSON pointer says it better.
fn strip_position(message: &str) -> String {
    match message.rfind(" at line ") {
        Some(at) => message[..at].to_owned(),
        None => message.to_owned(),
    }
}

fn solve_blocking(body: &[u8], budget: &Budget) -> Result<SolveAnswer, ApiError> {
    let request: SolveRequest = parse_json(body)?;
    Ok(answer(&request, budget)?)
}

fn tune_blocking(body: &[u8], budget: &Budget) -> Result<TuneResponse, ApiError> {
    let request: TuneRequest = parse_json(body)?;
    Ok(tune_parameter(&request, budget)?)
}

/// Runs CPU-heavy work on the blocking pool under one of the computation permits, and writes
/// its JSON there too (an exact answer can run to hundreds of megabytes), refusing an answer over
/// the size limit.
async fn compute<T: Serialize + Send + 'static>(
    state: &AppState,
    work: impl FnOnce(&Budget) -> Result<T, ApiError> + Send + 'static,
) -> Result<HttpResponse, ApiError> {
    let permit = state
        .permits
        .clone()
        .try_acquire_owned()
        .map_err(|_| ApiError::Saturated)?;
    let limits = state.limits;
    let body = web::block(move || {
        let _permit = permit;
        let budget = Budget::new(limits.time).with_memory(limits.memory_bytes);
        let answer = work(&budget)?;
        let body = serde_json::to_vec(&answer)
            .map_err(|e| ApiError::Internal(format!("could not write the answer: {e}")))?;
        if body.len() > limits.response_bytes {
            return Err(ApiError::from(SolveError::TooLarge(format!(
                "the answer is {} bytes of JSON, over the limit of {} bytes (setting \
                 ODDSMITH_MAX_RESPONSE_BYTES); ask for \"float\" arithmetic, fewer reports, or \
                 no `by_state`",
                body.len(),
                limits.response_bytes
            ))));
        }
        Ok(body)
    })
    .await
    .map_err(|e| ApiError::Internal(format!("computation panicked: {e}")))??;
    Ok(HttpResponse::Ok()
        .content_type("application/json")
        .body(body))
}

/// Solve an absorbing Markov chain.
///
/// Validates the chain, then reports where the walk ends (absorption probabilities and the chance
/// of never being absorbed), how long it takes (mean, variance, mean given each outcome) and
/// expected visits, from the start and, with `by_state`, from every transient state. Small chains
/// are solved in exact rational arithmetic, large ones in floating point.
#[utoipa::path(
    post,
    path = "/v1/solve",
    tag = "solve",
    request_body(
        content = SolveRequest,
        content_type = "application/json",
        example = json!({
            "chain": {
                "states": [{"id": "sword", "absorbing": true}],
                "transitions": [
                    {"from": "chest", "to": "sword", "probability": "1/40"},
                    {"from": "chest", "to": "mimic", "probability": "1/200"},
                    {"from": "chest", "to": "chest", "probability": "0.97"}
                ],
                "start": "chest"
            },
            "report": ["absorption", "steps"]
        })
    ),
    responses(
        (status = 200, description = "The answer (a `SweepResponse` when `sweep` is given)", body = SolveAnswer),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body too large", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Body not sent as JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid model (every problem with its JSON pointer), budget exceeded, or answer too large", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "Every computation slot is busy; see Retry-After", body = Problem, content_type = "application/problem+json"),
    )
)]
#[post("/v1/solve")]
pub async fn solve(
    request: HttpRequest,
    payload: web::Payload,
    state: web::Data<AppState>,
) -> Result<HttpResponse, ApiError> {
    let body = read_body(&request, payload, state.max_body_bytes).await?;
    compute(&state, move |budget| solve_blocking(&body, budget)).await
}

/// Find the parameter value at which a metric reaches a target.
///
/// Samples the range, then narrows a bracket around the value with safeguarded Newton steps
/// using the exact derivative. `value.exact` is present only when an exact rational root was
/// verified. A target the metric does not reach in the range is a 422 giving the metric at both
/// ends; a metric that is not monotone in the range is named in `warnings`.
#[utoipa::path(
    post,
    path = "/v1/tune",
    tag = "solve",
    request_body(
        content = TuneRequest,
        content_type = "application/json",
        example = json!({
            "chain": {
                "parameters": {"drop": "1/40"},
                "transitions": [
                    {"from": "chest", "to": "sword", "probability": "drop"},
                    {"from": "chest", "to": "mimic", "probability": "1/200"},
                    {"from": "chest", "to": "chest", "probability": "1 - drop - 1/200"}
                ],
                "start": "chest"
            },
            "parameter": "drop",
            "range": ["0.001", "0.2"],
            "target": {"metric": "absorption", "outcome": "sword", "equals": "0.9"}
        })
    ),
    responses(
        (status = 200, description = "The value found", body = TuneResponse),
        (status = 400, description = "Malformed JSON", body = Problem, content_type = "application/problem+json"),
        (status = 413, description = "Body too large", body = Problem, content_type = "application/problem+json"),
        (status = 415, description = "Body not sent as JSON", body = Problem, content_type = "application/problem+json"),
        (status = 422, description = "Invalid request, target not reached in the range, or budget exceeded", body = Problem, content_type = "application/problem+json"),
        (status = 503, description = "Every computation slot is busy; see Retry-After", body = Problem, content_type = "application/problem+json"),
    )
)]
#[post("/v1/tune")]
pub async fn tune(
    request: HttpRequest,
    payload: web::Payload,
    state: web::Data<AppState>,
) -> Result<HttpResponse, ApiError> {
    let body = read_body(&request, payload, state.max_body_bytes).await?;
    compute(&state, move |budget| tune_blocking(&body, budget)).await
}

/// Liveness: answers while the process runs.
#[utoipa::path(get, path = "/healthz", tag = "operations",
    responses((status = 200, description = "Alive", body = Object, example = json!({"status": "ok"}))))]
#[get("/healthz")]
pub async fn healthz() -> HttpResponse {
    HttpResponse::Ok().json(serde_json::json!({"status": "ok"}))
}

/// Readiness: 200 while a computation slot is free, 503 when every slot is busy.
#[utoipa::path(get, path = "/readyz", tag = "operations",
    responses(
        (status = 200, description = "Ready", body = Object, example = json!({"status": "ready"})),
        (status = 503, description = "Saturated", body = Problem, content_type = "application/problem+json")))]
#[get("/readyz")]
pub async fn readyz(state: web::Data<AppState>) -> Result<HttpResponse, ApiError> {
    if state.permits.available_permits() == 0 {
        return Err(ApiError::Saturated);
    }
    Ok(HttpResponse::Ok().json(serde_json::json!({"status": "ready"})))
}

/// This document.
#[utoipa::path(get, path = "/openapi.json", tag = "operations",
    responses((status = 200, description = "The OpenAPI 3.1 document", body = Object)))]
#[get("/openapi.json")]
pub async fn openapi_json(state: web::Data<AppState>) -> HttpResponse {
    HttpResponse::Ok()
        .content_type("application/json")
        .body(state.openapi_json.clone())
}

/// Anything else: 405 with `Allow` for a known path, 404 otherwise.
pub async fn fallback(request: HttpRequest, state: web::Data<AppState>) -> HttpResponse {
    use actix_web::ResponseError;
    let path = request.path().to_owned();
    let error = match state.routes.iter().find(|(known, _)| *known == path) {
        Some((_, methods)) => ApiError::MethodNotAllowed {
            path,
            method: request.method().to_string(),
            allow: methods.clone(),
        },
        None => ApiError::NotFound(path),
    };
    error.error_response()
}

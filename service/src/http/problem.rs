//! Every error the HTTP shell answers with, as an RFC 9457 problem document
//! (`application/problem+json`) with JSON pointers to each problem in the request.

use actix_web::http::{header, StatusCode};
use actix_web::{HttpResponse, ResponseError};
use oddsmith_client::types::{Problem, ProblemItem};

use crate::model::validate::Issue;
use crate::solve::SolveError;

/// Media type of problem documents.
pub const PROBLEM_JSON: &str = "application/problem+json";

/// An error answered to the client.
#[derive(Debug, thiserror::Error)]
pub enum ApiError {
    /// 400: the body is not well-formed JSON.
    #[error("the body is not well-formed JSON: {0}")]
    MalformedJson(String),
    /// 413: the body is larger than the limit.
    #[error("the body is larger than the limit of {limit} bytes")]
    PayloadTooLarge {
        /// The limit in bytes.
        limit: usize,
    },
    /// 415: the body is not declared as JSON.
    #[error("{0}")]
    UnsupportedMediaType(String),
    /// 422: well-formed JSON describing an invalid request; every problem with its pointer.
    #[error("the request is not a valid model: {} problem(s)", .0.len())]
    Invalid(Vec<Issue>),
    /// 422: the computation ran out of its time budget.
    #[error("{0}")]
    BudgetExceeded(String),
    /// 422: the answer would be larger than the service computes or sends.
    #[error("{0}")]
    TooLarge(String),
    /// 422: floating point cannot represent this chain's answer faithfully.
    #[error("{0}")]
    Numerical(String),
    /// 503: every computation slot is taken; retry shortly.
    #[error("every computation slot is busy; retry in a moment")]
    Saturated,
    /// 404: no such route.
    #[error("no resource at {0}")]
    NotFound(String),
    /// 405: the route exists but not with this method.
    #[error("{path} does not accept {method}; it accepts {}", allow.join(", "))]
    MethodNotAllowed {
        /// The requested path.
        path: String,
        /// The requested method.
        method: String,
        /// The methods the route accepts.
        allow: Vec<String>,
    },
    /// 500: a bug on our side; the cause is logged, never sent.
    #[error("internal error")]
    Internal(String),
}

impl ApiError {
    fn kind(&self) -> (&'static str, &'static str) {
        match self {
            ApiError::MalformedJson(_) => ("malformed-json", "Malformed JSON"),
            ApiError::PayloadTooLarge { .. } => ("body-too-large", "Request body too large"),
            ApiError::UnsupportedMediaType(_) => {
                ("unsupported-media-type", "Unsupported media type")
            }
            ApiError::Invalid(_) => ("invalid-model", "Invalid model"),
            ApiError::BudgetExceeded(_) => ("budget-exceeded", "Budget exceeded"),
            ApiError::TooLarge(_) => ("answer-too-large", "Answer too large"),
            ApiError::Numerical(_) => ("numerical-breakdown", "Floating point broke down"),
            ApiError::Saturated => ("saturated", "Service saturated"),
            ApiError::NotFound(_) => ("not-found", "Not found"),
            ApiError::MethodNotAllowed { .. } => ("method-not-allowed", "Method not allowed"),
            ApiError::Internal(_) => ("internal", "Internal error"),
        }
    }

    /// The problem document sent for this error.
    #[must_use]
    pub fn problem(&self) -> Problem {
        let (slug, title) = self.kind();
        let errors = match self {
            ApiError::Invalid(issues) => issues
                .iter()
                .map(|i| ProblemItem {
                    pointer: i.pointer.clone(),
                    detail: i.detail.clone(),
                })
                .collect(),
            _ => Vec::new(),
        };
        let detail = match self {
            ApiError::Invalid(issues) if issues.len() == 1 && issues[0].pointer.is_empty() => {
                issues[0].detail.clone()
            }
            ApiError::Invalid(issues) if issues.len() == 1 => {
                format!("{}: {}", issues[0].pointer, issues[0].detail)
            }
            ApiError::Invalid(issues) => format!(
                "the request has {} problems, each listed in `errors` with its JSON pointer",
                issues.len()
            ),
            other => other.to_string(),
        };
        Problem {
            problem_type: format!("urn:oddsmith:problem:{slug}"),
            title: title.to_owned(),
            status: self.status_code().as_u16(),
            detail,
            errors,
        }
    }
}

impl From<SolveError> for ApiError {
    fn from(error: SolveError) -> Self {
        match error {
            SolveError::BudgetExceeded { limit } => ApiError::BudgetExceeded(format!(
                "the computation exceeded its time budget of {} ms (setting \
                 ODDSMITH_SOLVE_BUDGET_MS); ask for \"float\" arithmetic, report less, or \
                 simplify the chain",
                limit.as_millis()
            )),
            SolveError::TooLarge(why) => ApiError::TooLarge(why),
            SolveError::Numerical(why) => {
                ApiError::Numerical(format!("{why}; ask for \"exact\" arithmetic"))
            }
        }
    }
}

impl From<crate::sweep::RequestError> for ApiError {
    fn from(error: crate::sweep::RequestError) -> Self {
        match error {
            crate::sweep::RequestError::Invalid(issues) => ApiError::Invalid(issues),
            crate::sweep::RequestError::Solve(solve) => solve.into(),
        }
    }
}

impl ResponseError for ApiError {
    fn status_code(&self) -> StatusCode {
        match self {
            ApiError::MalformedJson(_) => StatusCode::BAD_REQUEST,
            ApiError::PayloadTooLarge { .. } => StatusCode::PAYLOAD_TOO_LARGE,
            ApiError::UnsupportedMediaType(_) => StatusCode::UNSUPPORTED_MEDIA_TYPE,
            ApiError::Invalid(_)
            | ApiError::BudgetExceeded(_)
            | ApiError::TooLarge(_)
            | ApiError::Numerical(_) => StatusCode::UNPROCESSABLE_ENTITY,
            ApiError::Saturated => StatusCode::SERVICE_UNAVAILABLE,
            ApiError::NotFound(_) => StatusCode::NOT_FOUND,
            ApiError::MethodNotAllowed { .. } => StatusCode::METHOD_NOT_ALLOWED,
            ApiError::Internal(_) => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }

    fn error_response(&self) -> HttpResponse {
        if let ApiError::Internal(cause) = self {
            tracing::error!(%cause, "internal error");
        }
        let mut response = HttpResponse::build(self.status_code());
        response.insert_header((header::CONTENT_TYPE, PROBLEM_JSON));
        match self {
            ApiError::Saturated => {
                response.insert_header((header::RETRY_AFTER, "1"));
            }
            ApiError::MethodNotAllowed { allow, .. } => {
                response.insert_header((header::ALLOW, allow.join(", ")));
            }
            _ => {}
        }
        response.body(serde_json::to_string(&self.problem()).unwrap_or_default())
    }
}

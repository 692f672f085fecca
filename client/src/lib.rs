//! Client for the Oddsmith service, which answers questions about absorbing Markov chains:
//! absorption probabilities, expected steps and their spread, expected visits.
//!
//! [`types`] is the wire contract shared with the service; [`Client`] calls it over HTTP.
//!
//! ```no_run
//! # async fn demo() -> Result<(), oddsmith_client::Error> {
//! use oddsmith_client::{Client, types::*};
//! let chain: ChainSpec = serde_json::from_value(serde_json::json!({
//!     "transitions": [
//!         {"from": "chest", "to": "sword", "probability": "1/40"},
//!         {"from": "chest", "to": "chest", "probability": "39/40"}
//!     ],
//!     "start": "chest"
//! })).unwrap();
//! let answer = Client::new("http://127.0.0.1:8080").solve(&SolveRequest::new(chain)).await?;
//! let mean = answer.metrics.steps.unwrap().mean.unwrap();
//! assert_eq!(mean.exact.as_deref(), Some("40"));
//! # Ok(()) }
//! ```
#![deny(missing_docs)]

pub mod types;

use types::{Problem, SolveRequest, SolveResponse, SweepResponse, TuneRequest, TuneResponse};

/// What can go wrong when calling the service.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// The service refused the request and said why (an RFC 9457 problem document).
    #[error("{} {}: {}", .0.status, .0.title, .0.detail)]
    Problem(Box<Problem>),
    /// The request did not complete (connection, timeout, or an unreadable body).
    #[error("transport: {0}")]
    Transport(#[from] reqwest::Error),
    /// The service answered something that is neither a result nor a problem document.
    #[error("unexpected answer {status}: {body}")]
    Unexpected {
        /// HTTP status.
        status: u16,
        /// The body as text.
        body: String,
    },
}

/// A client for one Oddsmith service.
#[derive(Clone, Debug)]
pub struct Client {
    http: reqwest::Client,
    base_url: String,
}

impl Client {
    /// A client for the service at `base_url`, e.g. `http://127.0.0.1:8080`.
    #[must_use]
    pub fn new(base_url: impl Into<String>) -> Self {
        Client::with_http(reqwest::Client::new(), base_url)
    }

    /// A client that sends through a preconfigured `reqwest::Client` (timeouts, proxies).
    #[must_use]
    pub fn with_http(http: reqwest::Client, base_url: impl Into<String>) -> Self {
        let base_url = base_url.into().trim_end_matches('/').to_owned();
        Client { http, base_url }
    }

    /// The service's address as given.
    #[must_use]
    pub fn base_url(&self) -> &str {
        &self.base_url
    }

    /// Solves a chain (`POST /v1/solve`).
    ///
    /// # Errors
    /// [`Error::Problem`] when the service rejects the chain or runs out of budget,
    /// [`Error::Transport`] when the call fails, [`Error::Unexpected`] for anything else.
    pub async fn solve(&self, request: &SolveRequest) -> Result<SolveResponse, Error> {
        self.post("/v1/solve", request).await
    }

    /// Solves a chain once per sweep point (`POST /v1/solve` with `sweep` set).
    ///
    /// # Errors
    /// As for [`Client::solve`].
    pub async fn sweep(&self, request: &SolveRequest) -> Result<SweepResponse, Error> {
        self.post("/v1/solve", request).await
    }

    /// Finds the parameter value at which a metric reaches a target (`POST /v1/tune`).
    ///
    /// # Errors
    /// As for [`Client::solve`]; a target not reached in the range is an [`Error::Problem`].
    pub async fn tune(&self, request: &TuneRequest) -> Result<TuneResponse, Error> {
        self.post("/v1/tune", request).await
    }

    async fn post<T: serde::de::DeserializeOwned>(
        &self,
        path: &str,
        body: &impl serde::Serialize,
    ) -> Result<T, Error> {
        let response = self
            .http
            .post(format!("{}{path}", self.base_url))
            .json(body)
            .send()
            .await?;
        read_answer(response).await
    }

    /// Checks that the service is alive (`GET /healthz`).
    ///
    /// # Errors
    /// As for [`Client::solve`].
    pub async fn health(&self) -> Result<(), Error> {
        let response = self
            .http
            .get(format!("{}/healthz", self.base_url))
            .send()
            .await?;
        read_answer::<serde_json::Value>(response).await.map(drop)
    }
}

async fn read_answer<T: serde::de::DeserializeOwned>(
    response: reqwest::Response,
) -> Result<T, Error> {
    let status = response.status();
    let is_problem = response
        .headers()
        .get(reqwest::header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .is_some_and(|v| v.starts_with("application/problem+json"));
    let body = response.bytes().await?;
    if status.is_success() {
        if let Ok(answer) = serde_json::from_slice(&body) {
            return Ok(answer);
        }
    } else if is_problem {
        if let Ok(problem) = serde_json::from_slice::<Problem>(&body) {
            return Err(Error::Problem(Box::new(problem)));
        }
    }
    Err(Error::Unexpected {
        status: status.as_u16(),
        body: String::from_utf8_lossy(&body).into_owned(),
    })
}

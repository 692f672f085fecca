//! Starting the real server on a free port and calling it through the client crate.

use num_bigint::BigInt;
use num_rational::BigRational;
use oddsmith::http::Application;
use oddsmith::settings::Settings;
use oddsmith_client::types::{SolveRequest, SolveResponse};
use oddsmith_client::{Client, Error};
use serde_json::{json, Value};

/// A running server and a client for it.
pub struct TestApp {
    pub client: Client,
    pub address: String,
    pub http: reqwest::Client,
}

/// Starts the server with the default settings on a free port.
pub async fn spawn_app() -> TestApp {
    spawn_app_with(|_| {}).await
}

/// Starts the server with adjusted settings on a free port.
pub async fn spawn_app_with(adjust: impl FnOnce(&mut Settings)) -> TestApp {
    let mut settings = Settings::for_tests();
    adjust(&mut settings);
    let application = Application::build(&settings).expect("the server binds a free port");
    let address = format!("http://127.0.0.1:{}", application.port());
    tokio::spawn(application.run_until_stopped());
    let client = Client::new(address.clone());
    client.health().await.expect("the server answers /healthz");
    TestApp {
        client,
        address,
        http: reqwest::Client::new(),
    }
}

impl TestApp {
    /// Solves a request written as JSON, through the client crate's types.
    pub async fn solve(&self, request: Value) -> Result<SolveResponse, Error> {
        let request: SolveRequest =
            serde_json::from_value(request).expect("test requests match the wire types");
        self.client.solve(&request).await
    }

    /// Solves a request, panicking on any error.
    pub async fn solve_ok(&self, request: Value) -> SolveResponse {
        self.solve(request.clone())
            .await
            .unwrap_or_else(|e| panic!("{request} failed: {e}"))
    }

    /// Posts raw bytes with a content type, returning status, content type and JSON body.
    pub async fn post_raw(
        &self,
        path: &str,
        content_type: &str,
        body: Vec<u8>,
    ) -> (u16, String, Value) {
        let response = self
            .http
            .post(format!("{}{path}", self.address))
            .header("content-type", content_type)
            .body(body)
            .send()
            .await
            .expect("the server answers");
        read(response).await
    }

    /// Sends a request with any method and no body.
    pub async fn call(&self, method: reqwest::Method, path: &str) -> (u16, String, Value) {
        let response = self
            .http
            .request(method, format!("{}{path}", self.address))
            .send()
            .await
            .expect("the server answers");
        read(response).await
    }
}

async fn read(response: reqwest::Response) -> (u16, String, Value) {
    let status = response.status().as_u16();
    let content_type = response
        .headers()
        .get("content-type")
        .map(|v| v.to_str().unwrap().to_owned())
        .unwrap_or_default();
    let body = response.bytes().await.expect("a body");
    let json = serde_json::from_slice(&body).unwrap_or(Value::Null);
    (status, content_type, json)
}

/// The exact text of a reported number.
pub fn exact(number: &oddsmith_client::types::Number) -> &str {
    number.exact.as_deref().expect("an exact answer")
}

/// The rational n/d.
pub fn r(n: i64, d: i64) -> BigRational {
    BigRational::new(BigInt::from(n), BigInt::from(d))
}

/// A rational as the service writes it: `"n"` or `"n/d"` in lowest terms.
pub fn text(value: &BigRational) -> String {
    if value.is_integer() {
        value.numer().to_string()
    } else {
        format!("{}/{}", value.numer(), value.denom())
    }
}

/// An invented game's chest that yields the sword with probability `drop` per opening.
pub fn chest(drop: &str) -> Value {
    json!({
        "parameters": {"drop": drop},
        "transitions": [
            {"from": "chest", "to": "sword", "probability": "drop"},
            {"from": "chest", "to": "chest", "probability": "1 - drop"}
        ],
        "start": "chest"
    })
}

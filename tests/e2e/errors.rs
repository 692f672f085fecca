//! Every class of bad input gets a clear RFC 9457 problem document through the real server:
//! the right status, `application/problem+json`, and JSON pointers to each problem.

use std::io::Write;
use std::time::{Duration, Instant};

use reqwest::Method;
use serde_json::{json, Value};

use crate::behaviour::dense_chain;

/// A request that keeps exact arithmetic busy for minutes: the time distribution of a dense
/// chain over 100,000 steps, whose probabilities gain digits at every step.
fn slow_exact_request() -> Value {
    json!({"chain": dense_chain(20), "arithmetic": "exact", "report": ["distribution"], "horizon": 100_000})
}
use crate::helpers::{spawn_app, spawn_app_with, TestApp};

const JSON: &str = "application/json";
const PROBLEM: &str = "application/problem+json";

fn pointers(problem: &Value) -> Vec<&str> {
    problem["errors"]
        .as_array()
        .map(|errors| {
            errors
                .iter()
                .map(|e| e["pointer"].as_str().unwrap())
                .collect()
        })
        .unwrap_or_default()
}

async fn post_json(app: &TestApp, body: &Value) -> (u16, String, Value) {
    app.post_raw("/v1/solve", JSON, serde_json::to_vec(body).unwrap())
        .await
}

fn assert_problem(answer: &(u16, String, Value), status: u16) {
    let (got, content_type, body) = answer;
    assert_eq!(*got, status, "{body}");
    assert_eq!(content_type, PROBLEM);
    assert_eq!(body["status"], status);
    assert!(body["type"]
        .as_str()
        .unwrap()
        .starts_with("urn:oddsmith:problem:"));
    assert!(!body["title"].as_str().unwrap().is_empty());
    assert!(!body["detail"].as_str().unwrap().is_empty());
}

#[tokio::test]
async fn malformed_json_is_400() {
    let app = spawn_app().await;
    for body in [&b"{\"chain\": "[..], b"not json", b"{} trailing", b""] {
        let answer = app.post_raw("/v1/solve", JSON, body.to_vec()).await;
        assert_problem(&answer, 400);
    }
}

#[tokio::test]
async fn deep_nesting_is_refused_without_crashing() {
    let app = spawn_app().await;
    let depth = 100_000;
    let body = format!("{{\"chain\": {}{}}}", "[".repeat(depth), "]".repeat(depth));
    let answer = app.post_raw("/v1/solve", JSON, body.into_bytes()).await;
    assert_problem(&answer, 400);
    assert!(answer.2["detail"].as_str().unwrap().contains("recursion"));
    app.client.health().await.expect("still serving");
}

#[tokio::test]
async fn wrong_or_missing_content_type_is_415() {
    let app = spawn_app().await;
    let answer = app
        .post_raw("/v1/solve", "text/plain", b"{}".to_vec())
        .await;
    assert_problem(&answer, 415);
    let response = app
        .http
        .post(format!("{}/v1/solve", app.address))
        .body("{}")
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 415);
    // A JSON-based media type with parameters is accepted.
    let answer = app
        .post_raw(
            "/v1/solve",
            "application/json; charset=utf-8",
            b"{}".to_vec(),
        )
        .await;
    assert_eq!(answer.0, 422);
}

#[tokio::test]
async fn a_body_over_the_limit_is_413_even_when_it_arrives_gzipped() {
    let app = spawn_app_with(|s| s.max_body_bytes = 10_000).await;
    let big = format!("{{\"pad\": \"{}\"}}", "x".repeat(20_000));
    let answer = app
        .post_raw("/v1/solve", JSON, big.clone().into_bytes())
        .await;
    assert_problem(&answer, 413);
    // 20 kB of JSON compresses to well under the limit; the limit applies after decompression.
    let mut encoder = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::best());
    encoder.write_all(big.as_bytes()).unwrap();
    let compressed = encoder.finish().unwrap();
    assert!(compressed.len() < 10_000);
    let response = app
        .http
        .post(format!("{}/v1/solve", app.address))
        .header("content-type", JSON)
        .header("content-encoding", "gzip")
        .body(compressed)
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 413);
    assert_eq!(response.headers()["content-type"], PROBLEM);
}

#[tokio::test]
async fn every_problem_in_a_model_is_listed_with_its_pointer() {
    let app = spawn_app().await;
    let answer = post_json(
        &app,
        &json!({"chain": {
            "states": [{"id": "won", "absorbing": true}],
            "transitions": [
                {"from": "a", "to": "won", "probability": "1/2"},
                {"from": "a", "to": "b", "probability": "0.4"},
                {"from": "b", "to": "won", "probability": "1/0"},
                {"from": "c", "to": "won", "probability": "1e999999"},
                {"from": "d", "to": "won", "weight": "9".repeat(100_000)},
                {"from": "e", "to": "won", "probability": "2"},
                {"from": "won", "to": "a", "probability": 1},
                {"from": "f", "to": "won"}
            ],
            "start": "nowhere"
        }}),
    )
    .await;
    assert_problem(&answer, 422);
    assert_eq!(
        pointers(&answer.2),
        [
            "/chain/transitions/2/probability",
            "/chain/transitions/3/probability",
            "/chain/transitions/4/weight",
            "/chain/transitions/5/probability",
            "/chain/transitions/7",
            "/chain/states/0/absorbing",
            "/chain/transitions/0",
            "/chain/start",
        ]
    );
    let details: Vec<&str> = answer.2["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["detail"].as_str().unwrap())
        .collect();
    assert!(details[0].contains("divides by zero"));
    assert!(details[1].contains("exponent"));
    assert!(details[2].contains("characters"));
    assert!(details[6].contains("sum to 9/10"));
}

#[tokio::test]
async fn wrong_shapes_and_unknown_fields_are_422_with_pointers() {
    let app = spawn_app().await;
    let cases = [
        (
            json!({"chain": {"transitions": [], "start": "a"}, "arithmetic": "approximate"}),
            "/arithmetic",
        ),
        (
            json!({"chain": {"transitions": [{"from": "a", "to": "b", "probabilty": 1}], "start": "a"}}),
            "/chain/transitions/0/probabilty",
        ),
        (
            json!({"chain": {"transitions": [{"from": "a", "to": "b", "probability": true}], "start": "a"}}),
            "/chain/transitions/0/probability",
        ),
        (
            json!({"chain": {"transitions": [], "start": "a"}, "report": ["everything"]}),
            "/report/0",
        ),
        (
            json!({"chain": {"transitions": [], "start": "a"}, "report": []}),
            "/report",
        ),
        (
            json!({"chain": {"transitions": [], "start": 3}}),
            "/chain/start",
        ),
        (json!({"chain": {"transitions": []}}), "/chain"),
        (
            json!({"chain": {"transitions": [], "start": "a"}, "horizon": 10}),
            "/horizon",
        ),
        (json!({"transitions": []}), "/transitions"),
        (json!({}), ""),
    ];
    for (body, pointer) in cases {
        let answer = post_json(&app, &body).await;
        assert_problem(&answer, 422);
        assert_eq!(pointers(&answer.2), [pointer], "{body}");
    }
    // An empty chain has no states, so its start names none either.
    let answer = post_json(&app, &json!({"chain": {"transitions": [], "start": "a"}})).await;
    assert_eq!(pointers(&answer.2), ["/chain", "/chain/start"]);
}

#[tokio::test]
async fn unknown_routes_are_404_and_wrong_methods_405_with_allow() {
    let app = spawn_app().await;
    let answer = app.call(Method::GET, "/v2/solve").await;
    assert_problem(&answer, 404);
    let response = app
        .http
        .get(format!("{}/v1/solve", app.address))
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 405);
    assert_eq!(response.headers()["allow"], "POST");
    assert_eq!(response.headers()["content-type"], PROBLEM);
    let answer = app.call(Method::DELETE, "/healthz").await;
    assert_problem(&answer, 405);
}

#[tokio::test]
async fn a_computation_over_its_budget_is_422_promptly_and_others_are_still_served() {
    let app = spawn_app_with(|s| s.solve_budget_ms = 1_500).await;
    let started = Instant::now();
    let body = serde_json::to_vec(&slow_exact_request()).unwrap();
    let (http, url) = (app.http.clone(), format!("{}/v1/solve", app.address));
    let slow = tokio::spawn(async move {
        let response = http
            .post(url)
            .header("content-type", JSON)
            .body(body)
            .send()
            .await
            .unwrap();
        let status = response.status().as_u16();
        let content_type = response.headers()["content-type"]
            .to_str()
            .unwrap()
            .to_owned();
        let problem: Value = response.json().await.unwrap();
        (status, content_type, problem, Instant::now())
    });
    // While the slow computation runs (its body parses in milliseconds), a small one is answered.
    tokio::time::sleep(Duration::from_millis(300)).await;
    let small = post_json(&app, &json!({"chain": dense_chain(3)})).await;
    let small_done = Instant::now();
    assert_eq!(small.0, 200);
    let (status, content_type, problem, slow_done) = slow.await.unwrap();
    assert!(
        small_done < slow_done,
        "the small request waited for the slow one"
    );
    let answer = (status, content_type, problem);
    assert_problem(&answer, 422);
    assert!(answer.2["detail"].as_str().unwrap().contains("1500 ms"));
    assert!(answer.2["type"]
        .as_str()
        .unwrap()
        .ends_with("budget-exceeded"));
    // Stopping takes a moment beyond the budget itself.
    assert!(
        started.elapsed() < Duration::from_secs(10),
        "took {:?}",
        started.elapsed()
    );
}

#[tokio::test]
async fn when_every_slot_is_busy_the_answer_is_503_with_retry_after() {
    let app = spawn_app_with(|s| {
        s.max_concurrent_solves = 1;
        s.solve_budget_ms = 5_000;
    })
    .await;
    let body = serde_json::to_vec(&slow_exact_request()).unwrap();
    let http = app.http.clone();
    let url = format!("{}/v1/solve", app.address);
    let slow = tokio::spawn(async move {
        http.post(url)
            .header("content-type", JSON)
            .body(body)
            .send()
            .await
            .unwrap()
            .status()
    });
    let deadline = Instant::now() + Duration::from_secs(20);
    while app.call(Method::GET, "/readyz").await.0 == 200 {
        assert!(Instant::now() < deadline, "the slow request never started");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let response = app
        .http
        .post(format!("{}/v1/solve", app.address))
        .header("content-type", JSON)
        .body(serde_json::to_vec(&json!({"chain": dense_chain(2)})).unwrap())
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 503);
    assert_eq!(response.headers()["retry-after"], "1");
    assert_eq!(slow.await.unwrap(), 422);
    assert_eq!(app.call(Method::GET, "/readyz").await.0, 200);
}

#[tokio::test]
async fn probabilities_too_small_for_doubles_get_422_in_float_and_an_answer_in_exact() {
    let app = spawn_app().await;
    let chain = json!({"transitions": [
        {"from": "grind", "to": "relic", "weight": 1},
        {"from": "grind", "to": "grind", "weight": "1e400"}
    ], "start": "grind"});
    let answer = post_json(&app, &json!({"chain": chain, "arithmetic": "float"})).await;
    assert_problem(&answer, 422);
    assert!(
        answer.2["detail"].as_str().unwrap().contains("exact"),
        "{}",
        answer.2
    );
    let answer = post_json(&app, &json!({"chain": chain, "arithmetic": "exact"})).await;
    assert_eq!(answer.0, 200);
    assert_eq!(
        answer.2["steps"]["mean"]["exact"],
        format!("1{}1", "0".repeat(399))
    );
}

#[tokio::test]
async fn an_answer_too_large_to_send_is_refused_up_front() {
    // 1,500 transient states each with its own absorbing exit: by_state would report
    // 1,500 x 1,500 absorption probabilities.
    let app = spawn_app().await;
    let transitions: Vec<Value> = (0..1_500)
        .flat_map(|i| {
            [
                json!({"from": format!("s{i}"), "to": format!("exit{i}"), "probability": "1/2"}),
                json!({"from": format!("s{i}"), "to": format!("s{}", (i + 1) % 1_500), "probability": "1/2"}),
            ]
        })
        .collect();
    let started = Instant::now();
    let answer = post_json(
        &app,
        &json!({"chain": {"transitions": transitions, "start": "s0"}, "by_state": true}),
    )
    .await;
    assert_problem(&answer, 422);
    assert!(answer.2["type"]
        .as_str()
        .unwrap()
        .ends_with("answer-too-large"));
    assert!(started.elapsed() < Duration::from_secs(5));
}

#[tokio::test]
async fn runaway_numbers_and_oversized_requests_are_refused_promptly() {
    let app = spawn_app().await;
    let started = Instant::now();
    // A 70-byte power that would hold billions of digits.
    let answer = post_json(&app, &json!({"chain": {"transitions": [{"from": "a", "to": "b", "weight": "((3^999)^126)^1000"}], "start": "a"}})).await;
    assert_problem(&answer, 422);
    assert_eq!(pointers(&answer.2), ["/chain/transitions/0/weight"]);
    // A `within` horizon beyond the limit, in tuning.
    let tune = json!({
        "chain": {"parameters": {"drop": "1/40"}, "transitions": [
            {"from": "chest", "to": "sword", "probability": "drop"},
            {"from": "chest", "to": "chest", "probability": "1 - drop"}], "start": "chest"},
        "parameter": "drop", "range": ["0.01", "0.2"],
        "target": {"metric": "within", "steps": u64::MAX, "outcome": "sword", "equals": "0.5"}
    });
    let answer = app
        .post_raw("/v1/tune", JSON, serde_json::to_vec(&tune).unwrap())
        .await;
    assert_problem(&answer, 422);
    assert_eq!(pointers(&answer.2), ["/target/steps"]);
    // A sweep whose answers together would be too large.
    let sweep = json!({
        "chain": {"parameters": {"drop": "1/40"}, "transitions": [
            {"from": "chest", "to": "sword", "probability": "drop"},
            {"from": "chest", "to": "chest", "probability": "1 - drop"}], "start": "chest"},
        "report": ["distribution"], "horizon": 999_999,
        "sweep": {"parameter": "drop", "from": "0.01", "to": "0.02", "count": 10}
    });
    let answer = post_json(&app, &sweep).await;
    assert_problem(&answer, 422);
    assert!(answer.2["type"]
        .as_str()
        .unwrap()
        .ends_with("answer-too-large"));
    assert!(
        started.elapsed() < Duration::from_secs(10),
        "{:?}",
        started.elapsed()
    );
}

/// A 1-D walk in the columnar form: states 0..=n+1, absorbing ends, up 2/5, down 1/2, stay 1/10.
pub fn walk_table(n: usize) -> Value {
    let mut from = Vec::new();
    let mut to = Vec::new();
    let mut probability = Vec::new();
    for z in 1..=n {
        for (target, p) in [(z + 1, "0.4"), (z - 1, "0.5"), (z, "0.1")] {
            from.push(z);
            to.push(target);
            probability.push(p);
        }
    }
    let states: Vec<String> = (0..n + 2).map(|z| format!("z{z}")).collect();
    json!({"states": states, "table": {"from": from, "to": to, "probability": probability}, "start": "z1"})
}

#[tokio::test]
async fn a_request_over_the_memory_limit_is_422_naming_the_setting() {
    let app = spawn_app_with(|s| s.max_request_memory_mb = 1).await;
    let answer = post_json(
        &app,
        &json!({"chain": walk_table(50_000), "arithmetic": "float"}),
    )
    .await;
    assert_problem(&answer, 422);
    let detail = answer.2["detail"].as_str().unwrap();
    assert!(
        detail.contains("ODDSMITH_MAX_REQUEST_MEMORY_MB"),
        "{detail}"
    );
    // A small chain still fits.
    let small = post_json(
        &app,
        &json!({"chain": walk_table(10), "arithmetic": "float"}),
    )
    .await;
    assert_eq!(small.0, 200);
}

#[tokio::test]
async fn an_answer_over_the_response_limit_is_422_suggesting_less() {
    let app = spawn_app_with(|s| s.max_response_bytes = 20_000).await;
    // Exact answers on a 300-state walk run to thousands of digits from each state.
    let request = json!({"chain": walk_table(300), "arithmetic": "exact", "by_state": true});
    let answer = post_json(&app, &request).await;
    assert_problem(&answer, 422);
    let detail = answer.2["detail"].as_str().unwrap();
    assert!(
        detail.contains("ODDSMITH_MAX_RESPONSE_BYTES") && detail.contains("float"),
        "{detail}"
    );
    let small = post_json(
        &app,
        &json!({"chain": walk_table(3), "arithmetic": "exact"}),
    )
    .await;
    assert_eq!(small.0, 200);
}

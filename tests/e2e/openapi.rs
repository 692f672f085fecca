//! The published OpenAPI document describes exactly the wire contract, and its example works.

use serde_json::Value;

use crate::helpers::spawn_app;

fn property_names(document: &Value, schema: &str) -> Vec<String> {
    let mut names: Vec<String> = document["components"]["schemas"][schema]["properties"]
        .as_object()
        .unwrap_or_else(|| panic!("schema {schema} has properties"))
        .keys()
        .cloned()
        .collect();
    names.sort();
    names
}

#[tokio::test]
async fn the_document_is_openapi_3_1_with_the_contract_field_names() {
    let app = spawn_app().await;
    let (status, content_type, document) = app.call(reqwest::Method::GET, "/openapi.json").await;
    assert_eq!(status, 200);
    assert_eq!(content_type, "application/json");
    assert!(document["openapi"].as_str().unwrap().starts_with("3.1"));
    for (path, method) in [
        ("/v1/solve", "post"),
        ("/healthz", "get"),
        ("/readyz", "get"),
        ("/openapi.json", "get"),
    ] {
        assert!(
            document["paths"][path][method].is_object(),
            "{method} {path}"
        );
    }
    // Field names fixed by the wire contract.
    let expect = |schema: &str, names: &[&str]| {
        let mut names: Vec<String> = names.iter().map(|s| s.to_string()).collect();
        names.sort();
        assert_eq!(property_names(&document, schema), names, "{schema}");
    };
    expect(
        "SolveRequest",
        &[
            "chain",
            "arithmetic",
            "report",
            "by_state",
            "parameters",
            "horizon",
            "quantiles",
            "sweep",
        ],
    );
    expect(
        "ChainSpec",
        &["states", "transitions", "table", "start", "parameters"],
    );
    expect("TransitionTable", &["from", "to", "probability", "weight"]);
    expect("Derivative", &["derivative", "elasticity"]);
    expect(
        "Sensitivity",
        &[
            "absorption",
            "never_absorbed",
            "steps_mean",
            "steps_variance",
            "steps_mean_given",
            "visits",
            "distribution",
            "costs",
        ],
    );
    expect(
        "DistributionSensitivity",
        &["cdf", "by_outcome", "remaining"],
    );
    expect("CostSensitivity", &["mean", "variance", "mean_given"]);
    expect("SweepAxis", &["parameter", "values", "from", "to", "count"]);
    expect("SweepResponse", &["sweep"]);
    expect(
        "MetricSelector",
        &[
            "metric", "outcome", "given", "state", "steps", "q", "cost", "from",
        ],
    );
    expect(
        "Distribution",
        &[
            "horizon",
            "cdf",
            "by_outcome",
            "quantiles",
            "quantiles_by_outcome",
            "remaining",
        ],
    );
    expect("CostReport", &["mean", "variance", "mean_given"]);
    expect(
        "TuneRequest",
        &[
            "chain",
            "parameter",
            "range",
            "target",
            "arithmetic",
            "parameters",
        ],
    );
    expect(
        "TuneResponse",
        &[
            "parameter",
            "value",
            "bracket",
            "achieved",
            "evaluations",
            "warnings",
        ],
    );
    expect(
        "TransitionSpec",
        &["from", "to", "probability", "weight", "cost"],
    );
    expect("StateDetail", &["id", "absorbing", "cost"]);
    expect("Number", &["value", "exact"]);
    expect("Steps", &["mean", "variance", "mean_given"]);
    expect(
        "Metrics",
        &[
            "absorption",
            "never_absorbed",
            "steps",
            "visits",
            "distribution",
            "costs",
            "sensitivity",
        ],
    );
    expect(
        "SolverInfo",
        &[
            "method",
            "transient_states",
            "transitions",
            "elapsed_ms",
            "max_residual",
            // Ours, beyond the contract: how far to trust a float answer.
            "iterations",
            "error_estimate",
        ],
    );
    expect("Problem", &["type", "title", "status", "detail", "errors"]);
    expect("ProblemItem", &["pointer", "detail"]);
    let responses = &document["paths"]["/v1/solve"]["post"]["responses"];
    for status in ["200", "400", "413", "415", "422", "503"] {
        assert!(
            responses[status].is_object(),
            "response {status} documented"
        );
    }
    assert!(responses["422"]["content"]["application/problem+json"].is_object());
}

#[tokio::test]
async fn the_documented_tuning_example_finds_its_root() {
    let app = spawn_app().await;
    let (_, _, document) = app.call(reqwest::Method::GET, "/openapi.json").await;
    let example = &document["paths"]["/v1/tune"]["post"]["requestBody"]["content"]
        ["application/json"]["example"];
    let tuned = app
        .client
        .tune(&serde_json::from_value(example.clone()).unwrap())
        .await
        .unwrap();
    // drop / (drop + 1/200) = 9/10 at drop = 9/200.
    assert_eq!(tuned.value.exact.as_deref(), Some("9/200"));
}

#[tokio::test]
async fn the_documented_example_request_solves() {
    let app = spawn_app().await;
    let (_, _, document) = app.call(reqwest::Method::GET, "/openapi.json").await;
    let example = &document["paths"]["/v1/solve"]["post"]["requestBody"]["content"]
        ["application/json"]["example"];
    assert!(example.is_object(), "an example is published");
    let answer = app.solve_ok(example.clone()).await;
    // 1/40 sword versus 1/200 mimic per chest: the sword comes first with 5/6.
    assert_eq!(
        answer.metrics.absorption.unwrap()["sword"].exact.as_deref(),
        Some("5/6")
    );
}

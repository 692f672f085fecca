//! Named parameters through the real server: sensitivities against closed forms, sweeps against
//! individual solves, goal seeking against known roots, and parameter errors.

use num_bigint::BigInt;
use num_rational::BigRational;
use oddsmith_client::types::{SolveRequest, TuneRequest};
use serde_json::{json, Value};

use crate::helpers::{chest, exact, spawn_app, text};

#[tokio::test]
async fn sensitivities_of_the_geometric_waiting_time_match_its_derivatives() {
    // Geometric waiting time: mean 1/p, variance (1-p)/p^2 (Feller, Vol. 1, ch. XI); their
    // derivatives, by hand: -1/p^2 and (p-2)/p^3; the mean's elasticity is -1.
    let app = spawn_app().await;
    for (n, d) in [(1i64, 40i64), (3, 10), (1, 2)] {
        let p = BigRational::new(BigInt::from(n), BigInt::from(d));
        let answer = app
            .solve_ok(json!({"chain": chest(&format!("{n}/{d}")), "report": ["absorption", "steps", "sensitivity"], "arithmetic": "exact"}))
            .await;
        let sensitivity = &answer.metrics.sensitivity.unwrap()["drop"];
        let mean = sensitivity.steps_mean.as_ref().unwrap();
        assert_eq!(
            exact(mean.derivative.as_ref().unwrap()),
            text(&-(&p * &p).recip())
        );
        assert_eq!(exact(mean.elasticity.as_ref().unwrap()), "-1");
        let variance = sensitivity.steps_variance.as_ref().unwrap();
        let two = BigRational::from_integer(2.into());
        assert_eq!(
            exact(variance.derivative.as_ref().unwrap()),
            text(&((&p - two) / (&p * &p * &p)))
        );
        // Absorption is certain whatever the drop rate: derivative 0.
        assert_eq!(
            exact(
                sensitivity.absorption.as_ref().unwrap()["sword"]
                    .derivative
                    .as_ref()
                    .unwrap()
            ),
            "0"
        );
    }
}

#[tokio::test]
async fn float_sensitivities_agree_with_central_differences() {
    let app = spawn_app().await;
    // An invented payment gateway: each attempt succeeds with `ok`, else retries (3 attempts).
    let chain = json!({
        "parameters": {"ok": "0.8"},
        "transitions": [
            {"from": "try1", "to": "paid", "probability": "ok"},
            {"from": "try1", "to": "try2", "probability": "1 - ok"},
            {"from": "try2", "to": "paid", "probability": "ok"},
            {"from": "try2", "to": "try3", "probability": "1 - ok"},
            {"from": "try3", "to": "paid", "probability": "ok"},
            {"from": "try3", "to": "failed", "probability": "1 - ok"}
        ],
        "start": "try1"
    });
    let at = |ok: f64| json!({"chain": chain, "arithmetic": "float", "parameters": {"ok": ok}, "report": ["absorption", "steps", "sensitivity"]});
    let answer = app.solve_ok(at(0.8)).await;
    let h = 1e-6;
    let (up, down) = (
        app.solve_ok(at(0.8 + h)).await,
        app.solve_ok(at(0.8 - h)).await,
    );
    let sensitivity = &answer.metrics.sensitivity.as_ref().unwrap()["ok"];
    let failed = |a: &oddsmith_client::types::SolveResponse| {
        a.metrics.absorption.as_ref().unwrap()["failed"].value
    };
    let mean = |a: &oddsmith_client::types::SolveResponse| {
        a.metrics
            .steps
            .as_ref()
            .unwrap()
            .mean
            .as_ref()
            .unwrap()
            .value
    };
    let fd_failed = (failed(&up) - failed(&down)) / (2.0 * h);
    let fd_mean = (mean(&up) - mean(&down)) / (2.0 * h);
    let got_failed = sensitivity.absorption.as_ref().unwrap()["failed"]
        .derivative
        .as_ref()
        .unwrap()
        .value;
    let got_mean = sensitivity
        .steps_mean
        .as_ref()
        .unwrap()
        .derivative
        .as_ref()
        .unwrap()
        .value;
    // P(failed) = (1-ok)^3: derivative -3 (1-ok)^2 = -0.12 at ok = 0.8.
    assert!((got_failed + 0.12).abs() < 1e-12, "{got_failed}");
    assert!(
        (got_failed - fd_failed).abs() < 1e-6,
        "{got_failed} vs {fd_failed}"
    );
    assert!((got_mean - fd_mean).abs() < 1e-6, "{got_mean} vs {fd_mean}");
}

#[tokio::test]
async fn sweeps_equal_the_individual_solves_in_order() {
    let app = spawn_app().await;
    let mut request: SolveRequest = serde_json::from_value(json!({
        "chain": chest("1/40"),
        "sweep": {"parameter": "drop", "values": ["1/50", 0.05, "10%"]},
        "report": ["absorption", "steps", "sensitivity"]
    }))
    .unwrap();
    let swept = app.client.sweep(&request).await.unwrap();
    assert_eq!(swept.sweep.len(), 3);
    request.sweep = None;
    for (point, drop) in swept.sweep.iter().zip(["1/50", "1/20", "1/10"]) {
        assert_eq!(exact(&point.parameters["drop"]), drop);
        request.parameters.insert("drop".into(), drop.into());
        let mut single = app.client.solve(&request).await.unwrap();
        let mut from_sweep = point.answer.clone();
        single.solver.elapsed_ms = 0.0;
        from_sweep.solver.elapsed_ms = 0.0;
        assert_eq!(from_sweep, single);
    }
}

#[tokio::test]
async fn a_grid_sweep_varies_the_last_axis_fastest() {
    let app = spawn_app().await;
    let chain = json!({
        "parameters": {"drop": "1/40", "mimic": "1/200"},
        "transitions": [
            {"from": "chest", "to": "sword", "probability": "drop"},
            {"from": "chest", "to": "mimic", "probability": "mimic"},
            {"from": "chest", "to": "chest", "probability": "1 - drop - mimic"}
        ],
        "start": "chest"
    });
    let request: SolveRequest = serde_json::from_value(json!({
        "chain": chain,
        "sweep": [
            {"parameter": "drop", "from": "0.01", "to": "0.03", "count": 3},
            {"parameter": "mimic", "values": ["0", "0.01"]}
        ]
    }))
    .unwrap();
    let swept = app.client.sweep(&request).await.unwrap();
    let points: Vec<(String, String, String)> = swept
        .sweep
        .iter()
        .map(|p| {
            (
                exact(&p.parameters["drop"]).to_owned(),
                exact(&p.parameters["mimic"]).to_owned(),
                exact(&p.answer.metrics.absorption.as_ref().unwrap()["sword"]).to_owned(),
            )
        })
        .collect();
    let expected = [
        ("1/100", "0", "1"),
        ("1/100", "1/100", "1/2"),
        ("1/50", "0", "1"),
        ("1/50", "1/100", "2/3"),
        ("3/100", "0", "1"),
        ("3/100", "1/100", "3/4"),
    ];
    let expected: Vec<(String, String, String)> = expected
        .iter()
        .map(|(a, b, c)| (a.to_string(), b.to_string(), c.to_string()))
        .collect();
    assert_eq!(points, expected);
}

#[tokio::test]
async fn tuning_recovers_an_exact_drop_rate() {
    // P(sword before mimic) = drop / (drop + 1/200) = 9/10 exactly at drop = 9/200.
    let app = spawn_app().await;
    let request: TuneRequest = serde_json::from_value(json!({
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
    }))
    .unwrap();
    let tuned = app.client.tune(&request).await.unwrap();
    assert_eq!(tuned.value.exact.as_deref(), Some("9/200"));
    assert_eq!(tuned.achieved.exact.as_deref(), Some("9/10"));
    assert!(tuned.warnings.is_empty());
}

#[tokio::test]
async fn tuning_finds_an_irrational_root_to_double_precision() {
    // Three tries, each succeeding with p: P(success) = 1 - (1-p)^3 = 0.9 at p = 1 - 0.1^(1/3).
    let app = spawn_app().await;
    let mut transitions = Vec::new();
    for k in 1..=3 {
        let next = if k < 3 {
            format!("try{}", k + 1)
        } else {
            "gave_up".into()
        };
        transitions.push(json!({"from": format!("try{k}"), "to": "success", "probability": "p"}));
        transitions.push(json!({"from": format!("try{k}"), "to": next, "probability": "1 - p"}));
    }
    let request: TuneRequest = serde_json::from_value(json!({
        "chain": {"parameters": {"p": "1/2"}, "transitions": transitions, "start": "try1"},
        "parameter": "p",
        "range": [0.01, 0.99],
        "target": {"metric": "absorption", "outcome": "success", "equals": 0.9}
    }))
    .unwrap();
    let tuned = app.client.tune(&request).await.unwrap();
    let root = 1.0 - 0.1f64.powf(1.0 / 3.0);
    assert!(
        (tuned.value.value - root).abs() < 1e-12,
        "{} vs {root}",
        tuned.value.value
    );
    assert!(tuned.value.exact.is_none(), "the root is irrational");
    assert!((tuned.achieved.value - 0.9).abs() < 1e-12);
    assert!(
        tuned.bracket[0].value <= tuned.value.value && tuned.value.value <= tuned.bracket[1].value
    );
}

#[tokio::test]
async fn tuning_warns_when_the_metric_is_not_monotone_and_refuses_unreachable_targets() {
    let app = spawn_app().await;
    let chain = json!({
        "parameters": {"p": "1/2"},
        "transitions": [
            {"from": "duel", "to": "win", "probability": "4 * p * (1 - p)"},
            {"from": "duel", "to": "lose", "probability": "1 - 4 * p * (1 - p)"}
        ],
        "start": "duel"
    });
    let tune = |equals: &str| {
        json!({
            "chain": chain, "parameter": "p", "range": ["0", "1"],
            "target": {"metric": "absorption", "outcome": "win", "equals": equals}
        })
    };
    let tuned = app
        .client
        .tune(&serde_json::from_value(tune("3/4")).unwrap())
        .await
        .unwrap();
    assert_eq!(tuned.value.exact.as_deref(), Some("1/4"), "the lowest root");
    assert!(
        tuned.warnings[0].contains("not monotone"),
        "{:?}",
        tuned.warnings
    );
    let (status, content_type, problem) = app
        .post_raw(
            "/v1/tune",
            "application/json",
            serde_json::to_vec(&tune("1.5")).unwrap(),
        )
        .await;
    assert_eq!(
        (status, content_type.as_str()),
        (422, "application/problem+json")
    );
    let detail = problem["errors"][0]["detail"].as_str().unwrap();
    assert_eq!(problem["errors"][0]["pointer"], "/target/equals");
    assert!(
        detail.contains("is 0 at p = 0") && detail.contains("and 0 at p = 1"),
        "{detail}"
    );
}

#[tokio::test]
async fn parameter_mistakes_are_422_with_pointers_columns_and_values() {
    let app = spawn_app().await;
    let post = |body: Value| {
        let app = &app;
        async move {
            app.post_raw(
                "/v1/solve",
                "application/json",
                serde_json::to_vec(&body).unwrap(),
            )
            .await
        }
    };
    let mut chain = chest("1/40");
    chain["transitions"][1]["probability"] = json!("1 - dorp");
    let (status, _, problem) = post(json!({"chain": chain})).await;
    assert_eq!(status, 422);
    assert_eq!(
        problem["errors"][0]["pointer"],
        "/chain/transitions/1/probability"
    );
    assert!(
        problem["errors"][0]["detail"]
            .as_str()
            .unwrap()
            .contains("column 5"),
        "{problem}"
    );
    let (status, _, problem) =
        post(json!({"chain": chest("1/40"), "parameters": {"drop": "1.5"}})).await;
    assert_eq!(status, 422);
    let details: Vec<&str> = problem["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["detail"].as_str().unwrap())
        .collect();
    assert!(
        details.iter().all(|d| d.contains("drop = 3/2")),
        "{details:?}"
    );
    let (status, _, problem) =
        post(json!({"chain": chest("1/40"), "parameters": {"rate": "1/2"}})).await;
    assert_eq!(status, 422);
    assert_eq!(problem["errors"][0]["pointer"], "/parameters/rate");
    let (status, _, problem) =
        post(json!({"chain": chest("1/40"), "sweep": {"parameter": "rate", "values": [1]}})).await;
    assert_eq!(status, 422);
    assert_eq!(problem["errors"][0]["pointer"], "/sweep/parameter");
}

#[tokio::test]
async fn a_sampled_exact_hit_is_reported_as_that_exact_value() {
    // absorption = drop hits 1/24 exactly; no rounding of the sample may leak into `exact`.
    let app = spawn_app().await;
    let request: TuneRequest = serde_json::from_value(json!({
        "chain": chest("1/40"), "parameter": "drop", "range": ["0", "1/3"],
        "target": {"metric": "steps_mean", "equals": "24"}
    }))
    .unwrap();
    let tuned = app.client.tune(&request).await.unwrap();
    assert_eq!(tuned.value.exact.as_deref(), Some("1/24"));
    assert_eq!(tuned.achieved.exact.as_deref(), Some("24"));
}

#[tokio::test]
async fn long_expressions_are_expressions_not_overlong_numerals() {
    let app = spawn_app().await;
    let mut chain = chest("1/40");
    // 1 - drop written as 1 - (drop + 0*drop + 0*drop + ...), over 400 characters.
    let padding = " + 0*drop".repeat(60);
    chain["transitions"][1]["probability"] = json!(format!("1 - (drop{padding})"));
    let answer = app.solve_ok(json!({"chain": chain})).await;
    assert_eq!(
        exact(answer.metrics.steps.unwrap().mean.as_ref().unwrap()),
        "40"
    );
}

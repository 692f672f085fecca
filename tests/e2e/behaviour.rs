//! How the service behaves beyond single closed forms: traps, start distributions, defaults,
//! float against exact, the choice of arithmetic, gzip bodies.

use std::io::Write;

use oddsmith_client::types::UsedArithmetic;
use serde_json::json;

use crate::helpers::{exact, spawn_app, spawn_app_with};

/// An invented dungeon: from the hall the walk may fall into a pit it never leaves.
fn dungeon() -> serde_json::Value {
    json!({
        "transitions": [
            {"from": "hall", "to": "treasure", "probability": "1/2"},
            {"from": "hall", "to": "pit", "probability": "1/4"},
            {"from": "hall", "to": "hall", "probability": "1/4"},
            {"from": "pit", "to": "ledge", "probability": 1},
            {"from": "ledge", "to": "pit", "probability": 1},
            {"from": "gate", "to": "treasure", "probability": 1}
        ],
        "start": "hall"
    })
}

#[tokio::test]
async fn a_closed_class_traps_the_walk_and_makes_expected_steps_infinite() {
    let app = spawn_app().await;
    let answer = app
        .solve_ok(json!({"chain": dungeon(), "report": ["absorption", "steps", "visits"], "by_state": true}))
        .await;
    assert_eq!(answer.arithmetic, UsedArithmetic::Exact);
    let metrics = &answer.metrics;
    assert_eq!(
        exact(&metrics.absorption.as_ref().unwrap()["treasure"]),
        "2/3"
    );
    assert_eq!(exact(metrics.never_absorbed.as_ref().unwrap()), "1/3");
    let steps = metrics.steps.as_ref().unwrap();
    assert!(steps.mean.is_none() && steps.variance.is_none());
    // Given the treasure, the wait is geometric with parameter 2/3 on the hall's exits: 4/3.
    assert_eq!(exact(steps.mean_given["treasure"].as_ref().unwrap()), "4/3");
    let visits = metrics.visits.as_ref().unwrap();
    assert_eq!(exact(visits["hall"].as_ref().unwrap()), "4/3");
    assert!(visits["pit"].is_none() && visits["ledge"].is_none());
    assert_eq!(exact(visits["gate"].as_ref().unwrap()), "0");
    assert!(
        answer.warnings.iter().any(|w| w.contains("{pit, ledge}")),
        "{:?}",
        answer.warnings
    );
    let by_state = answer.by_state.unwrap();
    assert_eq!(exact(by_state["pit"].never_absorbed.as_ref().unwrap()), "1");
    assert_eq!(
        exact(
            by_state["gate"]
                .steps
                .as_ref()
                .unwrap()
                .mean
                .as_ref()
                .unwrap()
        ),
        "1"
    );
    assert!(by_state["gate"]
        .steps
        .as_ref()
        .unwrap()
        .mean_given
        .contains_key("treasure"));
}

#[tokio::test]
async fn a_start_distribution_mixes_the_answers_of_its_states() {
    let app = spawn_app().await;
    let mut chain = dungeon();
    chain["start"] = json!({"gate": "1/2", "treasure": "1/4", "hall": "1/4"});
    let answer = app.solve_ok(json!({"chain": chain})).await;
    // treasure: 1/2 · 1 + 1/4 · 1 + 1/4 · 2/3 = 11/12; trapped only via the hall: 1/4 · 1/3.
    assert_eq!(
        exact(&answer.metrics.absorption.as_ref().unwrap()["treasure"]),
        "11/12"
    );
    assert_eq!(
        exact(answer.metrics.never_absorbed.as_ref().unwrap()),
        "1/12"
    );
    chain["start"] = json!({"gate": "1/2", "treasure": "1/2"});
    let answer = app.solve_ok(json!({"chain": chain})).await;
    let steps = answer.metrics.steps.unwrap();
    // Steps are 1 or 0 with equal chance: mean 1/2, variance 1/4; given treasure, 1/2.
    assert_eq!(exact(steps.mean.as_ref().unwrap()), "1/2");
    assert_eq!(exact(steps.variance.as_ref().unwrap()), "1/4");
    assert_eq!(exact(steps.mean_given["treasure"].as_ref().unwrap()), "1/2");
    assert!(
        answer.warnings.is_empty(),
        "the trap is unreachable: {:?}",
        answer.warnings
    );
}

#[tokio::test]
async fn defaults_report_absorption_and_steps_only_and_list_every_absorbing_state() {
    let app = spawn_app().await;
    let answer = app
        .solve_ok(json!({"chain": {
            "states": ["refund", {"id": "chargeback", "absorbing": true}],
            "transitions": [{"from": "pending", "to": "settled", "probability": 1}],
            "start": "pending"
        }}))
        .await;
    let absorption = answer.metrics.absorption.unwrap();
    let keys: Vec<&str> = absorption.keys().map(String::as_str).collect();
    assert_eq!(keys, ["chargeback", "refund", "settled"]);
    assert_eq!(exact(&absorption["refund"]), "0");
    assert!(answer.metrics.visits.is_none());
    assert!(answer.by_state.is_none());
    assert!(answer.metrics.steps.unwrap().mean_given["refund"].is_none());
}

#[tokio::test]
async fn float_arithmetic_agrees_with_exact_and_reports_its_residual() {
    let app = spawn_app().await;
    let mut transitions = Vec::new();
    // An invented payment gateway: each attempt succeeds with 0.9, fails softly with 0.07
    // (retry) or hard with 0.03, up to four attempts.
    for k in 1..=4 {
        let next = if k < 4 {
            format!("attempt{}", k + 1)
        } else {
            "exhausted".into()
        };
        transitions.push(json!({"from": format!("attempt{k}"), "to": "paid", "probability": 0.9}));
        transitions.push(json!({"from": format!("attempt{k}"), "to": next, "probability": 0.07}));
        transitions
            .push(json!({"from": format!("attempt{k}"), "to": "declined", "probability": 0.03}));
    }
    let chain = json!({"transitions": transitions, "start": "attempt1"});
    let request = |arithmetic: &str| json!({"chain": chain, "arithmetic": arithmetic, "report": ["absorption", "steps", "visits"], "by_state": true});
    let exact_answer = app.solve_ok(request("exact")).await;
    let float_answer = app.solve_ok(request("float")).await;
    assert_eq!(float_answer.arithmetic, UsedArithmetic::Float);
    assert!(float_answer.solver.max_residual < 1e-12);
    // The chance all four attempts fail softly: 0.07^4.
    assert_eq!(
        exact(&exact_answer.metrics.absorption.as_ref().unwrap()["exhausted"]),
        "2401/100000000"
    );
    let exact_json = serde_json::to_value(&exact_answer).unwrap();
    let float_json = serde_json::to_value(&float_answer).unwrap();
    compare(&exact_json, &float_json, "");
}

/// Every `value` in the float answer is within 1e-12 of the exact answer's.
fn compare(exact: &serde_json::Value, float: &serde_json::Value, at: &str) {
    use serde_json::Value;
    match (exact, float) {
        (Value::Object(e), Value::Object(f)) if e.contains_key("exact") => {
            let (e, f) = (e["value"].as_f64().unwrap(), f["value"].as_f64().unwrap());
            assert!(
                (e - f).abs() <= 1e-12 * e.abs().max(1.0),
                "{at}: {e} vs {f}"
            );
            assert!(
                !float.as_object().unwrap().contains_key("exact"),
                "{at} has an exact form"
            );
        }
        (Value::Object(e), Value::Object(f)) => {
            for (key, value) in e {
                if key != "solver" && key != "arithmetic" {
                    compare(value, &f[key], &format!("{at}/{key}"));
                }
            }
        }
        (Value::Array(_), _) | (Value::String(_), _) => {}
        (e, f) => assert_eq!(e.is_null(), f.is_null(), "{at}"),
    }
}

/// A dense chain of `n` transient states with small integer weights (and two exits each).
pub fn dense_chain(n: usize) -> serde_json::Value {
    let mut transitions = Vec::new();
    for i in 0..n {
        for j in 0..n {
            transitions.push(json!({"from": format!("s{i}"), "to": format!("s{j}"), "weight": 1 + (i * 7 + j * 3) % 5}));
        }
        transitions.push(json!({"from": format!("s{i}"), "to": "won", "weight": 1}));
        transitions.push(json!({"from": format!("s{i}"), "to": "lost", "weight": 1 + i % 2}));
    }
    json!({"transitions": transitions, "start": "s0"})
}

/// A random chain of our own: each of `n` states jumps to 5 pseudo-random states (weights
/// 1..4) and leaves with weight 1 to `won` or `lost`.
pub fn random_chain(n: usize, seed: u64) -> serde_json::Value {
    let mut state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
    let mut next = move |bound: usize| {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        (state % bound as u64) as usize
    };
    let mut transitions = Vec::new();
    for i in 0..n {
        for _ in 0..5 {
            let (to, weight) = (next(n), 1 + next(4));
            transitions
                .push(json!({"from": format!("s{i}"), "to": format!("s{to}"), "weight": weight}));
        }
        let exit = if i % 2 == 0 { "won" } else { "lost" };
        transitions.push(json!({"from": format!("s{i}"), "to": exit, "weight": 1}));
    }
    json!({"transitions": transitions, "start": "s0"})
}

#[tokio::test]
async fn auto_answers_in_float_when_exact_is_predicted_to_overrun_and_exact_when_small() {
    // A random 3,000-state chain fills its factors almost completely, and its exact answers
    // run to thousands of bits: the prediction sends it straight to float instead of spending a
    // quarter of the budget.
    let app = spawn_app_with(|s| s.solve_budget_ms = 2_000).await;
    let answer = app.solve_ok(json!({"chain": random_chain(3_000, 1)})).await;
    assert_eq!(answer.arithmetic, UsedArithmetic::Float);
    // No exact attempt was made and abandoned: that would leave a fallback warning.
    assert!(
        !answer.warnings.iter().any(|w| w.contains("did not finish")),
        "{:?}",
        answer.warnings
    );
    let small = app.solve_ok(json!({"chain": dense_chain(5)})).await;
    assert_eq!(small.arithmetic, UsedArithmetic::Exact);
    // p-adic lifting makes a dense 100-state chain cheap enough for exact arithmetic.
    let dense = app.solve_ok(json!({"chain": dense_chain(100)})).await;
    assert_eq!(dense.arithmetic, UsedArithmetic::Exact);
    assert!(
        dense.solver.method.contains("p-adic"),
        "{}",
        dense.solver.method
    );
}

#[tokio::test]
async fn gzip_bodies_are_decompressed() {
    let app = spawn_app().await;
    let body = serde_json::to_vec(&json!({"chain": dungeon()})).unwrap();
    let mut encoder = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::default());
    encoder.write_all(&body).unwrap();
    let response = app
        .http
        .post(format!("{}/v1/solve", app.address))
        .header("content-type", "application/json")
        .header("content-encoding", "gzip")
        .body(encoder.finish().unwrap())
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 200);
    let answer: serde_json::Value = response.json().await.unwrap();
    assert_eq!(answer["never_absorbed"]["exact"], "1/3");
}

#[tokio::test]
async fn repeated_transitions_are_summed_with_a_warning() {
    let app = spawn_app().await;
    let answer = app
        .solve_ok(json!({"chain": {
            "transitions": [
                {"from": "spin", "to": "jackpot", "probability": "1/10"},
                {"from": "spin", "to": "jackpot", "probability": "1/10"},
                {"from": "spin", "to": "spin", "probability": "4/5"}
            ],
            "start": "spin"
        }}))
        .await;
    assert_eq!(
        exact(answer.metrics.steps.unwrap().mean.as_ref().unwrap()),
        "5"
    );
    assert!(
        answer.warnings[0].contains("transitions 0, 1"),
        "{:?}",
        answer.warnings
    );
}

#[tokio::test]
async fn float_keeps_the_escape_probability_of_a_self_loop_near_one() {
    // Geometric waiting time with p = 1e-12: mean exactly 1/p. Rounding 1 - 1e-12 to a double
    // before forming 1 - q would be off by about 1e-5 relative.
    let app = spawn_app().await;
    let answer = app
        .solve_ok(json!({
            "chain": {"transitions": [
                {"from": "a", "to": "z", "probability": "1e-12"},
                {"from": "a", "to": "a", "probability": "0.999999999999"}
            ], "start": "a"},
            "arithmetic": "float"
        }))
        .await;
    let mean = answer.metrics.steps.unwrap().mean.unwrap().value;
    assert!((mean / 1e12 - 1.0).abs() < 1e-12, "{mean}");
    assert_eq!(answer.metrics.absorption.unwrap()["z"].value, 1.0);
    assert!(answer.warnings.is_empty(), "{:?}", answer.warnings);
}

#[tokio::test]
async fn the_columnar_table_gives_the_same_answer_as_the_transition_list() {
    let app = spawn_app().await;
    let listed = json!({
        "transitions": [
            {"from": "hall", "to": "treasure", "probability": "1/2"},
            {"from": "hall", "to": "pit", "probability": "1/4"},
            {"from": "hall", "to": "hall", "probability": 0.25},
            {"from": "pit", "to": "hall", "weight": 1},
            {"from": "pit", "to": "treasure", "weight": 3}
        ],
        "start": "hall"
    });
    let weights = json!({
        "states": ["hall", "treasure", "pit"],
        "table": {"from": [0, 0, 0], "to": [1, 2, 0], "probability": ["1/2", "1/4", 0.25]},
        "start": "hall"
    });
    // The table holds one value kind, so `pit`'s weights become probabilities here.
    let mut tabled = weights.clone();
    tabled["table"]["from"] = json!([0, 0, 0, 2, 2]);
    tabled["table"]["to"] = json!([1, 2, 0, 0, 1]);
    tabled["table"]["probability"] = json!(["1/2", "1/4", 0.25, "1/4", "3/4"]);
    let request = |chain: &serde_json::Value| json!({"chain": chain, "report": ["absorption", "steps", "visits"], "by_state": true});
    let mut from_list = app.solve_ok(request(&listed)).await;
    let mut from_table = app.solve_ok(request(&tabled)).await;
    from_list.solver.elapsed_ms = 0.0;
    from_table.solver.elapsed_ms = 0.0;
    assert_eq!(from_list, from_table);
    assert_eq!(
        exact(&from_table.metrics.absorption.as_ref().unwrap()["treasure"]),
        "1"
    );

    let mut broken = weights.clone();
    broken["table"]["to"] = json!([1, 7, 0]);
    let (status, _, problem) = app
        .post_raw(
            "/v1/solve",
            "application/json",
            serde_json::to_vec(&json!({"chain": broken})).unwrap(),
        )
        .await;
    assert_eq!(status, 422);
    assert_eq!(problem["errors"][0]["pointer"], "/chain/table/to/1");
    let mut short = weights;
    short["table"]["to"] = json!([1]);
    let (status, _, problem) = app
        .post_raw(
            "/v1/solve",
            "application/json",
            serde_json::to_vec(&json!({"chain": short})).unwrap(),
        )
        .await;
    assert_eq!(status, 422);
    assert_eq!(problem["errors"][0]["pointer"], "/chain/table");
}

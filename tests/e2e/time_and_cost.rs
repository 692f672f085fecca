//! Time to absorption and accumulated costs through the real server, against closed forms.

use num_rational::BigRational;
use num_traits::{One, Zero};
use oddsmith_client::types::TuneRequest;
use serde_json::json;

use crate::helpers::{chest, exact, r, spawn_app, text};

fn binomial(n: u64, k: u64) -> BigRational {
    (0..k).fold(BigRational::one(), |acc, i| {
        acc * r((n - i) as i64, (i + 1) as i64)
    })
}

#[tokio::test]
async fn the_geometric_cdf_is_one_minus_q_to_the_n_and_quantiles_step_past_the_horizon() {
    // Geometric waiting time: P(T <= n) = 1 - (1-p)^n (Feller, Vol. 1, ch. XIII).
    let app = spawn_app().await;
    let answer = app
        .solve_ok(json!({
            "chain": {"transitions": [
                {"from": "roll", "to": "six", "probability": "1/6"},
                {"from": "roll", "to": "roll", "probability": "5/6"}
            ], "start": "roll"},
            "arithmetic": "exact",
            "report": ["distribution"],
            "horizon": 20,
            "quantiles": ["0.5", "0.99"]
        }))
        .await;
    let distribution = answer.metrics.distribution.unwrap();
    assert_eq!(distribution.cdf.len(), 21);
    for (n, value) in distribution.cdf.iter().enumerate() {
        let expected = BigRational::one() - num_traits::pow(r(5, 6), n);
        assert_eq!(exact(value), text(&expected), "n = {n}");
    }
    assert_eq!(
        exact(&distribution.remaining),
        text(&num_traits::pow(r(5, 6), 20))
    );
    // Smallest n with 1 - (5/6)^n >= q: 4 for 1/2, 26 for 0.99 (past the horizon of 20).
    assert_eq!(distribution.quantiles["0.5"], Some(4));
    assert_eq!(distribution.quantiles["0.99"], Some(26));
    assert_eq!(distribution.quantiles_by_outcome["six"]["0.99"], Some(26));
}

/// Draws numbered 1..=n, each wins with `chance`; draw `n` always wins (a pity guarantee).
fn pity(n: u64, chance: &str) -> serde_json::Value {
    let mut transitions = Vec::new();
    for k in 1..n {
        transitions.push(json!({"from": format!("draw{k}"), "to": "won", "probability": chance, "cost": {"gems": 160}}));
        transitions.push(json!({"from": format!("draw{k}"), "to": format!("draw{}", k + 1), "probability": format!("1 - {chance}"), "cost": {"gems": 160}}));
    }
    transitions.push(
        json!({"from": format!("draw{n}"), "to": "won", "probability": 1, "cost": {"gems": 160}}),
    );
    json!({"transitions": transitions, "start": "draw1"})
}

#[tokio::test]
async fn a_capped_geometric_has_mean_one_minus_q_to_the_n_over_p_and_certainty_at_the_cap() {
    // T = min(G, N) for a geometric G: E[T] = sum_{k<N} (1-p)^k = (1 - (1-p)^N) / p.
    let app = spawn_app().await;
    let (n, p) = (90u64, r(6, 1000));
    let answer = app
        .solve_ok(json!({
            "chain": pity(n, "0.6%"),
            "arithmetic": "exact",
            "report": ["steps", "distribution", "costs"],
            "horizon": 90
        }))
        .await;
    let q = BigRational::one() - &p;
    let mean = (BigRational::one() - num_traits::pow(q.clone(), n as usize)) / &p;
    assert_eq!(
        exact(
            answer
                .metrics
                .steps
                .as_ref()
                .unwrap()
                .mean
                .as_ref()
                .unwrap()
        ),
        text(&mean)
    );
    let distribution = answer.metrics.distribution.unwrap();
    assert_eq!(
        exact(&distribution.cdf[89]),
        text(&(BigRational::one() - num_traits::pow(q, 89)))
    );
    assert_eq!(exact(&distribution.cdf[90]), "1");
    assert_eq!(exact(&distribution.remaining), "0");
    // Each draw costs 160 gems: the expected spend is 160 E[T].
    let gems = &answer.metrics.costs.unwrap()["gems"];
    assert_eq!(
        exact(gems.mean.as_ref().unwrap()),
        text(&(mean * BigRational::from_integer(160.into())))
    );
}

#[tokio::test]
async fn waiting_for_k_successes_follows_the_negative_binomial() {
    // The number of trials T to the k-th success: P(T <= n) = P(Binomial(n, p) >= k)
    // (Feller, Vol. 1, ch. VI, sections 8 and 9).
    let app = spawn_app().await;
    let (k, p) = (3u64, r(1, 4));
    let mut transitions = Vec::new();
    for j in 0..k {
        let next = if j + 1 == k {
            "done".to_owned()
        } else {
            format!("got{}", j + 1)
        };
        transitions.push(json!({"from": format!("got{j}"), "to": next, "probability": "1/4"}));
        transitions.push(
            json!({"from": format!("got{j}"), "to": format!("got{j}"), "probability": "3/4"}),
        );
    }
    let answer = app
        .solve_ok(json!({
            "chain": {"transitions": transitions, "start": "got0"},
            "arithmetic": "exact",
            "report": ["distribution"],
            "horizon": 15
        }))
        .await;
    let cdf = answer.metrics.distribution.unwrap().cdf;
    for n in 0..=15u64 {
        let tail: BigRational = (k..=n)
            .map(|j| {
                binomial(n, j)
                    * num_traits::pow(p.clone(), j as usize)
                    * num_traits::pow(BigRational::one() - &p, (n - j) as usize)
            })
            .fold(BigRational::zero(), |a, b| a + b);
        assert_eq!(exact(&cdf[n as usize]), text(&tail), "n = {n}");
    }
}

#[tokio::test]
async fn retry_costs_match_a_direct_enumeration_of_the_attempts() {
    // An invented payment gateway: up to 4 attempts, each succeeding with 9/10 and costing
    // 120 ms, with a 100 ms wait before each retry (a state cost on the retry states).
    let app = spawn_app().await;
    let mut transitions = Vec::new();
    let mut states = Vec::new();
    for a in 1..=4 {
        let next = if a < 4 {
            format!("attempt{}", a + 1)
        } else {
            "exhausted".into()
        };
        transitions.push(json!({"from": format!("attempt{a}"), "to": "succeeded", "probability": "9/10", "cost": {"ms": 120}}));
        transitions.push(json!({"from": format!("attempt{a}"), "to": next, "probability": "1/10", "cost": {"ms": 120}}));
        if a > 1 {
            states.push(json!({"id": format!("attempt{a}"), "cost": {"ms": 100}}));
        }
    }
    let answer = app
        .solve_ok(json!({
            "chain": {"states": states, "transitions": transitions, "start": "attempt1"},
            "arithmetic": "exact",
            "report": ["absorption", "costs"]
        }))
        .await;
    // Enumerate: success at attempt k (prob (1/10)^(k-1) 9/10) costs 120k + 100(k-1) ms;
    // exhausted (prob (1/10)^4) costs 4·120 + 3·100 ms.
    let mut outcomes: Vec<(BigRational, BigRational, bool)> = (1..=4)
        .map(|k| {
            let p = num_traits::pow(r(1, 10), k - 1) * r(9, 10);
            (p, r(120 * k as i64 + 100 * (k as i64 - 1), 1), true)
        })
        .collect();
    outcomes.push((num_traits::pow(r(1, 10), 4), r(780, 1), false));
    let mean: BigRational = outcomes.iter().map(|(p, c, _)| p * c).sum();
    let second: BigRational = outcomes.iter().map(|(p, c, _)| p * c * c).sum();
    let success: BigRational = outcomes
        .iter()
        .filter(|o| o.2)
        .map(|(p, _, _)| p.clone())
        .sum();
    let given_success: BigRational = outcomes
        .iter()
        .filter(|o| o.2)
        .map(|(p, c, _)| p * c)
        .sum::<BigRational>()
        / &success;
    let ms = &answer.metrics.costs.unwrap()["ms"];
    assert_eq!(exact(ms.mean.as_ref().unwrap()), text(&mean));
    assert_eq!(
        exact(ms.variance.as_ref().unwrap()),
        text(&(second - &mean * &mean))
    );
    assert_eq!(
        exact(ms.mean_given["succeeded"].as_ref().unwrap()),
        text(&given_success)
    );
    assert_eq!(exact(ms.mean_given["exhausted"].as_ref().unwrap()), "780");
}

#[tokio::test]
async fn tuning_finds_the_drop_rate_that_gives_99_percent_the_sword_by_the_90th_chest() {
    // P(sword within 90 chests) = 1 - (1 - drop)^90 = 0.99 at drop = 1 - 0.01^(1/90).
    let app = spawn_app().await;
    let request: TuneRequest = serde_json::from_value(json!({
        "chain": chest("1/40"),
        "parameter": "drop",
        "range": ["0.001", "0.2"],
        "target": {"metric": "within", "steps": 90, "outcome": "sword", "equals": "0.99"}
    }))
    .unwrap();
    let tuned = app.client.tune(&request).await.unwrap();
    let root = 1.0 - 0.01f64.powf(1.0 / 90.0);
    assert!(
        (tuned.value.value - root).abs() < 1e-12,
        "{} vs {root}",
        tuned.value.value
    );
    assert!((tuned.achieved.value - 0.99).abs() < 1e-12);
}

#[tokio::test]
async fn merged_pairs_with_different_costs_keep_their_spread() {
    // Half the time 0 gold, half the time 10: mean 5, variance 25.
    let app = spawn_app().await;
    let answer = app
        .solve_ok(json!({"chain": {"transitions": [
            {"from": "chest", "to": "done", "probability": "1/2", "cost": {"gold": 0}},
            {"from": "chest", "to": "done", "probability": "1/2", "cost": {"gold": 10}}
        ], "start": "chest"}, "report": ["costs"]}))
        .await;
    let gold = &answer.metrics.costs.unwrap()["gold"];
    assert_eq!(exact(gold.mean.as_ref().unwrap()), "5");
    assert_eq!(exact(gold.variance.as_ref().unwrap()), "25");
}

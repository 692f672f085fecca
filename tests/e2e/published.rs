//! Answers checked against published closed forms and worked examples, each source named beside
//! its check. Expected values are computed here in exact rationals from the closed forms.

use std::collections::BTreeMap;

use num_rational::BigRational;
use num_traits::{One, Zero};
use serde_json::json;

use crate::helpers::{exact, r, spawn_app, text};

/// The classical ruin problem on 0..=a: from z, +1 with probability p, -1 with q = 1 - p,
/// absorbed at 0 (ruin) and at a.
fn ruin_chain(p: &BigRational, a: i64) -> serde_json::Value {
    let q = BigRational::one() - p;
    let mut transitions = Vec::new();
    for z in 1..a {
        transitions.push(
            json!({"from": format!("z{z}"), "to": format!("z{}", z + 1), "probability": text(p)}),
        );
        transitions.push(
            json!({"from": format!("z{z}"), "to": format!("z{}", z - 1), "probability": text(&q)}),
        );
    }
    json!({"transitions": transitions, "start": "z1"})
}

#[tokio::test]
async fn ruin_probability_and_duration_match_the_closed_forms() {
    // Feller, An Introduction to Probability Theory and Its Applications, Vol. 1, ch. XIV,
    // sections 2 and 3: with r = q/p != 1,
    //   P(ruin from z) = (r^a - r^z) / (r^a - 1),
    //   D_z = z/(q-p) - (a/(q-p)) (1 - r^z)/(1 - r^a);
    // and for p = q = 1/2: P(ruin) = 1 - z/a, D_z = z (a - z).
    let app = spawn_app().await;
    for (p, a) in [(r(2, 5), 10), (r(1, 2), 12), (r(51, 100), 30)] {
        let q = BigRational::one() - &p;
        let answer = app
            .solve_ok(json!({"chain": ruin_chain(&p, a), "arithmetic": "exact", "by_state": true}))
            .await;
        let by_state = answer.by_state.expect("by_state was asked");
        for z in 1..a {
            let (ruin, duration) = if p == q {
                (BigRational::one() - r(z, a), r(z * (a - z), 1))
            } else {
                let ratio = &q / &p;
                let rz = num_traits::pow(ratio.clone(), z as usize);
                let ra = num_traits::pow(ratio, a as usize);
                let ruin = (&ra - &rz) / (&ra - BigRational::one());
                let d = BigRational::from_integer(z.into()) / (&q - &p)
                    - BigRational::from_integer(a.into()) / (&q - &p) * (BigRational::one() - &rz)
                        / (BigRational::one() - &ra);
                (ruin, d)
            };
            let metrics = &by_state[&format!("z{z}")];
            let absorption = metrics.absorption.as_ref().unwrap();
            assert_eq!(
                exact(&absorption["z0"]),
                text(&ruin),
                "ruin from z={z}, p={p}, a={a}"
            );
            let steps = metrics.steps.as_ref().unwrap();
            assert_eq!(
                exact(steps.mean.as_ref().unwrap()),
                text(&duration),
                "duration from z={z}"
            );
        }
    }
}

#[tokio::test]
async fn geometric_waiting_time_has_mean_one_over_p_and_variance_q_over_p_squared() {
    // The geometric distribution of the number of trials up to the first success:
    // mean 1/p, variance (1-p)/p^2 (Feller, Vol. 1, ch. XI, section 2).
    let app = spawn_app().await;
    for (written, p) in [("1/40", r(1, 40)), ("0.6%", r(6, 1000)), ("0.25", r(1, 4))] {
        let chain = json!({
            "transitions": [
                {"from": "chest", "to": "sword", "probability": written},
                {"from": "chest", "to": "chest", "probability": text(&(BigRational::one() - &p))}
            ],
            "start": "chest"
        });
        let answer = app
            .solve_ok(json!({"chain": chain, "arithmetic": "exact"}))
            .await;
        let steps = answer.metrics.steps.unwrap();
        assert_eq!(
            exact(steps.mean.as_ref().unwrap()),
            text(&(BigRational::one() / &p))
        );
        let variance = (BigRational::one() - &p) / (&p * &p);
        assert_eq!(exact(steps.variance.as_ref().unwrap()), text(&variance));
        assert_eq!(
            exact(steps.mean_given["sword"].as_ref().unwrap()),
            text(&(BigRational::one() / &p))
        );
    }
}

#[tokio::test]
async fn coupon_collector_needs_n_times_the_harmonic_number() {
    // Collecting all n equally likely coupons takes n·H_n draws on average
    // (Feller, Vol. 1, ch. IX, section 3).
    let app = spawn_app().await;
    for n in [2i64, 6, 10, 25] {
        let mut transitions = Vec::new();
        for k in 0..n {
            transitions.push(json!({"from": format!("have{k}"), "to": format!("have{}", k + 1), "weight": n - k}));
            if k > 0 {
                transitions.push(
                    json!({"from": format!("have{k}"), "to": format!("have{k}"), "weight": k}),
                );
            }
        }
        let answer = app
            .solve_ok(json!({"chain": {"transitions": transitions, "start": "have0"}, "arithmetic": "exact"}))
            .await;
        let harmonic: BigRational = (1..=n)
            .map(|k| r(1, k))
            .fold(BigRational::zero(), |a, b| a + b);
        let expected = harmonic * BigRational::from_integer(n.into());
        assert_eq!(
            exact(answer.metrics.steps.unwrap().mean.as_ref().unwrap()),
            text(&expected),
            "n = {n}"
        );
    }
}

#[tokio::test]
async fn drunkards_walk_matches_the_textbook_fundamental_matrix() {
    // Grinstead and Snell, Introduction to Probability, ch. 11 (absorbing chains), the drunkard's
    // walk on 0..4 with absorbing ends and steps of ±1 with probability 1/2. Values recalled from
    // memory and re-derived by hand: N = [[3/2, 1, 1/2], [1, 2, 1], [1/2, 1, 3/2]],
    // t = (3, 4, 3), B = [[3/4, 1/4], [1/2, 1/2], [1/4, 3/4]].
    let app = spawn_app().await;
    let mut transitions = Vec::new();
    for z in 1..4 {
        transitions
            .push(json!({"from": z.to_string(), "to": (z + 1).to_string(), "probability": "1/2"}));
        transitions
            .push(json!({"from": z.to_string(), "to": (z - 1).to_string(), "probability": "1/2"}));
    }
    let answer = app
        .solve_ok(json!({
            "chain": {"transitions": transitions, "start": "1"},
            "arithmetic": "exact",
            "report": ["absorption", "steps", "visits"],
            "by_state": true
        }))
        .await;
    let by_state = answer.by_state.unwrap();
    let fundamental = [["3/2", "1", "1/2"], ["1", "2", "1"], ["1/2", "1", "3/2"]];
    let steps = ["3", "4", "3"];
    let absorption = [["3/4", "1/4"], ["1/2", "1/2"], ["1/4", "3/4"]];
    for (i, from) in ["1", "2", "3"].iter().enumerate() {
        let metrics = &by_state[*from];
        let visits = metrics.visits.as_ref().unwrap();
        for (j, to) in ["1", "2", "3"].iter().enumerate() {
            assert_eq!(
                exact(visits[*to].as_ref().unwrap()),
                fundamental[i][j],
                "N[{from}][{to}]"
            );
        }
        let steps_from = metrics.steps.as_ref().unwrap();
        assert_eq!(exact(steps_from.mean.as_ref().unwrap()), steps[i]);
        let b = metrics.absorption.as_ref().unwrap();
        assert_eq!(exact(&b["0"]), absorption[i][0]);
        assert_eq!(exact(&b["4"]), absorption[i][1]);
    }
    // Conditioned durations of the symmetric walk, (a² - z²)/3 given exit at a (from memory;
    // consistent with t = 3: 3/4 · 7/3 + 1/4 · 5 = 3).
    let given: BTreeMap<_, _> = answer.metrics.steps.unwrap().mean_given;
    assert_eq!(exact(given["4"].as_ref().unwrap()), "5");
    assert_eq!(exact(given["0"].as_ref().unwrap()), "7/3");
}

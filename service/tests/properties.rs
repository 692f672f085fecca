//! Property tests of the core on random chains (with traps, absorbing starts and distributions):
//! absorption plus never-absorbed sums to 1 exactly, `(I - Q) N = I`, visits add up to the
//! expected steps, and float agrees with exact.

use std::collections::{BTreeMap, BTreeSet};
use std::time::Duration;

use num_rational::BigRational;
use num_traits::{One, Zero};
use oddsmith::model::validate::validate;
use oddsmith::model::value::parse_exact;
use oddsmith::solve::budget::Budget;
use oddsmith::solve::{solve, Plan};
use oddsmith_client::types::{Arithmetic, ChainSpec, Metrics, Number, Report, SolveResponse};
use proptest::prelude::*;
use serde_json::json;

/// Weighted transitions `(target, weight)` out of each state.
type Rows = Vec<Vec<(usize, u32)>>;

/// Rows of small integer weights over `n` states, and start weights; an empty (or all-zero) row
/// makes a state absorbing.
fn chains() -> impl Strategy<Value = (usize, Rows, Vec<u32>)> {
    (2usize..8).prop_flat_map(|n| {
        let row = prop_oneof![
            1 => Just(Vec::new()),
            4 => prop::collection::vec((0..n, 0u32..5), 1..5),
        ];
        (
            Just(n),
            prop::collection::vec(row, n),
            prop::collection::vec(0u32..3, n),
        )
    })
}

fn spec(n: usize, rows: &[Vec<(usize, u32)>], start: &[u32]) -> Option<ChainSpec> {
    let mut transitions = Vec::new();
    for (i, row) in rows.iter().enumerate() {
        if row.iter().all(|&(_, w)| w == 0) {
            continue;
        }
        for &(j, w) in row {
            transitions.push(json!({"from": format!("s{i}"), "to": format!("s{j}"), "weight": w}));
        }
    }
    let total: u32 = start.iter().sum();
    if total == 0 {
        return None;
    }
    let start: BTreeMap<String, String> = start
        .iter()
        .enumerate()
        .filter(|(_, &w)| w > 0)
        .map(|(i, w)| (format!("s{i}"), format!("{w}/{total}")))
        .collect();
    let states: Vec<String> = (0..n).map(|i| format!("s{i}")).collect();
    Some(
        serde_json::from_value(
            json!({"states": states, "transitions": transitions, "start": start}),
        )
        .unwrap(),
    )
}

fn run(spec: &ChainSpec, arithmetic: Arithmetic) -> SolveResponse {
    let chain = validate(spec, &Default::default()).expect("generated chains are valid");
    let plan = Plan::new(
        arithmetic,
        BTreeSet::from([Report::Absorption, Report::Steps, Report::Visits]),
        true,
    );
    solve(&chain, &plan, &Budget::new(Duration::from_secs(30))).expect("small chains solve")
}

fn exact(number: &Number) -> BigRational {
    parse_exact(number.exact.as_deref().expect("exact")).unwrap()
}

fn every_metrics(answer: &SolveResponse) -> Vec<&Metrics> {
    std::iter::once(&answer.metrics)
        .chain(answer.by_state.as_ref().unwrap().values())
        .collect()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    #[test]
    fn absorption_and_never_absorbed_sum_to_one_exactly((n, rows, start) in chains()) {
        let Some(spec) = spec(n, &rows, &start) else { return Ok(()) };
        let answer = run(&spec, Arithmetic::Exact);
        for metrics in every_metrics(&answer) {
            let total = metrics.absorption.as_ref().unwrap().values().map(exact).sum::<BigRational>()
                + exact(metrics.never_absorbed.as_ref().unwrap());
            prop_assert_eq!(total, BigRational::one());
            // Infinite expected steps exactly where the walk can be trapped.
            let trapped = !exact(metrics.never_absorbed.as_ref().unwrap()).is_zero();
            prop_assert_eq!(metrics.steps.as_ref().unwrap().mean.is_none(), trapped);
        }
    }

    #[test]
    fn fundamental_matrix_inverts_i_minus_q_and_its_rows_sum_to_the_expected_steps((n, rows, start) in chains()) {
        let Some(spec) = spec(n, &rows, &start) else { return Ok(()) };
        let chain = validate(&spec, &Default::default()).unwrap();
        let answer = run(&spec, Arithmetic::Exact);
        let by_state = answer.by_state.as_ref().unwrap();
        // N[i][j] for states whose visits are finite.
        let visits = |i: usize, j: usize| -> Option<BigRational> {
            by_state.get(&chain.ids[i])?.visits.as_ref()?.get(&chain.ids[j])?.as_ref().map(exact)
        };
        for (id, metrics) in by_state {
            let i = chain.ids.iter().position(|s| s == id).unwrap();
            let row: Vec<_> = (0..chain.len()).filter(|&j| !chain.absorbing[j]).map(|j| visits(i, j)).collect();
            if let (Some(mean), true) = (&metrics.steps.as_ref().unwrap().mean, row.iter().all(Option::is_some)) {
                let sum: BigRational = row.into_iter().map(Option::unwrap).sum();
                prop_assert_eq!(sum, exact(mean));
            }
            // (I - Q) N = I on row i wherever row i and its successors' rows are finite.
            for j in (0..chain.len()).filter(|&j| !chain.absorbing[j]) {
                let Some(nij) = visits(i, j) else { continue };
                let mut lhs = nij;
                let mut finite = true;
                for (k, q) in chain.row(i) {
                    if chain.absorbing[k] { continue; }
                    match visits(k, j) {
                        Some(nkj) => lhs -= q * nkj,
                        None => finite = false,
                    }
                }
                if finite {
                    let identity = if i == j { BigRational::one() } else { BigRational::zero() };
                    prop_assert_eq!(lhs, identity, "row {} column {}", i, j);
                }
            }
        }
    }

    #[test]
    fn float_agrees_with_exact((n, rows, start) in chains()) {
        let Some(spec) = spec(n, &rows, &start) else { return Ok(()) };
        let exact_json = serde_json::to_value(run(&spec, Arithmetic::Exact)).unwrap();
        let float_json = serde_json::to_value(run(&spec, Arithmetic::Float)).unwrap();
        agree(&exact_json, &float_json, "")?;
    }
}

fn agree(
    exact: &serde_json::Value,
    float: &serde_json::Value,
    at: &str,
) -> Result<(), TestCaseError> {
    use serde_json::Value;
    match (exact, float) {
        (Value::Object(e), Value::Object(f)) if e.contains_key("exact") => {
            let (e, f) = (e["value"].as_f64().unwrap(), f["value"].as_f64().unwrap());
            prop_assert!(
                (e - f).abs() <= 1e-9 * e.abs().max(1.0),
                "{}: {} vs {}",
                at,
                e,
                f
            );
        }
        (Value::Object(e), Value::Object(f)) => {
            for (key, value) in e
                .iter()
                .filter(|(k, _)| *k != "solver" && *k != "arithmetic")
            {
                agree(value, &f[key], &format!("{at}/{key}"))?;
            }
        }
        (e, f) => prop_assert_eq!(e.is_null(), f.is_null(), "{}", at),
    }
    Ok(())
}

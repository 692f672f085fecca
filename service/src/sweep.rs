//! Whole requests: one solve, or a sweep that solves once per parameter value (or grid point),
//! in parallel across cores, answers in order.

use std::collections::BTreeSet;

use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, Signed};
use oddsmith_client::types::{
    Number, Report, SolveAnswer, SolveRequest, Sweep, SweepAxis, SweepPoint, SweepResponse,
    UsedArithmetic, Value,
};
use rayon::prelude::*;

use crate::model::chain::Chain;
use crate::model::validate::{validate, Issue};
use crate::model::value::{exact_text, parse_exact, to_f64};
use crate::solve::budget::Budget;
use crate::solve::{reported_numbers, solve, Plan, SolveError, MAX_HORIZON, MAX_REPORTED_NUMBERS};

/// Most points one sweep may have.
pub const MAX_SWEEP_POINTS: usize = 10_000;

/// Most quantile levels one request may ask for.
pub const MAX_QUANTILES: usize = 100;

/// Most axes of a sweep grid.
pub const MAX_SWEEP_AXES: usize = 3;

/// Why a request got no answer.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RequestError {
    /// The request is invalid; every problem with its pointer.
    #[error("invalid request")]
    Invalid(Vec<Issue>),
    /// The computation failed.
    #[error(transparent)]
    Solve(#[from] SolveError),
}

impl From<Vec<Issue>> for RequestError {
    fn from(issues: Vec<Issue>) -> Self {
        RequestError::Invalid(issues)
    }
}

fn invalid(pointer: impl Into<String>, detail: impl Into<String>) -> RequestError {
    RequestError::Invalid(vec![Issue {
        pointer: pointer.into(),
        detail: detail.into(),
    }])
}

/// Answers a solve request: one answer, or one per sweep point.
///
/// # Errors
/// [`RequestError`] for an invalid request or a failed computation.
pub fn answer(request: &SolveRequest, budget: &Budget) -> Result<SolveAnswer, RequestError> {
    if request.report.is_empty() {
        return Err(invalid(
            "/report",
            "list at least one of \"absorption\", \"steps\", \"visits\", \"distribution\", \
             \"costs\", \"sensitivity\"",
        ));
    }
    let plan = plan(request)?;
    let chain = validate(&request.chain, &request.parameters)?;
    let Some(sweep) = &request.sweep else {
        return Ok(SolveAnswer::Single(Box::new(solve(&chain, &plan, budget)?)));
    };
    let grid = sweep_points(sweep.axes(), &chain, matches!(sweep, Sweep::Grid(_)))?;
    let total = reported_numbers(&chain, &plan).saturating_mul(grid.len());
    if total > MAX_REPORTED_NUMBERS {
        return Err(SolveError::TooLarge(format!(
            "the sweep's {} answers would hold about {total} numbers, over the limit of \
             {MAX_REPORTED_NUMBERS}; sweep fewer points or report less",
            grid.len()
        ))
        .into());
    }
    let points: Vec<SweepPoint> = grid
        .into_par_iter()
        .map(|point| {
            budget.check()?;
            let mut overrides = request.parameters.clone();
            for (name, value) in &point {
                overrides.insert(name.clone(), Value::Text(exact_text(value)));
            }
            let chain = validate(&request.chain, &overrides).map_err(|issues| {
                // Name the sweep point: the same chain is valid elsewhere.
                let at: Vec<String> = point
                    .iter()
                    .map(|(name, value)| format!("{name} = {}", exact_text(value)))
                    .collect();
                issues
                    .into_iter()
                    .map(|issue| Issue {
                        detail: format!("at the sweep point {}: {}", at.join(", "), issue.detail),
                        ..issue
                    })
                    .collect::<Vec<_>>()
            })?;
            let answer = solve(&chain, &plan, budget)?;
            let exact = answer.arithmetic == UsedArithmetic::Exact;
            let parameters = point
                .into_iter()
                .map(|(name, value)| {
                    let number = Number {
                        value: to_f64(&value),
                        exact: exact.then(|| exact_text(&value)),
                    };
                    (name, number)
                })
                .collect();
            Ok(SweepPoint { parameters, answer })
        })
        .collect::<Result<_, RequestError>>()?;
    Ok(SolveAnswer::Sweep(SweepResponse { sweep: points }))
}

/// What to compute for a request: its report, and its distribution settings checked.
///
/// # Errors
/// [`RequestError::Invalid`] for a horizon or quantile out of range.
pub fn plan(request: &SolveRequest) -> Result<Plan, RequestError> {
    let mut plan = Plan::new(
        request.arithmetic,
        request.report.iter().copied().collect::<BTreeSet<_>>(),
        request.by_state,
    );
    let mut issues = Vec::new();
    if let Some(horizon) = request.horizon {
        if horizon > MAX_HORIZON {
            issues.push(Issue {
                pointer: "/horizon".into(),
                detail: format!("the horizon may be at most {MAX_HORIZON}"),
            });
        }
        plan.horizon = Some(horizon);
    }
    if request.quantiles.len() > MAX_QUANTILES {
        issues.push(Issue {
            pointer: "/quantiles".into(),
            detail: format!("ask for at most {MAX_QUANTILES} quantiles"),
        });
    }
    for (i, q) in request.quantiles.iter().enumerate().take(MAX_QUANTILES) {
        let text = q.text();
        match parse_exact(&text) {
            Ok(level) if level.is_positive() && level <= BigRational::one() => {
                if !plan.quantiles.iter().any(|(t, _)| *t == text) {
                    plan.quantiles.push((text, level));
                }
            }
            Ok(_) => issues.push(Issue {
                pointer: format!("/quantiles/{i}"),
                detail: format!("a quantile level must lie in (0, 1]; got {text}"),
            }),
            Err(detail) => issues.push(Issue {
                pointer: format!("/quantiles/{i}"),
                detail,
            }),
        }
    }
    let distribution = request.report.contains(&Report::Distribution);
    for (field, given) in [
        ("horizon", request.horizon.is_some()),
        ("quantiles", !request.quantiles.is_empty()),
    ] {
        if given && !distribution {
            issues.push(Issue {
                pointer: format!("/{field}"),
                detail: format!("`{field}` needs \"distribution\" in `report`"),
            });
        }
    }
    if issues.is_empty() {
        Ok(plan)
    } else {
        Err(RequestError::Invalid(issues))
    }
}

/// The grid's points in order (the last axis varies fastest), each as parameter values.
fn sweep_points(
    axes: Vec<&SweepAxis>,
    chain: &Chain,
    grid: bool,
) -> Result<Vec<Vec<(String, BigRational)>>, RequestError> {
    if axes.is_empty() || axes.len() > MAX_SWEEP_AXES {
        return Err(invalid(
            "/sweep",
            format!("a sweep has 1 to {MAX_SWEEP_AXES} axes"),
        ));
    }
    let mut issues = Vec::new();
    let mut columns = Vec::new();
    for (k, axis) in axes.iter().enumerate() {
        let at = if grid {
            format!("/sweep/{k}")
        } else {
            "/sweep".to_owned()
        };
        match axis_values(axis, chain, &at) {
            Ok(values) => columns.push((axis.parameter.clone(), values)),
            Err(mut found) => issues.append(&mut found),
        }
        if axes[..k]
            .iter()
            .any(|other| other.parameter == axis.parameter)
        {
            issues.push(Issue {
                pointer: format!("{at}/parameter"),
                detail: format!("'{}' is swept twice", axis.parameter),
            });
        }
    }
    if !issues.is_empty() {
        return Err(RequestError::Invalid(issues));
    }
    let total = columns
        .iter()
        .try_fold(1usize, |n, (_, values)| n.checked_mul(values.len()))
        .unwrap_or(usize::MAX);
    if total > MAX_SWEEP_POINTS {
        return Err(invalid(
            "/sweep",
            format!("the sweep has {total} points; at most {MAX_SWEEP_POINTS} are allowed"),
        ));
    }
    let mut points: Vec<Vec<(String, BigRational)>> = vec![Vec::new()];
    for (name, values) in &columns {
        points = points
            .into_iter()
            .flat_map(|point| {
                values.iter().map(move |v| {
                    let mut next = point.clone();
                    next.push((name.clone(), v.clone()));
                    next
                })
            })
            .collect();
    }
    Ok(points)
}

fn axis_values(axis: &SweepAxis, chain: &Chain, at: &str) -> Result<Vec<BigRational>, Vec<Issue>> {
    let mut issues = Vec::new();
    let mut issue = |pointer: String, detail: String| issues.push(Issue { pointer, detail });
    if !chain
        .parameters
        .iter()
        .any(|(name, _)| *name == axis.parameter)
    {
        let known: Vec<&str> = chain.parameters.iter().map(|(n, _)| n.as_str()).collect();
        issue(
            format!("{at}/parameter"),
            if known.is_empty() {
                format!(
                    "unknown parameter '{}': the chain declares no `parameters`",
                    axis.parameter
                )
            } else {
                format!(
                    "unknown parameter '{}'; the chain declares {}",
                    axis.parameter,
                    known.join(", ")
                )
            },
        );
    }
    let number = |value: &Value, pointer: String, issue: &mut dyn FnMut(String, String)| {
        parse_exact(&value.text())
            .map_err(|e| issue(pointer, e))
            .ok()
    };
    let values = match (&axis.values, &axis.from, &axis.to, axis.count) {
        (Some(values), None, None, None) => {
            if values.is_empty() || values.len() > MAX_SWEEP_POINTS {
                issue(
                    format!("{at}/values"),
                    format!("give 1 to {MAX_SWEEP_POINTS} values"),
                );
            }
            values
                .iter()
                .enumerate()
                .filter_map(|(i, v)| number(v, format!("{at}/values/{i}"), &mut issue))
                .collect()
        }
        (None, Some(from), Some(to), Some(count)) => {
            let from = number(from, format!("{at}/from"), &mut issue);
            let to = number(to, format!("{at}/to"), &mut issue);
            let count = count as usize;
            if !(2..=MAX_SWEEP_POINTS).contains(&count) {
                issue(
                    format!("{at}/count"),
                    format!("`count` must be from 2 to {MAX_SWEEP_POINTS}"),
                );
            }
            match (from, to) {
                (Some(from), Some(to)) if (2..=MAX_SWEEP_POINTS).contains(&count) => {
                    let steps = BigInt::from(count - 1);
                    (0..count)
                        .map(|i| {
                            &from + (&to - &from) * BigRational::new(BigInt::from(i), steps.clone())
                        })
                        .collect()
                }
                _ => Vec::new(),
            }
        }
        _ => {
            issue(
                at.to_owned(),
                "give either `values`, or `from`, `to` and `count`".to_owned(),
            );
            Vec::new()
        }
    };
    if issues.is_empty() {
        Ok(values)
    } else {
        Err(issues)
    }
}

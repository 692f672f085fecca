//! Goal seeking: the parameter value in a range at which a metric reaches a target. The range is
//! sampled to find a sign change (and to notice a metric that is not monotone), then a
//! safeguarded Newton iteration (Newton steps with the exact derivative from the sensitivity
//! solves, bisection whenever a step would leave the bracket or stall) narrows the bracket.
//! In exact arithmetic, small-denominator rationals near the root are checked for an exact root.

use std::collections::BTreeMap;

use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, Signed, ToPrimitive, Zero};
use oddsmith_client::types::{Number, Report, TuneRequest, TuneResponse, UsedArithmetic, Value};

use crate::model::validate::{validate, Issue};
use crate::model::value::{exact_text, parse_exact, to_f64};
use crate::selector::Selector;
use crate::solve::budget::Budget;
use crate::solve::{solve, Plan};
use crate::sweep::RequestError;

/// Points sampled across the range before narrowing (ends included).
pub const SAMPLES: usize = 9;

/// Most Newton or bisection steps after sampling.
pub const MAX_STEPS: usize = 100;

/// Largest denominator tried when looking for an exact rational root.
pub const MAX_EXACT_DENOMINATOR: i64 = 1_000_000;

/// One evaluation of the metric.
struct Point {
    theta: f64,
    /// The exact parameter value evaluated.
    exact_theta: BigRational,
    /// The metric equals the target exactly (exact arithmetic only).
    hit: bool,
    /// Metric minus target.
    gap: f64,
    metric: Number,
    derivative: Option<f64>,
    exact: bool,
}

struct Problem<'a> {
    request: &'a TuneRequest,
    selector: Selector,
    target: BigRational,
    budget: &'a Budget,
    evaluations: usize,
}

impl Problem<'_> {
    fn evaluate_exact(&mut self, theta: &BigRational) -> Result<Point, RequestError> {
        self.budget.check()?;
        self.evaluations += 1;
        let mut overrides: BTreeMap<String, Value> = self.request.parameters.clone();
        overrides.insert(
            self.request.parameter.clone(),
            Value::Text(exact_text(theta)),
        );
        let mut chain = validate(&self.request.chain, &overrides)?;
        if let Some(from) = self.selector.from() {
            let state = chain
                .ids
                .iter()
                .position(|s| s == from)
                .expect("checked by the selector");
            chain.start = vec![(state, BigRational::one())];
            chain.start_gradients = vec![vec![BigRational::zero(); chain.parameters.len()]];
        }
        let mut report = self.selector.reports();
        report.insert(Report::Sensitivity);
        let mut plan = Plan::new(self.request.arithmetic, report, false);
        plan.horizon = self.selector.horizon();
        plan.quantiles.extend(self.selector.quantile());
        let answer = solve(&chain, &plan, self.budget)?;
        let reading = self.selector.read(&answer, Some(&self.request.parameter));
        let Some(metric) = reading.value else {
            return Err(invalid(
                "/target",
                format!(
                    "{} is infinite or undefined at {} = {}",
                    self.selector.describe(),
                    self.request.parameter,
                    exact_text(theta)
                ),
            ));
        };
        let gap = match metric.exact.as_deref().map(parse_exact) {
            Some(Ok(exact)) => to_f64(&(exact - &self.target)),
            _ => metric.value - to_f64(&self.target),
        };
        let hit = metric
            .exact
            .as_deref()
            .and_then(|e| parse_exact(e).ok())
            .is_some_and(|m| m == self.target);
        Ok(Point {
            theta: to_f64(theta),
            exact_theta: theta.clone(),
            hit,
            gap,
            derivative: reading.derivative.map(|d| d.value),
            exact: answer.arithmetic == UsedArithmetic::Exact,
            metric,
        })
    }

    fn evaluate(&mut self, theta: f64) -> Result<Point, RequestError> {
        let exact = BigRational::from_float(theta).unwrap_or_else(BigRational::zero);
        self.evaluate_exact(&exact)
    }
}

fn invalid(pointer: &str, detail: String) -> RequestError {
    RequestError::Invalid(vec![Issue {
        pointer: pointer.to_owned(),
        detail,
    }])
}

/// Finds the parameter value in the range at which the target metric reaches its value.
///
/// # Errors
/// [`RequestError::Invalid`] for an invalid request or a target outside the range's values;
/// [`RequestError::Solve`] when an evaluation fails or the budget runs out.
pub fn tune(request: &TuneRequest, budget: &Budget) -> Result<TuneResponse, RequestError> {
    let mut issues = Vec::new();
    let mut number = |value: &Value, pointer: &str| {
        parse_exact(&value.text())
            .map_err(|detail| {
                issues.push(Issue {
                    pointer: pointer.to_owned(),
                    detail,
                })
            })
            .ok()
    };
    let low = number(&request.range[0], "/range/0");
    let high = number(&request.range[1], "/range/1");
    let target = number(&request.target.equals, "/target/equals");
    if !request.chain.parameters.contains_key(&request.parameter) {
        let known: Vec<&str> = request
            .chain
            .parameters
            .keys()
            .map(String::as_str)
            .collect();
        issues.push(Issue {
            pointer: "/parameter".into(),
            detail: if known.is_empty() {
                format!(
                    "unknown parameter '{}': the chain declares no `parameters`",
                    request.parameter
                )
            } else {
                format!(
                    "unknown parameter '{}'; the chain declares {}",
                    request.parameter,
                    known.join(", ")
                )
            },
        });
    }
    let (Some(low), Some(high), Some(target), true) = (low, high, target, issues.is_empty()) else {
        return Err(RequestError::Invalid(issues));
    };
    if low >= high {
        return Err(invalid(
            "/range",
            "the range must be [low, high] with low < high".into(),
        ));
    }
    // The selector is checked against the chain at the range's low end.
    let mut overrides = request.parameters.clone();
    overrides.insert(request.parameter.clone(), Value::Text(exact_text(&low)));
    let chain = validate(&request.chain, &overrides)?;
    let selector = Selector::new(&request.target.selector, &chain, "/target")?;
    let mut problem = Problem {
        request,
        selector,
        target,
        budget,
        evaluations: 0,
    };

    // Sample the range (exact end points, evenly spaced between).
    let mut samples = Vec::with_capacity(SAMPLES);
    for i in 0..SAMPLES {
        let theta =
            &low + (&high - &low) * BigRational::new(BigInt::from(i), BigInt::from(SAMPLES - 1));
        samples.push(problem.evaluate_exact(&theta)?);
    }
    let mut warnings = Vec::new();
    let rising = samples.windows(2).any(|w| w[1].gap > w[0].gap);
    let falling = samples.windows(2).any(|w| w[1].gap < w[0].gap);
    let slopes: Vec<f64> = samples.iter().filter_map(|p| p.derivative).collect();
    if (rising && falling) || (slopes.iter().any(|d| *d > 0.0) && slopes.iter().any(|d| *d < 0.0)) {
        warnings.push(format!(
            "{} is not monotone in {} over the range: there may be other values reaching the \
             target; this is the lowest one found",
            problem.selector.describe(),
            request.parameter
        ));
    }
    if let Some(hit) = samples.iter().position(|p| p.gap == 0.0) {
        let point = samples.swap_remove(hit);
        return finish(&mut problem, point, None, warnings);
    }
    let Some(at) = samples
        .windows(2)
        .position(|w| w[0].gap.signum() != w[1].gap.signum())
    else {
        let (first, last) = (&samples[0], &samples[SAMPLES - 1]);
        return Err(invalid(
            "/target/equals",
            format!(
                "the target {} is not reached in the range: {} is {} at {} = {} and {} at {} = {} \
                 (and never crosses the target at the {SAMPLES} points checked)",
                exact_text(&problem.target),
                problem.selector.describe(),
                number_text(&first.metric),
                request.parameter,
                exact_text(&low),
                number_text(&last.metric),
                request.parameter,
                exact_text(&high),
            ),
        ));
    };
    let mut a = samples.swap_remove(at);
    let mut b = samples.swap_remove(at);

    // Safeguarded Newton on [a, b], which always brackets the root.
    let mut best = if a.gap.abs() <= b.gap.abs() { 0 } else { 1 };
    for _ in 0..MAX_STEPS {
        let current = if best == 0 { &a } else { &b };
        let width = b.theta - a.theta;
        if width <= 4.0 * f64::EPSILON * a.theta.abs().max(b.theta.abs()).max(f64::MIN_POSITIVE) {
            break;
        }
        let newton = current
            .derivative
            .filter(|d| *d != 0.0)
            .map(|d| current.theta - current.gap / d)
            .filter(|t| *t > a.theta && *t < b.theta);
        let theta = newton.unwrap_or(0.5 * (a.theta + b.theta));
        let point = problem.evaluate(theta)?;
        if point.gap == 0.0 {
            return finish(&mut problem, point, Some([a, b]), warnings);
        }
        if point.gap.signum() == a.gap.signum() {
            a = point;
            best = 0;
        } else {
            b = point;
            best = 1;
        }
        if a.gap.abs().min(b.gap.abs()) <= 1e-15 * problem_scale(&problem) {
            break;
        }
    }
    let point = if a.gap.abs() <= b.gap.abs() {
        a.theta
    } else {
        b.theta
    };
    let point = problem.evaluate(point)?;
    finish(&mut problem, point, Some([a, b]), warnings)
}

fn problem_scale(problem: &Problem<'_>) -> f64 {
    to_f64(&problem.target).abs().max(1.0)
}

fn number_text(number: &Number) -> String {
    number
        .exact
        .clone()
        .unwrap_or_else(|| number.value.to_string())
}

/// Builds the answer, first trying small-denominator rationals near the root for an exact one.
fn finish(
    problem: &mut Problem<'_>,
    point: Point,
    bracket: Option<[Point; 2]>,
    warnings: Vec<String>,
) -> Result<TuneResponse, RequestError> {
    let (low, high) = bracket
        .as_ref()
        .map_or((point.theta, point.theta), |[a, b]| (a.theta, b.theta));
    let mut value = Number {
        value: point.theta,
        exact: None,
    };
    let mut achieved = point.metric.clone();
    if point.exact {
        if point.hit {
            value.exact = Some(exact_text(&point.exact_theta));
        } else {
            for candidate in convergents(point.theta, MAX_EXACT_DENOMINATOR)
                .into_iter()
                .rev()
                .take(4)
            {
                let c = to_f64(&candidate);
                if c < low || c > high {
                    continue;
                }
                let tried = problem.evaluate_exact(&candidate)?;
                let hit = tried
                    .metric
                    .exact
                    .as_deref()
                    .and_then(|e| parse_exact(e).ok())
                    .is_some_and(|m| m == problem.target);
                if hit {
                    value = Number {
                        value: c,
                        exact: Some(exact_text(&candidate)),
                    };
                    achieved = tried.metric;
                    break;
                }
            }
        }
    }
    let plain = |t: f64| Number {
        value: t,
        exact: None,
    };
    Ok(TuneResponse {
        parameter: problem.request.parameter.clone(),
        value,
        bracket: [plain(low), plain(high)],
        achieved,
        evaluations: problem.evaluations,
        warnings,
    })
}

/// Continued-fraction convergents of `x` with denominators up to `max_denominator`.
fn convergents(x: f64, max_denominator: i64) -> Vec<BigRational> {
    let mut out = Vec::new();
    let Some(mut rest) = BigRational::from_float(x) else {
        return out;
    };
    let (mut h0, mut h1) = (BigInt::zero(), BigInt::one());
    let (mut k0, mut k1) = (BigInt::one(), BigInt::zero());
    for _ in 0..64 {
        let a = rest.floor().to_integer();
        let h2 = &a * &h1 + &h0;
        let k2 = &a * &k1 + &k0;
        if k2.abs() > BigInt::from(max_denominator) {
            break;
        }
        out.push(BigRational::new(h2.clone(), k2.clone()));
        (h0, h1, k0, k1) = (h1, h2, k1, k2);
        let fraction = &rest - BigRational::from_integer(a);
        if fraction.is_zero() {
            break;
        }
        rest = fraction.recip();
        if rest.to_f64().is_none() {
            break;
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn convergents_recover_simple_fractions() {
        let c = convergents(1.0 / 40.0, 1_000_000);
        assert_eq!(c.last().unwrap(), &BigRational::new(1.into(), 40.into()));
        let c = convergents(0.333_333_333_333_333_3, 1_000);
        assert_eq!(c.last().unwrap(), &BigRational::new(1.into(), 3.into()));
    }
}

//! Metric selectors: which one number to read from an answer (and its derivative), shared by
//! sweeps, tuning and checks.

use std::collections::BTreeSet;

use num_rational::BigRational;
use num_traits::{One, Signed};
use oddsmith_client::types::{Metric, MetricSelector, Number, Report, SolveResponse, Value};

use crate::model::chain::Chain;
use crate::model::validate::Issue;
use crate::model::value::parse_exact;
use crate::solve::MAX_HORIZON;

/// A selector checked against a chain.
#[derive(Clone, Debug)]
pub struct Selector {
    wire: MetricSelector,
}

/// The selected metric at one point.
#[derive(Clone, Debug)]
pub struct Reading {
    /// The metric; `None` where it is infinite or undefined.
    pub value: Option<Number>,
    /// Its derivative with respect to the tuned parameter, when sensitivities were reported.
    pub derivative: Option<Number>,
}

impl Selector {
    /// Checks that the selector names what its metric needs, and that the states it names exist
    /// with the right kind. `at` is the selector's JSON pointer.
    ///
    /// # Errors
    /// Every problem, with pointers below `at`.
    pub fn new(wire: &MetricSelector, chain: &Chain, at: &str) -> Result<Self, Vec<Issue>> {
        let mut issues = Vec::new();
        let mut need = |field: &str, value: &Option<String>, absorbing: bool| match value {
            None => issues.push(Issue {
                pointer: at.to_owned(),
                detail: format!("`{}` needs `{field}`", metric_name(wire.metric)),
            }),
            Some(id) => check_state(chain, id, absorbing, &format!("{at}/{field}"), &mut issues),
        };
        match wire.metric {
            Metric::Absorption => need("outcome", &wire.outcome, true),
            Metric::Visits => need("state", &wire.state, false),
            Metric::Within => {
                if let Some(outcome) = &wire.outcome {
                    check_state(chain, outcome, true, &format!("{at}/outcome"), &mut issues);
                }
                match wire.steps {
                    None => issues.push(Issue {
                        pointer: at.to_owned(),
                        detail: "`within` needs `steps`".into(),
                    }),
                    Some(steps) if steps > MAX_HORIZON => issues.push(Issue {
                        pointer: format!("{at}/steps"),
                        detail: format!("`steps` may be at most {MAX_HORIZON}"),
                    }),
                    Some(_) => {}
                }
            }
            Metric::StepsQuantile => match wire.q.as_ref().map(|q| parse_exact(&q.text())) {
                None => issues.push(Issue {
                    pointer: at.to_owned(),
                    detail: "`steps_quantile` needs `q`".into(),
                }),
                Some(Ok(q)) if q.is_positive() && q <= BigRational::one() => {}
                Some(Ok(_)) => issues.push(Issue {
                    pointer: format!("{at}/q"),
                    detail: "`q` must lie in (0, 1]".into(),
                }),
                Some(Err(detail)) => issues.push(Issue {
                    pointer: format!("{at}/q"),
                    detail,
                }),
            },
            Metric::CostMean => match &wire.cost {
                None => issues.push(Issue {
                    pointer: at.to_owned(),
                    detail: "`cost_mean` needs `cost`".into(),
                }),
                Some(cost) if !chain.costs.iter().any(|d| d.name == *cost) => issues.push(Issue {
                    pointer: format!("{at}/cost"),
                    detail: format!(
                        "the chain has no cost dimension '{cost}'{}",
                        if chain.costs.is_empty() {
                            String::new()
                        } else {
                            format!(
                                "; it has {}",
                                chain
                                    .costs
                                    .iter()
                                    .map(|d| d.name.as_str())
                                    .collect::<Vec<_>>()
                                    .join(", ")
                            )
                        }
                    ),
                }),
                Some(_) => {}
            },
            _ => {}
        }
        if let Some(given) = &wire.given {
            if wire.metric == Metric::StepsMean {
                check_state(chain, given, true, &format!("{at}/given"), &mut issues);
            }
        }
        for (field, present, used) in [
            (
                "outcome",
                wire.outcome.is_some(),
                matches!(wire.metric, Metric::Absorption | Metric::Within),
            ),
            ("state", wire.state.is_some(), wire.metric == Metric::Visits),
            (
                "given",
                wire.given.is_some(),
                wire.metric == Metric::StepsMean,
            ),
            ("steps", wire.steps.is_some(), wire.metric == Metric::Within),
            ("q", wire.q.is_some(), wire.metric == Metric::StepsQuantile),
            ("cost", wire.cost.is_some(), wire.metric == Metric::CostMean),
        ] {
            if present && !used {
                issues.push(Issue {
                    pointer: format!("{at}/{field}"),
                    detail: format!("`{}` does not take `{field}`", metric_name(wire.metric)),
                });
            }
        }
        if let Some(from) = &wire.from {
            if !chain.ids.contains(from) {
                issues.push(Issue {
                    pointer: format!("{at}/from"),
                    detail: format!("unknown state '{from}'"),
                });
            }
        }
        if issues.is_empty() {
            Ok(Selector { wire: wire.clone() })
        } else {
            Err(issues)
        }
    }

    /// The state to start from instead of the chain's start, if any.
    #[must_use]
    pub fn from(&self) -> Option<&str> {
        self.wire.from.as_deref()
    }

    /// The metric families an answer must report for this selector.
    #[must_use]
    pub fn reports(&self) -> BTreeSet<Report> {
        BTreeSet::from([match self.wire.metric {
            Metric::Absorption | Metric::NeverAbsorbed => Report::Absorption,
            Metric::StepsMean | Metric::StepsVariance => Report::Steps,
            Metric::Visits => Report::Visits,
            Metric::Within | Metric::StepsQuantile => Report::Distribution,
            Metric::CostMean => Report::Costs,
        }])
    }

    /// The horizon a `within` selector needs.
    #[must_use]
    pub fn horizon(&self) -> Option<u64> {
        (self.wire.metric == Metric::Within)
            .then_some(self.wire.steps)
            .flatten()
    }

    /// The quantile a `steps_quantile` selector needs, with its text.
    #[must_use]
    pub fn quantile(&self) -> Option<(String, BigRational)> {
        let q = self.wire.q.as_ref()?;
        Some((q.text(), parse_exact(&q.text()).ok()?))
    }

    /// A short description, e.g. `absorption in 'sword'`.
    #[must_use]
    pub fn describe(&self) -> String {
        let name = metric_name(self.wire.metric);
        match (&self.wire.outcome, &self.wire.state, &self.wire.given) {
            (Some(outcome), _, _) => format!("{name} in '{outcome}'"),
            (_, Some(state), _) => format!("{name} of '{state}'"),
            (_, _, Some(given)) => format!("{name} given '{given}'"),
            _ => name.to_owned(),
        }
    }

    /// Reads the metric, and its derivative with respect to `parameter`, from an answer.
    #[must_use]
    pub fn read(&self, answer: &SolveResponse, parameter: Option<&str>) -> Reading {
        let metrics = &answer.metrics;
        let sensitivity = parameter
            .and_then(|p| metrics.sensitivity.as_ref()?.get(p))
            .cloned()
            .unwrap_or_default();
        let key = |id: &Option<String>| id.clone().unwrap_or_default();
        let (value, derivative) = match self.wire.metric {
            Metric::Absorption => (
                metrics
                    .absorption
                    .as_ref()
                    .and_then(|m| m.get(&key(&self.wire.outcome)).cloned()),
                sensitivity
                    .absorption
                    .and_then(|m| m.get(&key(&self.wire.outcome)).cloned()),
            ),
            Metric::NeverAbsorbed => (metrics.never_absorbed.clone(), sensitivity.never_absorbed),
            Metric::StepsMean => match &self.wire.given {
                None => (
                    metrics.steps.as_ref().and_then(|s| s.mean.clone()),
                    sensitivity.steps_mean,
                ),
                Some(given) => (
                    metrics
                        .steps
                        .as_ref()
                        .and_then(|s| s.mean_given.get(given).cloned().flatten()),
                    sensitivity
                        .steps_mean_given
                        .and_then(|m| m.get(given).cloned()),
                ),
            },
            Metric::StepsVariance => (
                metrics.steps.as_ref().and_then(|s| s.variance.clone()),
                sensitivity.steps_variance,
            ),
            Metric::Visits => (
                metrics
                    .visits
                    .as_ref()
                    .and_then(|m| m.get(&key(&self.wire.state)).cloned().flatten()),
                sensitivity
                    .visits
                    .and_then(|m| m.get(&key(&self.wire.state)).cloned()),
            ),
            Metric::Within => {
                let steps = self.wire.steps.unwrap_or_default() as usize;
                let distribution = metrics.distribution.as_ref();
                let d_distribution = sensitivity.distribution.as_ref();
                match &self.wire.outcome {
                    None => (
                        distribution.and_then(|d| d.cdf.get(steps).cloned()),
                        d_distribution.and_then(|d| d.cdf.get(steps).cloned()),
                    ),
                    Some(outcome) => (
                        distribution.and_then(|d| d.by_outcome.get(outcome)?.get(steps).cloned()),
                        d_distribution.and_then(|d| d.by_outcome.get(outcome)?.get(steps).cloned()),
                    ),
                }
            }
            Metric::StepsQuantile => {
                let q = self.wire.q.as_ref().map(Value::text).unwrap_or_default();
                let step = metrics
                    .distribution
                    .as_ref()
                    .and_then(|d| d.quantiles.get(&q).copied().flatten());
                let value = step.map(|n| Number {
                    value: n as f64,
                    exact: Some(n.to_string()),
                });
                (value, None)
            }
            Metric::CostMean => (
                metrics
                    .costs
                    .as_ref()
                    .and_then(|c| c.get(&key(&self.wire.cost))?.mean.clone()),
                None,
            ),
        };
        Reading {
            value,
            derivative: derivative.and_then(|d| d.derivative),
        }
    }
}

fn check_state(chain: &Chain, id: &str, absorbing: bool, pointer: &str, issues: &mut Vec<Issue>) {
    let detail = match chain.ids.iter().position(|s| s == id) {
        None => format!("unknown state '{id}'"),
        Some(i) if chain.absorbing[i] != absorbing => format!(
            "'{id}' is {}; this needs {} state",
            if chain.absorbing[i] {
                "absorbing"
            } else {
                "not absorbing"
            },
            if absorbing {
                "an absorbing"
            } else {
                "a transient"
            }
        ),
        Some(_) => return,
    };
    issues.push(Issue {
        pointer: pointer.to_owned(),
        detail,
    });
}

fn metric_name(metric: Metric) -> &'static str {
    match metric {
        Metric::Absorption => "absorption",
        Metric::NeverAbsorbed => "never_absorbed",
        Metric::StepsMean => "steps_mean",
        Metric::StepsVariance => "steps_variance",
        Metric::Visits => "visits",
        Metric::Within => "within",
        Metric::StepsQuantile => "steps_quantile",
        Metric::CostMean => "cost_mean",
    }
}

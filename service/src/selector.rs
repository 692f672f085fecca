//! Metric selectors: which one number to read from an answer (and its derivative), shared by
//! sweeps, tuning and checks.

use std::collections::BTreeSet;

use oddsmith_client::types::{Metric, MetricSelector, Number, Report, SolveResponse};

use crate::model::chain::Chain;
use crate::model::validate::Issue;

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
            _ => {}
        }
        if let Some(given) = &wire.given {
            if wire.metric == Metric::StepsMean {
                check_state(chain, given, true, &format!("{at}/given"), &mut issues);
            }
        }
        for (field, value, used) in [
            ("outcome", &wire.outcome, wire.metric == Metric::Absorption),
            ("state", &wire.state, wire.metric == Metric::Visits),
            ("given", &wire.given, wire.metric == Metric::StepsMean),
        ] {
            if value.is_some() && !used {
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
        }])
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
    }
}

//! Solving a validated chain: choosing the arithmetic, setting up the linear systems on `I - Q`
//! over the transient states, and assembling the reported metrics.
//!
//! With `N = (I - Q)⁻¹` the fundamental matrix, `R` the one-step probabilities into each outcome
//! (every absorbing state, and every trap class as a whole), the quantities are
//! - absorption probabilities `B = N R`,
//! - expected steps `t = N 1` and second moments `2 N t - t`, so `Var = (2N - I) t - t∘t`,
//! - `E[T; ends in a] = N b_a`, divided by `b_a` for the mean given the outcome,
//! - expected visits from a start distribution `s`: `sᵀ N`.
//!
//! Each is one sparse solve with a right-hand side; the inverse is never formed.

pub mod budget;
pub mod elimination;
pub mod scalar;

use std::collections::{BTreeMap, BTreeSet};
use std::time::Duration;

use num_rational::BigRational;
use oddsmith_client::types::{
    Arithmetic, Metrics, Report, SolveResponse, SolverInfo, Steps, UsedArithmetic,
};

use crate::model::chain::Chain;
use crate::structure::{StateKind, Structure};
use budget::Budget;
use elimination::{multiply, Factors, SparseRow};
use scalar::Scalar;

/// Cost model of exact solving used by `auto`: seconds per (factor entry x transient state),
/// fitted on the 2-core reference machine in a release build (see DEVELOPERS.md, "Exact or float").
pub const EXACT_SECONDS_PER_ENTRY_STATE: f64 = 3e-6;

/// Share of the budget that `auto` grants exact arithmetic before falling back to float.
pub const AUTO_EXACT_BUDGET_SHARE: f64 = 0.25;

/// Most numbers one answer may hold (a `by_state` table grows as states x outcomes, or n² with
/// visits); checked before any work is done.
pub const MAX_REPORTED_NUMBERS: usize = 2_000_000;

/// Most numbers the solution vectors may hold (transient states x outcomes, twice with steps),
/// which bounds a request's memory before any work is done.
pub const MAX_SOLUTION_NUMBERS: usize = 50_000_000;

/// Why a computation did not produce an answer.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SolveError {
    /// The deadline passed before the computation finished.
    #[error("the computation did not finish within its budget of {} ms", limit.as_millis())]
    BudgetExceeded {
        /// The budget that was exceeded.
        limit: Duration,
    },
    /// Floating point broke down (a pivot underflowed to zero, or a result overflowed); a
    /// validated chain cannot cause this in exact arithmetic.
    #[error("floating-point arithmetic broke down on this chain: {0}")]
    Numerical(String),
    /// The answer would be too large to compute or send.
    #[error("{0}")]
    TooLarge(String),
}

/// What to compute.
#[derive(Clone, Debug)]
pub struct Plan {
    /// Arithmetic requested.
    pub arithmetic: Arithmetic,
    /// Metric families to report.
    pub report: BTreeSet<Report>,
    /// Also report from every transient state.
    pub by_state: bool,
}

/// Solves the chain as planned, within the budget.
///
/// # Errors
/// [`SolveError`] when the budget runs out or the answer would be too large.
pub fn solve(chain: &Chain, plan: &Plan, budget: &Budget) -> Result<SolveResponse, SolveError> {
    let structure = Structure::of(chain);
    check_size(chain, &structure, plan)?;
    match plan.arithmetic {
        Arithmetic::Exact => run::<BigRational>(chain, &structure, plan, budget),
        Arithmetic::Float => run::<f64>(chain, &structure, plan, budget),
        Arithmetic::Auto => {
            let trial = budget.share(AUTO_EXACT_BUDGET_SHARE);
            let predicted = predicted_exact_seconds(chain, &structure, budget)?;
            if predicted > trial.limit().as_secs_f64() {
                return run::<f64>(chain, &structure, plan, budget);
            }
            match run::<BigRational>(chain, &structure, plan, &trial) {
                Err(SolveError::BudgetExceeded { limit }) => {
                    let mut answer = run::<f64>(chain, &structure, plan, budget)?;
                    answer.warnings.push(format!(
                        "exact arithmetic did not finish within {} ms, so the answer was \
                         computed in floating point; ask for \"exact\" to spend the whole budget",
                        limit.as_millis()
                    ));
                    Ok(answer)
                }
                other => other,
            }
        }
    }
}

/// Refuses, before any work, an answer whose size alone would exhaust memory or the network.
fn check_size(chain: &Chain, structure: &Structure, plan: &Plan) -> Result<(), SolveError> {
    let n = structure.transient.len();
    let outcomes = structure.absorbing.len() + structure.trap_classes.len();
    let copies = if plan.report.contains(&Report::Steps) {
        2
    } else {
        1
    };
    let solution = n.saturating_mul(outcomes).saturating_mul(copies);
    if solution > MAX_SOLUTION_NUMBERS {
        return Err(SolveError::TooLarge(format!(
            "{n} transient states and {outcomes} outcomes need {solution} intermediate numbers, \
             over the limit of {MAX_SOLUTION_NUMBERS}; merge absorbing states that mean the same \
             outcome"
        )));
    }
    let per_start = plan
        .report
        .iter()
        .map(|report| match report {
            Report::Absorption => structure.absorbing.len() + 1,
            Report::Steps => structure.absorbing.len() + 2,
            Report::Visits => chain.len() - structure.absorbing.len(),
        })
        .sum::<usize>();
    let starts = if plan.by_state {
        1 + chain.len() - structure.absorbing.len()
    } else {
        1
    };
    let reported = per_start.saturating_mul(starts);
    if reported > MAX_REPORTED_NUMBERS {
        return Err(SolveError::TooLarge(format!(
            "the answer would hold {reported} numbers ({per_start} from each of {starts} starts), \
             over the limit of {MAX_REPORTED_NUMBERS}; ask without `by_state` or report less"
        )));
    }
    Ok(())
}

/// Predicts the seconds an exact solve takes, from a float factorisation's fill (cheap next to
/// the exact one): exact numbers grow by a few bits per transient state, so the cost is roughly
/// `factor entries x transient states x` [`EXACT_SECONDS_PER_ENTRY_STATE`].
fn predicted_exact_seconds(
    chain: &Chain,
    structure: &Structure,
    budget: &Budget,
) -> Result<f64, SolveError> {
    let system = linear_system::<f64>(chain, structure, budget)?;
    let factors = Factors::new(system.matrix, budget)?;
    let n = structure.transient.len();
    Ok(factors.entries() as f64 * n as f64 * EXACT_SECONDS_PER_ENTRY_STATE)
}

/// The solved systems, in one arithmetic.
struct Solution<'a, S> {
    chain: &'a Chain,
    structure: &'a Structure,
    /// Outcome index of each absorbing state (trap classes follow the absorbing states).
    outcome_of: Vec<Option<usize>>,
    /// `outcome[k][p]`: probability of ending in outcome `k` from transient position `p`.
    outcome: Vec<Vec<S>>,
    /// Expected steps from each transient position (to absorption or a trap).
    steps: Vec<S>,
    /// Second moment of the number of steps from each transient position.
    second_moment: Vec<S>,
    /// `E[T; ends in a]` for each absorbing outcome.
    steps_and_outcome: Vec<Vec<S>>,
}

fn run<S: Scalar>(
    chain: &Chain,
    structure: &Structure,
    plan: &Plan,
    budget: &Budget,
) -> Result<SolveResponse, SolveError> {
    let n = structure.transient.len();
    let absorbing_count = structure.absorbing.len();
    let LinearSystem {
        matrix: rows,
        outcomes: rhs,
    } = linear_system::<S>(chain, structure, budget)?;
    let mut outcome_of = vec![None; chain.len()];
    for (k, &a) in structure.absorbing.iter().enumerate() {
        outcome_of[a] = Some(k);
    }

    let factors = Factors::new(rows.clone(), budget)?;
    let mut max_residual: f64 = 0.0;
    let mut solve = |b: Vec<S>| -> Result<Vec<S>, SolveError> {
        let x = factors.solve(b.clone(), budget)?;
        if !S::EXACT {
            if !x.iter().all(|v| v.to_f64().is_finite()) {
                return Err(SolveError::Numerical(
                    "a result overflowed the range of doubles".into(),
                ));
            }
            max_residual = max_residual.max(residual(&rows, &x, &b));
        }
        Ok(x)
    };
    let outcome: Vec<Vec<S>> = rhs.into_iter().map(&mut solve).collect::<Result<_, _>>()?;
    let wants_steps = plan.report.contains(&Report::Steps);
    let (steps, second_moment, steps_and_outcome) = if wants_steps {
        let steps = solve(vec![S::one(); n])?;
        let twice_n_t = solve(steps.clone())?;
        let second_moment = twice_n_t
            .iter()
            .zip(&steps)
            .map(|(w, t)| w.add(w).sub(t))
            .collect();
        let steps_and_outcome = outcome[..absorbing_count]
            .iter()
            .map(|b| solve(b.clone()))
            .collect::<Result<_, _>>()?;
        (steps, second_moment, steps_and_outcome)
    } else {
        (Vec::new(), Vec::new(), Vec::new())
    };

    let solution = Solution {
        chain,
        structure,
        outcome_of,
        outcome,
        steps,
        second_moment,
        steps_and_outcome,
    };
    let wants_visits = plan.report.contains(&Report::Visits);
    let mut visits_from = |start: &[(usize, BigRational)]| -> Result<Option<Vec<S>>, SolveError> {
        if !wants_visits {
            return Ok(None);
        }
        let mut c = vec![S::zero(); n];
        for (state, mass) in start {
            if let Some(p) = structure.position[*state] {
                c[p] = S::from_rational(mass);
            }
        }
        let x = factors.solve_transposed(c.clone(), budget)?;
        if !S::EXACT {
            max_residual = max_residual.max(residual_transposed(&rows, &x, &c));
        }
        Ok(Some(x))
    };

    let visits = visits_from(&chain.start)?;
    let metrics = solution.metrics(&chain.start, visits.as_deref(), plan);
    let by_state = if plan.by_state {
        let mut table = BTreeMap::new();
        for state in (0..chain.len()).filter(|&s| structure.kind[s] != StateKind::Absorbing) {
            budget.check()?;
            let start = [(state, num_traits::One::one())];
            let visits = visits_from(&start)?;
            table.insert(
                chain.ids[state].clone(),
                solution.metrics(&start, visits.as_deref(), plan),
            );
        }
        Some(table)
    } else {
        None
    };

    let mut warnings = chain.warnings.clone();
    warnings.extend(solution.trap_warning(plan.by_state));
    if !S::EXACT {
        warnings.extend(solution.verification_warning());
    }
    Ok(SolveResponse {
        arithmetic: if S::EXACT {
            UsedArithmetic::Exact
        } else {
            UsedArithmetic::Float
        },
        metrics,
        by_state,
        warnings,
        solver: SolverInfo {
            method: format!(
                "{} sparse LU, Markowitz order ({} factor entries)",
                if S::EXACT {
                    "exact rational"
                } else {
                    "float64"
                },
                factors.entries()
            ),
            transient_states: n,
            transitions: chain.transition_count(),
            elapsed_ms: budget.elapsed().as_secs_f64() * 1e3,
            max_residual,
        },
    })
}

/// The linear systems of a chain: `A = I - Q` and the right-hand sides `R`.
struct LinearSystem<S> {
    /// `I - Q` over the transient states, rows sorted by column.
    matrix: Vec<SparseRow<S>>,
    /// One-step probabilities into each outcome: each absorbing state in order, then each trap
    /// class.
    outcomes: Vec<Vec<S>>,
}

fn linear_system<S: Scalar>(
    chain: &Chain,
    structure: &Structure,
    budget: &Budget,
) -> Result<LinearSystem<S>, SolveError> {
    let n = structure.transient.len();
    let absorbing_count = structure.absorbing.len();
    let mut outcome_of = vec![None; chain.len()];
    for (k, &a) in structure.absorbing.iter().enumerate() {
        outcome_of[a] = Some(k);
    }
    let outcome_count = absorbing_count + structure.trap_classes.len();

    let mut rows: Vec<SparseRow<S>> = Vec::with_capacity(n);
    let mut rhs = vec![vec![S::zero(); n]; outcome_count];
    for (p, &state) in structure.transient.iter().enumerate() {
        budget.check()?;
        // The diagonal 1 - q_ii is formed exactly before rounding: a self-loop of 0.999999999999
        // rounded first would lose most of the digits of its escape probability.
        let self_loop = chain
            .row(state)
            .find(|&(target, _)| target == state)
            .map_or_else(num_traits::Zero::zero, |(_, p)| p.clone());
        let mut row: SparseRow<S> = vec![(
            p,
            S::from_rational(&(<BigRational as num_traits::One>::one() - self_loop)),
        )];
        for (target, probability) in chain.row(state) {
            let probability = S::from_rational(probability);
            match structure.kind[target] {
                StateKind::Transient => {
                    let q = structure.position[target].expect("transient states have a position");
                    if q != p {
                        row.push((q, S::zero().sub(&probability)));
                    }
                }
                StateKind::Absorbing => {
                    let k = outcome_of[target].expect("absorbing states are outcomes");
                    rhs[k][p] = rhs[k][p].add(&probability);
                }
                StateKind::Trapped => {
                    let k = absorbing_count
                        + structure.trap_class_of[target].expect("trapped states have a class");
                    rhs[k][p] = rhs[k][p].add(&probability);
                }
            }
        }
        row.sort_by_key(|&(j, _)| j);
        rows.push(row);
    }

    Ok(LinearSystem {
        matrix: rows,
        outcomes: rhs,
    })
}

/// `max |A x - b|`.
fn residual<S: Scalar>(rows: &[SparseRow<S>], x: &[S], b: &[S]) -> f64 {
    multiply(rows, x)
        .iter()
        .zip(b)
        .map(|(ax, b)| ax.sub(b).to_f64().abs())
        .fold(0.0, f64::max)
}

/// `max |Aᵀ x - c|`.
fn residual_transposed<S: Scalar>(rows: &[SparseRow<S>], x: &[S], c: &[S]) -> f64 {
    let mut atx = vec![S::zero(); c.len()];
    for (i, row) in rows.iter().enumerate() {
        for (j, a) in row {
            atx[*j] = atx[*j].add(&a.mul(&x[i]));
        }
    }
    atx.iter()
        .zip(c)
        .map(|(v, c)| v.sub(c).to_f64().abs())
        .fold(0.0, f64::max)
}

impl<S: Scalar> Solution<'_, S> {
    /// Probability of ending in outcome `k` when starting in `state`.
    fn outcome_probability(&self, state: usize, k: usize) -> S {
        let absorbing_count = self.structure.absorbing.len();
        match self.structure.kind[state] {
            StateKind::Transient => {
                self.outcome[k][self.structure.position[state].expect("transient")].clone()
            }
            StateKind::Absorbing if self.outcome_of[state] == Some(k) => S::one(),
            StateKind::Trapped
                if self.structure.trap_class_of[state].map(|c| c + absorbing_count) == Some(k) =>
            {
                S::one()
            }
            _ => S::zero(),
        }
    }

    /// `Σ s_i v_i` over the transient states of a start distribution.
    fn weighted(&self, start: &[(usize, S)], values: &[S]) -> S {
        start.iter().fold(S::zero(), |sum, (state, mass)| {
            match self.structure.position[*state] {
                Some(p) => sum.add(&mass.mul(&values[p])),
                None => sum,
            }
        })
    }

    /// The metrics from a start distribution; `visits` is `sᵀ N` when visits are reported.
    fn metrics(
        &self,
        start: &[(usize, BigRational)],
        visits: Option<&[S]>,
        plan: &Plan,
    ) -> Metrics {
        let start: Vec<(usize, S)> = start
            .iter()
            .map(|(s, m)| (*s, S::from_rational(m)))
            .collect();
        let ids = &self.chain.ids;
        let absorbing_count = self.structure.absorbing.len();
        let outcome_mass = |k: usize| {
            start.iter().fold(S::zero(), |sum, (state, mass)| {
                sum.add(&mass.mul(&self.outcome_probability(*state, k)))
            })
        };
        let absorbed: Vec<S> = (0..absorbing_count).map(outcome_mass).collect();
        let trapped: Vec<S> = (absorbing_count
            ..absorbing_count + self.structure.trap_classes.len())
            .map(outcome_mass)
            .collect();
        let never = trapped.iter().fold(S::zero(), |sum, p| sum.add(p));
        let mut metrics = Metrics::default();
        if plan.report.contains(&Report::Absorption) {
            metrics.absorption = Some(
                self.structure
                    .absorbing
                    .iter()
                    .zip(&absorbed)
                    .map(|(&a, p)| (ids[a].clone(), p.to_number()))
                    .collect(),
            );
            metrics.never_absorbed = Some(never.to_number());
        }
        if plan.report.contains(&Report::Steps) {
            let finite = never.is_zero();
            let mean = self.weighted(&start, &self.steps);
            let variance = {
                let v = self
                    .weighted(&start, &self.second_moment)
                    .sub(&mean.mul(&mean));
                // Rounding can leave a tiny negative where the variance is 0.
                let tolerance = 1e-9 * mean.to_f64().powi(2).max(1.0);
                if !S::EXACT && v.to_f64() < 0.0 && v.to_f64() > -tolerance {
                    S::zero()
                } else {
                    v
                }
            };
            let mean_given = self
                .structure
                .absorbing
                .iter()
                .enumerate()
                .map(|(k, &a)| {
                    let p = &absorbed[k];
                    let given = (!p.is_zero()).then(|| {
                        self.weighted(&start, &self.steps_and_outcome[k])
                            .div(p)
                            .to_number()
                    });
                    (ids[a].clone(), given)
                })
                .collect();
            metrics.steps = Some(Steps {
                mean: finite.then(|| mean.to_number()),
                variance: finite.then(|| variance.to_number()),
                mean_given,
            });
        }
        if let Some(visits) = visits {
            metrics.visits = Some(
                (0..self.chain.len())
                    .filter_map(|state| match self.structure.kind[state] {
                        StateKind::Absorbing => None,
                        StateKind::Transient => {
                            let p = self.structure.position[state].expect("transient");
                            Some((ids[state].clone(), Some(visits[p].to_number())))
                        }
                        StateKind::Trapped => {
                            let class = self.structure.trap_class_of[state].expect("trapped");
                            let reached = !trapped[class].is_zero();
                            Some((
                                ids[state].clone(),
                                (!reached).then(|| S::zero().to_number()),
                            ))
                        }
                    })
                    .collect(),
            );
        }
        metrics
    }

    /// Names the trap classes that a start (or, with `by_state`, any state) can fall into.
    fn trap_warning(&self, by_state: bool) -> Option<String> {
        let absorbing_count = self.structure.absorbing.len();
        let reachable: Vec<String> = self
            .structure
            .trap_classes
            .iter()
            .enumerate()
            .filter(|(c, _)| {
                by_state
                    || self.chain.start.iter().any(|(state, _)| {
                        !self
                            .outcome_probability(*state, absorbing_count + c)
                            .is_zero()
                    })
            })
            .map(|(_, class)| {
                let mut names: Vec<&str> = class
                    .iter()
                    .take(8)
                    .map(|&s| self.chain.ids[s].as_str())
                    .collect();
                if class.len() > 8 {
                    names.push("…");
                }
                format!("{{{}}}", names.join(", "))
            })
            .collect();
        (!reachable.is_empty()).then(|| {
            format!(
                "the walk can be trapped forever in {} with no way to an absorbing state: \
                 `never_absorbed` gives the chance, and expected steps are infinite (null) \
                 wherever it is positive",
                reachable.join(" and ")
            )
        })
    }

    /// Checks a float answer: each transient state's outcome probabilities in [0, 1] summing to 1.
    fn verification_warning(&self) -> Option<String> {
        let mut worst: f64 = 0.0;
        for p in 0..self.structure.transient.len() {
            let mut total = 0.0;
            for column in &self.outcome {
                let v = column[p].to_f64();
                worst = worst.max(-v).max(v - 1.0);
                total += v;
            }
            worst = worst.max((total - 1.0).abs());
        }
        (worst > 1e-9).then(|| {
            format!(
                "floating-point answer is inaccurate: outcome probabilities miss summing to 1 by \
                 up to {worst:.1e}; ask for \"exact\" arithmetic"
            )
        })
    }
}

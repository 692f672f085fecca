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
pub mod direct;
pub mod distribution;
pub mod elimination;
pub mod engine;
pub mod krylov;
pub mod padic;
pub mod scalar;
pub mod sensitivity;
pub mod sparse;

use std::collections::{BTreeMap, BTreeSet};
use std::time::Duration;

use num_rational::BigRational;
use oddsmith_client::types::{
    Arithmetic, CostReport, CostSensitivity, Derivative, Distribution, DistributionSensitivity,
    Metrics, Number, Report, Sensitivity, SolveResponse, SolverInfo, Steps, UsedArithmetic,
};

use crate::model::chain::Chain;
use crate::structure::{StateKind, Structure};
use budget::Budget;
use elimination::SparseRow;
use engine::LinearSolver;
use scalar::Scalar;
use sensitivity::{differentiate, elasticity, Perturbation};

/// Cost model of exact solving used by `auto`: seconds per operation of the factorisation modulo
/// a prime, fitted on the 2-core reference machine in a release build (see DEVELOPERS.md).
pub const EXACT_SECONDS_PER_FACTOR_OPERATION: f64 = 3e-10;

/// Cost model of exact solving used by `auto`: seconds per (factor entry x transient state) of
/// lifting one right-hand side, reconstruction and checking included.
pub const EXACT_SECONDS_PER_LIFTED_ENTRY_STATE: f64 = 2e-8;

/// Largest miss of a probability bound (below 0, above 1, or of a row summing to 1) that a float
/// answer may have without being flagged.
pub const VERIFICATION_TOLERANCE: f64 = 1e-9;

/// Largest estimated relative error of the solution vectors that a float answer may have without
/// being flagged. The estimate is a first-order bound, and grows with the expected time to
/// absorption (a million-state walk reaches 1e-8 while agreeing with other solvers to 1e-10), so
/// it is flagged only where digits that matter may be wrong.
pub const ERROR_ESTIMATE_TOLERANCE: f64 = 1e-6;

/// Largest horizon a request may ask for.
pub const MAX_HORIZON: u64 = 1_000_000;

/// Largest horizon chosen by default.
pub const DEFAULT_HORIZON_CAP: u64 = 100_000;

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
    /// Last step of the distribution (`None`: chosen from the expected steps).
    pub horizon: Option<u64>,
    /// Quantile levels asked for, with the text they were written in (the answer's keys).
    pub quantiles: Vec<(String, BigRational)>,
}

impl Plan {
    /// A plan with no distribution settings.
    #[must_use]
    pub fn new(arithmetic: Arithmetic, report: BTreeSet<Report>, by_state: bool) -> Self {
        Plan {
            arithmetic,
            report,
            by_state,
            horizon: None,
            quantiles: Vec::new(),
        }
    }
}

/// Solves the chain as planned, within the budget.
///
/// # Errors
/// [`SolveError`] when the budget runs out or the answer would be too large.
pub fn solve(chain: &Chain, plan: &Plan, budget: &Budget) -> Result<SolveResponse, SolveError> {
    let structure = Structure::of(chain);
    check_size(chain, &structure, plan)?;
    match plan.arithmetic {
        Arithmetic::Exact => Ok(run::<BigRational>(chain, &structure, plan, budget)?.response),
        Arithmetic::Float => Ok(run::<f64>(chain, &structure, plan, budget)?.response),
        Arithmetic::Auto => {
            let trial = budget.share(AUTO_EXACT_BUDGET_SHARE);
            let predicted = predicted_exact_seconds(chain, &structure, plan, budget)?;
            if predicted > trial.limit().as_secs_f64() {
                return verified_float(chain, &structure, plan, budget);
            }
            match run::<BigRational>(chain, &structure, plan, &trial) {
                Err(SolveError::TooLarge(why)) => {
                    let mut answer = verified_float(chain, &structure, plan, budget)?;
                    answer.warnings.push(format!(
                        "the answer was computed in floating point because exact arithmetic \
                         would not fit: {why}"
                    ));
                    Ok(answer)
                }
                Err(SolveError::BudgetExceeded { limit }) => {
                    let mut answer = verified_float(chain, &structure, plan, budget)?;
                    answer.warnings.push(format!(
                        "exact arithmetic did not finish within {} ms, so the answer was \
                         computed in floating point; ask for \"exact\" to spend the whole budget",
                        limit.as_millis()
                    ));
                    Ok(answer)
                }
                other => Ok(other?.response),
            }
        }
    }
}

/// For `auto`: a float answer that passed verification, or else the exact answer when it is
/// predicted to fit in half of the remaining budget and finishes in time, or else the float
/// answer with its warning (never an error once the float answer exists).
fn verified_float(
    chain: &Chain,
    structure: &Structure,
    plan: &Plan,
    budget: &Budget,
) -> Result<SolveResponse, SolveError> {
    let float = run::<f64>(chain, structure, plan, budget)?;
    if !float.failed_verification {
        return Ok(float.response);
    }
    let remaining = budget.remaining().as_secs_f64();
    let affordable = predicted_exact_seconds(chain, structure, plan, budget)
        .is_ok_and(|seconds| seconds < remaining / 2.0);
    if affordable {
        let until =
            (budget.elapsed().as_secs_f64() + 0.75 * remaining) / budget.limit().as_secs_f64();
        if let Ok(exact) = run::<BigRational>(chain, structure, plan, &budget.share(until)) {
            let mut answer = exact.response;
            answer.warnings.push(
                "the floating-point answer failed verification, so it was computed in exact \
                 arithmetic instead"
                    .to_owned(),
            );
            return Ok(answer);
        }
    }
    Ok(float.response)
}

/// How many numbers the solution vectors hold.
fn solution_numbers(chain: &Chain, structure: &Structure, plan: &Plan) -> usize {
    let n = structure.transient.len();
    let outcomes = structure.absorbing.len() + structure.trap_classes.len();
    let copies = if plan.report.contains(&Report::Steps) {
        2
    } else {
        1
    };
    // Sensitivities keep one more set of vectors per parameter.
    let sets = if plan.report.contains(&Report::Sensitivity) {
        1 + chain.parameters.len()
    } else {
        1
    };
    n.saturating_mul(outcomes)
        .saturating_mul(copies)
        .saturating_mul(sets)
}

/// Refuses, before any work, an answer whose size alone would exhaust memory or the network.
fn check_size(chain: &Chain, structure: &Structure, plan: &Plan) -> Result<(), SolveError> {
    let n = structure.transient.len();
    let outcomes = structure.absorbing.len() + structure.trap_classes.len();
    let solution = solution_numbers(chain, structure, plan);
    if solution > MAX_SOLUTION_NUMBERS {
        return Err(SolveError::TooLarge(format!(
            "{n} transient states and {outcomes} outcomes need {solution} intermediate numbers, \
             over the limit of {MAX_SOLUTION_NUMBERS}; merge absorbing states that mean the same \
             outcome"
        )));
    }
    let (per_start, starts) = answer_shape(chain, structure, plan);
    let reported = per_start.saturating_mul(starts);
    check_reported(reported, per_start, starts)
}

/// How many numbers an answer will hold, estimated before solving.
#[must_use]
pub fn reported_numbers(chain: &Chain, plan: &Plan) -> usize {
    let (per_start, starts) = answer_shape(chain, &Structure::of(chain), plan);
    per_start.saturating_mul(starts)
}

/// Numbers reported from each start, and the number of starts.
fn answer_shape(chain: &Chain, structure: &Structure, plan: &Plan) -> (usize, usize) {
    let per_start = plan
        .report
        .iter()
        .map(|report| match report {
            Report::Absorption => structure.absorbing.len() + 1,
            Report::Steps => structure.absorbing.len() + 2,
            Report::Visits => chain.len() - structure.absorbing.len(),
            Report::Distribution => (plan.horizon.unwrap_or(1_000) as usize)
                .saturating_add(1)
                .saturating_mul(structure.absorbing.len() + 1),
            Report::Costs => chain.costs.len() * (structure.absorbing.len() + 2),
            // Sensitivities repeat the other metrics once per parameter (counted below).
            Report::Sensitivity => 0,
        })
        .sum::<usize>();
    let per_start = if plan.report.contains(&Report::Sensitivity) {
        per_start.saturating_mul(1 + 2 * chain.parameters.len())
    } else {
        per_start
    };
    let starts = if plan.by_state {
        1 + chain.len() - structure.absorbing.len()
    } else {
        1
    };
    (per_start, starts)
}

fn check_reported(reported: usize, per_start: usize, starts: usize) -> Result<(), SolveError> {
    if reported > MAX_REPORTED_NUMBERS {
        return Err(SolveError::TooLarge(format!(
            "the answer would hold {reported} numbers ({per_start} from each of {starts} starts), \
             over the limit of {MAX_REPORTED_NUMBERS}; ask without `by_state` or report less"
        )));
    }
    Ok(())
}

/// Predicts the seconds an exact solve takes, from symbolic analysis alone (no numeric work).
///
/// p-adic lifting factors `A` once modulo a word-size prime, about `entries² / n` operations
/// for `entries` factor entries, then lifts each right-hand side one word at a time; answers
/// carry a few bits per transient state, so each system costs about `entries × n` word
/// operations. The constants were fitted on the 2-core reference machine (see DEVELOPERS.md).
fn predicted_exact_seconds(
    chain: &Chain,
    structure: &Structure,
    plan: &Plan,
    budget: &Budget,
) -> Result<f64, SolveError> {
    let n = structure.transient.len();
    if n == 0 {
        return Ok(0.0);
    }
    let system = linear_system::<f64>(chain, structure, budget)?;
    let matrix = sparse::Csr::from_rows(&system.matrix);
    let bound = direct::level_fill_bound(&matrix);
    // The ordering costs about a nanosecond per entry it finds; past this, exact is hopeless.
    let entries =
        if bound * engine::ORDERING_SECONDS_PER_ENTRY > 0.05 * budget.limit().as_secs_f64() {
            bound
        } else {
            direct::analyse(&matrix).predicted_entries as f64
        };
    let outcomes = structure.absorbing.len() + structure.trap_classes.len();
    let mut systems = outcomes as f64;
    if plan.report.contains(&Report::Steps) || plan.report.contains(&Report::Distribution) {
        systems += 2.0 + structure.absorbing.len() as f64;
    }
    if plan.report.contains(&Report::Visits) {
        systems += 1.0;
    }
    if plan.report.contains(&Report::Sensitivity) {
        systems *= 1.0 + chain.parameters.len() as f64;
    }
    let n = n as f64;
    Ok(entries * entries / n * EXACT_SECONDS_PER_FACTOR_OPERATION
        + entries * n * systems * EXACT_SECONDS_PER_LIFTED_ENTRY_STATE)
}

/// The solved systems, in one arithmetic.
struct Solution<'a, S> {
    chain: &'a Chain,
    structure: &'a Structure,
    /// Outcome index of each absorbing state (trap classes follow the absorbing states).
    outcome_of: Vec<Option<usize>>,
    /// The vectors at the parameters' values.
    at: Vectors<S>,
    /// Their derivatives with respect to each parameter (when sensitivities are reported).
    derivatives: Vec<Vectors<S>>,
}

/// The per-state solution vectors (over transient positions).
struct Vectors<S> {
    /// `outcome[k][p]`: probability of ending in outcome `k` from transient position `p`.
    outcome: Vec<Vec<S>>,
    /// Expected steps from each transient position (to absorption or a trap).
    steps: Vec<S>,
    /// `N t`, from which the second moment `2 N t - t` follows (formed only where reported:
    /// exact numbers here can have thousands of digits).
    steps_twice: Vec<S>,
    /// `E[T; ends in a]` for each absorbing outcome.
    steps_and_outcome: Vec<Vec<S>>,
    /// Accumulated costs, one per cost dimension (when costs are reported).
    costs: Vec<CostVectors<S>>,
}

impl<S: Scalar> Vectors<S> {
    /// Outcome probabilities only (steps not reported).
    fn outcomes_only(outcome: Vec<Vec<S>>) -> Self {
        Vectors {
            outcome,
            steps: Vec::new(),
            steps_twice: Vec::new(),
            steps_and_outcome: Vec::new(),
            costs: Vec::new(),
        }
    }

    /// Outcome probabilities and step statistics (costs are added after).
    fn with_steps(
        outcome: Vec<Vec<S>>,
        steps: Vec<S>,
        steps_twice: Vec<S>,
        steps_and_outcome: Vec<Vec<S>>,
    ) -> Self {
        Vectors {
            outcome,
            steps,
            steps_twice,
            steps_and_outcome,
            costs: Vec::new(),
        }
    }
}

/// Expected accumulated cost in one dimension, from each transient position.
struct CostVectors<S> {
    /// `E[C]`.
    mean: Vec<S>,
    /// `E[C²]`.
    second_moment: Vec<S>,
    /// `E[C; ends in a]` for each absorbing outcome.
    joint: Vec<Vec<S>>,
}

/// Expected visits from one start, and their derivatives with respect to each parameter.
struct Visits<S> {
    at: Vec<S>,
    derivatives: Vec<Vec<S>>,
}

fn run<S: Scalar>(
    chain: &Chain,
    structure: &Structure,
    plan: &Plan,
    budget: &Budget,
) -> Result<Run, SolveError> {
    let n = structure.transient.len();
    let absorbing_count = structure.absorbing.len();
    // Exact numbers grow by a few bits per transient state (an estimate: 4 bits per state).
    let bytes_per_number = if S::EXACT { 32.0 + 0.5 * n as f64 } else { 8.0 };
    budget.reserve(
        solution_numbers(chain, structure, plan) as f64 * bytes_per_number,
        "the solution vectors",
    )?;
    let LinearSystem {
        matrix: rows,
        outcomes: rhs,
    } = linear_system::<S>(chain, structure, budget)?;
    let mut outcome_of = vec![None; chain.len()];
    for (k, &a) in structure.absorbing.iter().enumerate() {
        outcome_of[a] = Some(k);
    }

    let solver = S::engine(rows, budget)?;
    let wants_steps =
        plan.report.contains(&Report::Steps) || plan.report.contains(&Report::Distribution);
    // Two batches: what depends only on A (outcomes, steps), then what depends on those.
    let mut first = rhs;
    if wants_steps {
        first.push(vec![S::one(); n]);
    }
    let mut solved = solver.solve_many(first, budget)?;
    let mut at = if wants_steps {
        let steps = solved.pop().expect("the steps were asked for");
        let outcome = solved;
        let mut second = vec![steps.clone()];
        second.extend(outcome[..absorbing_count].iter().cloned());
        let mut second = solver.solve_many(second, budget)?;
        let steps_and_outcome = second.split_off(1);
        let steps_twice = second.pop().expect("one solution per right-hand side");
        Vectors::with_steps(outcome, steps, steps_twice, steps_and_outcome)
    } else {
        Vectors::outcomes_only(solved)
    };
    if plan.report.contains(&Report::Costs) {
        for dimension in &chain.costs {
            let costs = cost_vectors(chain, structure, dimension, &at.outcome, &*solver, budget)?;
            at.costs.push(costs);
        }
    }

    let sensitivities = plan.report.contains(&Report::Sensitivity);
    let parameters = if sensitivities {
        chain.parameters.len()
    } else {
        0
    };
    let perturbations: Vec<Perturbation<S>> = (0..parameters)
        .map(|j| Perturbation::new(chain, structure, j))
        .collect();
    let mut derivatives = Vec::with_capacity(parameters);
    for perturbation in &perturbations {
        budget.check()?;
        let d = |x: &[S], db: Option<&[S]>| differentiate(&*solver, perturbation, x, db, budget);
        let outcome: Vec<Vec<S>> = at
            .outcome
            .iter()
            .enumerate()
            .map(|(k, b)| d(b, Some(perturbation.dr(k))))
            .collect::<Result<_, _>>()?;
        let mut vectors = if !wants_steps {
            Vectors::outcomes_only(outcome)
        } else {
            let steps = d(&at.steps, None)?;
            let steps_twice = d(&at.steps_twice, Some(&steps))?;
            let steps_and_outcome = at
                .steps_and_outcome
                .iter()
                .zip(&outcome)
                .map(|(y, db)| d(y, Some(db)))
                .collect::<Result<_, _>>()?;
            Vectors::with_steps(outcome, steps, steps_twice, steps_and_outcome)
        };
        if plan.report.contains(&Report::Costs) {
            let j = derivatives.len();
            for (dimension, values) in chain.costs.iter().zip(&at.costs) {
                vectors.costs.push(cost_derivatives(
                    chain,
                    structure,
                    dimension,
                    j,
                    &at.outcome,
                    &vectors.outcome,
                    values,
                    &*solver,
                    budget,
                )?);
            }
        }
        derivatives.push(vectors);
    }

    let solution = Solution {
        chain,
        structure,
        outcome_of,
        at,
        derivatives,
    };
    let wants_visits = plan.report.contains(&Report::Visits);
    // Visits from a start s are sᵀ N, so d/dθ is (dsᵀ + vᵀ dQ) N: one transposed solve each.
    let visits_from = |start: &[(usize, S)],
                       start_gradients: &[Vec<S>]|
     -> Result<Option<Visits<S>>, SolveError> {
        if !wants_visits {
            return Ok(None);
        }
        let mut c = vec![S::zero(); n];
        for (state, mass) in start {
            if let Some(p) = structure.position[*state] {
                c[p] = mass.clone();
            }
        }
        let x = solver.solve_transposed(c, budget)?;
        let mut derivatives = Vec::with_capacity(perturbations.len());
        for (j, perturbation) in perturbations.iter().enumerate() {
            let mut ds = vec![S::zero(); n];
            for ((state, _), gradient) in start.iter().zip(start_gradients) {
                if let Some(p) = structure.position[*state] {
                    ds[p] = gradient[j].clone();
                }
            }
            let rhs = perturbation.dq_transposed_times_plus(&x, ds);
            derivatives.push(solver.solve_transposed(rhs, budget)?);
        }
        Ok(Some(Visits { at: x, derivatives }))
    };

    let start: Vec<(usize, S)> = chain
        .start
        .iter()
        .map(|(state, mass)| (*state, S::from_rational(mass)))
        .collect();
    let start_gradients: Vec<Vec<S>> = chain
        .start_gradients
        .iter()
        .map(|g| g.iter().map(S::from_rational).collect())
        .collect();
    let mut warnings = chain.warnings.clone();
    let distribution_for = |start: &[(usize, S)],
                            gradients: &[Vec<S>],
                            metrics: &mut Metrics,
                            warnings: &mut Vec<String>| {
        if plan.report.contains(&Report::Distribution) {
            let (distribution, sensitivities, notes) =
                solution.distribution(start, gradients, plan, budget)?;
            metrics.distribution = Some(distribution);
            if let Some(by_parameter) = metrics.sensitivity.as_mut() {
                for ((name, _), sensitivity) in chain.parameters.iter().zip(sensitivities) {
                    if let Some(report) = by_parameter.get_mut(name) {
                        report.distribution = Some(sensitivity);
                    }
                }
            }
            warnings.extend(notes);
        }
        Ok::<(), SolveError>(())
    };
    let visits = visits_from(&start, &start_gradients)?;
    let mut metrics = solution.metrics(&start, &start_gradients, visits.as_ref(), plan);
    distribution_for(&start, &start_gradients, &mut metrics, &mut warnings)?;
    let by_state = if plan.by_state {
        let mut table = BTreeMap::new();
        let still = vec![vec![S::zero(); parameters]];
        for state in (0..chain.len()).filter(|&s| structure.kind[s] != StateKind::Absorbing) {
            budget.check()?;
            let start = [(state, S::one())];
            let visits = visits_from(&start, &still)?;
            let mut metrics = solution.metrics(&start, &still, visits.as_ref(), plan);
            let mut notes = Vec::new();
            distribution_for(&start, &still, &mut metrics, &mut notes)?;
            table.insert(chain.ids[state].clone(), metrics);
        }
        Some(table)
    } else {
        None
    };

    if plan.report.contains(&Report::Sensitivity) && chain.parameters.is_empty() {
        warnings
            .push("`sensitivity` was asked for, but the chain declares no `parameters`".to_owned());
    }
    warnings.extend(solution.trap_warning(plan.by_state));
    let engine = solver.report();
    let (error_estimate, doubt) = if S::EXACT {
        (0.0, None)
    } else {
        // An estimate the budget cannot pay for is unknown, not a reason to drop the answer.
        let estimate = solver.error_estimate(budget).unwrap_or(f64::INFINITY);
        (estimate, solution.verify(estimate))
    };
    if let Some(doubt) = &doubt {
        warnings.push(doubt.clone());
    }
    let response = SolveResponse {
        arithmetic: if S::EXACT {
            UsedArithmetic::Exact
        } else {
            UsedArithmetic::Float
        },
        metrics,
        by_state,
        warnings,
        solver: SolverInfo {
            method: engine.method,
            transient_states: n,
            transitions: chain.transition_count(),
            elapsed_ms: budget.elapsed().as_secs_f64() * 1e3,
            max_residual: engine.max_residual,
            iterations: engine.iterations,
            error_estimate,
        },
    };
    Ok(Run {
        response,
        failed_verification: doubt.is_some(),
    })
}

/// A finished run, and whether a float answer failed its verification.
struct Run {
    response: SolveResponse,
    failed_verification: bool,
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

/// Expected accumulated cost by first-step analysis. With `a_ij` the cost of one step from `i`
/// to `j` (the state cost of `i`, the transition's cost, and the state cost of `j` when `j` is
/// absorbing, paid on arrival): `(I - Q) m = Σ_j P_ij a_ij`,
/// `(I - Q) M2 = Σ_j P_ij (a_ij² + 2 a_ij m_j)` and `(I - Q) y_a = Σ_j P_ij a_ij h_a(j)`, where
/// `h_a(j)` is the probability of ending in `a` from `j`.
fn cost_vectors<S: Scalar>(
    chain: &Chain,
    structure: &Structure,
    dimension: &crate::model::chain::CostDimension,
    outcome: &[Vec<S>],
    solver: &dyn LinearSolver<S>,
    budget: &Budget,
) -> Result<CostVectors<S>, SolveError> {
    let solve = |b: Vec<S>| solver.solve(b, budget);
    let n = structure.transient.len();
    let absorbing_count = structure.absorbing.len();
    // (probability, mean step cost, target, variance of the step cost) for every transition out
    // of every transient state.
    let steps: Vec<Vec<(S, S, usize, S)>> = structure
        .transient
        .iter()
        .map(|&i| {
            let state_cost = S::from_rational(&dimension.on_states[i]);
            (chain.row_start[i]..chain.row_start[i + 1])
                .map(|t| {
                    let j = chain.targets[t];
                    let mut cost = state_cost.add(&S::from_rational(&dimension.on_transitions[t]));
                    if structure.kind[j] == StateKind::Absorbing {
                        cost = cost.add(&S::from_rational(&dimension.on_states[j]));
                    }
                    let spread = S::from_rational(&dimension.on_transitions_spread[t]);
                    (S::from_rational(&chain.probabilities[t]), cost, j, spread)
                })
                .collect()
        })
        .collect();
    let expected = |weight: &dyn Fn(&S, usize, &S) -> S| -> Vec<S> {
        steps
            .iter()
            .map(|row| {
                row.iter().fold(S::zero(), |sum, (p, a, j, spread)| {
                    sum.add(&p.mul(&weight(a, *j, spread)))
                })
            })
            .collect()
    };
    let at_position = |values: &[S], j: usize| match structure.position[j] {
        Some(q) => values[q].clone(),
        None => S::zero(),
    };
    let mean = solve(expected(&|a, _, _| a.clone()))?;
    // E[a²] = a² + Var(a) where merged pairs made the step cost random.
    let second_moment = solve(expected(&|a, j, spread| {
        a.mul(a)
            .add(spread)
            .add(&a.add(a).mul(&at_position(&mean, j)))
    }))?;
    let joint = (0..absorbing_count)
        .map(|k| {
            let goal = structure.absorbing[k];
            solve(expected(&|a, j, _| {
                let h = if j == goal {
                    S::one()
                } else {
                    at_position(&outcome[k], j)
                };
                a.mul(&h)
            }))
        })
        .collect::<Result<_, _>>()?;
    debug_assert_eq!(mean.len(), n);
    Ok(CostVectors {
        mean,
        second_moment,
        joint,
    })
}

/// Derivatives of the cost vectors with respect to parameter `parameter`: each vector solves
/// `(I - Q) x = b`, so `dx = N (dQ x + db)`, with `b`'s derivative taken term by term (both the
/// probabilities and the costs may depend on the parameter).
#[allow(clippy::too_many_arguments)]
fn cost_derivatives<S: Scalar>(
    chain: &Chain,
    structure: &Structure,
    dimension: &crate::model::chain::CostDimension,
    parameter: usize,
    outcome: &[Vec<S>],
    d_outcome: &[Vec<S>],
    values: &CostVectors<S>,
    solver: &dyn LinearSolver<S>,
    budget: &Budget,
) -> Result<CostVectors<S>, SolveError> {
    struct Step<S> {
        p: S,
        dp: S,
        a: S,
        da: S,
        spread: S,
        d_spread: S,
        target: usize,
    }
    let steps: Vec<Vec<Step<S>>> = structure
        .transient
        .iter()
        .map(|&i| {
            let state_cost = S::from_rational(&dimension.on_states[i]);
            let d_state_cost = S::from_rational(&dimension.on_states_gradient[i][parameter]);
            (chain.row_start[i]..chain.row_start[i + 1])
                .map(|t| {
                    let j = chain.targets[t];
                    let mut a = state_cost.add(&S::from_rational(&dimension.on_transitions[t]));
                    let mut da = d_state_cost.add(&S::from_rational(
                        &dimension.on_transitions_gradient[t][parameter],
                    ));
                    if structure.kind[j] == StateKind::Absorbing {
                        a = a.add(&S::from_rational(&dimension.on_states[j]));
                        da = da.add(&S::from_rational(
                            &dimension.on_states_gradient[j][parameter],
                        ));
                    }
                    Step {
                        p: S::from_rational(&chain.probabilities[t]),
                        dp: S::from_rational(&chain.gradients[t][parameter]),
                        a,
                        da,
                        spread: S::from_rational(&dimension.on_transitions_spread[t]),
                        d_spread: S::from_rational(
                            &dimension.on_transitions_spread_gradient[t][parameter],
                        ),
                        target: j,
                    }
                })
                .collect()
        })
        .collect();
    let at = |values: &[S], j: usize| match structure.position[j] {
        Some(q) => values[q].clone(),
        None => S::zero(),
    };
    let rhs = |term: &dyn Fn(&Step<S>) -> S| -> Vec<S> {
        steps
            .iter()
            .map(|row| row.iter().fold(S::zero(), |sum, step| sum.add(&term(step))))
            .collect()
    };
    let two = S::one().add(&S::one());
    let mean = solver.solve(
        rhs(&|s| {
            s.dp.mul(&s.a.add(&at(&values.mean, s.target)))
                .add(&s.p.mul(&s.da))
        }),
        budget,
    )?;
    let second_moment = solver.solve(
        rhs(&|s| {
            let m = at(&values.mean, s.target);
            let dm = at(&mean, s.target);
            let value =
                s.a.mul(&s.a)
                    .add(&s.spread)
                    .add(&two.mul(&s.a).mul(&m))
                    .add(&at(&values.second_moment, s.target));
            let change = two
                .mul(&s.a.mul(&s.da).add(&s.da.mul(&m)).add(&s.a.mul(&dm)))
                .add(&s.d_spread);
            s.dp.mul(&value).add(&s.p.mul(&change))
        }),
        budget,
    )?;
    let joint = (0..structure.absorbing.len())
        .map(|k| {
            let goal = structure.absorbing[k];
            let h = |j: usize| {
                if j == goal {
                    S::one()
                } else {
                    at(&outcome[k], j)
                }
            };
            solver.solve(
                rhs(&|s| {
                    let value = s.a.mul(&h(s.target)).add(&at(&values.joint[k], s.target));
                    let change =
                        s.da.mul(&h(s.target))
                            .add(&s.a.mul(&at(&d_outcome[k], s.target)));
                    s.dp.mul(&value).add(&s.p.mul(&change))
                }),
                budget,
            )
        })
        .collect::<Result<_, _>>()?;
    Ok(CostVectors {
        mean,
        second_moment,
        joint,
    })
}

/// Default horizon of a distribution: the mean plus six standard deviations of the steps (at
/// least 10), or 100 when the expected steps are infinite.
fn default_horizon(moments: Option<(f64, f64)>) -> u64 {
    match moments {
        Some((mean, variance)) => {
            let horizon = mean + 6.0 * variance.max(0.0).sqrt();
            (horizon.ceil() as u64).clamp(10, DEFAULT_HORIZON_CAP)
        }
        None => 100,
    }
}

impl<S: Scalar> Solution<'_, S> {
    /// Probability of ending in outcome `k` when starting in `state`, from `vectors` (the
    /// values, or a derivative: absorbing and trapped starts have constant outcomes).
    fn outcome_probability(
        &self,
        vectors: &Vectors<S>,
        state: usize,
        k: usize,
        derivative: bool,
    ) -> S {
        let absorbing_count = self.structure.absorbing.len();
        match self.structure.kind[state] {
            StateKind::Transient => {
                vectors.outcome[k][self.structure.position[state].expect("transient")].clone()
            }
            _ if derivative => S::zero(),
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

    /// The second moment of the steps from a start distribution: `sᵀ(2 N t - t)`.
    fn second_moment(&self, start: &[(usize, S)], vectors: &Vectors<S>) -> S {
        let twice = self.weighted(start, &vectors.steps_twice);
        twice.add(&twice).sub(&self.weighted(start, &vectors.steps))
    }

    /// `d/dθ Σ s_i v_i = Σ ds_i v_i + s_i dv_i`.
    fn weighted_derivative(
        &self,
        start: &[(usize, S)],
        ds: &[S],
        values: &[S],
        dvalues: &[S],
    ) -> S {
        self.weighted(start, dvalues).add(
            &self.weighted(
                &start
                    .iter()
                    .zip(ds)
                    .map(|((state, _), d)| (*state, d.clone()))
                    .collect::<Vec<_>>(),
                values,
            ),
        )
    }

    /// Probability of ending in outcome `k` from a start distribution, or its derivative with
    /// respect to parameter `j` (when `j` is given, with the start's gradients).
    fn outcome_mass(
        &self,
        start: &[(usize, S)],
        gradients: &[Vec<S>],
        k: usize,
        j: Option<usize>,
    ) -> S {
        let mut sum = S::zero();
        for (e, (state, mass)) in start.iter().enumerate() {
            match j {
                None => {
                    sum = sum.add(&mass.mul(&self.outcome_probability(&self.at, *state, k, false)))
                }
                Some(j) => {
                    let value = self.outcome_probability(&self.at, *state, k, false);
                    let derivative =
                        self.outcome_probability(&self.derivatives[j], *state, k, true);
                    sum = sum
                        .add(&gradients[e][j].mul(&value))
                        .add(&mass.mul(&derivative));
                }
            }
        }
        sum
    }

    /// The metrics from a start distribution (with the gradients of its probabilities);
    /// `visits` is `sᵀ N` when visits are reported.
    fn metrics(
        &self,
        start: &[(usize, S)],
        gradients: &[Vec<S>],
        visits: Option<&Visits<S>>,
        plan: &Plan,
    ) -> Metrics {
        let ids = &self.chain.ids;
        let absorbing_count = self.structure.absorbing.len();
        let outcome_count = absorbing_count + self.structure.trap_classes.len();
        let absorbed: Vec<S> = (0..absorbing_count)
            .map(|k| self.outcome_mass(start, gradients, k, None))
            .collect();
        let trapped: Vec<S> = (absorbing_count..outcome_count)
            .map(|k| self.outcome_mass(start, gradients, k, None))
            .collect();
        let never = trapped.iter().fold(S::zero(), |sum, p| sum.add(p));
        let finite = never.is_zero();
        let wants_steps = plan.report.contains(&Report::Steps);
        let mean = if wants_steps {
            self.weighted(start, &self.at.steps)
        } else {
            S::zero()
        };
        let second = if wants_steps {
            self.second_moment(start, &self.at)
        } else {
            S::zero()
        };
        let variance = {
            let v = second.sub(&mean.mul(&mean));
            // Rounding can leave a tiny negative where the variance is 0.
            let tolerance = 1e-9 * mean.to_f64().powi(2).max(1.0);
            if !S::EXACT && v.to_f64() < 0.0 && v.to_f64() > -tolerance {
                S::zero()
            } else {
                v
            }
        };
        // E[T; a] and E[T | a] for each absorbing outcome.
        let joint: Vec<S> = if wants_steps {
            (0..absorbing_count)
                .map(|k| self.weighted(start, &self.at.steps_and_outcome[k]))
                .collect()
        } else {
            Vec::new()
        };
        let given = |k: usize| {
            (!absorbed[k].is_zero())
                .then(|| joint[k].div(&absorbed[k]))
                .filter(|g| g.to_f64().is_finite())
        };
        let visit_value = |state: usize| -> Option<S> {
            let visits = visits?;
            match self.structure.kind[state] {
                StateKind::Absorbing => None,
                StateKind::Transient => {
                    Some(visits.at[self.structure.position[state].expect("transient")].clone())
                }
                StateKind::Trapped => {
                    let class = self.structure.trap_class_of[state].expect("trapped");
                    trapped[class].is_zero().then(S::zero)
                }
            }
        };
        let non_absorbing =
            || (0..self.chain.len()).filter(|&s| self.structure.kind[s] != StateKind::Absorbing);

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
        if wants_steps {
            metrics.steps = Some(Steps {
                mean: finite.then(|| mean.to_number()),
                variance: finite.then(|| variance.to_number()),
                mean_given: self
                    .structure
                    .absorbing
                    .iter()
                    .enumerate()
                    .map(|(k, &a)| (ids[a].clone(), given(k).map(|g| g.to_number())))
                    .collect(),
            });
        }
        if visits.is_some() {
            metrics.visits = Some(
                non_absorbing()
                    .map(|s| (ids[s].clone(), visit_value(s).map(|v| v.to_number())))
                    .collect(),
            );
        }
        if plan.report.contains(&Report::Costs) {
            let mut costs = BTreeMap::new();
            for (dimension, vectors) in self.chain.costs.iter().zip(&self.at.costs) {
                let on_arrival =
                    |power, only| self.arrival_cost(dimension, start, power, only, None).0;
                let mean = self
                    .weighted(start, &vectors.mean)
                    .add(&on_arrival(1, None));
                let second = self
                    .weighted(start, &vectors.second_moment)
                    .add(&on_arrival(2, None));
                let variance = second.sub(&mean.mul(&mean));
                let mean_given = self
                    .structure
                    .absorbing
                    .iter()
                    .enumerate()
                    .map(|(k, &a)| {
                        let given = (!absorbed[k].is_zero()).then(|| {
                            self.weighted(start, &vectors.joint[k])
                                .add(&on_arrival(1, Some(a)))
                                .div(&absorbed[k])
                                .to_number()
                        });
                        (ids[a].clone(), given)
                    })
                    .collect();
                costs.insert(
                    dimension.name.clone(),
                    CostReport {
                        mean: finite.then(|| mean.to_number()),
                        variance: finite.then(|| variance.to_number()),
                        mean_given,
                    },
                );
            }
            metrics.costs = Some(costs);
        }
        if !plan.report.contains(&Report::Sensitivity) {
            return metrics;
        }

        let mut sensitivity = BTreeMap::new();
        for (j, (name, value)) in self.chain.parameters.iter().enumerate() {
            let theta = S::from_rational(value);
            let ds: Vec<S> = gradients.iter().map(|g| g[j].clone()).collect();
            let d = &self.derivatives[j];
            let entry = |metric: Option<&S>, derivative: Option<S>| {
                // A derivative that overflowed doubles is reported as unknown, never as NaN.
                let derivative = derivative.filter(|d| d.to_f64().is_finite());
                Derivative {
                    elasticity: match (metric, &derivative) {
                        (Some(m), Some(dm)) => elasticity(dm, &theta, m)
                            .filter(|e| e.to_f64().is_finite())
                            .map(|e| e.to_number()),
                        _ => None,
                    },
                    derivative: derivative.map(|dm| dm.to_number()),
                }
            };
            let mut report = Sensitivity::default();
            let d_absorbed: Vec<S> = (0..outcome_count)
                .map(|k| self.outcome_mass(start, gradients, k, Some(j)))
                .collect();
            if plan.report.contains(&Report::Absorption) {
                report.absorption = Some(
                    self.structure
                        .absorbing
                        .iter()
                        .enumerate()
                        .map(|(k, &a)| {
                            (
                                ids[a].clone(),
                                entry(Some(&absorbed[k]), Some(d_absorbed[k].clone())),
                            )
                        })
                        .collect(),
                );
                let d_never = d_absorbed[absorbing_count..]
                    .iter()
                    .fold(S::zero(), |sum, p| sum.add(p));
                report.never_absorbed = Some(entry(Some(&never), Some(d_never)));
            }
            if wants_steps {
                let d_mean = self.weighted_derivative(start, &ds, &self.at.steps, &d.steps);
                let d_twice =
                    self.weighted_derivative(start, &ds, &self.at.steps_twice, &d.steps_twice);
                let d_second = d_twice.add(&d_twice).sub(&d_mean);
                let d_variance = d_second.sub(&mean.add(&mean).mul(&d_mean));
                report.steps_mean = Some(entry(Some(&mean), finite.then_some(d_mean)));
                report.steps_variance = Some(entry(Some(&variance), finite.then_some(d_variance)));
                report.steps_mean_given = Some(
                    self.structure
                        .absorbing
                        .iter()
                        .enumerate()
                        .map(|(k, &a)| {
                            let g = given(k);
                            // (Y / P)' = (Y' P - Y P') / P²
                            // (Y / P)' = (Y' - (Y / P) P') / P, which keeps P² from underflowing.
                            let derivative = g.as_ref().map(|given| {
                                let d_joint = self.weighted_derivative(
                                    start,
                                    &ds,
                                    &self.at.steps_and_outcome[k],
                                    &d.steps_and_outcome[k],
                                );
                                d_joint.sub(&given.mul(&d_absorbed[k])).div(&absorbed[k])
                            });
                            (ids[a].clone(), entry(g.as_ref(), derivative))
                        })
                        .collect(),
                );
            }
            if let Some(visits) = visits {
                report.visits = Some(
                    non_absorbing()
                        .map(|s| {
                            let value = visit_value(s);
                            let derivative =
                                value.as_ref().map(|_| match self.structure.position[s] {
                                    Some(p) => visits.derivatives[j][p].clone(),
                                    None => S::zero(),
                                });
                            (ids[s].clone(), entry(value.as_ref(), derivative))
                        })
                        .collect(),
                );
            }
            if plan.report.contains(&Report::Costs) {
                let mut costs = BTreeMap::new();
                for ((dimension, values), derivatives) in
                    self.chain.costs.iter().zip(&self.at.costs).zip(&d.costs)
                {
                    let on_arrival = |power, only| {
                        self.arrival_cost(dimension, start, power, only, Some((j, &ds)))
                    };
                    let (arrival, d_arrival) = on_arrival(1, None);
                    let (arrival2, d_arrival2) = on_arrival(2, None);
                    let mean = self.weighted(start, &values.mean).add(&arrival);
                    let d_mean = self
                        .weighted_derivative(start, &ds, &values.mean, &derivatives.mean)
                        .add(&d_arrival);
                    let second = self.weighted(start, &values.second_moment).add(&arrival2);
                    let d_second = self
                        .weighted_derivative(
                            start,
                            &ds,
                            &values.second_moment,
                            &derivatives.second_moment,
                        )
                        .add(&d_arrival2);
                    let variance = second.sub(&mean.mul(&mean));
                    let d_variance = d_second.sub(&mean.add(&mean).mul(&d_mean));
                    let mean_given = self
                        .structure
                        .absorbing
                        .iter()
                        .enumerate()
                        .map(|(k, &a)| {
                            let (arrival, d_arrival) = on_arrival(1, Some(a));
                            let joint = self.weighted(start, &values.joint[k]).add(&arrival);
                            let d_joint = self
                                .weighted_derivative(
                                    start,
                                    &ds,
                                    &values.joint[k],
                                    &derivatives.joint[k],
                                )
                                .add(&d_arrival);
                            let p = &absorbed[k];
                            let given = (!p.is_zero()).then(|| joint.div(p));
                            let derivative = given
                                .as_ref()
                                .map(|g| d_joint.sub(&g.mul(&d_absorbed[k])).div(p));
                            (ids[a].clone(), entry(given.as_ref(), derivative))
                        })
                        .collect();
                    costs.insert(
                        dimension.name.clone(),
                        CostSensitivity {
                            mean: entry(Some(&mean), finite.then_some(d_mean)),
                            variance: entry(Some(&variance), finite.then_some(d_variance)),
                            mean_given,
                        },
                    );
                }
                report.costs = Some(costs);
            }
            sensitivity.insert(name.clone(), report);
        }
        metrics.sensitivity = Some(sensitivity);
        metrics
    }

    /// The distribution of the time to absorption from a start, with notes on quantiles not
    /// reached.
    fn distribution(
        &self,
        start: &[(usize, S)],
        gradients: &[Vec<S>],
        plan: &Plan,
        budget: &Budget,
    ) -> Result<(Distribution, Vec<DistributionSensitivity>, Vec<String>), SolveError> {
        let ids = &self.chain.ids;
        let absorbing_count = self.structure.absorbing.len();
        let no_gradients = vec![Vec::new(); start.len()];
        let absorbed: Vec<S> = (0..absorbing_count)
            .map(|k| self.outcome_mass(start, &no_gradients, k, None))
            .collect();
        let eventually = absorbed.iter().fold(S::zero(), |sum, p| sum.add(p));
        let trapped = (absorbing_count..absorbing_count + self.structure.trap_classes.len())
            .any(|k| !self.outcome_mass(start, &no_gradients, k, None).is_zero());
        let moments = (!trapped).then(|| {
            let mean = self.weighted(start, &self.at.steps);
            let second = self.second_moment(start, &self.at);
            (mean.to_f64(), second.sub(&mean.mul(&mean)).to_f64())
        });
        let horizon = plan.horizon.unwrap_or_else(|| default_horizon(moments));
        let entries = (horizon as usize + 1).saturating_mul(absorbing_count + 1);
        if entries > MAX_REPORTED_NUMBERS {
            return Err(SolveError::TooLarge(format!(
                "the distribution up to step {horizon} over {absorbing_count} outcomes would hold \
                 {entries} numbers, over the limit of {MAX_REPORTED_NUMBERS}; give a smaller \
                 `horizon`"
            )));
        }
        let mut notes = Vec::new();
        let mut targets = Vec::new();
        let mut slots = Vec::new();
        let start_states: Vec<usize> = start.iter().map(|(state, _)| *state).collect();
        // In exact arithmetic a level equal to the limit of the distribution is reached at a
        // finite step only if no mass can circulate for ever on the way.
        let mut circulating: BTreeMap<Option<usize>, bool> = BTreeMap::new();
        let mut only_in_the_limit = |level: &S, limit: &S, goal: Option<usize>| {
            S::EXACT
                && level.at_least(limit)
                && *circulating.entry(goal).or_insert_with(|| {
                    distribution::circulates(self.chain, self.structure, &start_states, goal)
                })
        };
        for (text, q) in &plan.quantiles {
            budget.check()?;
            let q = S::from_rational(q);
            if !eventually.at_least(&q) {
                notes.push(format!(
                    "quantile {text} is never reached: the walk is absorbed with probability {} \
                     only",
                    eventually.to_f64()
                ));
            } else if only_in_the_limit(&q, &eventually, None) {
                notes.push(format!(
                    "quantile {text} is approached only in the limit: no finite number of steps \
                     reaches it"
                ));
            } else {
                slots.push((text, None));
                targets.push(distribution::QuantileTarget {
                    q: q.clone(),
                    outcome: None,
                    mass: S::one(),
                });
            }
            for (k, mass) in absorbed.iter().enumerate() {
                let goal = Some(self.structure.absorbing[k]);
                if !mass.is_zero() && !only_in_the_limit(&q, &S::one(), goal) {
                    slots.push((text, Some(k)));
                    targets.push(distribution::QuantileTarget {
                        q: q.clone(),
                        outcome: Some(k),
                        mass: mass.clone(),
                    });
                }
            }
        }
        // Stepping past the horizon for quantiles may use half of what is left of the budget.
        let extra = budget.share(
            0.5 + 0.5 * budget.elapsed().as_secs_f64() / budget.limit().as_secs_f64().max(1e-9),
        );
        let differentiate = plan.report.contains(&Report::Sensitivity);
        let found = distribution::propagate(
            self.chain,
            self.structure,
            start,
            differentiate.then_some(gradients),
            horizon,
            &targets,
            budget,
            &extra,
        )?;
        let mut quantiles: BTreeMap<String, Option<u64>> = plan
            .quantiles
            .iter()
            .map(|(t, _)| (t.clone(), None))
            .collect();
        let mut quantiles_by_outcome: BTreeMap<String, BTreeMap<String, Option<u64>>> = self
            .structure
            .absorbing
            .iter()
            .map(|&a| (ids[a].clone(), quantiles.clone()))
            .collect();
        for ((text, outcome), step) in slots.into_iter().zip(found.quantiles) {
            match outcome {
                None => {
                    quantiles.insert(text.clone(), step);
                    if step.is_none() {
                        notes.push(format!(
                            "quantile {text} was not reached within {} steps",
                            found.steps_taken
                        ));
                    }
                }
                Some(k) => {
                    let id = &ids[self.structure.absorbing[k]];
                    quantiles_by_outcome
                        .get_mut(id)
                        .expect("every outcome")
                        .insert(text.clone(), step);
                }
            }
        }
        let cdf: Vec<S> = (0..=horizon as usize)
            .map(|n| {
                found
                    .by_outcome
                    .iter()
                    .fold(S::zero(), |sum, column| sum.add(&column[n]))
            })
            .collect();
        let remaining = S::one().sub(cdf.last().expect("horizon + 1 entries"));
        let numbers = |values: &[S]| {
            values
                .iter()
                .map(Scalar::to_number)
                .collect::<Vec<Number>>()
        };
        let sensitivities = found
            .derivatives
            .iter()
            .zip(&self.chain.parameters)
            .map(|(columns, (_, theta))| {
                let theta = S::from_rational(theta);
                let entry = |value: &S, derivative: S| Derivative {
                    elasticity: elasticity(&derivative, &theta, value).map(|e| e.to_number()),
                    derivative: Some(derivative.to_number()),
                };
                let d_cdf: Vec<S> = (0..=horizon as usize)
                    .map(|n| {
                        columns
                            .iter()
                            .fold(S::zero(), |sum, column| sum.add(&column[n]))
                    })
                    .collect();
                DistributionSensitivity {
                    cdf: cdf
                        .iter()
                        .zip(&d_cdf)
                        .map(|(v, d)| entry(v, d.clone()))
                        .collect(),
                    by_outcome: self
                        .structure
                        .absorbing
                        .iter()
                        .zip(columns.iter().zip(&found.by_outcome))
                        .map(|(&a, (d_column, column))| {
                            let entries = column
                                .iter()
                                .zip(d_column)
                                .map(|(v, d)| entry(v, d.clone()))
                                .collect();
                            (ids[a].clone(), entries)
                        })
                        .collect(),
                    remaining: entry(&remaining, S::zero().sub(d_cdf.last().expect("entries"))),
                }
            })
            .collect();
        Ok((
            Distribution {
                horizon,
                cdf: numbers(&cdf),
                by_outcome: self
                    .structure
                    .absorbing
                    .iter()
                    .zip(&found.by_outcome)
                    .map(|(&a, column)| (ids[a].clone(), numbers(column)))
                    .collect(),
                quantiles,
                quantiles_by_outcome,
                remaining: remaining.to_number(),
            },
            sensitivities,
            notes,
        ))
    }

    /// The cost paid by starts in absorbing states (once, on arrival): `Σ s_a c_a^power` over
    /// the start (only at state `only` when given), and, with `(j, ds)`, its derivative with
    /// respect to parameter `j` given the start's derivatives `ds`.
    fn arrival_cost(
        &self,
        dimension: &crate::model::chain::CostDimension,
        start: &[(usize, S)],
        power: u32,
        only: Option<usize>,
        derivative: Option<(usize, &[S])>,
    ) -> (S, S) {
        let mut value = S::zero();
        let mut change = S::zero();
        for (e, (state, mass)) in start.iter().enumerate() {
            if self.structure.kind[*state] != StateKind::Absorbing
                || only.is_some_and(|a| a != *state)
            {
                continue;
            }
            let c = S::from_rational(&dimension.on_states[*state]);
            let term = if power == 2 { c.mul(&c) } else { c.clone() };
            value = value.add(&mass.mul(&term));
            if let Some((j, ds)) = derivative {
                let dc = S::from_rational(&dimension.on_states_gradient[*state][j]);
                let d_term = if power == 2 { c.add(&c).mul(&dc) } else { dc };
                change = change.add(&ds[e].mul(&term)).add(&mass.mul(&d_term));
            }
        }
        (value, change)
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
                            .outcome_probability(&self.at, *state, absorbing_count + c, false)
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

    /// Checks a float answer: each transient state's outcome probabilities in [0, 1] summing to
    /// 1, expected steps non-negative, and the estimated relative error small. Says what failed.
    fn verify(&self, error_estimate: f64) -> Option<String> {
        let mut worst: f64 = 0.0;
        for p in 0..self.structure.transient.len() {
            let mut total = 0.0;
            for column in &self.at.outcome {
                let v = column[p].to_f64();
                worst = worst.max(-v).max(v - 1.0);
                total += v;
            }
            worst = worst.max((total - 1.0).abs());
        }
        let negative_steps = self.at.steps.iter().any(|t| t.to_f64() < 0.0);
        let mut failures = Vec::new();
        if worst > VERIFICATION_TOLERANCE || !worst.is_finite() {
            failures.push(format!(
                "outcome probabilities leave [0, 1] or miss summing to 1 by up to {worst:.1e}"
            ));
        }
        if negative_steps {
            failures.push("some expected steps came out negative".to_owned());
        }
        if error_estimate.is_infinite() {
            failures.push("its error could not be estimated within the budget".to_owned());
        } else if error_estimate > ERROR_ESTIMATE_TOLERANCE || error_estimate.is_nan() {
            failures.push(format!(
                "the estimated relative error of the solution is {error_estimate:.1e}"
            ));
        }
        (!failures.is_empty()).then(|| {
            format!(
                "floating-point answer failed verification: {}; its digits cannot be trusted \
                 that far, ask for \"exact\" arithmetic",
                failures.join("; ")
            )
        })
    }
}

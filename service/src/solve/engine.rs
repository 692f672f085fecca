//! The engines that solve `(I - Q) x = b` and `(I - Q)ᵀ y = c`, and the rule that picks one.
//!
//! - Exact: sparse elimination over big rationals for small systems, p-adic lifting (word-size
//!   arithmetic modulo a prime, rationals reconstructed at the end) once that is cheaper.
//! - Float: a sparse LU in a fill-reducing (AMD) order, refined iteratively with residuals in
//!   double-double arithmetic, when symbolic analysis predicts modest fill; otherwise a
//!   preconditioned Krylov method, whose cost does not depend on fill.
//!
//! Every engine reports what it did ([`EngineReport`]) for the answer's `solver` section.

use std::cell::RefCell;

use num_rational::BigRational;

use super::budget::Budget;
use super::direct::{self, Analysis, DirectError, DirectFactors};
use super::elimination::{Factors, SparseRow};
use super::krylov::{IterativeError, IterativeSolver};
use super::padic::{PadicError, PadicSolver};
use super::scalar::Scalar;
use super::sparse::Csr;
use super::SolveError;

/// What an engine did, for the answer's `solver` section.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct EngineReport {
    /// The method, in words.
    pub method: String,
    /// Iterations of the iterative method, or refinement steps of the direct one (0 when exact).
    pub iterations: usize,
    /// Largest `‖b - A x‖∞` over the systems solved (0 when exact).
    pub max_residual: f64,
}

/// A prepared `A = I - Q` that solves systems with it, in one arithmetic.
pub trait LinearSolver<S> {
    /// Solves `A x = b` for each right-hand side.
    ///
    /// # Errors
    /// [`SolveError::BudgetExceeded`] past the deadline; [`SolveError::Numerical`] if floating
    /// point breaks down.
    fn solve_many(&self, rhs: Vec<Vec<S>>, budget: &Budget) -> Result<Vec<Vec<S>>, SolveError>;

    /// Solves `Aᵀ y = c` for each right-hand side.
    ///
    /// # Errors
    /// As [`LinearSolver::solve_many`].
    fn solve_transposed_many(
        &self,
        rhs: Vec<Vec<S>>,
        budget: &Budget,
    ) -> Result<Vec<Vec<S>>, SolveError>;

    /// What the engine did so far.
    fn report(&self) -> EngineReport;

    /// A bound on the relative error of every solution computed so far (0 when exact).
    ///
    /// # Errors
    /// As [`LinearSolver::solve_many`].
    fn error_estimate(&self, _budget: &Budget) -> Result<f64, SolveError> {
        Ok(0.0)
    }

    /// Solves `A x = b`.
    ///
    /// # Errors
    /// As [`LinearSolver::solve_many`].
    fn solve(&self, b: Vec<S>, budget: &Budget) -> Result<Vec<S>, SolveError> {
        Ok(self
            .solve_many(vec![b], budget)?
            .pop()
            .expect("one solution per right-hand side"))
    }

    /// Solves `Aᵀ y = c`.
    ///
    /// # Errors
    /// As [`LinearSolver::solve_many`].
    fn solve_transposed(&self, c: Vec<S>, budget: &Budget) -> Result<Vec<S>, SolveError> {
        Ok(self
            .solve_transposed_many(vec![c], budget)?
            .pop()
            .expect("one solution per right-hand side"))
    }
}

/// Sparse elimination in Markowitz order, in any arithmetic.
pub struct Eliminated<S> {
    factors: Factors<S>,
}

impl<S: Scalar> Eliminated<S> {
    /// Factors `A`.
    ///
    /// # Errors
    /// As [`Factors::new`].
    pub fn new(rows: Vec<SparseRow<S>>, budget: &Budget) -> Result<Self, SolveError> {
        Ok(Eliminated {
            factors: Factors::new(rows, budget)?,
        })
    }
}

impl<S: Scalar> LinearSolver<S> for Eliminated<S> {
    fn solve_many(&self, rhs: Vec<Vec<S>>, budget: &Budget) -> Result<Vec<Vec<S>>, SolveError> {
        rhs.into_iter()
            .map(|b| self.factors.solve(b, budget))
            .collect()
    }

    fn solve_transposed_many(
        &self,
        rhs: Vec<Vec<S>>,
        budget: &Budget,
    ) -> Result<Vec<Vec<S>>, SolveError> {
        rhs.into_iter()
            .map(|c| self.factors.solve_transposed(c, budget))
            .collect()
    }

    fn report(&self) -> EngineReport {
        EngineReport {
            method: format!(
                "{} sparse LU, Markowitz order ({} factor entries)",
                if S::EXACT {
                    "exact rational"
                } else {
                    "float64"
                },
                self.factors.entries()
            ),
            ..EngineReport::default()
        }
    }
}

/// Keeps a running [`EngineReport`] behind a shared reference.
#[derive(Debug, Default)]
pub struct Tally(RefCell<EngineReport>);

impl Tally {
    /// Starts a report for `method`.
    #[must_use]
    pub fn new(method: String) -> Self {
        Tally(RefCell::new(EngineReport {
            method,
            ..EngineReport::default()
        }))
    }

    /// Records one solved system.
    pub fn record(&self, iterations: usize, residual: f64) {
        let mut report = self.0.borrow_mut();
        report.iterations += iterations;
        report.max_residual = report.max_residual.max(residual);
    }

    /// The report so far.
    #[must_use]
    pub fn get(&self) -> EngineReport {
        self.0.borrow().clone()
    }
}

/// Systems at least this large are solved by p-adic lifting; smaller ones by elimination over
/// the rationals, whose set-up costs less.
pub const LIFTING_FROM: usize = 12;

/// The exact engine for `A` given by its rows.
///
/// # Errors
/// [`SolveError`] when factoring runs out of time.
pub fn exact(
    rows: Vec<SparseRow<BigRational>>,
    budget: &Budget,
) -> Result<Box<dyn LinearSolver<BigRational>>, SolveError> {
    if rows.len() < LIFTING_FROM {
        return Ok(Box::new(Eliminated::new(rows, budget)?));
    }
    // Lifting keeps a few dense n x n copies of word-size numbers when the matrix is dense.
    let n = rows.len() as f64;
    let entries = rows.iter().map(Vec::len).sum::<usize>() as f64;
    if entries > 0.2 * n * n {
        budget.reserve(4.0 * 8.0 * n * n, "the dense factors modulo a prime")?;
    }
    match PadicSolver::new(&rows, &interrupted(budget)) {
        Ok(solver) => Ok(Box::new(Lifted {
            solver,
            tally: Tally::new(
                "exact rational p-adic lifting over a sparse LU modulo a word-size prime".into(),
            ),
        })),
        Err(PadicError::Interrupted) => Err(budget.check().unwrap_err()),
        // Every prime tried divided a pivot: rare enough that elimination over the rationals,
        // which never meets a zero pivot here, is the fallback.
        Err(PadicError::UnluckyPrimes) => Ok(Box::new(Eliminated::new(rows, budget)?)),
    }
}

/// Exact solutions by p-adic lifting.
struct Lifted {
    solver: PadicSolver,
    tally: Tally,
}

impl Lifted {
    fn lifted(
        &self,
        rhs: &[Vec<BigRational>],
        transposed: bool,
        budget: &Budget,
    ) -> Result<Vec<Vec<BigRational>>, SolveError> {
        budget.check()?;
        let outcome = if transposed {
            self.solver.solve_transposed_many(rhs, &interrupted(budget))
        } else {
            self.solver.solve_many(rhs, &interrupted(budget))
        };
        outcome.map_err(|e| match e {
            PadicError::Interrupted => budget.check().unwrap_err(),
            PadicError::UnluckyPrimes => {
                SolveError::Numerical("p-adic lifting met only unlucky primes".into())
            }
        })
    }
}

impl LinearSolver<BigRational> for Lifted {
    fn solve_many(
        &self,
        rhs: Vec<Vec<BigRational>>,
        budget: &Budget,
    ) -> Result<Vec<Vec<BigRational>>, SolveError> {
        self.lifted(&rhs, false, budget)
    }

    fn solve_transposed_many(
        &self,
        rhs: Vec<Vec<BigRational>>,
        budget: &Budget,
    ) -> Result<Vec<Vec<BigRational>>, SolveError> {
        self.lifted(&rhs, true, budget)
    }

    fn report(&self) -> EngineReport {
        self.tally.get()
    }
}

/// Largest predicted fill (factor entries over matrix entries) for which the float engine
/// factors directly; beyond it, a Krylov method is cheaper (banded and near-acyclic chains fill
/// little, random expander-like ones fill hundreds of times over).
pub const MAX_DIRECT_FILL: f64 = 30.0;

/// Systems this small are always factored: the fill cannot hurt.
pub const ALWAYS_DIRECT_BELOW: usize = 2_000;

/// Seconds the fill-reducing ordering takes per factor entry it predicts (measured on random
/// chains, 2-core machine).
pub const ORDERING_SECONDS_PER_ENTRY: f64 = 1e-9;

/// Share of the remaining budget the ordering may take by the cheap bound before it is skipped.
pub const ORDERING_BUDGET_SHARE: f64 = 0.1;

/// Most seconds the ordering may take by the cheap bound, however long the budget: a fill that
/// would take longer to predict is far past what the direct solver could use.
pub const MAX_ORDERING_SECONDS: f64 = 1.0;

/// Relative residual the Krylov method iterates to.
pub const ITERATIVE_TOLERANCE: f64 = 1e-12;

/// Most refinement steps after a direct solve.
pub const MAX_REFINEMENT_STEPS: usize = 4;

/// Unit roundoff of doubles.
const UNIT_ROUNDOFF: f64 = f64::EPSILON / 2.0;

/// The float engine for `A` given by its rows: chooses direct or iterative by symbolic analysis.
///
/// # Errors
/// [`SolveError`] when factoring runs out of time or memory, or breaks down.
pub fn float(
    rows: Vec<SparseRow<f64>>,
    budget: &Budget,
) -> Result<Box<dyn LinearSolver<f64>>, SolveError> {
    let matrix = Csr::from_rows(&rows);
    drop(rows);
    // The ordering costs about a nanosecond per entry it predicts: skip it where even a cheap
    // upper bound says the fill (and so the ordering's own time) is out of reach.
    let bound = direct::level_fill_bound(&matrix);
    let ordering_seconds = bound * ORDERING_SECONDS_PER_ENTRY;
    let ordering_allowance =
        (ORDERING_BUDGET_SHARE * budget.remaining().as_secs_f64()).min(MAX_ORDERING_SECONDS);
    if matrix.n >= ALWAYS_DIRECT_BELOW && ordering_seconds > ordering_allowance {
        return iterative(matrix, bound, budget);
    }
    let analysis = direct::analyse(&matrix);
    let fill = analysis.predicted_entries as f64 / matrix.entries().max(1) as f64;
    // Factors: an index and a value per entry; the transpose for residuals: the same again.
    let direct_bytes = analysis.predicted_entries as f64 * 16.0 + matrix.entries() as f64 * 16.0;
    if matrix.n < ALWAYS_DIRECT_BELOW || fill <= MAX_DIRECT_FILL {
        budget.reserve(direct_bytes, "the sparse LU factors")?;
        return Ok(Box::new(FloatEngine::direct(matrix, &analysis, budget)?));
    }
    iterative(matrix, analysis.predicted_entries as f64, budget)
}

fn iterative(
    matrix: Csr,
    predicted_entries: f64,
    budget: &Budget,
) -> Result<Box<dyn LinearSolver<f64>>, SolveError> {
    // The matrix, its transpose and a preconditioner of the same pattern; a few dozen vectors.
    budget.reserve(
        matrix.entries() as f64 * 40.0 + matrix.n as f64 * 8.0 * 40.0,
        "the iterative solver",
    )?;
    let fill = predicted_entries / matrix.entries().max(1) as f64;
    Ok(Box::new(FloatEngine::iterative(matrix, fill)))
}

/// Doubles: a direct or an iterative solver, with residuals computed in double-double.
pub struct FloatEngine {
    matrix: Csr,
    transposed: Csr,
    method: FloatMethod,
    tally: Tally,
    /// Componentwise maximum over solved systems of `(|r| + 2u(|A||x| + |b|)) / ‖x‖∞`, for `A`
    /// and for `Aᵀ`.
    error_terms: RefCell<[Vec<f64>; 2]>,
}

enum FloatMethod {
    Direct(DirectFactors),
    Iterative(Box<IterativeSolver>),
}

fn interrupted(budget: &Budget) -> impl Fn() -> bool + '_ {
    move || budget.check().is_err()
}

impl FloatEngine {
    fn direct(matrix: Csr, analysis: &Analysis, budget: &Budget) -> Result<Self, SolveError> {
        let factors =
            DirectFactors::new(&matrix, analysis, &interrupted(budget)).map_err(|e| match e {
                DirectError::Interrupted => budget.check().unwrap_err(),
                DirectError::ZeroPivot { row } => SolveError::Numerical(format!(
                    "a pivot vanished in floating point (transient state #{row})"
                )),
            })?;
        let method = format!(
            "float64 sparse LU in approximate minimum degree order ({} factor entries, {:.1}x \
             the matrix), refined with double-double residuals",
            factors.entries(),
            factors.entries() as f64 / matrix.entries().max(1) as f64
        );
        Ok(FloatEngine {
            transposed: matrix.transpose(),
            matrix,
            method: FloatMethod::Direct(factors),
            tally: Tally::new(method),
            error_terms: RefCell::default(),
        })
    }

    fn iterative(matrix: Csr, fill: f64) -> Self {
        let transposed = matrix.transpose();
        let solver = IterativeSolver::new(matrix.clone());
        FloatEngine {
            matrix,
            transposed,
            method: FloatMethod::Iterative(Box::new(solver)),
            tally: Tally::new(format!(
                "float64 preconditioned Krylov iteration (a sparse LU would fill up to {fill:.0}x \
                 the matrix)"
            )),
            error_terms: RefCell::default(),
        }
    }

    fn solve_all(
        &self,
        rhs: Vec<Vec<f64>>,
        transposed: bool,
        budget: &Budget,
    ) -> Result<Vec<Vec<f64>>, SolveError> {
        budget.check()?;
        let matrix = if transposed {
            &self.transposed
        } else {
            &self.matrix
        };
        let solutions = match &self.method {
            FloatMethod::Direct(factors) => rhs
                .iter()
                .map(|b| self.refined(factors, b, transposed, budget))
                .collect::<Result<Vec<_>, _>>()?,
            FloatMethod::Iterative(solver) => {
                let outcome = if transposed {
                    solver.solve_transposed_many(&rhs, ITERATIVE_TOLERANCE, &interrupted(budget))
                } else {
                    solver.solve_many(&rhs, ITERATIVE_TOLERANCE, &interrupted(budget))
                };
                let (solutions, report) = outcome.map_err(|e| match e {
                    IterativeError::Interrupted => budget.check().unwrap_err(),
                    IterativeError::Stagnated {
                        relative_residual,
                        iterations,
                    } => SolveError::Numerical(format!(
                        "the iterative solver stagnated at a relative residual of \
                         {relative_residual:.1e} after {iterations} iterations"
                    )),
                })?;
                for (b, x) in rhs.iter().zip(&solutions) {
                    let r = residual(matrix, x, b);
                    self.tally.record(0, norm(&r));
                    self.note_error(matrix, x, b, &r, transposed);
                }
                self.tally.record(report.iterations, 0.0);
                solutions
            }
        };
        if solutions.iter().flatten().any(|v| !v.is_finite()) {
            return Err(SolveError::Numerical(
                "a result overflowed the range of doubles".into(),
            ));
        }
        Ok(solutions)
    }

    /// A direct solve, then refinement steps with residuals in double-double until the
    /// correction stops shrinking.
    fn refined(
        &self,
        factors: &DirectFactors,
        b: &[f64],
        transposed: bool,
        budget: &Budget,
    ) -> Result<Vec<f64>, SolveError> {
        let matrix = if transposed {
            &self.transposed
        } else {
            &self.matrix
        };
        let apply = |v: &mut [f64]| {
            if transposed {
                factors.solve_transposed_in_place(v);
            } else {
                factors.solve_in_place(v);
            }
        };
        let mut x = b.to_vec();
        apply(&mut x);
        let mut r = residual(matrix, &x, b);
        let mut steps = 0;
        while steps < MAX_REFINEMENT_STEPS && norm(&r) > UNIT_ROUNDOFF * norm(&x) {
            budget.check()?;
            let mut d = r.clone();
            apply(&mut d);
            let candidate: Vec<f64> = x.iter().zip(&d).map(|(x, d)| x + d).collect();
            let next = residual(matrix, &candidate, b);
            steps += 1;
            if norm(&next).is_nan() || norm(&next) >= norm(&r) {
                break;
            }
            x = candidate;
            r = next;
        }
        self.tally.record(steps, norm(&r));
        self.note_error(matrix, &x, b, &r, transposed);
        Ok(x)
    }

    /// Takes in a solved system's error terms. With `N = A⁻¹ ≥ 0` (an M-matrix's inverse), the
    /// error of `x` is `N r` exactly, and rounding `A` and `b` entry by entry (relative `u`)
    /// moves `x` by at most `u N (|A||x| + |b|)` to first order: since `N ≥ 0`, one solve with
    /// the componentwise maximum of these terms bounds every solution's error at once (componentwise, so a chain with a long
    /// expected time but exactly formed diagonal is not flagged for no reason).
    fn note_error(&self, matrix: &Csr, x: &[f64], b: &[f64], r: &[f64], transposed: bool) {
        let scale = norm(x);
        if scale == 0.0 {
            return;
        }
        let mut terms = self.error_terms.borrow_mut();
        let sum = &mut terms[usize::from(transposed)];
        if sum.is_empty() {
            *sum = vec![0.0; matrix.n];
        }
        for (i, total) in sum.iter_mut().enumerate() {
            let magnitude: f64 = matrix.row(i).map(|(j, a)| a.abs() * x[j].abs()).sum();
            let term = (r[i].abs() + 2.0 * UNIT_ROUNDOFF * (magnitude + b[i].abs())) / scale;
            *total = total.max(term);
        }
    }
}

impl LinearSolver<f64> for FloatEngine {
    fn solve_many(&self, rhs: Vec<Vec<f64>>, budget: &Budget) -> Result<Vec<Vec<f64>>, SolveError> {
        self.solve_all(rhs, false, budget)
    }

    fn solve_transposed_many(
        &self,
        rhs: Vec<Vec<f64>>,
        budget: &Budget,
    ) -> Result<Vec<Vec<f64>>, SolveError> {
        self.solve_all(rhs, true, budget)
    }

    fn report(&self) -> EngineReport {
        self.tally.get()
    }

    fn error_estimate(&self, budget: &Budget) -> Result<f64, SolveError> {
        let terms = self.error_terms.borrow().clone();
        let mut estimate: f64 = 0.0;
        for (transposed, sum) in terms.into_iter().enumerate() {
            if sum.is_empty() {
                continue;
            }
            let bound = match &self.method {
                FloatMethod::Direct(factors) => {
                    let mut e = sum;
                    if transposed == 1 {
                        factors.solve_transposed_in_place(&mut e);
                    } else {
                        factors.solve_in_place(&mut e);
                    }
                    e
                }
                FloatMethod::Iterative(solver) => {
                    // An estimate needs a digit or two, not twelve.
                    let rhs = [sum];
                    let outcome = if transposed == 1 {
                        solver.solve_transposed_many(&rhs, 1e-3, &interrupted(budget))
                    } else {
                        solver.solve_many(&rhs, 1e-3, &interrupted(budget))
                    };
                    match outcome {
                        Ok((mut e, _)) => e.pop().unwrap_or_default(),
                        Err(IterativeError::Interrupted) => {
                            return Err(budget.check().unwrap_err())
                        }
                        Err(IterativeError::Stagnated { .. }) => return Ok(f64::INFINITY),
                    }
                }
            };
            estimate = estimate.max(norm(&bound));
        }
        Ok(estimate)
    }
}

/// `‖v‖∞`, NaN when any entry is NaN (so a broken correction is never taken for a small one).
fn norm(v: &[f64]) -> f64 {
    v.iter().fold(0.0, |m: f64, x| {
        if x.is_nan() || m.is_nan() {
            f64::NAN
        } else {
            m.max(x.abs())
        }
    })
}

/// `b - A x`, each entry accumulated in double-double (error-free products by fused
/// multiply-add, compensated sums), so refinement sees the residual that double rounding hides.
fn residual(matrix: &Csr, x: &[f64], b: &[f64]) -> Vec<f64> {
    (0..matrix.n)
        .map(|i| {
            let (mut high, mut low) = (b[i], 0.0);
            for (j, a) in matrix.row(i) {
                let product = -a * x[j];
                let product_error = (-a).mul_add(x[j], -product);
                let sum = high + product;
                let virtual_high = sum - product;
                let sum_error = (high - virtual_high) + (product - (sum - virtual_high));
                high = sum;
                low += sum_error + product_error;
            }
            high + low
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use std::time::Duration;

    use num_bigint::BigInt;

    use super::*;

    fn budget() -> Budget {
        Budget::new(Duration::from_secs(60))
    }

    /// A random chain: each state jumps to `out` random states (weights 1..4) and exits with
    /// weight 1; rows of `A = I - Q` as exact rationals, and the exit probabilities.
    fn random_chain(
        n: usize,
        out: usize,
        seed: u64,
    ) -> (Vec<SparseRow<BigRational>>, Vec<BigRational>) {
        let mut state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
        let mut next = move |bound: u64| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state % bound
        };
        let mut rows = Vec::with_capacity(n);
        let mut exits = Vec::with_capacity(n);
        for i in 0..n {
            let jumps: Vec<(usize, i64)> = (0..out)
                .map(|_| (next(n as u64) as usize, 1 + next(4) as i64))
                .collect();
            let total: i64 = jumps.iter().map(|&(_, w)| w).sum::<i64>() + 1;
            let mut row: std::collections::BTreeMap<usize, BigRational> = Default::default();
            row.insert(i, BigRational::from_integer(BigInt::from(1)));
            for (j, w) in jumps {
                let entry = row
                    .entry(j)
                    .or_insert_with(|| BigRational::from_integer(BigInt::from(0)));
                *entry -= BigRational::new(BigInt::from(w), BigInt::from(total));
            }
            rows.push(row.into_iter().collect());
            exits.push(BigRational::new(BigInt::from(1), BigInt::from(total)));
        }
        (rows, exits)
    }

    fn to_float(rows: &[SparseRow<BigRational>]) -> Vec<SparseRow<f64>> {
        rows.iter()
            .map(|row| {
                row.iter()
                    .map(|(j, v)| (*j, f64::from_rational(v)))
                    .collect()
            })
            .collect()
    }

    fn relative_gap(x: &[f64], y: &[f64]) -> f64 {
        x.iter()
            .zip(y)
            .map(|(a, b)| (a - b).abs() / a.abs().max(b.abs()).max(1e-300))
            .fold(0.0, f64::max)
    }

    #[test]
    fn direct_and_iterative_float_engines_agree_to_1e_9() {
        let n = 3_000;
        let (rows, exits) = random_chain(n, 5, 11);
        let matrix = Csr::from_rows(&to_float(&rows));
        let analysis = direct::analyse(&matrix);
        let direct = FloatEngine::direct(matrix.clone(), &analysis, &budget()).unwrap();
        let iterative = FloatEngine::iterative(matrix, 1.0);
        let rhs = vec![exits.iter().map(f64::from_rational).collect(), vec![1.0; n]];
        let a = direct.solve_many(rhs.clone(), &budget()).unwrap();
        let b = iterative.solve_many(rhs.clone(), &budget()).unwrap();
        for (x, y) in a.iter().zip(&b) {
            assert!(relative_gap(x, y) < 1e-9, "{}", relative_gap(x, y));
        }
        let c = vec![vec![0.0; n]; 1];
        let mut start = c[0].clone();
        start[0] = 1.0;
        let a = direct.solve_transposed(start.clone(), &budget()).unwrap();
        let b = iterative.solve_transposed(start, &budget()).unwrap();
        assert!(relative_gap(&a, &b) < 1e-9);
        for engine in [&direct as &dyn LinearSolver<f64>, &iterative] {
            let estimate = engine.error_estimate(&budget()).unwrap();
            assert!(estimate > 0.0 && estimate < 1e-9, "{estimate}");
        }
        assert!(iterative.report().iterations > 0);
    }

    #[test]
    fn random_chains_past_the_size_limit_go_to_the_iterative_engine_and_walks_do_not() {
        let (rows, _) = random_chain(5_000, 5, 3);
        let engine = float(to_float(&rows), &budget()).unwrap();
        assert!(
            engine.report().method.contains("Krylov"),
            "{}",
            engine.report().method
        );
        let walk: Vec<SparseRow<f64>> = (0..5_000)
            .map(|i| {
                let mut row = vec![(i, 0.9)];
                if i > 0 {
                    row.insert(0, (i - 1, -0.5));
                }
                if i + 1 < 5_000 {
                    row.push((i + 1, -0.4));
                }
                row
            })
            .collect();
        let engine = float(walk, &budget()).unwrap();
        assert!(engine.report().method.contains("minimum degree"));
    }

    #[test]
    fn lifting_and_rational_elimination_give_identical_answers() {
        let (rows, exits) = random_chain(40, 4, 5);
        let lifted = exact(rows.clone(), &budget()).unwrap();
        assert!(lifted.report().method.contains("p-adic"));
        let eliminated = Eliminated::new(rows, &budget()).unwrap();
        let ones = vec![BigRational::from_integer(BigInt::from(1)); 40];
        let rhs = vec![exits, ones.clone()];
        assert_eq!(
            lifted.solve_many(rhs.clone(), &budget()).unwrap(),
            eliminated.solve_many(rhs, &budget()).unwrap()
        );
        assert_eq!(
            lifted.solve_transposed(ones.clone(), &budget()).unwrap(),
            eliminated.solve_transposed(ones, &budget()).unwrap()
        );
    }

    #[test]
    fn an_exhausted_budget_stops_every_engine() {
        let (rows, exits) = random_chain(3_000, 5, 7);
        let spent = Budget::new(Duration::ZERO);
        assert!(matches!(
            float(to_float(&rows), &spent)
                .and_then(|e| e.solve(exits.iter().map(f64::from_rational).collect(), &spent)),
            Err(SolveError::BudgetExceeded { .. })
        ));
        assert!(matches!(
            exact(
                rows[..100]
                    .iter()
                    .map(|r| r.iter().filter(|(j, _)| *j < 100).cloned().collect())
                    .collect(),
                &spent
            ),
            Err(SolveError::BudgetExceeded { .. })
        ));
    }
}

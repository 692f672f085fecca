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
use super::elimination::{Factors, SparseRow};
use super::scalar::Scalar;
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
    /// Largest `(‖b - A x‖∞ + 4u‖x‖∞) / ‖x‖∞` over the systems solved, `u` the unit roundoff:
    /// the residual together with the rounding of the matrix itself, relative to the solution.
    /// Times `‖N‖∞` it bounds the relative error of a solution (0 when exact).
    pub relative_backward_error: f64,
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
                if S::EXACT { "exact rational" } else { "float64" },
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
    pub fn record(&self, iterations: usize, residual: f64, relative_backward_error: f64) {
        let mut report = self.0.borrow_mut();
        report.iterations += iterations;
        report.max_residual = report.max_residual.max(residual);
        report.relative_backward_error = report
            .relative_backward_error
            .max(relative_backward_error);
    }

    /// The report so far.
    #[must_use]
    pub fn get(&self) -> EngineReport {
        self.0.borrow().clone()
    }
}

/// The exact engine for `A` given by its rows.
///
/// # Errors
/// [`SolveError`] when factoring runs out of time.
pub fn exact(
    rows: Vec<SparseRow<BigRational>>,
    budget: &Budget,
) -> Result<Box<dyn LinearSolver<BigRational>>, SolveError> {
    Ok(Box::new(Eliminated::new(rows, budget)?))
}

/// The float engine for `A` given by its rows.
///
/// # Errors
/// [`SolveError`] when factoring runs out of time or memory, or breaks down.
pub fn float(
    rows: Vec<SparseRow<f64>>,
    budget: &Budget,
) -> Result<Box<dyn LinearSolver<f64>>, SolveError> {
    Ok(Box::new(Eliminated::new(rows, budget)?))
}

//! Sensitivities by differentiating the linear systems: when `(I - Q) x = b` and both `Q` and
//! `b` depend on a parameter θ, `dx/dθ = (I - Q)⁻¹ (dQ/dθ · x + db/dθ)` — one more solve with the
//! factors already at hand, exact in exact arithmetic (no finite differences).

use super::budget::Budget;
use super::elimination::SparseRow;
use super::engine::LinearSolver;
use super::scalar::Scalar;
use super::SolveError;
use crate::model::chain::Chain;
use crate::structure::{StateKind, Structure};

/// `dQ/dθ` over the transient states and `dR/dθ` for each outcome, for one parameter.
pub struct Perturbation<S> {
    /// Rows of `dQ/dθ` (transient to transient).
    dq: Vec<SparseRow<S>>,
    /// `dR/dθ`, one column per outcome (absorbing states, then trap classes).
    dr: Vec<Vec<S>>,
}

impl<S: Scalar> Perturbation<S> {
    /// The derivative of the chain's matrices with respect to parameter `parameter`.
    #[must_use]
    pub fn new(chain: &Chain, structure: &Structure, parameter: usize) -> Self {
        let n = structure.transient.len();
        let absorbing_count = structure.absorbing.len();
        let outcomes = absorbing_count + structure.trap_classes.len();
        let mut dq = Vec::with_capacity(n);
        let mut dr = vec![vec![S::zero(); n]; outcomes];
        for (p, &state) in structure.transient.iter().enumerate() {
            let mut row = Vec::new();
            for (target, gradient) in chain.row_gradients(state) {
                let g = S::from_rational(&gradient[parameter]);
                if g.is_zero() {
                    continue;
                }
                match structure.kind[target] {
                    StateKind::Transient => {
                        row.push((structure.position[target].expect("transient"), g));
                    }
                    StateKind::Absorbing => {
                        let k = structure
                            .absorbing
                            .binary_search(&target)
                            .expect("absorbing states are listed");
                        dr[k][p] = dr[k][p].add(&g);
                    }
                    StateKind::Trapped => {
                        let k = absorbing_count + structure.trap_class_of[target].expect("class");
                        dr[k][p] = dr[k][p].add(&g);
                    }
                }
            }
            dq.push(row);
        }
        Perturbation { dq, dr }
    }

    /// `dQ · x`.
    #[must_use]
    pub fn dq_times(&self, x: &[S]) -> Vec<S> {
        self.dq
            .iter()
            .map(|row| {
                row.iter()
                    .fold(S::zero(), |sum, (j, g)| sum.add(&g.mul(&x[*j])))
            })
            .collect()
    }

    /// `dQᵀ · v + c`.
    #[must_use]
    pub fn dq_transposed_times_plus(&self, v: &[S], mut c: Vec<S>) -> Vec<S> {
        for (i, row) in self.dq.iter().enumerate() {
            for (j, g) in row {
                c[*j] = c[*j].add(&g.mul(&v[i]));
            }
        }
        c
    }

    /// `dR/dθ` for outcome `k`.
    #[must_use]
    pub fn dr(&self, k: usize) -> &[S] {
        &self.dr[k]
    }
}

/// `d/dθ` of `x` where `(I - Q) x = b`: solves `(I - Q) dx = dQ x + db`.
///
/// # Errors
/// [`SolveError::BudgetExceeded`] past the deadline.
pub fn differentiate<S: Scalar>(
    solver: &dyn LinearSolver<S>,
    perturbation: &Perturbation<S>,
    x: &[S],
    db: Option<&[S]>,
    budget: &Budget,
) -> Result<Vec<S>, SolveError> {
    let mut rhs = perturbation.dq_times(x);
    if let Some(db) = db {
        for (r, d) in rhs.iter_mut().zip(db) {
            *r = r.add(d);
        }
    }
    solver.solve(rhs, budget)
}

/// The elasticity `derivative · θ / metric`, or `None` where the metric is 0.
#[must_use]
pub fn elasticity<S: Scalar>(derivative: &S, parameter: &S, metric: &S) -> Option<S> {
    (!metric.is_zero()).then(|| derivative.mul(parameter).div(metric))
}

//! The distribution of the time to absorption by forward propagation: the mass on the
//! non-absorbing states is pushed through one sparse matrix-vector product per step, so the cost
//! is linear in horizon × transitions (no matrix powers). Quantiles not reached by the horizon are
//! sought by stepping on, within a share of the budget.

use super::budget::Budget;
use super::scalar::Scalar;
use super::SolveError;
use crate::model::chain::Chain;
use crate::structure::{StateKind, Structure};

/// Most steps taken past the horizon while looking for quantiles.
pub const MAX_EXTRA_STEPS: u64 = 10_000_000;

/// A quantile to find: P(within n) >= `q` overall, or within the outcome conditioned on it.
pub struct QuantileTarget<S> {
    /// The probability level.
    pub q: S,
    /// `None` for the overall time; `Some(k)` for absorbing outcome `k`.
    pub outcome: Option<usize>,
    /// The outcome's total probability (the conditioning mass; 1 overall).
    pub mass: S,
}

/// What propagation found.
pub struct Propagated<S> {
    /// `by_outcome[k][n]` = P(absorbed in absorbing outcome `k` within `n` steps), n ≤ horizon.
    pub by_outcome: Vec<Vec<S>>,
    /// For each target, the smallest n reaching it, or `None` if not reached.
    pub quantiles: Vec<Option<u64>>,
    /// Steps taken in all, horizon included.
    pub steps_taken: u64,
}

/// Propagates a start distribution for `horizon` steps, then further until every quantile target
/// is reached, the extra-step limit, or `extra_budget` runs out.
///
/// # Errors
/// [`SolveError::BudgetExceeded`] when `budget` runs out before the horizon.
pub fn propagate<S: Scalar>(
    chain: &Chain,
    structure: &Structure,
    start: &[(usize, S)],
    horizon: u64,
    targets: &[QuantileTarget<S>],
    budget: &Budget,
    extra_budget: &Budget,
) -> Result<Propagated<S>, SolveError> {
    let n = chain.len();
    let outcome_of = |state: usize| structure.absorbing.binary_search(&state).ok();
    let rows: Vec<Vec<(usize, S)>> = (0..n)
        .map(|i| {
            if structure.kind[i] == StateKind::Absorbing {
                return Vec::new();
            }
            chain
                .row(i)
                .map(|(j, p)| (j, S::from_rational(p)))
                .collect()
        })
        .collect();
    let outcomes = structure.absorbing.len();
    let mut mass = vec![S::zero(); n];
    let mut absorbed = vec![S::zero(); outcomes];
    for (state, p) in start {
        match outcome_of(*state) {
            Some(k) => absorbed[k] = absorbed[k].add(p),
            None => mass[*state] = mass[*state].add(p),
        }
    }
    let mut by_outcome: Vec<Vec<S>> = absorbed.iter().map(|a| vec![a.clone()]).collect();
    let mut quantiles: Vec<Option<u64>> = vec![None; targets.len()];
    let record_quantiles = |step: u64, absorbed: &[S], quantiles: &mut Vec<Option<u64>>| {
        let total = absorbed.iter().fold(S::zero(), |sum, a| sum.add(a));
        for (target, found) in targets.iter().zip(quantiles.iter_mut()) {
            if found.is_some() {
                continue;
            }
            let reached = match target.outcome {
                None => &total,
                Some(k) => &absorbed[k],
            };
            if reached.at_least(&target.q.mul(&target.mass)) {
                *found = Some(step);
            }
        }
    };
    record_quantiles(0, &absorbed, &mut quantiles);
    let mut next = vec![S::zero(); n];
    let mut step = 0u64;
    let mut active: Vec<usize> = (0..n).filter(|&i| !mass[i].is_zero()).collect();
    loop {
        let past_horizon = step >= horizon;
        if past_horizon {
            let done = quantiles.iter().all(Option::is_some);
            if done
                || active.is_empty()
                || step - horizon >= MAX_EXTRA_STEPS
                || extra_budget.check().is_err()
            {
                break;
            }
        } else {
            budget.check()?;
        }
        step += 1;
        let mut touched = Vec::with_capacity(active.len());
        for &i in &active {
            let m = std::mem::replace(&mut mass[i], S::zero());
            for (j, p) in &rows[i] {
                let flow = m.mul(p);
                match outcome_of(*j) {
                    Some(k) => absorbed[k] = absorbed[k].add(&flow),
                    None => {
                        if next[*j].is_zero() {
                            touched.push(*j);
                        }
                        next[*j] = next[*j].add(&flow);
                    }
                }
            }
        }
        touched.sort_unstable();
        touched.dedup();
        for &j in &touched {
            mass[j] = std::mem::replace(&mut next[j], S::zero());
        }
        active = touched
            .into_iter()
            .filter(|&j| !mass[j].is_zero())
            .collect();
        if step <= horizon {
            for (k, a) in absorbed.iter().enumerate() {
                by_outcome[k].push(a.clone());
            }
        }
        record_quantiles(step, &absorbed, &mut quantiles);
    }
    // Mass that never left (nothing active before the horizon) keeps the cdf flat.
    for column in &mut by_outcome {
        while (column.len() as u64) <= horizon {
            let last = column.last().cloned().unwrap_or_else(S::zero);
            column.push(last);
        }
    }
    Ok(Propagated {
        by_outcome,
        quantiles,
        steps_taken: step,
    })
}

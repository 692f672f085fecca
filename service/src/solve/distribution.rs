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
    /// `derivatives[j][k][n]`: the derivative of `by_outcome[k][n]` with respect to parameter `j`
    /// (empty when no derivatives were asked for).
    pub derivatives: Vec<Vec<Vec<S>>>,
    /// For each target, the smallest n reaching it, or `None` if not reached.
    pub quantiles: Vec<Option<u64>>,
    /// Steps taken in all, horizon included.
    pub steps_taken: u64,
}

/// Propagates a start distribution for `horizon` steps, then further until every quantile target
/// is reached, the extra-step limit, or `extra_budget` runs out. With `start_gradients` (one row
/// per start entry, one value per parameter), the derivatives of the distribution up to the
/// horizon are propagated alongside: `dv(n+1) = dv(n) P + v(n) dP`.
///
/// # Errors
/// [`SolveError::BudgetExceeded`] when `budget` runs out before the horizon.
#[allow(clippy::too_many_arguments)]
pub fn propagate<S: Scalar>(
    chain: &Chain,
    structure: &Structure,
    start: &[(usize, S)],
    start_gradients: Option<&[Vec<S>]>,
    horizon: u64,
    targets: &[QuantileTarget<S>],
    budget: &Budget,
    extra_budget: &Budget,
) -> Result<Propagated<S>, SolveError> {
    let n = chain.len();
    let outcome_of = |state: usize| structure.absorbing.binary_search(&state).ok();
    let parameters = start_gradients.map_or(0, |_| chain.parameters.len());
    // (target, probability, its gradient) for each transition out of a non-absorbing state.
    let rows: Vec<Vec<(usize, S, Vec<S>)>> = (0..n)
        .map(|i| {
            if structure.kind[i] == StateKind::Absorbing {
                return Vec::new();
            }
            chain
                .row(i)
                .zip(chain.row_gradients(i))
                .map(|((j, p), (_, g))| {
                    let gradient = g[..parameters].iter().map(S::from_rational).collect();
                    (j, S::from_rational(p), gradient)
                })
                .collect()
        })
        .collect();
    let outcomes = structure.absorbing.len();
    let mut mass = vec![S::zero(); n];
    let mut absorbed = vec![S::zero(); outcomes];
    let mut dmass = vec![vec![S::zero(); n]; parameters];
    let mut dabsorbed = vec![vec![S::zero(); outcomes]; parameters];
    for (e, (state, p)) in start.iter().enumerate() {
        match outcome_of(*state) {
            Some(k) => absorbed[k] = absorbed[k].add(p),
            None => mass[*state] = mass[*state].add(p),
        }
        for j in 0..parameters {
            let g = &start_gradients.expect("parameters > 0")[e][j];
            match outcome_of(*state) {
                Some(k) => dabsorbed[j][k] = dabsorbed[j][k].add(g),
                None => dmass[j][*state] = dmass[j][*state].add(g),
            }
        }
    }
    let mut by_outcome: Vec<Vec<S>> = absorbed.iter().map(|a| vec![a.clone()]).collect();
    let mut derivatives: Vec<Vec<Vec<S>>> = dabsorbed
        .iter()
        .map(|d| d.iter().map(|a| vec![a.clone()]).collect())
        .collect();
    let mut dnext = vec![vec![S::zero(); n]; parameters];
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
        // Derivatives are only reported up to the horizon.
        let differentiate = step <= horizon;
        let mut touched = Vec::with_capacity(active.len());
        for &i in &active {
            let m = std::mem::replace(&mut mass[i], S::zero());
            let dm: Vec<S> = if differentiate {
                dmass
                    .iter_mut()
                    .map(|d| std::mem::replace(&mut d[i], S::zero()))
                    .collect()
            } else {
                Vec::new()
            };
            for (j, p, gradient) in &rows[i] {
                let flow = m.mul(p);
                match outcome_of(*j) {
                    Some(k) => absorbed[k] = absorbed[k].add(&flow),
                    None => {
                        touched.push(*j);
                        next[*j] = next[*j].add(&flow);
                    }
                }
                for (q, dm) in dm.iter().enumerate() {
                    let dflow = dm.mul(p).add(&m.mul(&gradient[q]));
                    match outcome_of(*j) {
                        Some(k) => dabsorbed[q][k] = dabsorbed[q][k].add(&dflow),
                        None => dnext[q][*j] = dnext[q][*j].add(&dflow),
                    }
                }
            }
        }
        touched.sort_unstable();
        touched.dedup();
        for &j in &touched {
            mass[j] = std::mem::replace(&mut next[j], S::zero());
            if differentiate {
                for q in 0..parameters {
                    dmass[q][j] = std::mem::replace(&mut dnext[q][j], S::zero());
                }
            }
        }
        active = touched
            .into_iter()
            .filter(|&j| !mass[j].is_zero())
            .collect();
        if step <= horizon {
            for (k, a) in absorbed.iter().enumerate() {
                by_outcome[k].push(a.clone());
            }
            for (q, columns) in derivatives.iter_mut().enumerate() {
                for (k, column) in columns.iter_mut().enumerate() {
                    column.push(dabsorbed[q][k].clone());
                }
            }
        }
        record_quantiles(step, &absorbed, &mut quantiles);
    }
    // Once nothing moves (all absorbed before the horizon), the columns stay flat.
    for column in by_outcome
        .iter_mut()
        .chain(derivatives.iter_mut().flatten())
    {
        while (column.len() as u64) <= horizon {
            let last = column.last().cloned().unwrap_or_else(S::zero);
            column.push(last);
        }
    }
    Ok(Propagated {
        by_outcome,
        derivatives,
        quantiles,
        steps_taken: step,
    })
}

/// Whether the transient states reachable from `start` (and, with `goal`, able to reach that
/// absorbing state) contain a cycle. Then mass keeps circulating for ever and a level equal to the
/// limit of the distribution is approached but never reached at a finite step.
#[must_use]
pub fn circulates(
    chain: &Chain,
    structure: &Structure,
    start: &[usize],
    goal: Option<usize>,
) -> bool {
    let n = chain.len();
    let transient = |s: usize| structure.kind[s] == StateKind::Transient;
    let mut reached = vec![false; n];
    let mut stack: Vec<usize> = start.iter().copied().filter(|&s| transient(s)).collect();
    for &s in &stack {
        reached[s] = true;
    }
    while let Some(s) = stack.pop() {
        for (t, _) in chain.row(s) {
            if transient(t) && !reached[t] {
                reached[t] = true;
                stack.push(t);
            }
        }
    }
    if let Some(goal) = goal {
        // Keep only the states from which `goal` can be reached.
        let mut reverse: Vec<Vec<usize>> = vec![Vec::new(); n];
        for s in 0..n {
            for (t, _) in chain.row(s) {
                reverse[t].push(s);
            }
        }
        let mut leads = vec![false; n];
        let mut stack = vec![goal];
        while let Some(s) = stack.pop() {
            for &r in &reverse[s] {
                if transient(r) && !leads[r] {
                    leads[r] = true;
                    stack.push(r);
                }
            }
        }
        for (r, l) in reached.iter_mut().zip(&leads) {
            *r &= *l;
        }
    }
    // Kahn's algorithm on the induced subgraph: a cycle is whatever cannot be peeled off.
    let mut indegree = vec![0usize; n];
    for s in (0..n).filter(|&s| reached[s]) {
        for (t, _) in chain.row(s) {
            if reached[t] {
                indegree[t] += 1;
            }
        }
    }
    let mut ready: Vec<usize> = (0..n).filter(|&s| reached[s] && indegree[s] == 0).collect();
    let mut peeled = 0;
    while let Some(s) = ready.pop() {
        peeled += 1;
        for (t, _) in chain.row(s) {
            if reached[t] {
                indegree[t] -= 1;
                if indegree[t] == 0 {
                    ready.push(t);
                }
            }
        }
    }
    peeled < reached.iter().filter(|&&r| r).count()
}

//! The validated chain: states as integer indices, transition probabilities as exact rationals
//! in compressed sparse rows. Solvers only ever see this type, so they never re-check input.

use std::collections::HashMap;

use num_rational::BigRational;

/// A validated absorbing Markov chain.
#[derive(Clone, Debug)]
pub struct Chain {
    /// State ids, in order of first appearance; a state's index is its position here.
    pub ids: Vec<String>,
    /// Whether each state is absorbing.
    pub absorbing: Vec<bool>,
    /// Row `i` holds `targets[row_start[i]..row_start[i + 1]]`; `row_start` has `len + 1` items.
    pub row_start: Vec<usize>,
    /// Target state of each transition, ascending within a row.
    pub targets: Vec<usize>,
    /// Probability of each transition; all positive, each row summing to 1. Absorbing states
    /// have empty rows (their self-loop is implied).
    pub probabilities: Vec<BigRational>,
    /// For each transition, the derivative of its probability with respect to each parameter
    /// (empty rows when the chain has no parameters).
    pub gradients: Vec<Vec<BigRational>>,
    /// The start distribution: states with positive probability, summing to 1.
    pub start: Vec<(usize, BigRational)>,
    /// For each start entry, the derivative of its probability with respect to each parameter.
    pub start_gradients: Vec<Vec<BigRational>>,
    /// Named cost dimensions (sorted by name).
    pub costs: Vec<CostDimension>,
    /// The parameters and the values in force, in the chain's order.
    pub parameters: Vec<(String, BigRational)>,
    /// Things worth telling the caller that are not errors.
    pub warnings: Vec<String>,
}

/// One named cost dimension, e.g. `gold` or `ms`.
#[derive(Clone, Debug)]
pub struct CostDimension {
    /// The dimension's name.
    pub name: String,
    /// Cost paid on each visit to each state (on arrival, once, for an absorbing state).
    pub on_states: Vec<BigRational>,
    /// Gradient of each state's cost with respect to each parameter.
    pub on_states_gradient: Vec<Vec<BigRational>>,
    /// Cost paid each time each transition is taken, aligned with `targets`.
    pub on_transitions: Vec<BigRational>,
    /// Gradient of each transition's cost with respect to each parameter.
    pub on_transitions_gradient: Vec<Vec<BigRational>>,
    /// Variance of each transition's cost: nonzero only where repeated `(from, to)` pairs with
    /// different costs were merged (the cost is then random given the transition).
    pub on_transitions_spread: Vec<BigRational>,
    /// Gradient of that variance with respect to each parameter.
    pub on_transitions_spread_gradient: Vec<Vec<BigRational>>,
}

impl Chain {
    /// Number of states.
    #[must_use]
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// True when the chain has no states (never the case after validation).
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// The transitions out of `state` as `(target, probability)`.
    pub fn row(&self, state: usize) -> impl Iterator<Item = (usize, &BigRational)> {
        let span = self.row_start[state]..self.row_start[state + 1];
        self.targets[span.clone()]
            .iter()
            .copied()
            .zip(&self.probabilities[span])
    }

    /// The transitions out of `state` as `(target, gradient of the probability)`.
    pub fn row_gradients(&self, state: usize) -> impl Iterator<Item = (usize, &[BigRational])> {
        let span = self.row_start[state]..self.row_start[state + 1];
        self.targets[span.clone()]
            .iter()
            .copied()
            .zip(self.gradients[span].iter().map(Vec::as_slice))
    }

    /// Number of transitions with positive probability (implied self-loops excluded).
    #[must_use]
    pub fn transition_count(&self) -> usize {
        self.targets.len()
    }

    /// Index of each state id.
    #[must_use]
    pub fn index(&self) -> HashMap<&str, usize> {
        self.ids
            .iter()
            .enumerate()
            .map(|(i, id)| (id.as_str(), i))
            .collect()
    }
}

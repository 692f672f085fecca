//! From the wire's `ChainSpec` to a validated [`Chain`], collecting every problem with its JSON
//! pointer rather than stopping at the first.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::hash::BuildHasherDefault;

use num_rational::BigRational;
use num_traits::{One, Signed, Zero};
use oddsmith_client::types::{ChainSpec, Cost, StartSpec, StateSpec, Value};

use super::chain::{Chain, CostDimension};
use super::expr::{parse, Dual};
use super::value::{exact_text, parse_exact};

/// One problem found in a request, located by a JSON pointer (RFC 6901).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Issue {
    /// Where the problem is, e.g. `/chain/transitions/3/probability`.
    pub pointer: String,
    /// What is wrong there.
    pub detail: String,
}

/// Escapes one reference token of a JSON pointer (`~` as `~0`, `/` as `~1`).
#[must_use]
pub fn pointer_token(token: &str) -> String {
    token.replace('~', "~0").replace('/', "~1")
}

/// Collects issues while validating, and evaluates values at the parameters in force.
#[derive(Default)]
struct Issues {
    found: Vec<Issue>,
    /// Parameter names, in order.
    names: Vec<String>,
    /// Their values in force.
    values: Vec<BigRational>,
}

impl Issues {
    fn add(&mut self, pointer: impl Into<String>, detail: impl Into<String>) {
        self.found.push(Issue {
            pointer: pointer.into(),
            detail: detail.into(),
        });
    }

    /// " (with drop = 1/40)" when the chain has parameters: problems that depend on the values
    /// in force say which values those were.
    fn at_values(&self) -> String {
        if self.names.is_empty() {
            return String::new();
        }
        let list: Vec<String> = self
            .names
            .iter()
            .zip(&self.values)
            .map(|(n, v)| format!("{n} = {}", exact_text(v)))
            .collect();
        format!(" (with {})", list.join(", "))
    }

    /// Evaluates a number or an expression, recording an issue (and returning `None`) when it
    /// is neither.
    fn value(&mut self, value: &Value, pointer: impl FnOnce() -> String) -> Option<Dual> {
        let parameters = self.names.len();
        let result = match value {
            Value::Number(n) => parse_exact(n.as_str()).map(|v| Dual::constant(v, parameters)),
            Value::Text(text) => match parse_exact(text) {
                Ok(v) => Ok(Dual::constant(v, parameters)),
                // A numeral that is out of bounds says so; anything else may be an expression.
                Err(detail) if looks_numeric(text) && !detail.contains("is not a number") => {
                    Err(detail)
                }
                Err(_) => parse(text, &self.names)
                    .and_then(|e| e.evaluate(&self.values))
                    .map_err(|e| {
                        if e.column == 0 {
                            format!("{}{}", e.message, self.at_values())
                        } else {
                            e.to_string()
                        }
                    }),
            },
        };
        match result {
            Ok(dual) => Some(dual),
            Err(detail) => {
                self.add(pointer(), detail);
                None
            }
        }
    }

    /// Evaluates a probability in [0, 1]. The pointer is written only when there is a problem:
    /// big tables have millions of values.
    fn probability(&mut self, value: &Value, pointer: impl Fn() -> String) -> Option<Dual> {
        let p = self.value(value, &pointer)?;
        if p.value.is_negative() || p.value.numer() > p.value.denom() {
            let detail = format!(
                "a probability must lie in [0, 1]; got {}{}",
                exact_text(&p.value),
                self.at_values()
            );
            self.add(pointer(), detail);
            return None;
        }
        Some(p)
    }

    /// Evaluates a cost map, recording issues; only valid amounts are returned.
    fn costs(&mut self, cost: Option<&Cost>, pointer: &str) -> BTreeMap<String, Dual> {
        let mut amounts = BTreeMap::new();
        for (dimension, amount) in cost.into_iter().flatten() {
            let at = format!("{pointer}/cost/{}", pointer_token(dimension));
            if dimension.trim().is_empty() {
                self.add(at.clone(), "a cost dimension needs a non-empty name");
            }
            if let Some(value) = self.value(amount, || at) {
                amounts.insert(dimension.clone(), value);
            }
        }
        amounts
    }

    /// Reads the chain's parameters and the request's overrides.
    fn parameters(
        &mut self,
        declared: &BTreeMap<String, Value>,
        overrides: &BTreeMap<String, Value>,
    ) {
        for (name, value) in declared {
            let at = format!("/chain/parameters/{}", pointer_token(name));
            let mut chars = name.chars();
            let identifier = chars.next().is_some_and(|c| c.is_alphabetic() || c == '_')
                && chars.all(|c| c.is_alphanumeric() || c == '_');
            if !identifier {
                self.add(
                    at.clone(),
                    format!("'{name}' is not a parameter name: use letters, digits and _, not starting with a digit"),
                );
            }
            let number = constant(&value.text()).unwrap_or_else(|detail| {
                self.add(
                    at,
                    format!("a parameter's default must be a number: {detail}"),
                );
                BigRational::zero()
            });
            self.names.push(name.clone());
            self.values.push(number);
        }
        for (name, value) in overrides {
            let at = format!("/parameters/{}", pointer_token(name));
            match self.names.iter().position(|n| n == name) {
                None if self.names.is_empty() => {
                    self.add(
                        at,
                        format!("unknown parameter '{name}': the chain declares no `parameters`"),
                    );
                }
                None => {
                    let known = self.names.join(", ");
                    self.add(
                        at,
                        format!("unknown parameter '{name}'; the chain declares {known}"),
                    );
                }
                Some(i) => match constant(&value.text()) {
                    Ok(number) => self.values[i] = number,
                    Err(detail) => self.add(at, detail),
                },
            }
        }
    }
}

/// Text made only of what numerals are made of (digits, sign, point, exponent, `/`, `%`).
fn looks_numeric(text: &str) -> bool {
    text.chars()
        .all(|c| c.is_ascii_digit() || " +-.eE/%".contains(c))
}

/// A parameter's value: a number, or an expression of numbers alone such as `"1/4 + 1/8"`.
fn constant(text: &str) -> Result<BigRational, String> {
    parse_exact(text).or_else(|numeral| {
        if looks_numeric(text) && !numeral.contains("is not a number") {
            return Err(numeral);
        }
        parse(text, &[])
            .and_then(|e| e.evaluate(&[]))
            .map(|d| d.value)
            .map_err(|e| format!("'{text}' is not a number ({e})"))
    })
}

#[derive(Clone, Copy, PartialEq, Eq)]
enum RowKind {
    Probability,
    Weight,
}

impl RowKind {
    fn name(self) -> &'static str {
        match self {
            RowKind::Probability => "probabilities",
            RowKind::Weight => "weights",
        }
    }
}

/// FNV-1a: state ids are short strings from the request, looked up twice per transition, and the
/// standard hasher's resistance to chosen collisions costs more than it protects here (a
/// collision-heavy request is still bounded by the body limit and the budget).
#[derive(Default)]
struct IdHasher(u64);

impl std::hash::Hasher for IdHasher {
    fn finish(&self) -> u64 {
        self.0
    }

    fn write(&mut self, bytes: &[u8]) {
        let mut hash = if self.0 == 0 {
            0xcbf2_9ce4_8422_2325
        } else {
            self.0
        };
        for &b in bytes {
            hash = (hash ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3);
        }
        self.0 = hash;
    }
}

/// Everything said about the transitions out of one state.
#[derive(Default)]
struct Row {
    kind: Option<(RowKind, usize)>,
    /// Some value in the row was invalid (already reported): skip the row's own checks.
    broken: bool,
    /// Target -> (summed value, indices of the transitions that gave it).
    targets: BTreeMap<usize, (Dual, Vec<usize>)>,
    /// Target -> cost dimension -> Σ value × cost over the transitions to that target (repeated
    /// pairs with different costs average them, weighted by their probabilities).
    /// (Σ value × cost, Σ value × cost²) per target and dimension.
    weighted_costs: BTreeMap<usize, BTreeMap<String, (Dual, Dual)>>,
}

/// One transition, from the `transitions` list or a row of the `table`, with its location.
struct TransitionInput<'a> {
    from: &'a str,
    to: &'a str,
    probability: Option<&'a Value>,
    weight: Option<&'a Value>,
    cost: Option<&'a Cost>,
    /// Index of the `transitions` entry, or of the table row.
    index: usize,
    /// Whether it is a table row.
    in_table: bool,
}

impl TransitionInput<'_> {
    /// Pointer to the transition (a `transitions` entry, or the table's `from` cell); written
    /// only when there is something to report, since big tables have millions of rows.
    fn at(&self) -> String {
        if self.in_table {
            format!("/chain/table/from/{}", self.index)
        } else {
            format!("/chain/transitions/{}", self.index)
        }
    }

    /// Pointer to the transition's value of this kind (`probability` or `weight`).
    fn value_at(&self, kind: &str) -> String {
        if self.in_table {
            format!("/chain/table/{kind}/{}", self.index)
        } else {
            format!("/chain/transitions/{}/{kind}", self.index)
        }
    }
}

/// The transitions of either form, checking the table's shape and indices.
fn transition_inputs<'a>(spec: &'a ChainSpec, issues: &mut Issues) -> Vec<TransitionInput<'a>> {
    let Some(table) = &spec.table else {
        return spec
            .transitions
            .iter()
            .enumerate()
            .map(|(k, t)| TransitionInput {
                from: &t.from,
                to: &t.to,
                probability: t.probability.as_ref(),
                weight: t.weight.as_ref(),
                cost: t.cost.as_ref(),
                index: k,
                in_table: false,
            })
            .collect();
    };
    if !spec.transitions.is_empty() {
        issues.add(
            "/chain/table",
            "give either `transitions` or `table`, not both",
        );
        return Vec::new();
    }
    let rows = table.from.len();
    let values = match (&table.probability, &table.weight) {
        (Some(p), None) => p.len(),
        (None, Some(w)) => w.len(),
        _ => {
            issues.add(
                "/chain/table",
                "give exactly one of `probability` or `weight` columns",
            );
            return Vec::new();
        }
    };
    if table.to.len() != rows || values != rows {
        issues.add(
            "/chain/table",
            format!(
                "the columns must have one entry per row: `from` has {rows}, `to` has {}, the \
                 values have {values}",
                table.to.len()
            ),
        );
        return Vec::new();
    }
    let ids: Vec<&str> = spec
        .states
        .iter()
        .map(|s| match s {
            StateSpec::Id(id) => id.as_str(),
            StateSpec::Detailed(d) => d.id.as_str(),
        })
        .collect();
    let mut inputs = Vec::with_capacity(rows);
    for k in 0..rows {
        let mut state = |column: &str, index: usize| match ids.get(index) {
            Some(id) => Some(*id),
            None => {
                issues.add(
                    format!("/chain/table/{column}/{k}"),
                    format!(
                        "state index {index} is out of range: `states` has {}",
                        ids.len()
                    ),
                );
                None
            }
        };
        let (Some(from), Some(to)) = (state("from", table.from[k]), state("to", table.to[k]))
        else {
            continue;
        };
        inputs.push(TransitionInput {
            from,
            to,
            probability: table.probability.as_ref().map(|p| &p[k]),
            weight: table.weight.as_ref().map(|w| &w[k]),
            cost: None,
            index: k,
            in_table: true,
        });
    }
    inputs
}

/// Validates a chain description at its parameters' values, with `overrides` (the request's
/// `parameters`) replacing the chain's defaults.
///
/// # Errors
/// Every problem found, each with a JSON pointer below `/chain` (or `/parameters`).
pub fn validate(
    spec: &ChainSpec,
    overrides: &BTreeMap<String, Value>,
) -> Result<Chain, Vec<Issue>> {
    let mut issues = Issues::default();
    issues.parameters(&spec.parameters, overrides);
    let parameter_count = issues.names.len();
    let mut ids: Vec<String> = Vec::new();
    let mut index: HashMap<String, usize, BuildHasherDefault<IdHasher>> = HashMap::default();
    // Looked up by `&str` first: allocating a key per transition costs more than the lookup.
    let mut intern = |id: &str, ids: &mut Vec<String>| -> usize {
        if let Some(&i) = index.get(id) {
            return i;
        }
        ids.push(id.to_owned());
        index.insert(id.to_owned(), ids.len() - 1);
        ids.len() - 1
    };

    // Declared states, in order.
    let mut state_costs: Vec<(usize, String, Dual)> = Vec::new();
    let mut declared_absorbing: HashMap<usize, usize> = HashMap::new();
    let mut declared_at: HashMap<usize, usize> = HashMap::new();
    for (k, state) in spec.states.iter().enumerate() {
        let at = format!("/chain/states/{k}");
        let (id, absorbing, cost) = match state {
            StateSpec::Id(id) => (id, None, None),
            StateSpec::Detailed(d) => (&d.id, d.absorbing, d.cost.as_ref()),
        };
        if id.is_empty() {
            issues.add(at.clone(), "a state id must not be empty");
            continue;
        }
        let i = intern(id, &mut ids);
        if let Some(first) = declared_at.insert(i, k) {
            issues.add(
                at.clone(),
                format!("state '{id}' is already declared at /chain/states/{first}"),
            );
        }
        if absorbing == Some(true) {
            declared_absorbing.insert(i, k);
        }
        let amounts = issues.costs(cost, &at);
        for (dimension, amount) in amounts {
            state_costs.push((i, dimension, amount));
        }
    }

    // Transitions, grouped by source state.
    let mut rows: Vec<Option<Row>> = Vec::new();
    let inputs = transition_inputs(spec, &mut issues);
    for (k, t) in inputs.iter().enumerate() {
        for (field, id) in [("from", t.from), ("to", t.to)] {
            if id.is_empty() {
                issues.add(
                    format!("{}/{field}", t.at()),
                    "a state id must not be empty",
                );
            }
        }
        let transition_cost = match t.cost {
            Some(cost) => issues.costs(Some(cost), &t.at()),
            None => BTreeMap::new(),
        };
        if t.from.is_empty() || t.to.is_empty() {
            continue;
        }
        let from = intern(t.from, &mut ids);
        let to = intern(t.to, &mut ids);
        let (kind, value) = match (t.probability, t.weight) {
            (Some(p), None) => (
                RowKind::Probability,
                issues.probability(p, || t.value_at("probability")),
            ),
            (None, Some(w)) => {
                let weight = issues.value(w, || t.value_at("weight"));
                let weight = weight.filter(|w| {
                    let ok = !w.value.is_negative();
                    if !ok {
                        let detail = format!(
                            "a weight must not be negative; got {}{}",
                            exact_text(&w.value),
                            issues.at_values()
                        );
                        issues.add(t.value_at("weight"), detail);
                    }
                    ok
                });
                (RowKind::Weight, weight)
            }
            _ => {
                issues.add(t.at(), "give exactly one of `probability` or `weight`");
                continue;
            }
        };
        if rows.len() <= from {
            rows.resize_with(from + 1, || None);
        }
        let row = rows[from].get_or_insert_with(Row::default);
        match row.kind {
            None => row.kind = Some((kind, k)),
            Some((first, first_at)) if first != kind => {
                issues.add(
                    t.at(),
                    format!(
                        "transitions out of '{}' mix {} (first at {}) \
                         and {}; use one kind per state",
                        t.from,
                        first.name(),
                        inputs[first_at].at(),
                        kind.name()
                    ),
                );
                row.broken = true;
                continue;
            }
            Some(_) => {}
        }
        let Some(value) = value else {
            row.broken = true;
            continue;
        };
        {
            match row.targets.entry(to) {
                std::collections::btree_map::Entry::Vacant(place) => {
                    place.insert((value.clone(), vec![k]));
                }
                std::collections::btree_map::Entry::Occupied(mut place) => {
                    let entry = place.get_mut();
                    entry.0.add_assign(&value);
                    entry.1.push(k);
                }
            }
            let costs = row.weighted_costs.entry(to).or_default();
            for (dimension, amount) in transition_cost {
                let zero = || Dual::constant(BigRational::zero(), parameter_count);
                let (sum, squares) = costs.entry(dimension).or_insert_with(|| (zero(), zero()));
                let weighted = value.mul(&amount);
                squares.add_assign(&weighted.mul(&amount));
                sum.add_assign(&weighted);
            }
        }
    }

    let n = ids.len();
    if n == 0 {
        issues.add(
            "/chain",
            "the chain has no states: give at least one transition",
        );
    }

    // Per-state checks, building the sparse rows.
    let mut warnings = Vec::new();
    let mut absorbing = vec![false; n];
    let mut row_start = Vec::with_capacity(n + 1);
    let mut targets = Vec::new();
    let mut probabilities = Vec::new();
    let mut gradients = Vec::new();
    // Per transition and dimension: (mean cost, variance of the cost) over merged pairs.
    let mut weighted_costs: Vec<BTreeMap<String, (Dual, Dual)>> = Vec::new();
    for (state, id) in ids.iter().enumerate() {
        row_start.push(targets.len());
        let Some(row) = rows.get_mut(state).and_then(Option::take) else {
            absorbing[state] = true;
            continue;
        };
        let (kind, first_at) = row
            .kind
            .expect("a row exists only once a transition set its kind");
        if row.broken {
            continue;
        }
        for (target, (_, sources)) in &row.targets {
            if sources.len() > 1 {
                let list: Vec<String> = sources.iter().map(|s| s.to_string()).collect();
                warnings.push(format!(
                    "transitions {} all go from '{id}' to '{}'; their {} were summed",
                    list.join(", "),
                    ids[*target],
                    kind.name()
                ));
            }
        }
        let mut total = Dual::constant(BigRational::zero(), parameter_count);
        for (value, _) in row.targets.values() {
            total.add_assign(value);
        }
        let row_at = inputs[first_at].at();
        let sources = || {
            let mut all: Vec<usize> = row.targets.values().flat_map(|(_, s)| s.clone()).collect();
            all.sort_unstable();
            all.iter()
                .map(|s| s.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        };
        match kind {
            RowKind::Probability if !total.value.is_one() => {
                let detail = format!(
                    "probabilities out of '{id}' sum to {} (≈ {}), not 1 (transitions {}){}; \
                     write repeating decimals as fractions such as \"1/3\", or use weights",
                    exact_text(&total.value),
                    super::value::to_f64(&total.value),
                    sources(),
                    issues.at_values()
                );
                issues.add(row_at, detail);
                continue;
            }
            RowKind::Weight if total.value.is_zero() => {
                let detail = format!(
                    "weights out of '{id}' sum to 0 (transitions {}){}; at least one must be \
                     positive",
                    sources(),
                    issues.at_values()
                );
                issues.add(row_at, detail);
                continue;
            }
            RowKind::Probability if total.gradient.iter().any(|g| !g.is_zero()) => {
                warnings.push(format!(
                    "probabilities out of '{id}' sum to 1 at these parameter values but not \
                     nearby (transitions {}); sensitivities assume the row stays a distribution, \
                     so write the last probability as 1 minus the others",
                    sources()
                ));
            }
            _ => {}
        }
        let leaves = row
            .targets
            .iter()
            .any(|(&target, (v, _))| target != state && !v.value.is_zero());
        if !leaves {
            // Only a self-loop (possibly beside zero-probability edges): absorbing by rule.
            absorbing[state] = true;
            continue;
        }
        if let Some(k) = declared_absorbing.get(&state) {
            issues.add(
                format!("/chain/states/{k}/absorbing"),
                format!(
                    "'{id}' is declared absorbing but has transitions to other states \
                     (transitions {})",
                    sources()
                ),
            );
        }
        let vanishing: Vec<String> = row
            .targets
            .iter()
            .filter(|(_, (v, _))| v.value.is_zero() && v.gradient.iter().any(|g| !g.is_zero()))
            .map(|(&target, _)| format!("'{}'", ids[target]))
            .collect();
        if !vanishing.is_empty() {
            warnings.push(format!(
                "from '{id}', the transitions to {} have probability 0 at these parameter values \
                 but change with them; sensitivities treat them as absent, so derivatives here \
                 are one-sided",
                vanishing.join(", ")
            ));
        }
        let mut row_costs = row.weighted_costs;
        for (target, (value, _)) in row.targets {
            if !value.value.is_zero() {
                // A probability row that sums to exactly 1 needs no division.
                let probability =
                    if total.value.is_one() && total.gradient.iter().all(Zero::is_zero) {
                        value.clone()
                    } else {
                        value.ratio(&total)
                    };
                let costs = row_costs.remove(&target).unwrap_or_default();
                weighted_costs.push(
                    costs
                        .into_iter()
                        .map(|(dimension, (sum, squares))| {
                            let mean = sum.ratio(&value);
                            let square = squares.ratio(&value);
                            let mut spread = mean.mul(&mean);
                            spread.value = -spread.value;
                            spread.gradient.iter_mut().for_each(|g| *g = -g.clone());
                            spread.add_assign(&square);
                            (dimension, (mean, spread))
                        })
                        .collect(),
                );
                targets.push(target);
                probabilities.push(probability.value);
                gradients.push(probability.gradient);
            }
        }
    }
    row_start.push(targets.len());

    let (start, start_gradients) = validate_start(&spec.start, &ids, &mut issues)
        .into_iter()
        .map(|(state, p)| ((state, p.value), p.gradient))
        .unzip();

    // Costs by dimension, dense over states and transitions.
    let dimensions: BTreeSet<String> = state_costs
        .iter()
        .map(|(_, d, _)| d.clone())
        .chain(weighted_costs.iter().flat_map(|c| c.keys().cloned()))
        .collect();
    let zero = Dual::constant(BigRational::zero(), parameter_count);
    let costs = dimensions
        .into_iter()
        .map(|dimension| {
            let mut on_states = vec![zero.clone(); n];
            for (state, d, amount) in &state_costs {
                if *d == dimension {
                    on_states[*state] = amount.clone();
                }
            }
            let (on_transitions, spread): (Vec<Dual>, Vec<Dual>) = weighted_costs
                .iter()
                .map(|c| {
                    c.get(&dimension)
                        .cloned()
                        .unwrap_or_else(|| (zero.clone(), zero.clone()))
                })
                .unzip();
            let split = |duals: Vec<Dual>| -> (Vec<BigRational>, Vec<Vec<BigRational>>) {
                duals.into_iter().map(|d| (d.value, d.gradient)).unzip()
            };
            let (on_states, on_states_gradient) = split(on_states);
            let (on_transitions, on_transitions_gradient) = split(on_transitions);
            let (on_transitions_spread, on_transitions_spread_gradient) = split(spread);
            CostDimension {
                name: dimension,
                on_states,
                on_states_gradient,
                on_transitions,
                on_transitions_gradient,
                on_transitions_spread,
                on_transitions_spread_gradient,
            }
        })
        .collect();

    if issues.found.is_empty() {
        Ok(Chain {
            costs,
            ids,
            absorbing,
            row_start,
            targets,
            probabilities,
            gradients,
            start,
            start_gradients,
            parameters: issues.names.into_iter().zip(issues.values).collect(),
            warnings,
        })
    } else {
        Err(issues.found)
    }
}

fn validate_start(start: &StartSpec, ids: &[String], issues: &mut Issues) -> Vec<(usize, Dual)> {
    let find = |id: &str| ids.iter().position(|known| known == id);
    let unknown = |id: &str| {
        format!("unknown state '{id}': a start state must be declared or appear in a transition")
    };
    let parameter_count = issues.names.len();
    match start {
        StartSpec::State(id) => match find(id) {
            Some(i) => vec![(i, Dual::constant(BigRational::one(), parameter_count))],
            None => {
                issues.add("/chain/start", unknown(id));
                Vec::new()
            }
        },
        StartSpec::Distribution(weights) => {
            if weights.is_empty() {
                issues.add(
                    "/chain/start",
                    "a start distribution needs at least one state",
                );
                return Vec::new();
            }
            let mut total = Dual::constant(BigRational::zero(), parameter_count);
            let mut distribution = Vec::new();
            let before = issues.found.len();
            for (id, value) in weights {
                let at = format!("/chain/start/{}", pointer_token(id));
                let p = issues.probability(value, || at.clone());
                match find(id) {
                    None => issues.add(at, unknown(id)),
                    Some(i) => {
                        if let Some(p) = p {
                            total.add_assign(&p);
                            if !p.value.is_zero() {
                                distribution.push((i, p));
                            }
                        }
                    }
                }
            }
            if !total.value.is_one() && issues.found.len() == before {
                let detail = format!(
                    "start probabilities sum to {}, not 1{}",
                    exact_text(&total.value),
                    issues.at_values()
                );
                issues.add("/chain/start", detail);
            }
            distribution.sort_by_key(|(i, _)| *i);
            distribution
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn check(chain: serde_json::Value) -> Result<Chain, Vec<Issue>> {
        validate(&serde_json::from_value(chain).unwrap(), &BTreeMap::new())
    }

    fn pointers(issues: &[Issue]) -> Vec<&str> {
        issues.iter().map(|i| i.pointer.as_str()).collect()
    }

    #[test]
    fn infers_states_and_absorbing_ones() {
        let chain = check(json!({
            "states": ["chest", {"id": "vault", "absorbing": true}],
            "transitions": [
                {"from": "chest", "to": "sword", "probability": "1/40"},
                {"from": "chest", "to": "chest", "probability": "39/40"},
                {"from": "sword", "to": "sword", "probability": 1}
            ],
            "start": "chest"
        }))
        .unwrap();
        assert_eq!(chain.ids, ["chest", "vault", "sword"]);
        assert_eq!(chain.absorbing, [false, true, true]);
        assert_eq!(chain.transition_count(), 2);
    }

    #[test]
    fn normalises_weights_and_sums_repeated_pairs_with_a_warning() {
        let chain = check(json!({
            "transitions": [
                {"from": "a", "to": "b", "weight": 1},
                {"from": "a", "to": "c", "weight": "2"},
                {"from": "a", "to": "b", "weight": 1}
            ],
            "start": "a"
        }))
        .unwrap();
        let row: Vec<String> = chain.row(0).map(|(_, p)| exact_text(p)).collect();
        assert_eq!(row, ["1/2", "1/2"]);
        assert_eq!(chain.warnings.len(), 1);
        assert!(chain.warnings[0].contains("transitions 0, 2"));
    }

    #[test]
    fn collects_every_problem_with_its_pointer() {
        let issues = check(json!({
            "states": [{"id": "done", "absorbing": true}, "done"],
            "transitions": [
                {"from": "a", "to": "b", "probability": "0.3"},
                {"from": "a", "to": "c", "probability": "0.3"},
                {"from": "b", "to": "c", "probability": "1.5"},
                {"from": "c", "to": "a", "weight": -1},
                {"from": "c", "to": "b", "probability": "1"},
                {"from": "done", "to": "a", "probability": "1"},
                {"from": "x", "to": "y"}
            ],
            "start": "nowhere"
        }))
        .unwrap_err();
        assert_eq!(
            pointers(&issues),
            [
                "/chain/states/1",
                "/chain/transitions/2/probability",
                "/chain/transitions/3/weight",
                "/chain/transitions/4",
                "/chain/transitions/6",
                "/chain/states/0/absorbing",
                "/chain/transitions/0",
                "/chain/start",
            ]
        );
        assert!(issues[6].detail.contains("sum to 3/5"));
    }

    #[test]
    fn checks_start_distributions() {
        let issues = check(json!({
            "transitions": [{"from": "a/b", "to": "c", "probability": 1}],
            "start": {"a/b": "1/2", "c": "1/3", "z": "1/6"}
        }))
        .unwrap_err();
        assert_eq!(pointers(&issues), ["/chain/start/z"]);
        let issues = check(json!({
            "transitions": [{"from": "a", "to": "c", "probability": 1}],
            "start": {"a": "1/2", "c": "1/3"}
        }))
        .unwrap_err();
        assert!(issues[0].detail.contains("5/6"));
    }
}

//! The wire contract: every request and response body of the service, defined once and used by
//! both the service (which deserialises requests and serialises responses) and the client.
//!
//! Request types reject unknown fields, so a typo is an error rather than a silently ignored
//! option. Response types accept unknown fields, so an older client keeps working against a newer
//! service.

use std::collections::BTreeMap;

use serde::{Deserialize, Deserializer, Serialize};

#[cfg(feature = "schema")]
use utoipa::ToSchema;

/// A number as the client wrote it: a JSON number (kept as its exact decimal text) or a string
/// such as `"3"`, `"0.125"`, `"2.5e-3"`, `"1/6"` or `"0.6%"`.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[cfg_attr(
    feature = "schema",
    schema(
        description = "An exact number: a JSON number (read from its decimal text, so 0.1 is 1/10) \
                       or a string holding an integer, decimal, scientific number, fraction or \
                       percentage: \"3\", \"0.125\", \"2.5e-3\", \"1/6\", \"0.6%\".",
        example = json!("1/40")
    )
)]
#[serde(untagged)]
pub enum Value {
    /// A JSON number, kept as the text it was written with.
    #[cfg_attr(feature = "schema", schema(value_type = f64))]
    Number(serde_json::Number),
    /// A number written as a string.
    Text(String),
}

impl Value {
    /// The text of the value exactly as it was written (without JSON quotes).
    #[must_use]
    pub fn text(&self) -> String {
        match self {
            Value::Number(n) => n.to_string(),
            Value::Text(s) => s.clone(),
        }
    }
}

impl From<&str> for Value {
    fn from(s: &str) -> Self {
        Value::Text(s.to_owned())
    }
}

impl From<String> for Value {
    fn from(s: String) -> Self {
        Value::Text(s)
    }
}

impl From<i64> for Value {
    fn from(n: i64) -> Self {
        Value::Number(n.into())
    }
}

impl<'de> Deserialize<'de> for Value {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        // Going through serde_json::Value keeps a JSON number's decimal text (the workspace
        // enables serde_json's `arbitrary_precision`), which serde's untagged enums would lose.
        match serde_json::Value::deserialize(deserializer)? {
            serde_json::Value::Number(n) => Ok(Value::Number(n)),
            serde_json::Value::String(s) => Ok(Value::Text(s)),
            other => Err(serde::de::Error::custom(format!(
                "expected a number or a string holding a number, found {}",
                json_kind(&other)
            ))),
        }
    }
}

fn json_kind(value: &serde_json::Value) -> &'static str {
    match value {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
    }
}

/// Named cost dimensions and their amounts, e.g. `{"gold": 160, "ms": "250"}`.
pub type Cost = BTreeMap<String, Value>;

/// Which arithmetic to solve in.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(rename_all = "lowercase")]
pub enum Arithmetic {
    /// Exact when the chain is small enough to finish well inside the budget, float otherwise.
    #[default]
    Auto,
    /// Exact rational arithmetic: answers such as `1/3`.
    Exact,
    /// Double-precision floating point, with the residual reported.
    Float,
}

/// The arithmetic a solve actually used.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(rename_all = "lowercase")]
pub enum UsedArithmetic {
    /// Exact rational arithmetic; every number carries its `exact` form.
    Exact,
    /// Double-precision floating point.
    Float,
}

/// A metric family to report.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(rename_all = "lowercase")]
pub enum Report {
    /// Probability of ending in each absorbing state, and of never being absorbed.
    Absorption,
    /// Mean and variance of the number of steps, and the mean given each outcome.
    Steps,
    /// Expected visits to each transient state (the start counts as a visit).
    Visits,
    /// Derivatives and elasticities of every other reported metric with respect to each
    /// parameter.
    Sensitivity,
    /// The distribution of the time to absorption: P(absorbed within n steps) for n up to
    /// `horizon`, overall and per outcome, and the `quantiles` asked for.
    Distribution,
    /// Expected accumulated cost per cost dimension, its variance and its mean given each outcome.
    Costs,
}

/// A state, declared by id alone or with details.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(untagged)]
pub enum StateSpec {
    /// Just the id.
    Id(String),
    /// The id with details.
    Detailed(StateDetail),
}

/// A declared state with details.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct StateDetail {
    /// The state's id.
    pub id: String,
    /// Declares the state absorbing (it must then have no transitions to other states).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub absorbing: Option<bool>,
    /// Cost paid on every visit to the state, the start included.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cost: Option<Cost>,
}

/// One transition; exactly one of `probability` and `weight` must be given.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct TransitionSpec {
    /// Source state id.
    pub from: String,
    /// Target state id.
    pub to: String,
    /// Probability of taking this transition from `from`; the probabilities out of one state must
    /// sum to exactly 1.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub probability: Option<Value>,
    /// Non-negative weight, normalised over the transitions out of `from`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub weight: Option<Value>,
    /// Cost paid each time the transition is taken.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cost: Option<Cost>,
}

/// Transitions column-wise: row `k` goes from `states[from[k]]` to `states[to[k]]` with
/// `probability[k]` (or `weight[k]`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct TransitionTable {
    /// Source state of each row, as an index into `states`.
    pub from: Vec<usize>,
    /// Target state of each row, as an index into `states`.
    pub to: Vec<usize>,
    /// Probability of each row (give this or `weight`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub probability: Option<Vec<Value>>,
    /// Weight of each row, normalised per source state (give this or `probability`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub weight: Option<Vec<Value>>,
}

/// Where the walk starts: one state, or a distribution over states summing to 1.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(untagged)]
pub enum StartSpec {
    /// Start in this state.
    State(String),
    /// Start in each state with the given probability.
    Distribution(BTreeMap<String, Value>),
}

/// An absorbing Markov chain as the client writes it.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct ChainSpec {
    /// Optional declarations; states are also declared by appearing in a transition.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub states: Vec<StateSpec>,
    /// The transitions. A state with none, or with only a self-loop, is absorbing. Give either
    /// these or `table`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub transitions: Vec<TransitionSpec>,
    /// The transitions column-wise, for big models: indices into `states`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub table: Option<TransitionTable>,
    /// Where the walk starts.
    pub start: StartSpec,
    /// Named parameters with their default values; any probability, weight, cost or start value
    /// may then be an expression over them, e.g. `"1 - drop"`.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub parameters: BTreeMap<String, Value>,
}

fn default_report() -> Vec<Report> {
    vec![Report::Absorption, Report::Steps]
}

/// Body of `POST /v1/solve`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct SolveRequest {
    /// The chain to solve.
    pub chain: ChainSpec,
    /// Arithmetic to use (default `auto`).
    #[serde(default)]
    pub arithmetic: Arithmetic,
    /// Metric families to report (default `["absorption", "steps"]`).
    #[serde(default = "default_report")]
    pub report: Vec<Report>,
    /// Also report every metric from each transient state (default false).
    #[serde(default)]
    pub by_state: bool,
    /// Parameter values overriding the chain's defaults.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub parameters: BTreeMap<String, Value>,
    /// Last step of the reported distribution (default: from the expected steps, mean + 6
    /// standard deviations, at least 10).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub horizon: Option<u64>,
    /// Probabilities q for which the smallest n with P(absorbed within n) >= q is reported, e.g.
    /// `["0.5", "0.9", "0.99"]` (with `distribution`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub quantiles: Vec<Value>,
    /// Solve once per parameter value (or grid point) instead; the answer is then a
    /// [`SweepResponse`].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sweep: Option<Sweep>,
}

impl SolveRequest {
    /// A request with the defaults: `auto` arithmetic, absorption and steps, start only.
    #[must_use]
    pub fn new(chain: ChainSpec) -> Self {
        SolveRequest {
            chain,
            arithmetic: Arithmetic::Auto,
            report: default_report(),
            by_state: false,
            parameters: BTreeMap::new(),
            horizon: None,
            quantiles: Vec::new(),
            sweep: None,
        }
    }
}

/// A computed number: always a float `value`, plus the `exact` rational when the run was exact.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct Number {
    /// The value as a double (rounded when the exact value is not representable).
    pub value: f64,
    /// The exact value as `"n/d"` or `"n"`, present only when exact arithmetic was used.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub exact: Option<String>,
}

/// Schema of a map from ids to numbers that may be `null`.
#[cfg(feature = "schema")]
fn nullable_number_map() -> utoipa::openapi::schema::Object {
    use utoipa::openapi::schema::{ObjectBuilder, OneOfBuilder, Type};
    use utoipa::openapi::{Ref, RefOr, Schema};
    let value = OneOfBuilder::new()
        .item(Ref::from_schema_name("Number"))
        .item(ObjectBuilder::new().schema_type(Type::Null))
        .build();
    ObjectBuilder::new()
        .schema_type(Type::Object)
        .additional_properties(Some(RefOr::T(Schema::OneOf(value))))
        .build()
}

/// Step statistics; a mean or variance is `null` where it is infinite (the walk can be trapped).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct Steps {
    /// Expected number of steps to absorption; `null` when the walk can be trapped.
    pub mean: Option<Number>,
    /// Variance of the number of steps; `null` when the walk can be trapped.
    pub variance: Option<Number>,
    /// Expected steps given that the walk ends in each absorbing state; `null` for an outcome
    /// that cannot happen.
    #[cfg_attr(feature = "schema", schema(schema_with = nullable_number_map))]
    pub mean_given: BTreeMap<String, Option<Number>>,
}

/// Metrics from one starting point (the request's start, or one state under `by_state`).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct Metrics {
    /// Probability of ending in each absorbing state (every absorbing state listed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub absorption: Option<BTreeMap<String, Number>>,
    /// Probability of never reaching an absorbing state.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub never_absorbed: Option<Number>,
    /// Step statistics.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub steps: Option<Steps>,
    /// Expected visits to each transient state, the start counting as one; `null` where infinite.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    #[cfg_attr(feature = "schema", schema(schema_with = nullable_number_map))]
    pub visits: Option<BTreeMap<String, Option<Number>>>,
    /// The distribution of the time to absorption.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub distribution: Option<Distribution>,
    /// Accumulated costs, per cost dimension.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub costs: Option<BTreeMap<String, CostReport>>,
    /// For each parameter, the derivatives of the other reported metrics.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sensitivity: Option<BTreeMap<String, Sensitivity>>,
}

/// The distribution of the number of steps to absorption.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct Distribution {
    /// The last step reported.
    pub horizon: u64,
    /// `cdf[n]` = P(absorbed within n steps), n = 0..=horizon.
    pub cdf: Vec<Number>,
    /// P(absorbed in each outcome within n steps), n = 0..=horizon.
    pub by_outcome: BTreeMap<String, Vec<Number>>,
    /// For each q asked, the smallest n with P(absorbed within n) >= q; `null` when never reached
    /// (a warning says why).
    pub quantiles: BTreeMap<String, Option<u64>>,
    /// The same for each outcome, conditioned on ending there.
    pub quantiles_by_outcome: BTreeMap<String, BTreeMap<String, Option<u64>>>,
    /// Probability of not being absorbed within `horizon` steps.
    pub remaining: Number,
}

/// Statistics of the cost accumulated up to absorption, in one dimension; `null` where the walk
/// can be trapped (the cost then has no finite expectation in general).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct CostReport {
    /// Expected total cost.
    pub mean: Option<Number>,
    /// Variance of the total cost.
    pub variance: Option<Number>,
    /// Expected total cost given the walk ends in each absorbing state.
    #[cfg_attr(feature = "schema", schema(schema_with = nullable_number_map))]
    pub mean_given: BTreeMap<String, Option<Number>>,
}

/// The derivative of one metric with respect to one parameter.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct Derivative {
    /// `d metric / d parameter`; `null` where the metric is infinite.
    pub derivative: Option<Number>,
    /// Relative change per relative change, `derivative x parameter / metric`; `null` where the
    /// metric is 0 or infinite.
    pub elasticity: Option<Number>,
}

/// Derivatives of the reported metrics with respect to one parameter; each present when its
/// metric is reported.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct Sensitivity {
    /// Of each absorption probability.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub absorption: Option<BTreeMap<String, Derivative>>,
    /// Of the probability of never being absorbed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub never_absorbed: Option<Derivative>,
    /// Of the expected steps.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub steps_mean: Option<Derivative>,
    /// Of the variance of the steps.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub steps_variance: Option<Derivative>,
    /// Of the expected steps given each outcome.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub steps_mean_given: Option<BTreeMap<String, Derivative>>,
    /// Of the expected visits to each transient state.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub visits: Option<BTreeMap<String, Derivative>>,
    /// Of the distribution of the time to absorption, step by step up to the horizon.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub distribution: Option<DistributionSensitivity>,
    /// Of each cost dimension's statistics.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub costs: Option<BTreeMap<String, CostSensitivity>>,
}

/// Derivatives of a distribution's entries.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct DistributionSensitivity {
    /// Of `cdf[n]`.
    pub cdf: Vec<Derivative>,
    /// Of `by_outcome[a][n]`.
    pub by_outcome: BTreeMap<String, Vec<Derivative>>,
    /// Of `remaining`.
    pub remaining: Derivative,
}

/// Derivatives of one cost dimension's statistics.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct CostSensitivity {
    /// Of the expected total cost.
    pub mean: Derivative,
    /// Of its variance.
    pub variance: Derivative,
    /// Of the expected total cost given each outcome.
    pub mean_given: BTreeMap<String, Derivative>,
}

/// One axis of a sweep: a parameter and its values, listed or evenly spaced.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct SweepAxis {
    /// The parameter to vary.
    pub parameter: String,
    /// The values, in order (or give `from`, `to` and `count`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub values: Option<Vec<Value>>,
    /// First value of an evenly spaced range.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub from: Option<Value>,
    /// Last value of an evenly spaced range.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub to: Option<Value>,
    /// Number of evenly spaced values, ends included (at least 2).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub count: Option<u32>,
}

/// A sweep over one parameter, or a grid over two (a list of two axes; the last varies fastest).
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(untagged)]
pub enum Sweep {
    /// One parameter.
    Axis(SweepAxis),
    /// A grid over several parameters.
    Grid(Vec<SweepAxis>),
}

impl Sweep {
    /// The axes, in order.
    #[must_use]
    pub fn axes(&self) -> Vec<&SweepAxis> {
        match self {
            Sweep::Axis(axis) => vec![axis],
            Sweep::Grid(axes) => axes.iter().collect(),
        }
    }
}

impl<'de> Deserialize<'de> for Sweep {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        match serde_json::Value::deserialize(deserializer)? {
            object @ serde_json::Value::Object(_) => serde_json::from_value(object)
                .map(Sweep::Axis)
                .map_err(serde::de::Error::custom),
            array @ serde_json::Value::Array(_) => serde_json::from_value(array)
                .map(Sweep::Grid)
                .map_err(serde::de::Error::custom),
            other => Err(serde::de::Error::custom(format!(
                "expected an axis {{\"parameter\", \"values\" | \"from\", \"to\", \"count\"}} \
                 or a list of axes, found {}",
                json_kind(&other)
            ))),
        }
    }
}

/// One point of a sweep: the parameter values, then the answer there.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct SweepPoint {
    /// The swept parameters' values at this point.
    pub parameters: BTreeMap<String, Number>,
    /// The answer at this point.
    #[serde(flatten)]
    pub answer: SolveResponse,
}

impl<'de> Deserialize<'de> for SweepPoint {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        let mut value = serde_json::Value::deserialize(deserializer)?;
        let parameters = value
            .as_object_mut()
            .and_then(|object| object.remove("parameters"))
            .ok_or_else(|| serde::de::Error::missing_field("parameters"))?;
        Ok(SweepPoint {
            parameters: serde_json::from_value(parameters).map_err(serde::de::Error::custom)?,
            answer: serde_json::from_value(value).map_err(serde::de::Error::custom)?,
        })
    }
}

/// Body of a successful `POST /v1/solve` with `sweep`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct SweepResponse {
    /// One answer per point, in order.
    pub sweep: Vec<SweepPoint>,
}

/// Which metric to read from an answer (shared by sweeps, tuning and checks).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(rename_all = "snake_case")]
pub enum Metric {
    /// Probability of ending in `outcome`.
    Absorption,
    /// Probability of never being absorbed.
    NeverAbsorbed,
    /// Expected steps (given `given`, when set).
    StepsMean,
    /// Variance of the steps.
    StepsVariance,
    /// Expected visits to `state`.
    Visits,
    /// P(absorbed within `steps` steps), in `outcome` when given.
    Within,
    /// The smallest n with P(absorbed within n) >= `q`.
    StepsQuantile,
    /// Expected total of cost dimension `cost`.
    CostMean,
}

/// A metric of a chain, e.g. `{"metric": "absorption", "outcome": "sword"}`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct MetricSelector {
    /// The metric.
    pub metric: Metric,
    /// The absorbing state, for `absorption`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub outcome: Option<String>,
    /// Condition `steps_mean` on ending in this absorbing state.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub given: Option<String>,
    /// The transient state, for `visits`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub state: Option<String>,
    /// The number of steps, for `within`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub steps: Option<u64>,
    /// The probability, for `steps_quantile`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub q: Option<Value>,
    /// The cost dimension, for `cost_mean`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cost: Option<String>,
    /// Start here instead of the chain's `start`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub from: Option<String>,
}

/// A metric and the value it should reach.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct TuneTarget {
    /// The metric.
    #[serde(flatten)]
    pub selector: MetricSelector,
    /// The value to reach.
    pub equals: Value,
}

impl<'de> Deserialize<'de> for TuneTarget {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        // Read as one JSON value so that the selector can still reject unknown fields (serde's
        // `flatten` cannot) and `equals` keeps its decimal text.
        let mut value = serde_json::Value::deserialize(deserializer)?;
        let equals = value
            .as_object_mut()
            .and_then(|object| object.remove("equals"))
            .ok_or_else(|| serde::de::Error::missing_field("equals"))?;
        Ok(TuneTarget {
            selector: serde_json::from_value(value).map_err(serde::de::Error::custom)?,
            equals: serde_json::from_value(equals).map_err(serde::de::Error::custom)?,
        })
    }
}

/// Body of `POST /v1/tune`: find the parameter value in `range` at which the target metric
/// reaches its value.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(deny_unknown_fields)]
pub struct TuneRequest {
    /// The chain, with the parameter among its `parameters`.
    pub chain: ChainSpec,
    /// The parameter to tune.
    pub parameter: String,
    /// The interval to search, `[low, high]`.
    pub range: [Value; 2],
    /// The metric and the value it should reach.
    pub target: TuneTarget,
    /// Arithmetic of each evaluation (default `auto`).
    #[serde(default)]
    pub arithmetic: Arithmetic,
    /// Values of the other parameters, overriding the chain's defaults.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub parameters: BTreeMap<String, Value>,
}

/// Body of a successful `POST /v1/tune`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct TuneResponse {
    /// The tuned parameter.
    pub parameter: String,
    /// The value found; `exact` only when an exact rational root was verified.
    pub value: Number,
    /// The final bracket around the root.
    pub bracket: [Number; 2],
    /// The metric at `value`.
    pub achieved: Number,
    /// Number of chain evaluations it took.
    pub evaluations: usize,
    /// Things worth knowing, e.g. that the metric is not monotone in the range.
    #[serde(default)]
    pub warnings: Vec<String>,
}

/// How the answer was computed.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct SolverInfo {
    /// The method used, e.g. `"exact sparse elimination"`.
    pub method: String,
    /// Number of transient states in the linear systems solved.
    pub transient_states: usize,
    /// Number of transitions with positive probability.
    pub transitions: usize,
    /// Wall-clock time of the computation in milliseconds.
    pub elapsed_ms: f64,
    /// Largest absolute residual `|(I - Q) x - b|` over the systems solved (0 when exact).
    pub max_residual: f64,
    /// Iterations of the iterative method, or refinement steps of the direct one (0 when exact).
    #[serde(default)]
    pub iterations: usize,
    /// Estimated bound on the relative error of the solution vectors: the residual, with the
    /// rounding of the matrix itself, times `‖N‖∞` (the largest expected number of steps); 0 when
    /// exact. Float answers whose estimate exceeds 1e-6 carry a warning.
    #[serde(default)]
    pub error_estimate: f64,
}

/// Body of a successful `POST /v1/solve`.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct SolveResponse {
    /// The arithmetic used.
    pub arithmetic: UsedArithmetic,
    /// The metrics from the start.
    #[serde(flatten)]
    pub metrics: Metrics,
    /// With `by_state`: the metrics from each transient state.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub by_state: Option<BTreeMap<String, Metrics>>,
    /// Things worth knowing about the chain or the answer (summed duplicates, trapping states).
    #[serde(default)]
    pub warnings: Vec<String>,
    /// How the answer was computed.
    pub solver: SolverInfo,
}

/// One problem inside a request, located by a JSON pointer (RFC 6901).
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct ProblemItem {
    /// Where in the request body the problem is, e.g. `/chain/transitions/3/probability`.
    pub pointer: String,
    /// What is wrong there.
    pub detail: String,
}

/// An RFC 9457 problem document (`application/problem+json`).
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
pub struct Problem {
    /// A URI reference naming the problem type.
    #[serde(rename = "type")]
    pub problem_type: String,
    /// A short summary of the problem type.
    pub title: String,
    /// The HTTP status code.
    pub status: u16,
    /// What went wrong with this request.
    pub detail: String,
    /// Every problem found, each with its location.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub errors: Vec<ProblemItem>,
}

impl<'de> Deserialize<'de> for StateSpec {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        match serde_json::Value::deserialize(deserializer)? {
            serde_json::Value::String(id) => Ok(StateSpec::Id(id)),
            object @ serde_json::Value::Object(_) => serde_json::from_value(object)
                .map(StateSpec::Detailed)
                .map_err(serde::de::Error::custom),
            other => Err(serde::de::Error::custom(format!(
                "expected a state id or an object {{\"id\", \"absorbing\", \"cost\"}}, found {}",
                json_kind(&other)
            ))),
        }
    }
}

impl<'de> Deserialize<'de> for StartSpec {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        match serde_json::Value::deserialize(deserializer)? {
            serde_json::Value::String(id) => Ok(StartSpec::State(id)),
            object @ serde_json::Value::Object(_) => serde_json::from_value(object)
                .map(StartSpec::Distribution)
                .map_err(serde::de::Error::custom),
            other => Err(serde::de::Error::custom(format!(
                "expected a state id or a distribution {{\"state\": probability, ...}}, found {}",
                json_kind(&other)
            ))),
        }
    }
}

impl<'de> Deserialize<'de> for SolveResponse {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        // serde's `flatten` cannot read numbers under serde_json's `arbitrary_precision`, so the
        // top-level fields and the flattened metrics are read from one JSON value separately.
        #[derive(Deserialize)]
        struct Top {
            arithmetic: UsedArithmetic,
            #[serde(default)]
            by_state: Option<BTreeMap<String, Metrics>>,
            #[serde(default)]
            warnings: Vec<String>,
            solver: SolverInfo,
        }
        let value = serde_json::Value::deserialize(deserializer)?;
        let top: Top = serde_json::from_value(value.clone()).map_err(serde::de::Error::custom)?;
        let metrics: Metrics = serde_json::from_value(value).map_err(serde::de::Error::custom)?;
        Ok(SolveResponse {
            arithmetic: top.arithmetic,
            metrics,
            by_state: top.by_state,
            warnings: top.warnings,
            solver: top.solver,
        })
    }
}

/// Body of a successful `POST /v1/solve`: one answer, or one per point with `sweep`.
#[derive(Clone, Debug, PartialEq, Serialize)]
#[cfg_attr(feature = "schema", derive(ToSchema))]
#[serde(untagged)]
pub enum SolveAnswer {
    /// Without `sweep`.
    Single(Box<SolveResponse>),
    /// With `sweep`.
    Sweep(SweepResponse),
}

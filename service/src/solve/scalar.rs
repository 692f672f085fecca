//! The two number systems the solvers run in: exact rationals and doubles, behind one trait so
//! that every algorithm is written once.

use num_rational::BigRational;
use num_traits::{One, Zero};
use oddsmith_client::types::Number;

use super::budget::Budget;
use super::elimination::SparseRow;
use super::engine::{self, LinearSolver};
use super::SolveError;
use crate::model::value::{exact_text, to_f64};

/// A field the solvers can compute in.
pub trait Scalar: Clone + Send + std::fmt::Debug + 'static {
    /// True for exact arithmetic.
    const EXACT: bool;
    /// Additive identity.
    fn zero() -> Self;
    /// Multiplicative identity.
    fn one() -> Self;
    /// Converts an exact input value.
    fn from_rational(value: &BigRational) -> Self;
    /// Exactly zero.
    fn is_zero(&self) -> bool;
    /// `self + other`.
    fn add(&self, other: &Self) -> Self;
    /// `self - other`.
    fn sub(&self, other: &Self) -> Self;
    /// `self * other`.
    fn mul(&self, other: &Self) -> Self;
    /// `self / other`; the caller guarantees `other` is not zero.
    fn div(&self, other: &Self) -> Self;
    /// The nearest double, for residuals and checks.
    fn to_f64(&self) -> f64;
    /// `self >= other`.
    fn at_least(&self, other: &Self) -> bool;
    /// The wire form: a double, plus the exact text for exact arithmetic.
    fn to_number(&self) -> Number;
    /// The engine that solves systems with `A = I - Q` (given by its rows) in this arithmetic.
    ///
    /// # Errors
    /// [`SolveError`] when preparing `A` runs out of time or memory, or breaks down.
    fn engine(
        rows: Vec<SparseRow<Self>>,
        budget: &Budget,
    ) -> Result<Box<dyn LinearSolver<Self>>, SolveError>;
}

impl Scalar for BigRational {
    const EXACT: bool = true;
    fn engine(
        rows: Vec<SparseRow<Self>>,
        budget: &Budget,
    ) -> Result<Box<dyn LinearSolver<Self>>, SolveError> {
        engine::exact(rows, budget)
    }
    fn zero() -> Self {
        Zero::zero()
    }
    fn one() -> Self {
        One::one()
    }
    fn from_rational(value: &BigRational) -> Self {
        value.clone()
    }
    fn is_zero(&self) -> bool {
        Zero::is_zero(self)
    }
    fn add(&self, other: &Self) -> Self {
        self + other
    }
    fn sub(&self, other: &Self) -> Self {
        self - other
    }
    fn mul(&self, other: &Self) -> Self {
        self * other
    }
    fn div(&self, other: &Self) -> Self {
        self / other
    }
    fn to_f64(&self) -> f64 {
        to_f64(self)
    }
    fn at_least(&self, other: &Self) -> bool {
        self >= other
    }
    fn to_number(&self) -> Number {
        Number {
            value: to_f64(self),
            exact: Some(exact_text(self)),
        }
    }
}

impl Scalar for f64 {
    fn engine(
        rows: Vec<SparseRow<Self>>,
        budget: &Budget,
    ) -> Result<Box<dyn LinearSolver<Self>>, SolveError> {
        engine::float(rows, budget)
    }
    const EXACT: bool = false;
    fn zero() -> Self {
        0.0
    }
    fn one() -> Self {
        1.0
    }
    fn from_rational(value: &BigRational) -> Self {
        to_f64(value)
    }
    fn is_zero(&self) -> bool {
        *self == 0.0
    }
    fn add(&self, other: &Self) -> Self {
        self + other
    }
    fn sub(&self, other: &Self) -> Self {
        self - other
    }
    fn mul(&self, other: &Self) -> Self {
        self * other
    }
    fn div(&self, other: &Self) -> Self {
        self / other
    }
    fn to_f64(&self) -> f64 {
        *self
    }
    fn at_least(&self, other: &Self) -> bool {
        self >= other
    }
    fn to_number(&self) -> Number {
        Number {
            value: *self,
            exact: None,
        }
    }
}

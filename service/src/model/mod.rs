//! The chain model: exact numbers, the validated sparse chain, and validation of the wire form.

pub mod chain;
pub mod expr;
pub mod validate;
pub mod value;

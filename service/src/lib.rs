//! Oddsmith: answers about absorbing Markov chains, exactly or in floating point.
//!
//! Layout and data flow, request to answer:
//! - [`model`]: `ChainSpec` (wire) → [`model::validate::validate`] → [`model::chain::Chain`]
//!   (states as indices, exact probabilities in compressed sparse rows), every problem collected
//!   with its JSON pointer;
//! - [`structure`]: strongly connected components → absorbing, transient and trapped states;
//! - [`solve`]: sparse LU of `I - Q` in exact rationals or doubles, under a time [`solve::budget`],
//!   then the reported metrics (absorption, steps, visits) as wire types;
//! - [`sweep`]: whole solve requests, one point or a sweep (in parallel); [`tune`]: goal
//!   seeking over one parameter; [`selector`]: reading one metric from an answer;
//! - [`http`]: the thin actix-web shell (routes, RFC 9457 problems, OpenAPI) — the only module
//!   that knows about HTTP;
//! - [`settings`]: the service's settings (flags and `ODDSMITH_*` variables).
#![deny(missing_docs)]

pub mod http;
pub mod model;
pub mod selector;
pub mod settings;
pub mod solve;
pub mod structure;
pub mod sweep;
pub mod tune;

//! End-to-end tests: each starts the real server on a free port and calls it over real sockets
//! through the client crate.

mod behaviour;
mod errors;
mod helpers;
mod openapi;
mod parameters;
mod published;
mod time_and_cost;

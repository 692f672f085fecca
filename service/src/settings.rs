//! The service's settings: one struct, each field a `--flag` with an `ODDSMITH_*` environment
//! equivalent, so `oddsmith --help` is the settings reference.

use clap::Parser;

/// Settings of the Oddsmith service.
#[derive(Parser, Clone, Debug)]
#[command(
    name = "oddsmith",
    version,
    about = "HTTP service answering questions about absorbing Markov chains: absorption \
             probabilities, expected steps and their spread, expected visits — exactly or in \
             floating point."
)]
pub struct Settings {
    /// Address to listen on (port 0 picks a free port).
    #[arg(long, env = "ODDSMITH_BIND", default_value = "127.0.0.1:8080")]
    pub bind: String,

    /// Time budget of one computation, in milliseconds; past it the request gets 422.
    #[arg(long, env = "ODDSMITH_SOLVE_BUDGET_MS", default_value_t = 10_000)]
    pub solve_budget_ms: u64,

    /// Largest request body accepted, in bytes (after gzip decompression); larger gets 413. The
    /// default admits a chain of 5,000,000 transitions in the columnar `table` form.
    #[arg(long, env = "ODDSMITH_MAX_BODY_BYTES", default_value_t = 512 * 1024 * 1024)]
    pub max_body_bytes: usize,

    /// Working memory one computation may use, in MiB (estimated before each large step:
    /// solution vectors, factors, iteration vectors); over it the request gets 422.
    #[arg(long, env = "ODDSMITH_MAX_REQUEST_MEMORY_MB", default_value_t = 8192)]
    pub max_request_memory_mb: usize,

    /// Largest answer sent, in bytes of JSON; a larger one gets 422 suggesting float
    /// arithmetic or fewer reported states.
    #[arg(long, env = "ODDSMITH_MAX_RESPONSE_BYTES", default_value_t = 256 * 1024 * 1024)]
    pub max_response_bytes: usize,

    /// Computations allowed at once; more get 503 with Retry-After (0: twice the cores).
    #[arg(long, env = "ODDSMITH_MAX_CONCURRENT_SOLVES", default_value_t = 0)]
    pub max_concurrent_solves: usize,

    /// HTTP worker threads (0: one per core).
    #[arg(long, env = "ODDSMITH_WORKERS", default_value_t = 0)]
    pub workers: usize,

    /// Seconds that in-flight requests get to finish after SIGTERM or Ctrl-C.
    #[arg(long, env = "ODDSMITH_SHUTDOWN_TIMEOUT_S", default_value_t = 30)]
    pub shutdown_timeout_s: u64,

    /// Log filter, in tracing's env-filter syntax (e.g. `info`, `oddsmith=debug`).
    #[arg(long, env = "ODDSMITH_LOG", default_value = "info")]
    pub log: String,
}

impl Settings {
    /// The defaults, listening on a free loopback port: what tests start.
    #[must_use]
    pub fn for_tests() -> Self {
        Settings::parse_from(["oddsmith", "--bind", "127.0.0.1:0"])
    }

    /// Computations allowed at once, with 0 resolved to twice the available cores.
    #[must_use]
    pub fn concurrent_solves(&self) -> usize {
        match self.max_concurrent_solves {
            0 => 2 * std::thread::available_parallelism().map_or(1, |n| n.get()),
            n => n,
        }
    }
}

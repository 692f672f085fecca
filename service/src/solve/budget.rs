//! The budget of one computation. Time: solvers call [`Budget::check`] as they go and stop with
//! [`SolveError::BudgetExceeded`] once the deadline has passed. Memory: before allocating
//! anything large, solvers call [`Budget::reserve`] with their estimate, which refuses what would
//! not fit.

use std::time::{Duration, Instant};

use super::SolveError;

/// A deadline for one computation.
#[derive(Clone, Copy, Debug)]
pub struct Budget {
    started: Instant,
    deadline: Instant,
    limit: Duration,
    memory_bytes: usize,
}

impl Budget {
    /// A budget of `limit` starting now.
    #[must_use]
    pub fn new(limit: Duration) -> Self {
        let started = Instant::now();
        Budget {
            started,
            deadline: started + limit,
            limit,
            memory_bytes: usize::MAX,
        }
    }

    /// The same budget with at most `bytes` of working memory for the computation.
    #[must_use]
    pub fn with_memory(self, bytes: usize) -> Self {
        Budget {
            memory_bytes: bytes,
            ..self
        }
    }

    /// Refuses a step whose estimated working memory (`bytes`, for `what`) exceeds the limit.
    ///
    /// # Errors
    /// [`SolveError::TooLarge`] naming the estimate and the limit.
    pub fn reserve(&self, bytes: f64, what: &str) -> Result<(), SolveError> {
        if bytes > self.memory_bytes as f64 {
            const MIB: f64 = 1024.0 * 1024.0;
            return Err(SolveError::TooLarge(format!(
                "{what} would need about {:.0} MiB of memory, over the limit of {:.0} MiB for one \
                 request (setting ODDSMITH_MAX_REQUEST_MEMORY_MB)",
                bytes / MIB,
                self.memory_bytes as f64 / MIB
            )));
        }
        Ok(())
    }

    /// A budget ending at the same time as this one or after `fraction` of the total, whichever
    /// comes first (used to try exact arithmetic before falling back to float).
    #[must_use]
    pub fn share(&self, fraction: f64) -> Self {
        let deadline = (self.started + self.limit.mul_f64(fraction)).min(self.deadline);
        Budget {
            started: self.started,
            deadline,
            limit: deadline - self.started,
            memory_bytes: self.memory_bytes,
        }
    }

    /// The whole budget's length.
    #[must_use]
    pub fn limit(&self) -> Duration {
        self.limit
    }

    /// Time spent since the budget started.
    #[must_use]
    pub fn elapsed(&self) -> Duration {
        self.started.elapsed()
    }

    /// Time left before the deadline.
    #[must_use]
    pub fn remaining(&self) -> Duration {
        self.deadline.saturating_duration_since(Instant::now())
    }

    /// Fails once the deadline has passed.
    ///
    /// # Errors
    /// [`SolveError::BudgetExceeded`] past the deadline.
    pub fn check(&self) -> Result<(), SolveError> {
        if Instant::now() >= self.deadline {
            Err(SolveError::BudgetExceeded { limit: self.limit })
        } else {
            Ok(())
        }
    }
}

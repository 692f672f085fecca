//! The time budget of one computation: solvers call [`Budget::check`] as they go and stop with
//! [`SolveError::BudgetExceeded`] once the deadline has passed.

use std::time::{Duration, Instant};

use super::SolveError;

/// A deadline for one computation.
#[derive(Clone, Copy, Debug)]
pub struct Budget {
    started: Instant,
    deadline: Instant,
    limit: Duration,
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
        }
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

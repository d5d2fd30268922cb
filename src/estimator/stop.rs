//! Cooperative cancellation: a deadline and a flag that long computations
//! poll between units of work, so an expired or abandoned request stops
//! using CPU.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use super::error::EstimateError;

/// When to stop early. The default never stops.
#[derive(Clone, Debug, Default)]
pub struct Stop {
    deadline: Option<Instant>,
    cancelled: Option<Arc<AtomicBool>>,
}

impl Stop {
    /// Never stops.
    pub fn never() -> Self {
        Stop::default()
    }

    /// Stops once `deadline` has passed.
    pub fn with_deadline(mut self, deadline: Instant) -> Self {
        self.deadline = Some(deadline);
        self
    }

    /// Stops once `flag` is set.
    pub fn with_flag(mut self, flag: Arc<AtomicBool>) -> Self {
        self.cancelled = Some(flag);
        self
    }

    /// # Errors
    /// [`EstimateError::Cancelled`] or [`EstimateError::DeadlineExceeded`].
    pub fn check(&self) -> Result<(), EstimateError> {
        if self.cancelled.as_ref().is_some_and(|f| f.load(Ordering::Relaxed)) {
            return Err(EstimateError::Cancelled);
        }
        if self.deadline.is_some_and(|d| Instant::now() >= d) {
            return Err(EstimateError::DeadlineExceeded);
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flag_and_deadline_stop() {
        assert!(Stop::never().check().is_ok());
        let flag = Arc::new(AtomicBool::new(false));
        let s = Stop::never().with_flag(flag.clone());
        assert!(s.check().is_ok());
        flag.store(true, Ordering::Relaxed);
        assert_eq!(s.check(), Err(EstimateError::Cancelled));
        let past = Stop::never().with_deadline(Instant::now());
        assert_eq!(past.check(), Err(EstimateError::DeadlineExceeded));
    }
}

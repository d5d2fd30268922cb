//! Cooperative cancellation: a deadline and a flag that long computations
//! poll between units of work, so an expired or abandoned request stops
//! using CPU.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use super::error::EstimateError;

/// A hook [`Stop::check`] calls before it reads the flag and the clock.
pub type Probe = Arc<dyn Fn() + Send + Sync>;

/// When to stop early. The default never stops.
#[derive(Clone, Default)]
pub struct Stop {
    deadline: Option<Instant>,
    cancelled: Option<Arc<AtomicBool>>,
    probe: Option<Probe>,
}

impl std::fmt::Debug for Stop {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Stop")
            .field("deadline", &self.deadline)
            .field("cancelled", &self.cancelled)
            .field("probe", &self.probe.is_some())
            .finish()
    }
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

    /// Calls `probe` at every check, before the flag and the deadline are
    /// read: instrumentation, and fault injection in tests (a probe that
    /// sleeps is a slow solver; one that sets the flag cancels at that point).
    pub fn with_probe(mut self, probe: Probe) -> Self {
        self.probe = Some(probe);
        self
    }

    /// # Errors
    /// [`EstimateError::Cancelled`] or [`EstimateError::DeadlineExceeded`].
    pub fn check(&self) -> Result<(), EstimateError> {
        if let Some(probe) = &self.probe {
            probe();
        }
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

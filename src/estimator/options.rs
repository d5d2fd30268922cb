//! How a fit runs — threads, deadline, eigen path — and how long its phases
//! took: never what it computes.

use std::time::Duration;

use super::basis::EigenPath;
use super::stop::Stop;

/// How a fit runs (not what it computes: results do not depend on these).
#[derive(Clone, Debug)]
pub struct FitOptions {
    /// Worker threads: for independent cross-validation folds, and for the
    /// kernels of a large fit (1 = sequential; see [`PARALLEL_FLOPS`](super::dense::PARALLEL_FLOPS)).
    pub threads: usize,
    /// Deadline and cancellation.
    pub stop: Stop,
    /// Which eigenproblem to solve.
    pub eigen_path: EigenPath,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions { threads: 1, stop: Stop::never(), eigen_path: EigenPath::Auto }
    }
}

/// Wall-clock time spent in each phase of one fit (for operational metrics;
/// the results never depend on it).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct PhaseTimes {
    /// Validating the window (shapes, values, exclusions).
    pub validate: Duration,
    /// Demarketing and moments.
    pub moments: Duration,
    /// Eigendecompositions of the window and of every fold's training block.
    pub components: Duration,
    /// Scoring the (K, κ) grid and solving at the chosen point (components
    /// methods), or the plug-in solve (baselines).
    pub solve: Duration,
    /// Weights, normalisation and diagnostics.
    pub assemble: Duration,
}

impl PhaseTimes {
    /// Phase names and times, in order.
    pub fn named(&self) -> [(&'static str, Duration); 5] {
        [
            ("validate", self.validate),
            ("moments", self.moments),
            ("components", self.components),
            ("solve", self.solve),
            ("assemble", self.assemble),
        ]
    }
}

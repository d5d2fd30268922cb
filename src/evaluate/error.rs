//! What can stop a backtest.

use thiserror::Error;

use crate::estimator::EstimateError;

/// A backtest that cannot run.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum BacktestError {
    /// The specification does not fit the panel.
    #[error("backtest `{field}`: {reason}")]
    Spec {
        /// Offending option, as the request names it.
        field: String,
        /// Why.
        reason: String,
    },
    /// The history itself is unusable (a shape, name or value that no
    /// window may hold, or a market return missing in a holding period).
    #[error("the history: {0}")]
    History(EstimateError),
    /// A fit failed on one window.
    #[error("strategy `{strategy}`, window ending before {period}: {source}")]
    Window {
        /// Strategy name.
        strategy: String,
        /// First held-out period of the window.
        period: String,
        /// The estimator's error.
        #[source]
        source: EstimateError,
    },
    /// Cancelled or past its deadline.
    #[error(transparent)]
    Stopped(EstimateError),
}

//! Admission: the in-flight limit, drain refusal, the size limits of a
//! request, and the budget of a backtest, all checked before any work.

use super::WeightsApi;
use super::metrics::ShedReason;
use super::status::ServiceError;
use crate::convert::settings_from_proto;
use crate::estimator::{EstimateError, ValidSettings};
use crate::evaluate::BacktestBudget;
use crate::proto;

impl WeightsApi {
    /// Admits a request unless the server is draining or at its in-flight
    /// limit; the permit is held until the request's work ends.
    pub(super) fn admit(&self) -> Result<tokio::sync::OwnedSemaphorePermit, ServiceError> {
        let sh = &self.shared;
        if sh.draining.load(std::sync::atomic::Ordering::SeqCst) {
            sh.metrics.shed(ShedReason::Draining);
            return Err(ServiceError::Draining);
        }
        sh.admission.clone().try_acquire_owned().map_err(|_| {
            sh.metrics.shed(ShedReason::Overloaded);
            ServiceError::Overloaded { limit: sh.config.raw.server.max_in_flight }
        })
    }

    /// The request's settings over the server's defaults, validated.
    pub(super) fn settings(&self, p: &proto::Settings) -> Result<ValidSettings, ServiceError> {
        Ok(settings_from_proto(p, self.shared.config.defaults.settings())
            .and_then(|s| s.check())
            .map_err(EstimateError::from)?)
    }

    /// Rejects windows above the configured size limits.
    pub(super) fn check_size(&self, returns: Option<&proto::Matrix>, names: usize) -> Result<(), ServiceError> {
        let limits = &self.shared.config.raw.server;
        let (rows, cols, values) = returns.map_or((0, 0, 0), |m| (m.rows as u64, m.cols as u64, m.values.len() as u64));
        if cols > limits.max_factors as u64 || names > limits.max_factors {
            return Err(ServiceError::TooLarge {
                field: "returns.cols",
                value: cols.max(names as u64),
                limit: limits.max_factors as u64,
                what: "factors",
            });
        }
        let cells = rows.saturating_mul(cols).max(values);
        if cells > limits.max_cells as u64 {
            return Err(ServiceError::TooLarge {
                field: "returns",
                value: cells,
                limit: limits.max_cells as u64,
                what: "periods × factors",
            });
        }
        Ok(())
    }

    /// Refuses a request whose settings run the implementation stage over
    /// more factors than `server.max_stage_factors`.
    pub(super) fn check_stage_size(&self, settings: &ValidSettings, factors: usize) -> Result<(), ServiceError> {
        let limit = self.shared.config.raw.server.max_stage_factors;
        if settings.implementation_active() && factors > limit {
            return Err(ServiceError::TooLarge {
                field: "returns.cols",
                value: factors as u64,
                limit: limit as u64,
                what: "factors with limits or costs set (server.max_stage_factors)",
            });
        }
        Ok(())
    }

    /// Refuses a backtest whose estimated fits or memory exceed the server's
    /// budget (`server.max_backtest_fits`, `server.max_request_bytes_estimate`).
    pub(super) fn check_budget(&self, budget: BacktestBudget) -> Result<(), ServiceError> {
        let limits = &self.shared.config.raw.server;
        let over = if budget.fits > limits.max_backtest_fits {
            Some(("fits", budget.fits, limits.max_backtest_fits, "server.max_backtest_fits"))
        } else if budget.bytes > limits.max_request_bytes_estimate {
            Some(("bytes", budget.bytes, limits.max_request_bytes_estimate, "server.max_request_bytes_estimate"))
        } else {
            None
        };
        match over {
            None => Ok(()),
            Some((what, value, limit, key)) => {
                self.shared.metrics.shed(ShedReason::OverBudget);
                Err(ServiceError::OverBudget { what, value, limit, key, refits: budget.refits })
            }
        }
    }
}

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

    /// Refuses a request whose settings run the implementation stage on a
    /// window over `server.max_stage_factors` factors or
    /// `server.max_stage_cells` periods × factors (the stage's time grows
    /// as N·T² in the factor form of Ω and N³ in the dense one).
    pub(super) fn check_stage_size(
        &self,
        settings: &ValidSettings,
        periods: usize,
        factors: usize,
    ) -> Result<(), ServiceError> {
        if !settings.implementation_active() {
            return Ok(());
        }
        let limits = &self.shared.config.raw.server;
        if factors > limits.max_stage_factors {
            return Err(ServiceError::TooLarge {
                field: "returns.cols",
                value: factors as u64,
                limit: limits.max_stage_factors as u64,
                what: "factors with limits or costs set (server.max_stage_factors)",
            });
        }
        let cells = (periods as u64).saturating_mul(factors as u64);
        if cells > limits.max_stage_cells {
            return Err(ServiceError::TooLarge {
                field: "returns",
                value: cells,
                limit: limits.max_stage_cells,
                what: "periods × factors of the implementation stage's window with limits or costs set \
                       (server.max_stage_cells)",
            });
        }
        Ok(())
    }

    /// Refuses one fit whose estimated working memory, the implementation
    /// stage's included, exceeds `server.max_request_bytes_estimate`.
    pub(super) fn check_fit_bytes(
        &self,
        settings: &ValidSettings,
        periods: usize,
        factors: usize,
    ) -> Result<(), ServiceError> {
        let limit = self.shared.config.raw.server.max_request_bytes_estimate;
        let bytes = crate::estimator::budget::fit_bytes(periods, factors, settings);
        if bytes <= limit {
            return Ok(());
        }
        self.shared.metrics.shed(ShedReason::OverBudget);
        let mut hint = String::from("send fewer factors or a shorter window");
        if settings.implementation_active() {
            hint.push_str(" (the implementation stage, run because a limit or a cost is set, holds most of it)");
        }
        Err(ServiceError::OverBudget {
            job: "request",
            what: "bytes",
            value: bytes,
            limit,
            key: "server.max_request_bytes_estimate",
            refits: 0,
            hint,
        })
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
                Err(ServiceError::OverBudget {
                    job: "backtest",
                    what,
                    value,
                    limit,
                    key,
                    refits: budget.refits,
                    hint: budget_hint(what, budget),
                })
            }
        }
    }
}

/// What a caller can change to bring a backtest within budget, naming the
/// request's fields and what the estimate counted.
fn budget_hint(what: &str, b: BacktestBudget) -> String {
    let mut parts = vec![format!("{} refit dates", b.refits)];
    if b.draws > 0 {
        parts.push(format!("every fit bagged over {} bootstrap draws", b.draws));
    }
    if b.stages > 0 {
        parts.push(format!("{} runs of the implementation stage (limits or costs set)", b.stages));
    }
    let mut levers = if what == "fits" {
        vec!["a longer `step`", "a shorter history", "`skip_baselines`", "a smaller `sweep_max_k`"]
    } else {
        vec!["fewer factors", "a shorter `window` (rolling, not `expanding`)", "a smaller `sweep_max_k`"]
    };
    if b.draws > 0 {
        levers.push("fewer `bootstrap_draws`");
    }
    if b.stages > 0 {
        levers.push("fewer limits and costs");
    }
    format!("the estimate counts {}; use {}", parts.join(", "), or_list(&levers))
}

/// "a, b or c".
fn or_list(items: &[&str]) -> String {
    match items {
        [] => String::new(),
        [one] => (*one).to_owned(),
        [init @ .., last] => format!("{} or {last}", init.join(", ")),
    }
}

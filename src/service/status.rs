//! The one place where errors become gRPC statuses. Every variant of every
//! error is matched explicitly (no wildcard arm), so a new error variant
//! does not compile until its status is decided here.

use std::collections::HashMap;

use thiserror::Error;
use tonic::{Code, Status};
use tonic_types::{ErrorDetails, FieldViolation, PreconditionViolation, StatusExt as _};

use crate::estimator::{EstimateError, InputError, Location, SettingsError};

/// Error domain reported in `google.rpc.ErrorInfo`.
pub const ERROR_DOMAIN: &str = "keelson.v1";

/// Everything a request can fail with.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum ServiceError {
    /// The estimator rejected the window or failed on it.
    #[error(transparent)]
    Estimate(#[from] EstimateError),
    /// A backtest failed.
    #[error(transparent)]
    Backtest(#[from] crate::evaluate::BacktestError),
    /// The request exceeds a configured size limit.
    #[error("field `{field}`: {value} exceeds the server limit of {limit} ({what})")]
    TooLarge {
        /// Request field.
        field: &'static str,
        /// Size found.
        value: u64,
        /// Configured limit.
        limit: u64,
        /// What is measured.
        what: &'static str,
    },
    /// A request's estimated work or memory is above the server's budget.
    #[error("the {job} needs an estimated {value} {what}, above the server limit of {limit} ({key}); {hint}")]
    OverBudget {
        /// `backtest` or `request`.
        job: &'static str,
        /// What is over: `fits` or `bytes`.
        what: &'static str,
        /// The estimate.
        value: u64,
        /// The configured limit.
        limit: u64,
        /// The configuration key of the limit.
        key: &'static str,
        /// Refit dates of a backtest (0 for one fit).
        refits: u64,
        /// What the caller can change, naming the request's fields.
        hint: String,
    },
    /// More requests are in flight than the server admits.
    #[error("the server is at its limit of {limit} requests in flight; retry with backoff")]
    Overloaded {
        /// The configured limit.
        limit: usize,
    },
    /// The server is shutting down.
    #[error("the server is draining for shutdown; retry on another replica")]
    Draining,
    /// The server-side time limit passed before the result was ready.
    #[error("the request ran past the server time limit of {limit_ms} ms")]
    ServerTimeout {
        /// The configured limit.
        limit_ms: u64,
    },
    /// The call carries no accepted bearer token.
    #[error("unauthenticated: {reason}")]
    Unauthenticated {
        /// What is wrong with the credentials (never the token itself).
        reason: &'static str,
    },
    /// A bug: a worker task failed.
    #[error("internal error: {0}")]
    Internal(String),
}

impl ServiceError {
    /// Whether the computation stopped early on a deadline or a cancellation.
    pub fn stopped_early(&self) -> bool {
        matches!(
            self,
            ServiceError::Estimate(EstimateError::Cancelled | EstimateError::DeadlineExceeded)
                | ServiceError::Backtest(crate::evaluate::BacktestError::Stopped(_))
        )
    }

    /// Whether the computation stopped because its deadline passed.
    pub fn deadline_exceeded(&self) -> bool {
        matches!(
            self,
            ServiceError::Estimate(EstimateError::DeadlineExceeded)
                | ServiceError::Backtest(crate::evaluate::BacktestError::Stopped(EstimateError::DeadlineExceeded))
        )
    }
}

fn violation_path(at: &Location, cols: Option<usize>) -> String {
    match (at.field, at.row, at.column) {
        ("returns", Some(r), Some(c)) => match cols {
            Some(n) => format!("returns.values[{}]", r * n + c),
            None => "returns.values".to_owned(),
        },
        ("returns", None, Some(c)) => format!("returns.cols[{c}]"),
        ("market_returns", Some(r), _) => format!("market_returns[{r}]"),
        ("factor_names", _, Some(c)) => format!("factor_names[{c}]"),
        ("period_labels", Some(r), _) => format!("period_labels[{r}]"),
        ("previous_weights", _, Some(c)) => format!("previous_weights[{c}]"),
        (f, _, _) => f.to_owned(),
    }
}

fn location_metadata(at: &Location) -> HashMap<String, String> {
    let mut m = HashMap::from([("field".to_owned(), at.field.to_owned())]);
    if let Some(r) = at.row {
        m.insert("row".to_owned(), r.to_string());
    }
    if let Some(c) = at.column {
        m.insert("column".to_owned(), c.to_string());
    }
    if let Some(p) = &at.period {
        m.insert("period".to_owned(), p.clone());
    }
    if let Some(f) = &at.factor {
        m.insert("factor".to_owned(), f.clone());
    }
    m
}

fn invalid(reason: &str, field: String, message: String, metadata: HashMap<String, String>) -> Status {
    let mut details = ErrorDetails::with_bad_request(vec![FieldViolation::new(field, message.clone())]);
    details.set_error_info(reason, ERROR_DOMAIN, metadata);
    Status::with_error_details(Code::InvalidArgument, message, details)
}

fn with_info(code: Code, reason: &str, message: String) -> Status {
    Status::with_error_details(code, message, ErrorDetails::with_error_info(reason, ERROR_DOMAIN, HashMap::new()))
}

fn input_reason(e: &InputError) -> &'static str {
    match e {
        InputError::Shape { .. } => "SHAPE_MISMATCH",
        InputError::NonFinite { .. } => "NON_FINITE_VALUE",
        InputError::OutOfRange { .. } => "VALUE_OUT_OF_RANGE",
        InputError::WeightOutOfRange { .. } => "WEIGHT_OUT_OF_RANGE",
        InputError::Missing { .. } => "MISSING_VALUE",
        InputError::AllMissing { .. } => "ALL_MISSING",
        InputError::DuplicateName { .. } => "DUPLICATE_FACTOR_NAME",
        InputError::EmptyName { .. } => "EMPTY_FACTOR_NAME",
        InputError::NameTooLong { .. } => "FACTOR_NAME_TOO_LONG",
        InputError::BadPeriodLabel { .. } => "BAD_PERIOD_LABEL",
        InputError::UnsortedPeriods { .. } => "UNSORTED_PERIODS",
        InputError::IrregularPeriods { .. } => "IRREGULAR_PERIODS",
        InputError::TooFewPeriods { .. } => "TOO_FEW_PERIODS",
        InputError::NoFactors => "NO_FACTORS",
        InputError::NoUsableFactors { .. } => "NO_USABLE_FACTORS",
        InputError::MarketZeroVariance => "MARKET_ZERO_VARIANCE",
    }
}

fn settings_status(e: &SettingsError) -> Status {
    let (reason, field) = match e {
        SettingsError::UnknownField { field, .. } => ("UNKNOWN_SETTING", format!("settings.{field}")),
        SettingsError::InvalidValue { field, .. } => ("INVALID_SETTING", format!("settings.{field}")),
        SettingsError::OutOfRange { field, .. } => ("SETTING_OUT_OF_RANGE", format!("settings.{field}")),
        SettingsError::File { .. } => ("INVALID_SETTING", "settings".to_owned()),
    };
    let meta = HashMap::from([("field".to_owned(), field.clone())]);
    invalid(reason, field, e.to_string(), meta)
}

/// The status of an estimator error (the `ServiceError::Estimate` arm of [`to_status`]).
fn estimate_status(e: &EstimateError, cols: Option<usize>) -> Status {
    match e {
        EstimateError::Input(ie) => {
            let (path, meta) = match ie.location() {
                Some(at) => (violation_path(at, cols), location_metadata(at)),
                None => {
                    let field = match ie.as_ref() {
                        InputError::TooFewPeriods { .. }
                        | InputError::NoUsableFactors { .. }
                        | InputError::Shape { .. }
                        | InputError::NonFinite { .. }
                        | InputError::OutOfRange { .. }
                        | InputError::Missing { .. }
                        | InputError::AllMissing { .. }
                        | InputError::BadPeriodLabel { .. }
                        | InputError::UnsortedPeriods { .. } => "returns",
                        InputError::IrregularPeriods { .. } => "period_labels",
                        InputError::NoFactors
                        | InputError::DuplicateName { .. }
                        | InputError::EmptyName { .. }
                        | InputError::NameTooLong { .. } => "factor_names",
                        InputError::MarketZeroVariance => "market_returns",
                        InputError::WeightOutOfRange { .. } => "previous_weights",
                    };
                    (field.to_owned(), HashMap::from([("field".to_owned(), field.to_owned())]))
                }
            };
            invalid(input_reason(ie), path, ie.to_string(), meta)
        }
        EstimateError::Settings(se) => settings_status(se),
        EstimateError::FrequencyMismatch { given, inferred, .. } => {
            let field = "settings.periods_per_year".to_owned();
            let meta = HashMap::from([
                ("field".to_owned(), field.clone()),
                ("given".to_owned(), given.to_string()),
                ("inferred".to_owned(), inferred.to_string()),
            ]);
            invalid("FREQUENCY_MISMATCH", field, e.to_string(), meta)
        }
        EstimateError::TooManyComponents { .. } => invalid(
            "TOO_MANY_COMPONENTS",
            "settings.components".into(),
            e.to_string(),
            HashMap::from([("field".to_owned(), "settings.components".to_owned())]),
        ),
        EstimateError::CriterionUnavailable { .. } => invalid(
            "CV_CRITERION_UNAVAILABLE",
            "settings.cv_criterion".into(),
            e.to_string(),
            HashMap::from([("field".to_owned(), "settings.cv_criterion".to_owned())]),
        ),
        // The data admit no usable portfolio: the request cannot succeed as sent.
        EstimateError::NoFiniteScore { .. } => with_info(Code::FailedPrecondition, "NO_FINITE_CV_SCORE", e.to_string()),
        EstimateError::DegeneratePortfolio { .. } => {
            with_info(Code::FailedPrecondition, "DEGENERATE_PORTFOLIO", e.to_string())
        }
        EstimateError::ConstraintsInfeasible { constraints, .. } => {
            let mut details = ErrorDetails::with_error_info(
                "CONSTRAINTS_INFEASIBLE",
                ERROR_DOMAIN,
                HashMap::from([("constraints".to_owned(), constraints.join(","))]),
            );
            details.set_precondition_failure(
                constraints
                    .iter()
                    .map(|c| {
                        PreconditionViolation::new("CONSTRAINTS_INFEASIBLE", format!("settings.{c}"), e.to_string())
                    })
                    .collect::<Vec<_>>(),
            );
            Status::with_error_details(Code::FailedPrecondition, e.to_string(), details)
        }
        EstimateError::SolverFailed { .. } => with_info(Code::Internal, "SOLVER_FAILED", e.to_string()),
        EstimateError::Numerical { .. } => with_info(Code::Internal, "NUMERICAL_FAILURE", e.to_string()),
        EstimateError::Cancelled => with_info(Code::Cancelled, "CANCELLED", e.to_string()),
        EstimateError::DeadlineExceeded => with_info(Code::DeadlineExceeded, "DEADLINE_EXCEEDED", e.to_string()),
    }
}

/// Maps an error to its gRPC status. `cols` is the request's column count,
/// used to point a field violation at `returns.values[i]`.
pub fn to_status(err: &ServiceError, cols: Option<usize>) -> Status {
    match err {
        ServiceError::Estimate(e) => estimate_status(e, cols),
        ServiceError::Backtest(b) => match b {
            crate::evaluate::BacktestError::Spec { field, .. } => invalid(
                "INVALID_BACKTEST",
                field.clone(),
                b.to_string(),
                HashMap::from([("field".to_owned(), field.clone())]),
            ),
            crate::evaluate::BacktestError::Window { source, strategy, period } => {
                let mut st = to_status(&ServiceError::Estimate(source.clone()), cols);
                st = Status::with_error_details(
                    st.code(),
                    b.to_string(),
                    ErrorDetails::with_error_info(
                        "BACKTEST_WINDOW_FAILED",
                        ERROR_DOMAIN,
                        HashMap::from([
                            ("strategy".to_owned(), strategy.clone()),
                            ("period".to_owned(), period.clone()),
                        ]),
                    ),
                );
                st
            }
            crate::evaluate::BacktestError::Stopped(e) | crate::evaluate::BacktestError::History(e) => {
                to_status(&ServiceError::Estimate(e.clone()), cols)
            }
        },
        ServiceError::TooLarge { field, .. } => Status::with_error_details(Code::InvalidArgument, err.to_string(), {
            let mut d = ErrorDetails::with_bad_request(vec![FieldViolation::new(*field, err.to_string())]);
            d.set_error_info("REQUEST_TOO_LARGE", ERROR_DOMAIN, HashMap::from([("field".into(), (*field).into())]));
            d
        }),
        ServiceError::OverBudget { what, value, limit, key, refits, .. } => Status::with_error_details(
            Code::ResourceExhausted,
            err.to_string(),
            ErrorDetails::with_error_info(
                "REQUEST_OVER_BUDGET",
                ERROR_DOMAIN,
                HashMap::from([
                    ("what".to_owned(), (*what).to_owned()),
                    ("estimate".to_owned(), value.to_string()),
                    ("limit".to_owned(), limit.to_string()),
                    ("limit_key".to_owned(), (*key).to_owned()),
                    ("refits".to_owned(), refits.to_string()),
                ]),
            ),
        ),
        ServiceError::Overloaded { .. } => with_info(Code::ResourceExhausted, "OVERLOADED", err.to_string()),
        ServiceError::Draining => with_info(Code::Unavailable, "DRAINING", err.to_string()),
        ServiceError::ServerTimeout { .. } => with_info(Code::DeadlineExceeded, "SERVER_TIMEOUT", err.to_string()),
        ServiceError::Unauthenticated { .. } => with_info(Code::Unauthenticated, "UNAUTHENTICATED", err.to_string()),
        ServiceError::Internal(_) => with_info(Code::Internal, "INTERNAL", err.to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::{ServiceError, to_status};
    use crate::estimator::{EstimateError, InputError, Location};
    use crate::evaluate::BacktestError;
    use tonic::Code;
    use tonic_types::StatusExt as _;

    /// A bad cell at row 2, column 3 of a 5-column request is the field
    /// violation `returns.values[13]` (row-major, as the proto lays the
    /// matrix out), with its row, column, period and factor in ErrorInfo.
    #[test]
    fn a_bad_cell_names_its_flat_index_row_and_column() {
        let at = Location::field("returns").row(2, Some("2020-03")).column(3, Some("carry"));
        let e = ServiceError::Estimate(InputError::NonFinite { at, value: f64::INFINITY }.into());
        let st = to_status(&e, Some(5));
        assert_eq!(st.code(), Code::InvalidArgument);
        let d = st.get_error_details();
        let v = &d.bad_request().expect("a BadRequest").field_violations[0];
        assert_eq!(v.field, "returns.values[13]");
        let info = d.error_info().expect("an ErrorInfo");
        assert_eq!((info.reason.as_str(), info.domain.as_str()), ("NON_FINITE_VALUE", super::ERROR_DOMAIN));
        for (k, want) in [("row", "2"), ("column", "3"), ("period", "2020-03"), ("factor", "carry")] {
            assert_eq!(info.metadata.get(k).map(String::as_str), Some(want), "{k}");
        }
        // Without the column count the path cannot be flattened.
        let st = to_status(&e, None);
        assert_eq!(st.get_error_details().bad_request().unwrap().field_violations[0].field, "returns.values");
    }

    /// Infeasible limits are FAILED_PRECONDITION with one violation per
    /// conflicting setting, under `settings.`.
    #[test]
    fn infeasible_limits_are_a_precondition_failure_per_setting() {
        let e = ServiceError::Estimate(EstimateError::ConstraintsInfeasible {
            constraints: vec!["max_gross".into(), "max_turnover".into()],
            detail: "x".into(),
        });
        let st = to_status(&e, None);
        assert_eq!(st.code(), Code::FailedPrecondition);
        let d = st.get_error_details();
        let subjects: Vec<&str> =
            d.precondition_failure().unwrap().violations.iter().map(|v| v.subject.as_str()).collect();
        assert_eq!(subjects, ["settings.max_gross", "settings.max_turnover"]);
        assert_eq!(d.error_info().unwrap().metadata["constraints"], "max_gross,max_turnover");
    }

    /// A backtest window's failure keeps its source's code and names the
    /// strategy and period; a stopped backtest is its stop's code.
    #[test]
    fn backtest_failures_keep_their_source_code() {
        let e = ServiceError::Backtest(BacktestError::Window {
            strategy: "ridge".into(),
            period: "2019-06".into(),
            source: EstimateError::DegeneratePortfolio { reason: "flat".into() },
        });
        let st = to_status(&e, None);
        assert_eq!(st.code(), Code::FailedPrecondition);
        let info = st.get_error_details().error_info().cloned().unwrap();
        assert_eq!(info.reason, "BACKTEST_WINDOW_FAILED");
        assert_eq!((info.metadata["strategy"].as_str(), info.metadata["period"].as_str()), ("ridge", "2019-06"));
        let stopped = ServiceError::Backtest(BacktestError::Stopped(EstimateError::Cancelled));
        assert_eq!(to_status(&stopped, None).code(), Code::Cancelled);
        assert!(stopped.stopped_early() && !stopped.deadline_exceeded());
    }

    /// The codes clients retry on (UNAVAILABLE, RESOURCE_EXHAUSTED) are given
    /// only to failures a retry can cure (gRPC status code guide, common practice).
    #[test]
    fn only_curable_failures_get_retryable_codes() {
        let cases = [
            (ServiceError::Overloaded { limit: 4 }, Code::ResourceExhausted),
            (ServiceError::Draining, Code::Unavailable),
            (ServiceError::ServerTimeout { limit_ms: 10 }, Code::DeadlineExceeded),
            (ServiceError::Unauthenticated { reason: "no token" }, Code::Unauthenticated),
            (ServiceError::Internal("bug".into()), Code::Internal),
            (ServiceError::Estimate(EstimateError::DeadlineExceeded), Code::DeadlineExceeded),
            (
                ServiceError::Estimate(EstimateError::SolverFailed { status: "s".into(), detail: "d".into() }),
                Code::Internal,
            ),
            (ServiceError::TooLarge { field: "returns", value: 9, limit: 8, what: "cells" }, Code::InvalidArgument),
        ];
        for (e, code) in cases {
            let st = to_status(&e, None);
            assert_eq!(st.code(), code, "{e}");
            assert!(st.get_error_details().error_info().is_some_and(|i| !i.reason.is_empty()), "{e}: no reason");
        }
    }
}

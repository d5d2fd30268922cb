//! The integration tests, one module per concern, linked as one binary.
//!
//! | module | checks |
//! |---|---|
//! | `reference_checks` | the estimator against numpy, scipy and scikit-learn values in `tests/reference/` |
//! | `backtest_checks` | the evaluation against statsmodels, linearmodels and an independent numpy backtest |
//! | `properties`, `proptests`, `numerics` | invariants, random windows, ill-conditioned inputs |
//! | `cli` | the command line: output, exit codes, files |
//! | `grpc`, `ops`, `faults` | the service in-process and as a real process: API, TLS, tokens, metrics, traces, drain |
//! | `bad_input_corpus`, `hostile` | malformed and hostile requests, budgets, panics, server defaults |

mod backtest_checks;
mod bad_input_corpus;
mod cli;
mod common;
mod desk_checks;
mod faults;
mod grpc;
mod hostile;
mod numerics;
mod ops;
mod properties;
mod proptests;
mod reference_checks;

//! Keelson: factor portfolio weights from the shrunk mean–variance portfolio
//! of principal components (by default the ridge on every component of the
//! covariance, its penalty chosen by time-series cross-validation; scaled
//! components such as Sharpe-scaled PCA on request), turned into a portfolio
//! a desk can hold within its limits, with a volatility target met out of
//! sample and the diagnostics a portfolio team needs to trust them.
//!
//! [`estimator`] is the pure numerical core (SPEC §1–8); [`panel_csv`] reads
//! windows from CSV files; [`proto`] holds the generated `keelson.v1`
//! messages and [`convert`] translates between them and the core's types;
//! [`service`] serves the API over gRPC and [`client`] calls it; [`evaluate`]
//! runs backtests and [`report`] writes them; [`demo`] builds the invented
//! demonstration market.
#![warn(missing_docs, unreachable_pub, clippy::missing_errors_doc)]
#![deny(rustdoc::broken_intra_doc_links)]
// `!(x > 0.0)` is deliberate throughout: it is true for NaN as well.
#![allow(clippy::neg_cmp_op_on_partial_ord)]
// Numerical kernels index several arrays with one loop variable.
#![allow(clippy::needless_range_loop)]
// Input errors carry their location (field, row, column, period, factor) by
// value; they are built once per rejected request, never in a loop.
#![allow(clippy::result_large_err)]

pub mod estimator;
pub mod evaluate;

/// Generated `keelson.v1` protobuf messages with their proto3-JSON mapping.
#[allow(missing_docs, unreachable_pub, clippy::all, clippy::missing_errors_doc)]
pub mod proto {
    include!(concat!(env!("OUT_DIR"), "/keelson.v1.rs"));
    include!(concat!(env!("OUT_DIR"), "/keelson.v1.serde.rs"));
}

#[cfg(feature = "server")]
pub mod client;
pub mod convert;
pub mod demo;
pub mod panel_csv;
#[cfg(feature = "report")]
pub mod report;
#[cfg(feature = "server")]
pub mod service;

//! What a backtest answers: every strategy's out-of-sample record, the
//! sweep, the tests, and the portfolio to hold.

use serde::Serialize;

use super::provenance::Provenance;
use super::spec::BacktestSpec;
use super::stats;
use super::strategies::ConstraintSet;
use crate::estimator::{Scaling, Settings, WeightSet};

/// Progress of a running backtest.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Progress {
    /// Fits done.
    pub done: usize,
    /// Fits in all.
    pub total: usize,
}

/// Performance of one return series.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Metrics {
    /// Annualised mean, P·mean.
    pub mean: f64,
    /// Annualised volatility, √P·sd.
    pub volatility: f64,
    /// Annualised Sharpe ratio.
    pub sharpe: f64,
    /// Lo (2002) iid standard error of the annualised Sharpe ratio.
    pub sharpe_se_iid: f64,
    /// Lo (2002) Newey–West standard error of the annualised Sharpe ratio.
    pub sharpe_se_nw: f64,
    /// Certainty-equivalent return (annualised).
    pub cer: f64,
    /// Maximum drawdown of compounded wealth.
    pub max_drawdown: f64,
    /// Skewness.
    pub skewness: f64,
    /// Non-excess kurtosis.
    pub kurtosis: f64,
}

pub(super) fn metrics(x: &[f64], p: f64, gamma: f64, lag: usize) -> Metrics {
    let sr = stats::sharpe(x);
    let (skewness, kurtosis) = stats::skew_kurt(x);
    Metrics {
        mean: p * stats::mean(x),
        volatility: (p * stats::var(x)).sqrt(),
        sharpe: p.sqrt() * sr,
        sharpe_se_iid: p.sqrt() * stats::sharpe_se_iid(sr, x.len()),
        sharpe_se_nw: p.sqrt() * stats::sharpe_se_nw(x, lag),
        cer: stats::cer(x, gamma, p),
        max_drawdown: stats::max_drawdown(x),
        skewness,
        kurtosis,
    }
}

/// Everything about one strategy.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct StrategyResult {
    /// Stable identifier (see [`Strategy::id`]).
    pub id: String,
    /// Name.
    pub name: String,
    /// Effective settings of its fits, limits included; `None` for the market.
    pub settings: Option<Settings>,
    /// Every warning code its fits raised, with the number of refits that raised it.
    pub warnings: Vec<WarningCount>,
    /// Out-of-sample return per period.
    pub returns: Vec<f64>,
    /// Returns net of linear costs.
    pub net_returns: Vec<f64>,
    /// Gross metrics.
    pub metrics: Metrics,
    /// Metrics net of costs.
    pub net_metrics: Metrics,
    /// Average turnover Σ|Δw| + |Δw_m| per refit (after the first).
    pub average_turnover: f64,
    /// Median gross exposure Σ|wᵢ| + |w_m| over refits.
    pub gross_median: f64,
    /// Largest gross exposure over refits.
    pub gross_max: f64,
    /// The annualised volatility the strategy targets, when it has a target
    /// (compare with `metrics.volatility`, the realised one).
    pub target_volatility: Option<f64>,
    /// Refits whose cross-validated κ sat at an end of its grid.
    pub kappa_at_edge: usize,
    /// Refits whose cross-validated K sat at the top of its grid (below N).
    pub components_at_cap: usize,
    /// K chosen at each refit (0 for methods without components).
    pub chosen_k: Vec<usize>,
    /// Annualised κ chosen at each refit.
    pub chosen_kappa: Vec<f64>,
    /// Share of gross weight in the top-Sharpe factors at each refit.
    pub top_sharpe_share: Vec<f64>,
    /// Holding-period returns that were missing for a factor with weight (counted as 0).
    pub missing_holding_returns: usize,
    /// Refits at which some limit bound, so that a limit and not the volatility
    /// target set the risk held (SPEC §10, §13).
    pub limit_bound_refits: usize,
    /// Each limit that bound, with the number of refits it bound at, most first.
    pub binding_limits: Vec<LimitCount>,
}

/// How often one limit bound across a backtest's refits.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct LimitCount {
    /// The setting: `max_weight`, `max_gross`, `max_market_weight`, `max_turnover`.
    pub limit: String,
    /// Refits at which it bound.
    pub refits: usize,
}

/// How often one warning code was raised across a backtest's refits.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct WarningCount {
    /// The warning's stable code.
    pub code: String,
    /// Refits that raised it.
    pub refits: usize,
}

/// One point of the sweep.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SweepPoint {
    /// Scaling.
    pub scaling: Scaling,
    /// Fixed number of components.
    pub k: usize,
    /// Annualised OOS Sharpe ratio (NaN where K did not fit every window).
    pub sharpe: f64,
}

/// Alpha of a strategy against one benchmark set.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct AlphaTest {
    /// Strategy.
    pub strategy: String,
    /// Benchmark names.
    pub benchmarks: Vec<String>,
    /// Annualised alpha P·α.
    pub alpha: f64,
    /// Newey–West t-statistic of α.
    pub t_nw: f64,
    /// Heteroskedasticity-robust (HC0) t-statistic of α.
    pub t_robust: f64,
    /// R² of the regression.
    pub r2: f64,
    /// Why α and its t-statistics are not reported (NaN), when they are not.
    pub note: Option<String>,
}

/// The pricing test of the configured method's K-component model.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PricingTest {
    /// Components in the model.
    pub k: usize,
    /// Test assets (factors observed in every out-of-sample period).
    pub assets: usize,
    /// Assets whose alpha has |NW t| > 1.96.
    pub significant: usize,
    /// GRS statistic and p-value.
    pub grs: Option<stats::Grs>,
}

/// Sharpe-difference test of the configured method against one strategy.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Comparison {
    /// Baseline.
    pub against: String,
    /// The test, on returns gross of costs.
    pub test: stats::SharpeDifference,
    /// Holm (1979) adjusted p-value over every comparison.
    pub p_holm: f64,
    /// Romano & Wolf (2005) step-down p-value by the stationary bootstrap.
    pub p_romano_wolf: f64,
}

/// Result of a backtest.
#[derive(Clone, Debug, Serialize)]
pub struct BacktestResult {
    /// The specification.
    pub spec: BacktestSpec,
    /// Periods per year.
    pub periods_per_year: u32,
    /// Out-of-sample period labels (or indices).
    pub periods: Vec<String>,
    /// Refits.
    pub refits: usize,
    /// Strategies, the configured method first.
    pub strategies: Vec<StrategyResult>,
    /// OOS Sharpe against K.
    pub sweep: Vec<SweepPoint>,
    /// Jobson–Korkie–Memmel tests, configured against each other strategy.
    pub comparisons: Vec<Comparison>,
    /// Probabilistic Sharpe ratio of the configured method against 0.
    pub psr: f64,
    /// Deflated Sharpe ratio of the configured method.
    pub dsr: f64,
    /// The distinct candidate configurations counted as trials for the DSR.
    pub trials: Vec<String>,
    /// Alphas of every strategy against every benchmark set.
    pub alphas: Vec<AlphaTest>,
    /// Pricing test of the configured K-component model.
    pub pricing: Option<PricingTest>,
    /// The configured method's fit on the latest window.
    #[serde(skip)]
    pub last_fit: Option<LatestFit>,
    /// Newey–West lag used.
    pub nw_lag: usize,
    /// The implementation limits every fitted strategy ran under (SPEC §10).
    pub constraints: ConstraintSet,
    /// What ran, on what, by which build, when (the caller names the
    /// invocation and the input).
    pub provenance: Provenance,
}

/// The portfolio to hold: the configured method's fit on the latest window.
#[derive(Clone, Debug, PartialEq)]
pub struct LatestFit {
    /// Label of the window's first period.
    pub first_period: String,
    /// Label of the window's last period (the data's latest).
    pub last_period: String,
    /// The fit, with the implementation stage when limits or costs are set.
    pub fit: WeightSet,
}

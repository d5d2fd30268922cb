//! Out-of-sample evaluation (SPEC §9): rolling or expanding refits, the
//! configured method beside its baselines on the same dates, a sweep of
//! out-of-sample Sharpe ratio against K, and the statistics that tell luck
//! from skill. Pure: no async runtime, no protobuf types.
//!
//! Weights fitted on periods [t − L, t) (or [0, t) when expanding) are held
//! over [t, t + step); the out-of-sample return is p_t = w'r_t + w_m m_t. No
//! step of a fit sees a period at or after t.

pub mod provenance;
pub mod spec;
pub mod stats;
pub mod verdict;

pub use provenance::Provenance;
pub use spec::{BacktestBudget, BacktestSpec, ValidBacktestSpec};

use std::sync::atomic::{AtomicUsize, Ordering};

use serde::Serialize;
use thiserror::Error;

use crate::estimator::desk::{DeskWindow, Holdings, Limits};
use crate::estimator::{
    self, Aggregate, Cap, Choice, CvCriterion, EstimateError, FitOptions, Method, Normalization, ReturnPanel, Scaling,
    Settings, Stop, ValidSettings, WeightSet,
};

/// Name of the market as a benchmark and as a strategy.
pub const MARKET: &str = "market";

/// The ridge on all factors as published: κ chosen by the held-out pricing R².
pub const KNS_PUBLISHED: &str = "KNS ridge, all factors (pricing R²)";

/// The ridge on all factors with κ chosen by the held-out Sharpe ratio.
pub const KNS_SHARPE: &str = "KNS ridge, all factors (held-out Sharpe)";

/// Name and id of the strategy run with the settings as given (the command's
/// `--config` and `--set`, or the request's settings over the server's
/// defaults): the row every other strategy is compared with.
pub const CONFIGURED: &str = "configured";

/// Name of the configured method's unconstrained model portfolio, a row of
/// its own when limits or costs are set (SPEC §10).
pub const MODEL: &str = "configured, model portfolio";

/// The settings without the implementation stage: the model portfolio.
pub fn model_settings(s: &ValidSettings) -> ValidSettings {
    let mut m = s.settings().clone();
    m.max_weight = Cap::Off;
    m.max_gross = Cap::Off;
    m.max_market_weight = Cap::Off;
    m.max_turnover = Cap::Off;
    m.cost_bps = 0.0;
    // Intervals at every refit serve no one; bagging changes the weights and stays.
    if m.aggregate == Aggregate::Point {
        m.bootstrap_draws = 0;
    }
    m.check().unwrap_or_else(|_| s.clone())
}

/// The implementation limits of a backtest, as run (SPEC §10): the same for
/// every fitted strategy.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ConstraintSet {
    /// Limits and the cost priced in the objective.
    #[serde(flatten)]
    pub limits: Limits,
    /// Amortisation horizon of that cost, periods.
    pub holding_periods: f64,
    /// Half-life of the volatility target's covariance (0 = sample).
    pub volatility_halflife: f64,
    /// Annualised volatility target, when the normalisation has one.
    pub target_volatility: Option<f64>,
}

impl ConstraintSet {
    fn of(s: &ValidSettings) -> ConstraintSet {
        ConstraintSet {
            limits: Limits::of(s),
            holding_periods: s.holding_periods.fixed().unwrap_or(f64::from(s.periods_per_year())),
            volatility_halflife: s.volatility_halflife,
            target_volatility: (s.normalization == Normalization::TargetVolatility).then_some(s.target_volatility),
        }
    }

    /// Whether any limit or cost is set.
    pub fn active(&self) -> bool {
        let l = &self.limits;
        [l.max_weight, l.max_gross, l.max_market_weight, l.max_turnover].iter().any(Option::is_some) || l.cost_bps > 0.0
    }
}

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

/// One strategy of the comparison.
#[derive(Clone, Debug)]
pub struct Strategy {
    /// Stable identifier: lower case, digits and hyphens (column names of `returns.csv`).
    pub id: String,
    /// Display name.
    pub name: String,
    /// Settings of its fits; `None` for the market itself.
    pub settings: Option<ValidSettings>,
}

fn with(base: &Settings, f: impl FnOnce(&mut Settings)) -> Option<ValidSettings> {
    let mut s = base.clone();
    f(&mut s);
    s.check().ok()
}

/// The configured method first, then (when `baselines`) the same with every
/// other scaling, plug-in, plug-in with Ledoit–Wolf, KNS ridge on all
/// factors, equal weight, and the market.
pub fn strategies(configured: &ValidSettings, has_market: bool, baselines: bool) -> Vec<Strategy> {
    let base = configured.settings();
    let mut out = vec![Strategy { id: CONFIGURED.into(), name: CONFIGURED.into(), settings: Some(configured.clone()) }];
    if configured.implementation_active() {
        // The configured method's model portfolio, before limits and costs (SPEC §10).
        out.push(Strategy {
            id: "configured-model".into(),
            name: MODEL.into(),
            settings: Some(model_settings(configured)),
        });
    }
    if !baselines {
        return out;
    }
    if matches!(base.method, Method::Components | Method::Ensemble | Method::KnsRidge | Method::Blend) {
        // Each scaling's components method (for an ensemble or `auto`, each of its members).
        for sc in Scaling::ALL {
            if sc != base.scaling || base.method != Method::Components {
                let settings = with(base, |s| {
                    s.method = Method::Components;
                    s.scaling = sc;
                });
                out.push(Strategy { id: format!("scaling-{sc}"), name: format!("components, scaling {sc}"), settings });
            }
        }
    }
    let baseline = |m: Method| {
        with(base, |s| {
            s.method = m;
            s.components = Choice::Auto;
        })
    };
    out.push(Strategy { id: "plug-in".into(), name: "plug-in".into(), settings: baseline(Method::PlugIn) });
    out.push(Strategy {
        id: "plug-in-ledoit-wolf".into(),
        name: "plug-in Ledoit-Wolf".into(),
        settings: baseline(Method::PlugInLedoitWolf),
    });
    // KNS ridge on all factors as published: κ by the held-out pricing R² (Kozak, Nagel &
    // Santosh 2020); beside it the same with the held-out Sharpe ratio as the criterion.
    let kns = |criterion: CvCriterion| {
        with(base, |s| {
            s.method = Method::KnsRidge;
            s.components = Choice::Auto;
            s.cv_criterion = criterion;
        })
    };
    for (id, name, criterion) in [
        ("kns-ridge-pricing-r2", KNS_PUBLISHED, CvCriterion::PricingR2),
        ("kns-ridge-sharpe", KNS_SHARPE, CvCriterion::Sharpe),
    ] {
        let settings = kns(criterion);
        // Not twice: the configured method may be one of them.
        if settings.as_ref() != Some(configured) {
            out.push(Strategy { id: id.into(), name: name.into(), settings });
        }
    }
    out.push(Strategy {
        id: "equal-weight".into(),
        name: "equal weight".into(),
        settings: baseline(Method::EqualWeight),
    });
    if has_market {
        out.push(Strategy { id: MARKET.into(), name: MARKET.into(), settings: None });
    }
    out.retain(|s| s.name == MARKET || s.settings.is_some());
    out
}

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

fn metrics(x: &[f64], p: f64, gamma: f64, lag: usize) -> Metrics {
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

/// One refit's outcome for one strategy.
#[derive(Clone, Debug)]
struct Held {
    weights: Vec<f64>,
    market: f64,
    k: usize,
    kappa: f64,
    top_share: f64,
    /// The model's annualised Sharpe ratio behind γ* (SPEC §10): held-out when cross-validated.
    sharpe_model: f64,
    /// Codes of every warning the fit (and its implementation stage) raised, sorted, once each.
    warnings: Vec<&'static str>,
    /// The limits that bound at the implementation stage, sorted, once each
    /// (empty: the volatility target set the risk).
    binding: Vec<&'static str>,
    /// Component loadings (configured strategy only) and betas.
    components: Vec<Vec<f64>>,
    betas: Vec<f64>,
}

fn sub_panel(panel: &ReturnPanel, start: usize, end: usize) -> ReturnPanel {
    let c = panel.cols;
    ReturnPanel {
        factor_names: panel.factor_names.clone(),
        period_labels: if panel.period_labels.is_empty() {
            Vec::new()
        } else {
            panel.period_labels[start..end].to_vec()
        },
        returns: panel.returns[start * c..end * c].to_vec(),
        rows: end - start,
        cols: c,
        market: panel.market.as_ref().map(|m| m[start..end].to_vec()),
        previous_weights: Vec::new(),
        market_name: None,
    }
}

fn label(panel: &ReturnPanel, t: usize) -> String {
    panel.period_labels.get(t).cloned().unwrap_or_else(|| format!("#{t}"))
}

/// What the return series need of a fit: weights, K, κ, no loadings.
fn held_weights(ws: &WeightSet) -> Held {
    Held {
        weights: ws.factors.iter().map(|f| f.weight).collect(),
        market: ws.market_weight,
        k: ws.diagnostics.num_components,
        kappa: ws.diagnostics.kappa,
        top_share: ws.diagnostics.top_sharpe_gross_share,
        sharpe_model: if ws.diagnostics.cv_sharpe.is_finite() {
            ws.diagnostics.cv_sharpe
        } else {
            ws.diagnostics.in_sample_sharpe
        },
        warnings: codes(&ws.diagnostics.warnings),
        binding: Vec::new(),
        components: Vec::new(),
        betas: Vec::new(),
    }
}

/// The distinct codes of `warnings`, sorted.
fn codes(warnings: &[estimator::Warning]) -> Vec<&'static str> {
    let mut c: Vec<&'static str> = warnings.iter().map(|w| w.code).collect();
    c.sort_unstable();
    c.dedup();
    c
}

/// [`held_weights`] with the component loadings and betas, for the pricing test.
fn held_from(ws: &WeightSet) -> Held {
    Held {
        components: ws.components.iter().map(|c| c.loadings.clone()).collect(),
        betas: ws.factors.iter().map(|f| f.market_beta).collect(),
        ..held_weights(ws)
    }
}

/// The refit dates and what is fitted at each: the strategies, and the
/// sweep's scalings and K values.
struct Schedule {
    /// Refit dates: the first out-of-sample period of each holding span.
    dates: Vec<usize>,
    strategies: Vec<Strategy>,
    sweep_ks: Vec<usize>,
    sweep_scalings: Vec<Scaling>,
}

impl Schedule {
    fn new(panel: &ReturnPanel, configured: &ValidSettings, spec: &ValidBacktestSpec) -> Schedule {
        let strategies = strategies(configured, panel.market.is_some(), spec.baselines);
        // Bounded by check(): at most the window's rank and settings.max_components.
        let sweep_ks: Vec<usize> = (1..=spec.sweep_max_k()).collect();
        let sweep_scalings = sweep_scalings(configured, spec.sweep_max_k());
        let dates = (spec.window..panel.rows).step_by(spec.step).collect();
        Schedule { dates, strategies, sweep_ks, sweep_scalings }
    }

    /// Progress steps in all, counted as [`BacktestBudget::fits`] counts
    /// fits: per date, every strategy once and once per bootstrap draw, every
    /// K of the sweep, and one per run of the implementation stage; then the
    /// latest window's fit (with its draws and its stage).
    fn steps(&self, configured: &ValidSettings) -> usize {
        let per_date = self.strategies.iter().map(|s| fit_steps(s.settings.as_ref())).sum::<usize>()
            + self.sweep_scalings.len() * self.sweep_ks.len()
            + self.staged(configured);
        let latest = fit_steps(Some(configured)) + usize::from(configured.implementation_active());
        self.dates.len() * per_date + latest
    }

    /// Strategies the implementation stage runs on at every date.
    fn staged(&self, configured: &ValidSettings) -> usize {
        if !configured.implementation_active() {
            return 0;
        }
        self.strategies.iter().filter(|s| s.settings.is_some() && s.name != MODEL).count()
    }
}

/// The scalings the component sweep fits at every date. The ridge on every
/// component always uses the covariance basis: its sweep is that basis alone
/// (every other scaling would repeat it).
pub(crate) fn sweep_scalings(configured: &ValidSettings, sweep_max_k: usize) -> Vec<Scaling> {
    match configured.method {
        _ if sweep_max_k == 0 || !has_sweep(configured) => Vec::new(),
        Method::KnsRidge | Method::Blend => vec![Scaling::Covariance],
        _ => Scaling::ALL.to_vec(),
    }
}

/// Progress steps of one fit: one, and one per bootstrap draw when bagged.
pub(crate) fn fit_steps(settings: Option<&ValidSettings>) -> usize {
    match settings {
        Some(s) if s.aggregate == estimator::Aggregate::Bagged => 1 + s.bootstrap_draws as usize,
        _ => 1,
    }
}

/// Counts progress steps across workers and reports each to the caller.
struct Ticker<'a> {
    done: AtomicUsize,
    total: usize,
    report: &'a (dyn Fn(Progress) + Sync),
}

impl Ticker<'_> {
    /// `steps` more done.
    fn tick(&self, steps: usize) {
        let done = self.done.fetch_add(steps, Ordering::Relaxed) + steps;
        (self.report)(Progress { done: done.min(self.total), total: self.total });
    }
}

/// Everything fitted at one refit date.
struct DateFits {
    held: Vec<Held>,
    sweep: Vec<Vec<Option<Held>>>,
    /// The configured scaling's loadings at the sweep's largest fitted K.
    basis: Option<Held>,
}

/// The market itself, held as a strategy.
fn market_held(cols: usize) -> Held {
    Held {
        weights: vec![0.0; cols],
        market: 1.0,
        k: 0,
        kappa: 0.0,
        top_share: 0.0,
        sharpe_model: 0.0,
        warnings: Vec::new(),
        binding: Vec::new(),
        components: Vec::new(),
        betas: Vec::new(),
    }
}

/// Fits every strategy and the sweep on the window before `plan.dates[d]`.
fn fit_date(
    panel: &ReturnPanel,
    configured: &ValidSettings,
    spec: &ValidBacktestSpec,
    plan: &Schedule,
    d: usize,
    ticker: &Ticker<'_>,
    stop: &Stop,
) -> Result<DateFits, BacktestError> {
    let t = plan.dates[d];
    let start = if spec.expanding { 0 } else { t - spec.window };
    let window = sub_panel(panel, start, t);
    let opts = FitOptions { threads: 1, stop: stop.clone(), ..FitOptions::default() };
    let wrap = |strategy: &str, e: EstimateError| match e {
        EstimateError::Cancelled | EstimateError::DeadlineExceeded => BacktestError::Stopped(e),
        e => BacktestError::Window { strategy: strategy.to_owned(), period: label(panel, t), source: e },
    };
    let mut held = Vec::with_capacity(plan.strategies.len());
    for (i, s) in plan.strategies.iter().enumerate() {
        held.push(match &s.settings {
            None => market_held(panel.cols),
            Some(settings) => {
                // The model portfolios are fitted here, in parallel over dates; the
                // implementation stage runs after, date by date (see `implement_all`).
                let settings = &model_settings(settings);
                let ws = estimator::fit_unhashed(&window, settings, &opts).map_err(|e| wrap(&s.name, e))?;
                // Only the configured fits feed the pricing test: the others keep no loadings.
                if i == 0 { held_from(&ws) } else { held_weights(&ws) }
            }
        });
        ticker.tick(fit_steps(s.settings.as_ref()));
    }
    let mut sweep = Vec::with_capacity(plan.sweep_scalings.len());
    let mut basis = None;
    for &sc in &plan.sweep_scalings {
        let mut s = configured.settings().clone();
        s.scaling = sc;
        let settings = model_settings(&s.check().map_err(|e| wrap("sweep", e.into()))?);
        let fits =
            estimator::fit_component_sweep(&window, &settings, &plan.sweep_ks, &opts).map_err(|e| wrap("sweep", e))?;
        // The fixed-K fits of one window share one basis, so the largest
        // K's loadings hold every smaller K's: keep only those, and only
        // for the configured scaling (the pricing test's fallback).
        if sc == configured.scaling {
            basis = fits.iter().rev().find_map(|r| r.as_ref().ok()).map(held_from);
        }
        sweep.push(fits.iter().map(|r| r.as_ref().ok().map(held_weights)).collect());
        ticker.tick(plan.sweep_ks.len());
    }
    Ok(DateFits { held, sweep, basis })
}

/// Fits every date, split across `spec.threads` workers; results in date order.
fn fit_all_dates(
    panel: &ReturnPanel,
    configured: &ValidSettings,
    spec: &ValidBacktestSpec,
    plan: &Schedule,
    ticker: &Ticker<'_>,
    stop: &Stop,
) -> Result<Vec<DateFits>, BacktestError> {
    let one = |d: usize| fit_date(panel, configured, spec, plan, d, ticker, stop);
    let n_dates = plan.dates.len();
    if spec.threads <= 1 {
        return (0..n_dates).map(one).collect();
    }
    // Refit dates are independent: split them across threads, keep date order.
    let chunk = n_dates.div_ceil(spec.threads);
    let results: Vec<Result<DateFits, BacktestError>> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..spec.threads)
            .map(|w| {
                let f = &one;
                scope.spawn(move || (w * chunk..((w + 1) * chunk).min(n_dates)).map(f).collect::<Vec<_>>())
            })
            .collect();
        join_workers(handles)
    });
    results.into_iter().collect()
}

/// Each worker's results in worker order; a worker that panicked gives one error.
fn join_workers<T>(
    handles: Vec<std::thread::ScopedJoinHandle<'_, Vec<Result<T, BacktestError>>>>,
) -> Vec<Result<T, BacktestError>> {
    handles
        .into_iter()
        .flat_map(|h| {
            h.join().unwrap_or_else(|_| {
                vec![Err(BacktestError::Stopped(EstimateError::Numerical {
                    stage: "backtest",
                    detail: "worker panicked".into(),
                }))]
            })
        })
        .collect()
}

/// The implementation stage (SPEC §10), date after date: each fitted
/// strategy's model weights become the weights held, starting from what it
/// held after the previous refit (nothing before the first). The model-
/// portfolio row and the market keep their weights. Strategies are
/// independent of each other, so they are split across `spec.threads`
/// workers; each strategy's dates run in order, so results do not depend on
/// the thread count.
fn implement_all(
    panel: &ReturnPanel,
    configured: &ValidSettings,
    spec: &ValidBacktestSpec,
    plan: &Schedule,
    fits: &mut [DateFits],
    ticker: &Ticker<'_>,
    stop: &Stop,
) -> Result<(), BacktestError> {
    let todo: Vec<usize> = plan
        .strategies
        .iter()
        .enumerate()
        .filter(|(_, s)| s.settings.is_some() && s.name != MODEL)
        .map(|(i, _)| i)
        .collect();
    // Each strategy's model weights, per date, moved out so that workers own them.
    let mut columns: Vec<Vec<Held>> = todo
        .iter()
        .map(|&si| fits.iter_mut().map(|f| std::mem::replace(&mut f.held[si], market_held(0))).collect())
        .collect();
    let run = StageRun { panel, configured, spec, plan, ticker, stop };
    let one = |si: usize, held: &mut [Held]| implement_strategy(&run, si, held);
    let workers = spec.threads.clamp(1, todo.len().max(1));
    let results: Vec<Result<(), BacktestError>> = if workers <= 1 {
        todo.iter().zip(columns.iter_mut()).map(|(&si, col)| one(si, col)).collect()
    } else {
        let per = todo.len().div_ceil(workers);
        std::thread::scope(|scope| {
            let handles: Vec<_> = todo
                .chunks(per)
                .zip(columns.chunks_mut(per))
                .map(|(sis, cols)| {
                    let f = &one;
                    scope
                        .spawn(move || sis.iter().zip(cols.iter_mut()).map(|(&si, col)| f(si, col)).collect::<Vec<_>>())
                })
                .collect();
            join_workers(handles)
        })
    };
    for (&si, col) in todo.iter().zip(columns) {
        for (f, h) in fits.iter_mut().zip(col) {
            f.held[si] = h;
        }
    }
    results.into_iter().collect()
}

/// What every strategy's run of the implementation stage shares.
struct StageRun<'a> {
    panel: &'a ReturnPanel,
    configured: &'a ValidSettings,
    spec: &'a ValidBacktestSpec,
    plan: &'a Schedule,
    ticker: &'a Ticker<'a>,
    stop: &'a Stop,
}

/// One strategy's implemented weights at every date, in date order.
fn implement_strategy(run: &StageRun<'_>, si: usize, held: &mut [Held]) -> Result<(), BacktestError> {
    let StageRun { panel, configured, spec, plan, ticker, stop } = *run;
    let strategy = &plan.strategies[si];
    let Some(settings) = &strategy.settings else { return Ok(()) };
    let mut prev = (vec![0.0; panel.cols], 0.0);
    for (&t, h) in plan.dates.iter().zip(held.iter_mut()) {
        stop.check().map_err(BacktestError::Stopped)?;
        let start = if spec.expanding { 0 } else { t - spec.window };
        let wrap = |e: EstimateError| match e {
            EstimateError::Cancelled | EstimateError::DeadlineExceeded => BacktestError::Stopped(e),
            e => BacktestError::Window { strategy: strategy.name.clone(), period: label(panel, t), source: e },
        };
        let desk = DeskWindow::new(&sub_panel(panel, start, t), configured).map_err(wrap)?;
        let mut warnings = Vec::new();
        let done = desk
            .implement(
                settings,
                &h.weights,
                h.sharpe_model,
                Holdings { weights: &prev.0, market: prev.1 },
                stop,
                &mut warnings,
            )
            .map_err(wrap)?;
        h.weights = done.weights;
        h.market = done.market_weight;
        h.top_share = done.top_sharpe_gross_share;
        h.warnings.extend(warnings.iter().map(|w| w.code));
        h.warnings.sort_unstable();
        h.warnings.dedup();
        h.binding = done.report.binding.iter().map(|b| b.constraint).collect();
        h.binding.sort_unstable();
        h.binding.dedup();
        prev = (h.weights.clone(), h.market);
        ticker.tick(1);
    }
    Ok(())
}

/// The out-of-sample span: its periods and each period's holding.
struct OutOfSample<'a> {
    panel: &'a ReturnPanel,
    /// Out-of-sample period indices.
    periods: Vec<usize>,
    window: usize,
    step: usize,
}

impl OutOfSample<'_> {
    /// The refit date whose weights are held in period `t`.
    fn date_of(&self, t: usize) -> usize {
        (t - self.window) / self.step
    }

    /// p_t = w'r_t + w_m m_t; a missing factor return counts as 0 (and is counted).
    fn port_return(&self, h: &Held, t: usize, missing: &mut usize) -> f64 {
        let cols = self.panel.cols;
        let mut r = h.market * self.panel.market.as_deref().map_or(0.0, |m| m[t]);
        for j in 0..cols {
            let w = h.weights[j];
            if w != 0.0 {
                let x = self.panel.returns[t * cols + j];
                if x.is_nan() {
                    *missing += 1;
                } else {
                    r += w * x;
                }
            }
        }
        r
    }

    /// The out-of-sample series of a factor or of the market.
    fn series_of(&self, name: &str) -> Option<Vec<f64>> {
        if name == MARKET {
            return self.panel.market.as_ref().map(|m| self.periods.iter().map(|&t| m[t]).collect());
        }
        let j = self.panel.factor_names.iter().position(|f| f == name)?;
        Some(self.periods.iter().map(|&t| self.panel.returns[t * self.panel.cols + j]).collect())
    }
}

/// How many refits named each name (each refit's names are distinct), most
/// first, ties by name.
fn refit_counts<'a>(per_refit: impl Iterator<Item = &'a [&'static str]>) -> Vec<(&'static str, usize)> {
    let mut counts: Vec<(&'static str, usize)> = Vec::new();
    for names in per_refit {
        for &name in names {
            match counts.iter_mut().find(|(n, _)| *n == name) {
                Some((_, c)) => *c += 1,
                None => counts.push((name, 1)),
            }
        }
    }
    counts.sort_by(|a, b| b.1.cmp(&a.1).then_with(|| a.0.cmp(b.0)));
    counts
}

/// Each strategy's returns, gross and net of costs, with its metrics.
fn strategy_results(
    oos: &OutOfSample<'_>,
    plan: &Schedule,
    fits: &[DateFits],
    spec: &ValidBacktestSpec,
    p: f64,
    lag: usize,
) -> Vec<StrategyResult> {
    let cost = spec.cost_bps / 1e4;
    let mut results = Vec::with_capacity(plan.strategies.len());
    for (si, s) in plan.strategies.iter().enumerate() {
        let mut missing = 0;
        let returns: Vec<f64> =
            oos.periods.iter().map(|&t| oos.port_return(&fits[oos.date_of(t)].held[si], t, &mut missing)).collect();
        let mut turnovers = Vec::new();
        let mut net = returns.clone();
        for d in 1..plan.dates.len() {
            let (a, b) = (&fits[d - 1].held[si], &fits[d].held[si]);
            let tv: f64 =
                a.weights.iter().zip(&b.weights).map(|(x, y)| (x - y).abs()).sum::<f64>() + (a.market - b.market).abs();
            turnovers.push(tv);
            net[plan.dates[d] - spec.window] -= cost * tv;
        }
        let average_turnover = if turnovers.is_empty() { 0.0 } else { stats::mean(&turnovers) };
        let mut gross: Vec<f64> = fits
            .iter()
            .map(|f| f.held[si].weights.iter().map(|w| w.abs()).sum::<f64>() + f.held[si].market.abs())
            .collect();
        gross.sort_by(f64::total_cmp);
        let gross_median = match gross.len() {
            0 => f64::NAN,
            n if n % 2 == 1 => gross[n / 2],
            n => 0.5 * (gross[n / 2 - 1] + gross[n / 2]),
        };
        let target_volatility = s
            .settings
            .as_ref()
            .filter(|v| v.normalization == Normalization::TargetVolatility)
            .map(|v| v.target_volatility);
        let warnings: Vec<WarningCount> = refit_counts(fits.iter().map(|f| f.held[si].warnings.as_slice()))
            .into_iter()
            .map(|(code, refits)| WarningCount { code: code.to_owned(), refits })
            .collect();
        let binding_limits: Vec<LimitCount> = refit_counts(fits.iter().map(|f| f.held[si].binding.as_slice()))
            .into_iter()
            .map(|(limit, refits)| LimitCount { limit: limit.to_owned(), refits })
            .collect();
        let limit_bound_refits = fits.iter().filter(|f| !f.held[si].binding.is_empty()).count();
        let refits_with = |code: &str| warnings.iter().find(|w| w.code == code).map_or(0, |w| w.refits);
        let (kappa_at_edge, components_at_cap) =
            (refits_with("kappa-at-grid-edge"), refits_with("components-at-grid-edge"));
        results.push(StrategyResult {
            id: s.id.clone(),
            name: s.name.clone(),
            settings: s.settings.as_ref().map(|v| v.settings().clone()),
            warnings,
            metrics: metrics(&returns, p, spec.cer_risk_aversion, lag),
            net_metrics: metrics(&net, p, spec.cer_risk_aversion, lag),
            returns,
            net_returns: net,
            average_turnover,
            gross_median,
            gross_max: gross.last().copied().unwrap_or(f64::NAN),
            target_volatility,
            kappa_at_edge,
            components_at_cap,
            chosen_k: fits.iter().map(|f| f.held[si].k).collect(),
            chosen_kappa: fits.iter().map(|f| f.held[si].kappa).collect(),
            top_sharpe_share: fits.iter().map(|f| f.held[si].top_share).collect(),
            missing_holding_returns: missing,
            limit_bound_refits,
            binding_limits,
        });
    }
    results
}

/// OOS Sharpe ratio against K, per scaling (NaN where K did not fit every window).
fn sweep_points(oos: &OutOfSample<'_>, plan: &Schedule, fits: &[DateFits], p: f64) -> Vec<SweepPoint> {
    let mut sweep = Vec::new();
    for (ci, &scaling) in plan.sweep_scalings.iter().enumerate() {
        for (ki, &k) in plan.sweep_ks.iter().enumerate() {
            let mut missing = 0;
            let mut series = Vec::with_capacity(oos.periods.len());
            for &t in &oos.periods {
                match &fits[oos.date_of(t)].sweep[ci][ki] {
                    Some(h) => series.push(oos.port_return(h, t, &mut missing)),
                    None => break,
                }
            }
            let sharpe = if series.len() == oos.periods.len() { p.sqrt() * stats::sharpe(&series) } else { f64::NAN };
            sweep.push(SweepPoint { scaling, k, sharpe });
        }
    }
    sweep
}

/// Whether the backtest sweeps the out-of-sample Sharpe ratio against K:
/// for every method built on principal components.
pub(crate) fn has_sweep(configured: &ValidSettings) -> bool {
    matches!(configured.method, Method::Components | Method::KnsRidge | Method::Ensemble | Method::Blend)
}

/// Configurations the configured method chooses among or combines in every
/// fit: each scaling for `auto` and the ensemble, else itself.
fn candidates(configured: &ValidSettings) -> usize {
    match (configured.method, configured.scaling) {
        (Method::Ensemble, _) | (Method::Components, Scaling::Auto) => Scaling::ALL.len(),
        _ => 1,
    }
}

/// Luck or skill: JKM tests against every other strategy (raw, Holm and
/// Romano–Wolf adjusted), and the probabilistic and deflated Sharpe ratios
/// of the configured method over the distinct candidates tried.
struct Inference {
    comparisons: Vec<Comparison>,
    psr: f64,
    dsr: f64,
    trials: Vec<String>,
}

/// Bootstrap draws of the Romano–Wolf step-down (fixed seed 0).
pub const ROMANO_WOLF_DRAWS: usize = 1000;

/// Whether a strategy is a benchmark rather than a candidate configuration:
/// the market, equal weight and the configured method's model-portfolio row.
fn is_benchmark(s: &StrategyResult) -> bool {
    s.name == MODEL || s.settings.as_ref().is_none_or(|v| v.method == Method::EqualWeight)
}

fn inference(results: &[StrategyResult], sweep: &[SweepPoint], p: f64, candidates: usize) -> Inference {
    let configured = &results[0].returns;
    let raw: Vec<stats::SharpeDifference> =
        results[1..].iter().map(|r| stats::jobson_korkie_memmel(configured, &r.returns, p)).collect();
    let holm = stats::holm(&raw.iter().map(|t| t.p_value).collect::<Vec<_>>());
    let others: Vec<&[f64]> = results[1..].iter().map(|r| r.returns.as_slice()).collect();
    let block = (configured.len() as f64).cbrt().ceil();
    let romano_wolf = stats::romano_wolf(configured, &others, ROMANO_WOLF_DRAWS, block, 0);
    let comparisons = results[1..]
        .iter()
        .zip(raw)
        .enumerate()
        .map(|(i, (r, test))| Comparison {
            against: r.name.clone(),
            test,
            p_holm: holm[i],
            p_romano_wolf: romano_wolf[i],
        })
        .collect();
    let sr = stats::sharpe(configured);
    let (skew, kurt) = stats::skew_kurt(configured);
    let psr = stats::probabilistic_sharpe(sr, 0.0, configured.len(), skew, kurt);
    // Trials (SPEC §13): every distinct candidate configuration evaluated, the
    // fitted strategies and the sweep points; benchmarks are not candidates, and
    // configurations whose out-of-sample Sharpe ratios agree to the last bit
    // (the same return series) count once.
    let mut seen: Vec<u64> = Vec::new();
    let mut trials = Vec::new();
    let mut trial_srs = Vec::new();
    let named = results
        .iter()
        .filter(|r| !is_benchmark(r))
        .map(|r| (r.name.clone(), r.metrics.sharpe))
        .chain(sweep.iter().map(|s| (format!("{} components, scaling {}", s.k, s.scaling), s.sharpe)));
    for (name, annual) in named {
        if !annual.is_finite() || seen.contains(&annual.to_bits()) {
            continue;
        }
        seen.push(annual.to_bits());
        trials.push(name);
        trial_srs.push(annual / p.sqrt());
    }
    // The configured method's own candidates (every scaling for `auto` and the
    // ensemble) are trials too (SPEC §11); those not already a row add to the count.
    let rows_of_members = results.iter().filter(|r| r.id.starts_with("scaling-")).count();
    for i in 0..candidates.saturating_sub(1).saturating_sub(rows_of_members) {
        trials.push(format!("member {} of the configured method", i + 2));
    }
    let dsr = if trials.len() >= 2 && trial_srs.len() >= 2 {
        stats::deflated_sharpe(sr, configured.len(), skew, kurt, stats::var(&trial_srs), trials.len())
    } else {
        f64::NAN
    };
    Inference { comparisons, psr, dsr, trials }
}

/// A regression with R² this close to 1 has no residual to test: its α and
/// t-statistics are rounding noise and are not reported.
pub const SPANNED_R2: f64 = 1e-10;

/// Alphas of every strategy against every benchmark set observed throughout.
fn alpha_tests(
    oos: &OutOfSample<'_>,
    sets: &[Vec<String>],
    results: &[StrategyResult],
    p: f64,
    lag: usize,
) -> Vec<AlphaTest> {
    let mut alphas = Vec::new();
    for set in sets {
        let Some(xs) = set.iter().map(|n| oos.series_of(n)).collect::<Option<Vec<Vec<f64>>>>() else { continue };
        if xs.iter().any(|x| x.iter().any(|v| !v.is_finite())) {
            continue;
        }
        for r in results {
            if let Some(reg) = stats::ols(&r.returns, &xs, lag) {
                let note = if r.id == MARKET && set.iter().any(|b| b == MARKET) {
                    Some("the strategy is one of its benchmarks".to_owned())
                } else if reg.r2 >= 1.0 - SPANNED_R2 {
                    Some(format!("R² is 1 to within {SPANNED_R2:e}: the benchmarks span the strategy"))
                } else {
                    None
                };
                let nan_if_spanned = |v: f64| if note.is_some() { f64::NAN } else { v };
                alphas.push(AlphaTest {
                    strategy: r.name.clone(),
                    benchmarks: set.clone(),
                    alpha: nan_if_spanned(p * reg.coef[0]),
                    t_nw: nan_if_spanned(reg.coef[0] / reg.se_nw[0]),
                    t_robust: nan_if_spanned(reg.coef[0] / reg.se_robust[0]),
                    r2: reg.r2,
                    note,
                });
            }
        }
    }
    alphas
}

/// Runs every strategy over every refit date, with `threads` workers over
/// dates; `progress` is called after each strategy at each date.
///
/// # Errors
/// [`BacktestError::Spec`] for a specification checked against another
/// history, [`BacktestError::Window`] naming the strategy and date of a
/// failed fit, [`BacktestError::Stopped`] when `stop` fires.
pub fn run(
    panel: &ReturnPanel,
    configured: &ValidSettings,
    spec: &ValidBacktestSpec,
    progress: &(dyn Fn(Progress) + Sync),
    stop: &Stop,
) -> Result<BacktestResult, BacktestError> {
    if !spec.fits_shape(panel) {
        return Err(BacktestError::Spec {
            field: "returns".into(),
            reason: "the specification was checked against a history of another shape".into(),
        });
    }
    // One frequency for the whole history (SPEC §13), fixed for every strategy's refits.
    let (configured, _) = configured.for_panel(panel).map_err(BacktestError::History)?;
    let configured = &configured;
    let plan = Schedule::new(panel, configured, spec);
    let ticker = Ticker { done: AtomicUsize::new(0), total: plan.steps(configured), report: progress };
    let mut fits = fit_all_dates(panel, configured, spec, &plan, &ticker, stop)?;
    let constraints = ConstraintSet::of(configured);
    if configured.implementation_active() {
        implement_all(panel, configured, spec, &plan, &mut fits, &ticker, stop)?;
    }
    let last_fit = portfolio_to_hold(panel, configured, spec, &fits, stop)?;
    ticker.tick(fit_steps(Some(configured)) + usize::from(configured.implementation_active()));
    let p = f64::from(configured.periods_per_year());
    let oos = OutOfSample { panel, periods: (spec.window..panel.rows).collect(), window: spec.window, step: spec.step };
    let lag = spec.nw_lag.unwrap_or_else(|| stats::default_nw_lag(oos.periods.len()));
    let strategies = strategy_results(&oos, &plan, &fits, spec, p, lag);
    let sweep = sweep_points(&oos, &plan, &fits, p);
    let Inference { comparisons, psr, dsr, trials } = inference(&strategies, &sweep, p, candidates(configured));
    let alphas = alpha_tests(&oos, spec.benchmark_sets(), &strategies, p, lag);
    // The pricing test needs the same K components at every refit: the
    // configured fits when they have them, else the sweep's fixed-K fits.
    let per_date_held: Vec<&[Held]> = fits.iter().map(|f| f.held.as_slice()).collect();
    let per_date_sweep: Vec<&[Vec<Option<Held>>]> = fits.iter().map(|f| f.sweep.as_slice()).collect();
    let per_date_basis: Vec<Option<&Held>> = fits.iter().map(|f| f.basis.as_ref()).collect();
    let sweep_index = plan.sweep_scalings.iter().position(|&sc| sc == configured.scaling);
    let sweep_fits = SweepFits { fits: &per_date_sweep, basis: &per_date_basis, index: sweep_index };
    let pricing = pricing_test(&oos, &per_date_held, &sweep_fits, lag, configured);
    // The specification as run: the sweep's K and the benchmark sets resolved.
    let resolved = BacktestSpec {
        sweep_max_k: Some(spec.sweep_max_k()),
        benchmark_sets: spec.benchmark_sets().to_vec(),
        ..spec.spec().clone()
    };
    Ok(BacktestResult {
        provenance: Provenance::of(panel, configured, "as given to the backtest"),
        spec: resolved,
        periods_per_year: configured.periods_per_year(),
        periods: oos.periods.iter().map(|&t| label(panel, t)).collect(),
        refits: plan.dates.len(),
        strategies,
        sweep,
        comparisons,
        psr,
        dsr,
        trials,
        alphas,
        pricing,
        last_fit,
        nw_lag: lag,
        constraints,
    })
}

/// The portfolio to hold now: the configured method's full fit on the
/// latest window of the data (its last `window` periods, or all of them
/// when expanding), from the weights it held after the last refit.
fn portfolio_to_hold(
    panel: &ReturnPanel,
    configured: &ValidSettings,
    spec: &ValidBacktestSpec,
    fits: &[DateFits],
    stop: &Stop,
) -> Result<Option<LatestFit>, BacktestError> {
    let end = panel.rows;
    let start = if spec.expanding { 0 } else { end - spec.window };
    let mut window = sub_panel(panel, start, end);
    // Trades from the weights held matter only to the implementation stage.
    if let Some(before) = fits.last().map(|f| &f.held[0]).filter(|_| configured.implementation_active()) {
        window.previous_weights =
            panel.factor_names.iter().cloned().zip(before.weights.iter().copied()).filter(|(_, w)| *w != 0.0).collect();
        if panel.market.is_some() {
            let name = panel.market_name.clone().unwrap_or_else(|| MARKET.to_owned());
            window.previous_weights.push((name.clone(), before.market));
            window.market_name = Some(name);
        }
    }
    let opts = FitOptions { threads: 1, stop: stop.clone(), ..FitOptions::default() };
    let fit = estimator::fit_with(&window, configured, &opts).map_err(|e| match e {
        EstimateError::Cancelled | EstimateError::DeadlineExceeded => BacktestError::Stopped(e),
        e => BacktestError::Window { strategy: "configured".into(), period: "the latest window".into(), source: e },
    })?;
    Ok(Some(LatestFit { first_period: label(panel, start), last_period: label(panel, end - 1), fit }))
}

/// The sweep's fixed-K fits per date and scaling, and per date the loadings
/// of the configured scaling's largest fitted K.
struct SweepFits<'a> {
    fits: &'a [&'a [Vec<Option<Held>>]],
    basis: &'a [Option<&'a Held>],
    index: Option<usize>,
}

/// Time-series regressions of every factor observed throughout the
/// out-of-sample span on the out-of-sample returns of the configured
/// scaling's first K components (and the market, when there is one); K is
/// the one the configured method chose most often, at most the sweep's
/// largest K when the configured fits do not all have that many.
fn pricing_test(
    oos: &OutOfSample<'_>,
    held: &[&[Held]],
    sweep: &SweepFits<'_>,
    lag: usize,
    configured: &ValidSettings,
) -> Option<PricingTest> {
    // A K-component model is a statement only where K is chosen: the ridge on
    // every component spans the factors themselves.
    if configured.method != Method::Components {
        return None;
    }
    let mut counts = std::collections::BTreeMap::new();
    for h in held {
        *counts.entry(h[0].k).or_insert(0usize) += 1;
    }
    let mut k = counts.iter().max_by_key(|(k, c)| (**c, std::cmp::Reverse(**k))).map(|(k, _)| *k)?;
    let fits: Vec<&Held> = if held.iter().all(|h| h[0].components.len() >= k) {
        held.iter().map(|h| &h[0]).collect()
    } else {
        // The sweep holds fixed-K fits up to its largest K; every date must
        // have the K-component fit, whose loadings are the first K of the basis.
        let si = sweep.index?;
        k = k.min(sweep.fits.first().and_then(|d| d.get(si)).map_or(0, Vec::len));
        if k == 0 {
            return None;
        }
        let all_fit = sweep.fits.iter().all(|d| d.get(si).and_then(|ks| ks.get(k - 1)).is_some_and(Option::is_some));
        if !all_fit {
            return None;
        }
        sweep.basis.iter().copied().collect::<Option<_>>()?
    };
    let panel = oos.panel;
    let cols = panel.cols;
    let m = panel.market.as_deref();
    let mut regressors: Vec<Vec<f64>> = vec![Vec::with_capacity(oos.periods.len()); k];
    for &t in &oos.periods {
        let h = fits[oos.date_of(t)];
        for (c, reg) in regressors.iter_mut().enumerate() {
            let load = h.components.get(c)?;
            let mut v = 0.0;
            for j in 0..cols {
                if load[j] != 0.0 {
                    let x = panel.returns[t * cols + j];
                    v += load[j] * (x - h.betas[j] * m.map_or(0.0, |m| m[t]));
                }
            }
            reg.push(v);
        }
    }
    if let Some(m) = m {
        regressors.push(oos.periods.iter().map(|&t| m[t]).collect());
    }
    let assets: Vec<Vec<f64>> = (0..cols)
        .map(|j| oos.periods.iter().map(|&t| panel.returns[t * cols + j]).collect::<Vec<f64>>())
        .filter(|s| s.iter().all(|v| v.is_finite()))
        .collect();
    let significant = assets
        .iter()
        .filter_map(|y| stats::ols(y, &regressors, lag))
        .filter(|r| (r.coef[0] / r.se_nw[0]).abs() > 1.96)
        .count();
    Some(PricingTest { k, assets: assets.len(), significant, grs: stats::grs(&assets, &regressors) })
}

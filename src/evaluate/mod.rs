//! Out-of-sample evaluation (SPEC §9): rolling or expanding refits, the
//! configured method beside its baselines on the same dates, a sweep of
//! out-of-sample Sharpe ratio against K, and the statistics that tell luck
//! from skill. Pure: no async runtime, no protobuf types.
//!
//! Weights fitted on periods [t − L, t) (or [0, t) when expanding) are held
//! over [t, t + step); the out-of-sample return is p_t = w'r_t + w_m m_t. No
//! step of a fit sees a period at or after t.

pub mod error;
pub mod inference;
pub mod provenance;
pub mod refits;
pub mod results;
pub mod spec;
pub mod stats;
pub mod strategies;
pub mod verdict;

pub use error::BacktestError;
pub use inference::{ROMANO_WOLF_DRAWS, SPANNED_R2};
pub use provenance::Provenance;
pub use results::*;
pub use spec::{BacktestBudget, BacktestSpec, ValidBacktestSpec};
pub use strategies::{CONFIGURED, ConstraintSet, KNS_PUBLISHED, KNS_SHARPE, MARKET, MODEL, Strategy, strategies};

use std::sync::atomic::AtomicUsize;

use crate::estimator::{Normalization, ReturnPanel, Stop, ValidSettings};
use inference::inference as infer;
use inference::{Inference, SweepFits, alpha_tests, pricing_test};
use refits::{
    DateFits, Held, OutOfSample, Schedule, Ticker, fit_all_dates, implement_all, label, portfolio_to_hold, refit_counts,
};
use strategies::{candidates, fit_steps};

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
    let Inference { comparisons, psr, dsr, trials } = infer(&strategies, &sweep, p, candidates(configured));
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

//! The refits: the schedule of dates, the model fits per date (in parallel
//! over dates), the implementation stage per strategy (dates in order), and
//! the portfolio to hold on the latest window.

use std::sync::atomic::{AtomicUsize, Ordering};

use super::error::BacktestError;
use super::results::{LatestFit, Progress};
use super::spec::ValidBacktestSpec;
use super::strategies::{MARKET, MODEL, Strategy, fit_steps, strategies, sweep_scalings};
use crate::estimator::desk::{DeskWindow, Holdings};
use crate::estimator::fanout;
use crate::estimator::{self, EstimateError, FitOptions, ReturnPanel, Scaling, Stop, ValidSettings, WeightSet};

/// One refit's outcome for one strategy.
#[derive(Clone, Debug)]
pub(super) struct Held {
    pub(super) weights: Vec<f64>,
    pub(super) market: f64,
    pub(super) k: usize,
    pub(super) kappa: f64,
    pub(super) top_share: f64,
    /// The model's annualised Sharpe ratio behind γ* (SPEC §10): held-out when cross-validated.
    pub(super) sharpe_model: f64,
    /// Codes of every warning the fit (and its implementation stage) raised, sorted, once each.
    pub(super) warnings: Vec<&'static str>,
    /// The limits that bound at the implementation stage, sorted, once each
    /// (empty: the volatility target set the risk).
    pub(super) binding: Vec<&'static str>,
    /// Component loadings (configured strategy only) and betas.
    pub(super) components: Vec<Vec<f64>>,
    pub(super) betas: Vec<f64>,
}

pub(super) fn sub_panel(panel: &ReturnPanel, start: usize, end: usize) -> ReturnPanel {
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

pub(super) fn label(panel: &ReturnPanel, t: usize) -> String {
    panel.period_labels.get(t).cloned().unwrap_or_else(|| format!("#{t}"))
}

/// What the return series need of a fit: weights, K, κ, no loadings.
pub(super) fn held_weights(ws: &WeightSet) -> Held {
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
pub(super) fn codes(warnings: &[estimator::Warning]) -> Vec<&'static str> {
    let mut c: Vec<&'static str> = warnings.iter().map(|w| w.code.word()).collect();
    c.sort_unstable();
    c.dedup();
    c
}

/// [`held_weights`] with the component loadings and betas, for the pricing test.
pub(super) fn held_from(ws: &WeightSet) -> Held {
    Held {
        components: ws.components.iter().map(|c| c.loadings.clone()).collect(),
        betas: ws.factors.iter().map(|f| f.market_beta).collect(),
        ..held_weights(ws)
    }
}

/// The refit dates and what is fitted at each: the strategies, and the
/// sweep's scalings and K values.
pub(super) struct Schedule {
    /// Refit dates: the first out-of-sample period of each holding span.
    pub(super) dates: Vec<usize>,
    pub(super) strategies: Vec<Strategy>,
    pub(super) sweep_ks: Vec<usize>,
    pub(super) sweep_scalings: Vec<Scaling>,
}

impl Schedule {
    pub(super) fn new(panel: &ReturnPanel, configured: &ValidSettings, spec: &ValidBacktestSpec) -> Schedule {
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
    pub(super) fn steps(&self, configured: &ValidSettings) -> usize {
        let per_date = self.strategies.iter().map(|s| fit_steps(s.settings.as_ref())).sum::<usize>()
            + self.sweep_scalings.len() * self.sweep_ks.len()
            + self.staged(configured);
        let latest = fit_steps(Some(configured)) + usize::from(configured.implementation_active());
        self.dates.len() * per_date + latest
    }

    /// Strategies the implementation stage runs on at every date.
    pub(super) fn staged(&self, configured: &ValidSettings) -> usize {
        if !configured.implementation_active() {
            return 0;
        }
        self.strategies.iter().filter(|s| s.settings.is_some() && s.name != MODEL).count()
    }
}

/// Counts progress steps across workers and reports each to the caller.
pub(super) struct Ticker<'a> {
    pub(super) done: AtomicUsize,
    pub(super) total: usize,
    pub(super) report: &'a (dyn Fn(Progress) + Sync),
}

impl Ticker<'_> {
    /// `steps` more done.
    pub(super) fn tick(&self, steps: usize) {
        let done = self.done.fetch_add(steps, Ordering::Relaxed) + steps;
        (self.report)(Progress { done: done.min(self.total), total: self.total });
    }
}

/// Everything fitted at one refit date.
pub(super) struct DateFits {
    pub(super) held: Vec<Held>,
    pub(super) sweep: Vec<Vec<Option<Held>>>,
    /// The configured scaling's loadings at the sweep's largest fitted K.
    pub(super) basis: Option<Held>,
}

/// The market itself, held as a strategy.
pub(super) fn market_held(cols: usize) -> Held {
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
pub(super) fn fit_date(
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
                let settings = &settings.model_only();
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
        let settings = configured.with_scaling(sc).model_only();
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
pub(super) fn fit_all_dates(
    panel: &ReturnPanel,
    configured: &ValidSettings,
    spec: &ValidBacktestSpec,
    plan: &Schedule,
    ticker: &Ticker<'_>,
    stop: &Stop,
) -> Result<Vec<DateFits>, BacktestError> {
    let one = |d: usize| fit_date(panel, configured, spec, plan, d, ticker, stop);
    // Refit dates are independent: split across threads, in date order.
    fanout::map_in_order((0..plan.dates.len()).collect(), spec.threads, one)
        .map_err(worker_panicked)?
        .into_iter()
        .collect()
}

/// A backtest worker that panicked, as the error the backtest ends with.
fn worker_panicked(_: fanout::WorkerPanicked) -> BacktestError {
    BacktestError::Stopped(EstimateError::Numerical { stage: "backtest", detail: "worker panicked".into() })
}

/// The implementation stage (SPEC §10), date after date: each fitted
/// strategy's model weights become the weights held, starting from what it
/// held after the previous refit (nothing before the first). The model-
/// portfolio row and the market keep their weights. Strategies are
/// independent of each other, so they are split across `spec.threads`
/// workers; each strategy's dates run in order, so results do not depend on
/// the thread count.
pub(super) fn implement_all(
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
    let items: Vec<(usize, &mut Vec<Held>)> = todo.iter().copied().zip(columns.iter_mut()).collect();
    let results = fanout::map_in_order(items, spec.threads, |(si, col)| one(si, col)).map_err(worker_panicked)?;
    for (&si, col) in todo.iter().zip(columns) {
        for (f, h) in fits.iter_mut().zip(col) {
            f.held[si] = h;
        }
    }
    results.into_iter().collect()
}

/// What every strategy's run of the implementation stage shares.
pub(super) struct StageRun<'a> {
    pub(super) panel: &'a ReturnPanel,
    pub(super) configured: &'a ValidSettings,
    pub(super) spec: &'a ValidBacktestSpec,
    pub(super) plan: &'a Schedule,
    pub(super) ticker: &'a Ticker<'a>,
    pub(super) stop: &'a Stop,
}

/// One strategy's implemented weights at every date, in date order.
pub(super) fn implement_strategy(run: &StageRun<'_>, si: usize, held: &mut [Held]) -> Result<(), BacktestError> {
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
        h.warnings.extend(warnings.iter().map(|w| w.code.word()));
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

/// The portfolio to hold now: the configured method's full fit on the
/// latest window of the data (its last `window` periods, or all of them
/// when expanding), from the weights it held after the last refit.
pub(super) fn portfolio_to_hold(
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

/// The out-of-sample span: its periods and each period's holding.
pub(super) struct OutOfSample<'a> {
    pub(super) panel: &'a ReturnPanel,
    /// Out-of-sample period indices.
    pub(super) periods: Vec<usize>,
    pub(super) window: usize,
    pub(super) step: usize,
}

impl OutOfSample<'_> {
    /// The refit date whose weights are held in period `t`.
    pub(super) fn date_of(&self, t: usize) -> usize {
        (t - self.window) / self.step
    }

    /// p_t = w'r_t + w_m m_t; a missing factor return counts as 0 (and is counted).
    pub(super) fn port_return(&self, h: &Held, t: usize, missing: &mut usize) -> f64 {
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
    pub(super) fn series_of(&self, name: &str) -> Option<Vec<f64>> {
        if name == MARKET {
            return self.panel.market.as_ref().map(|m| self.periods.iter().map(|&t| m[t]).collect());
        }
        let j = self.panel.factor_names.iter().position(|f| f == name)?;
        Some(self.periods.iter().map(|&t| self.panel.returns[t * self.panel.cols + j]).collect())
    }
}

/// How many refits named each name (each refit's names are distinct), most
/// first, ties by name.
pub(super) fn refit_counts<'a>(per_refit: impl Iterator<Item = &'a [&'static str]>) -> Vec<(&'static str, usize)> {
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

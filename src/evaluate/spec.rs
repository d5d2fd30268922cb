//! The backtest specification as a caller gives it ([`BacktestSpec`]), its
//! validation against the history and the estimator settings
//! ([`BacktestSpec::check`]), and the resulting [`ValidBacktestSpec`], the
//! only form [`super::run`] accepts. Validation also estimates the work and
//! memory of the run ([`BacktestBudget`]) from its shape alone, before any
//! fit, so that a server can refuse a request it could not afford.

use serde::Serialize;

use super::error::BacktestError;
use super::strategies::{MARKET, strategies};
use crate::estimator::{InputError, ReturnPanel, ValidSettings, window};

/// Largest K of the sweep when the caller does not set one.
pub const DEFAULT_SWEEP_MAX_K: usize = 10;
/// Most benchmark sets one backtest may test.
pub const MAX_BENCHMARK_SETS: usize = 64;
/// Largest trading cost accepted, basis points (100%).
pub const MAX_COST_BPS: f64 = 10_000.0;
/// Largest certainty-equivalent risk aversion accepted.
pub const MAX_CER_RISK_AVERSION: f64 = 1e6;
/// Most worker threads over refit dates.
pub const MAX_THREADS: usize = 256;

/// How a backtest runs, as the caller gives it. Defaults: 120-period rolling
/// window, monthly refits, 10 bp costs, the sweep up to K = 10.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct BacktestSpec {
    /// Estimation window length L (the minimum length when expanding).
    pub window: usize,
    /// Expanding instead of rolling windows.
    pub expanding: bool,
    /// Refit every `step` periods.
    pub step: usize,
    /// Linear trading cost in basis points of turnover.
    pub cost_bps: f64,
    /// Risk aversion γ of the certainty-equivalent return.
    pub cer_risk_aversion: f64,
    /// Largest K of the OOS-Sharpe-against-K sweep (0 turns the sweep off);
    /// `None` = [`DEFAULT_SWEEP_MAX_K`], lowered to what the window supports.
    pub sweep_max_k: Option<usize>,
    /// Benchmark sets for alphas: names of factors or [`MARKET`]. The market
    /// alone is always added when the panel has a market.
    pub benchmark_sets: Vec<Vec<String>>,
    /// Newey–West lag; `None` = ⌊4(T/100)^{2/9}⌋.
    pub nw_lag: Option<usize>,
    /// Also run every baseline strategy.
    pub baselines: bool,
    /// Worker threads over refit dates (results do not depend on it).
    pub threads: usize,
}

impl Default for BacktestSpec {
    fn default() -> Self {
        BacktestSpec {
            window: 120,
            expanding: false,
            step: 1,
            cost_bps: 10.0,
            cer_risk_aversion: 3.0,
            sweep_max_k: None,
            benchmark_sets: Vec::new(),
            nw_lag: None,
            baselines: true,
            threads: 1,
        }
    }
}

/// What a backtest will cost, known from its shape before any fit.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
pub struct BacktestBudget {
    /// Refit dates.
    pub refits: u64,
    /// Estimator fits in all: every strategy at every date (once per
    /// bootstrap draw as well when bagged), every K of the sweep, and one per
    /// run of the implementation stage (a stage costs about one fit: see
    /// DEVELOPERS.md, "Benchmarks").
    pub fits: u64,
    /// Runs of the implementation stage (strategies with a limit or a cost,
    /// at every date); counted in `fits` too.
    pub stages: u64,
    /// Bootstrap draws per bagged fit (0: not bagged).
    pub draws: u64,
    /// Return cells read by all fits together (a measure of the work).
    pub cells: u64,
    /// Peak memory of the run, bytes (an upper estimate: retained results
    /// plus one window's working set per thread).
    pub bytes: u64,
}

/// A [`BacktestSpec`] that passed [`BacktestSpec::check`] for one history and
/// one estimator configuration.
#[derive(Clone, Debug, PartialEq)]
pub struct ValidBacktestSpec {
    inner: BacktestSpec,
    sweep_max_k: usize,
    periods: usize,
    factors: usize,
    benchmark_sets: Vec<Vec<String>>,
    budget: BacktestBudget,
}

impl std::ops::Deref for ValidBacktestSpec {
    type Target = BacktestSpec;
    fn deref(&self) -> &BacktestSpec {
        &self.inner
    }
}

impl ValidBacktestSpec {
    /// The specification as given (with the sweep's K resolved).
    pub fn spec(&self) -> &BacktestSpec {
        &self.inner
    }

    /// Largest K of the sweep (0: no sweep).
    pub fn sweep_max_k(&self) -> usize {
        self.sweep_max_k
    }

    /// The benchmark sets tested, the market alone first when there is one.
    pub fn benchmark_sets(&self) -> &[Vec<String>] {
        &self.benchmark_sets
    }

    /// The estimated cost of the run.
    pub fn budget(&self) -> BacktestBudget {
        self.budget
    }

    /// Whether this specification was checked against a history of this shape.
    pub(super) fn fits_shape(&self, panel: &ReturnPanel) -> bool {
        panel.rows == self.periods && panel.cols == self.factors
    }
}

fn spec_err(field: impl Into<String>, reason: impl Into<String>) -> BacktestError {
    BacktestError::Spec { field: field.into(), reason: reason.into() }
}

/// Largest K a window of `window` periods and `factors` factors can support
/// under `settings`: centring removes one dimension, demarketing another.
pub fn window_rank(window: usize, factors: usize, has_market: bool, settings: &ValidSettings) -> usize {
    let lost = 1 + usize::from(has_market && settings.demarket);
    let cap = settings.max_components as usize;
    window.saturating_sub(lost).min(factors).min(cap)
}

impl BacktestSpec {
    /// Validates the history's structure and values, every option against its
    /// range and against `panel` and `settings`, and estimates the run's cost.
    ///
    /// # Errors
    /// [`BacktestError::Spec`] naming the first option out of range (with the
    /// request's field name: `window`, `step`, `sweep_max_k`, `cost_bps`,
    /// `cer_risk_aversion`, `threads`, `nw_lag`, `benchmark_sets[i].names[j]`);
    /// [`BacktestError::History`] for a value no window may hold or a missing
    /// market return (the market is held in every period).
    pub fn check(self, panel: &ReturnPanel, settings: &ValidSettings) -> Result<ValidBacktestSpec, BacktestError> {
        let s = &self;
        // Every period is held out of sample by some refit: its values must be
        // usable even where no estimation window will check them.
        let history = |e: InputError| BacktestError::History(e.into());
        window::check_structure(panel).map_err(history)?;
        window::check_values(panel, settings.missing_policy).map_err(history)?;
        let periods = panel.rows;
        let min_window = window::min_periods_required(settings);
        if s.window < min_window {
            return Err(spec_err(
                "window",
                format!(
                    "{} periods is below the estimator's minimum of {min_window} (settings.min_periods, and 8 \
                     periods per cross-validation fold)",
                    s.window
                ),
            ));
        }
        if s.window >= periods {
            return Err(spec_err(
                "window",
                format!("{periods} periods leave nothing out of sample after a {}-period window", s.window),
            ));
        }
        let out_of_sample = periods - s.window;
        if s.step == 0 || s.step > out_of_sample {
            return Err(spec_err(
                "step",
                format!("{} is outside 1..={out_of_sample} (the out-of-sample periods)", s.step),
            ));
        }
        if !(s.cost_bps.is_finite() && (0.0..=MAX_COST_BPS).contains(&s.cost_bps)) {
            return Err(spec_err("cost_bps", format!("{} is outside [0, {MAX_COST_BPS}]", s.cost_bps)));
        }
        let ra = s.cer_risk_aversion;
        if !(ra.is_finite() && ra > 0.0 && ra <= MAX_CER_RISK_AVERSION) {
            return Err(spec_err("cer_risk_aversion", format!("{ra} is outside (0, {MAX_CER_RISK_AVERSION}]")));
        }
        if s.threads == 0 || s.threads > MAX_THREADS {
            return Err(spec_err("threads", format!("{} is outside 1..={MAX_THREADS}", s.threads)));
        }
        if let Some(lag) = s.nw_lag
            && lag >= out_of_sample
        {
            return Err(spec_err("nw_lag", format!("{lag} is not below the {out_of_sample} out-of-sample periods")));
        }
        let has_market = panel.market.is_some();
        let rank = window_rank(s.window, panel.cols, has_market, settings);
        let sweep_max_k = match s.sweep_max_k {
            None => DEFAULT_SWEEP_MAX_K.min(rank),
            Some(k) if k > rank => {
                return Err(spec_err(
                    "sweep_max_k",
                    format!(
                        "{k} exceeds {rank}, the most components a {}-period window of {} factors supports \
                         (at most settings.max_components = {})",
                        s.window, panel.cols, settings.max_components
                    ),
                ));
            }
            Some(k) => k,
        };
        let benchmark_sets = check_benchmarks(&s.benchmark_sets, panel)?;
        let budget = estimate(s, panel, settings, sweep_max_k, benchmark_sets.len());
        let mut inner = self;
        inner.sweep_max_k = Some(sweep_max_k);
        Ok(ValidBacktestSpec { inner, sweep_max_k, periods, factors: panel.cols, benchmark_sets, budget })
    }
}

/// The market alone (when there is one), then each caller's set: names that
/// exist, each once per set, sets beyond the first copy dropped.
fn check_benchmarks(sets: &[Vec<String>], panel: &ReturnPanel) -> Result<Vec<Vec<String>>, BacktestError> {
    if sets.len() > MAX_BENCHMARK_SETS {
        return Err(spec_err("benchmark_sets", format!("{} sets; at most {MAX_BENCHMARK_SETS}", sets.len())));
    }
    let mut out: Vec<Vec<String>> = Vec::new();
    if panel.market.is_some() {
        out.push(vec![MARKET.to_owned()]);
    }
    for (i, set) in sets.iter().enumerate() {
        if set.is_empty() {
            return Err(spec_err(format!("benchmark_sets[{i}].names"), "an empty benchmark set"));
        }
        for (j, name) in set.iter().enumerate() {
            let field = || format!("benchmark_sets[{i}].names[{j}]");
            let known = (name == MARKET && panel.market.is_some()) || panel.factor_names.iter().any(|f| f == name);
            if !known {
                let shown = crate::estimator::error::truncate_for_display(name);
                return Err(spec_err(field(), format!("no factor or market named \"{shown}\"")));
            }
            if set[..j].contains(name) {
                let what = if name == MARKET { "the market" } else { "this name" };
                return Err(spec_err(field(), format!("{what} appears twice in the set")));
            }
        }
        if !out.contains(set) {
            out.push(set.clone());
        }
    }
    Ok(out)
}

/// Fits, cells and memory of a run, from its shape.
fn estimate(
    s: &BacktestSpec,
    panel: &ReturnPanel,
    settings: &ValidSettings,
    sweep_max_k: usize,
    benchmark_sets: usize,
) -> BacktestBudget {
    const F64: u64 = 8;
    let n = panel.cols as u64;
    let periods = panel.rows as u64;
    let window = s.window as u64;
    let out_of_sample = periods - window;
    let refits = out_of_sample.div_ceil(s.step as u64);
    let catalogue = strategies(settings, panel.market.is_some(), s.baselines);
    let strategies = catalogue.len() as u64;
    let sweep_scalings = super::strategies::sweep_scalings(settings, sweep_max_k).len() as u64;
    let k_sweep = sweep_max_k as u64;
    // Bagging refits every strategy once per bootstrap draw as well.
    let draws =
        if settings.aggregate == crate::estimator::Aggregate::Bagged { u64::from(settings.bootstrap_draws) } else { 0 };
    let per_date: u64 = catalogue.iter().map(|st| super::strategies::fit_steps(st.settings.as_ref()) as u64).sum();
    // The implementation stage runs per date on every fitted strategy but
    // the model-portfolio row, when the configured settings set a limit or a cost.
    let staged = if settings.implementation_active() {
        catalogue.iter().filter(|st| st.name != super::strategies::MODEL && st.settings.is_some()).count() as u64
    } else {
        0
    };
    let stages = refits.saturating_mul(staged);
    let fits = refits.saturating_mul(per_date + sweep_scalings * k_sweep).saturating_add(stages);
    // Expanding windows grow from L to the whole history: count the mean length.
    let mean_window = if s.expanding { (window + periods - 1) / 2 } else { window };
    let cells = fits.saturating_mul(mean_window.saturating_mul(n));
    // Retained per refit: every strategy's weights and market weight, the
    // configured fit's loadings (up to its largest K) and betas, each sweep
    // point's weights, and the configured scaling's sweep loadings.
    let k_configured = window_rank(s.window, panel.cols, panel.market.is_some(), settings) as u64;
    let per_refit = strategies * (n + 4)
        + n * (k_configured + 1)
        + sweep_scalings * k_sweep * (n + 4)
        + if sweep_scalings > 0 { n * k_sweep } else { 0 };
    let retained = refits.saturating_mul(per_refit);
    // Out-of-sample series (gross and net, per strategy) and alpha regressions.
    let series = out_of_sample.saturating_mul(2 * strategies + sweep_scalings * k_sweep + n + 2);
    let alphas = out_of_sample.saturating_mul(benchmark_sets as u64 * (n.min(64) + 2));
    // One window's working set per thread, the largest window's: the model
    // fits run first, then the stage (SPEC §10), so the larger of the two.
    let largest = if s.expanding { panel.rows } else { s.window };
    let model = crate::estimator::budget::model_bytes(largest, panel.cols, settings);
    let stage = if staged > 0 { crate::estimator::budget::stage_bytes(largest, panel.cols) } else { 0 };
    let working = model.max(stage).saturating_mul(s.threads as u64);
    let words = retained.saturating_add(series).saturating_add(alphas).saturating_add(periods * n);
    BacktestBudget { refits, fits, stages, draws, cells, bytes: words.saturating_mul(F64).saturating_add(working) }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimator::Settings;

    fn panel(rows: usize, cols: usize) -> ReturnPanel {
        crate::demo::synthetic_panel(3, rows, cols)
    }

    fn field_of(r: Result<ValidBacktestSpec, BacktestError>) -> String {
        match r {
            Err(BacktestError::Spec { field, .. }) => field,
            other => panic!("expected a spec error, got {other:?}"),
        }
    }

    #[test]
    fn every_option_is_range_checked_and_named() {
        let p = panel(200, 6);
        let s = Settings::default().check().unwrap();
        let check = |spec: BacktestSpec| spec.check(&p, &s);
        let d = BacktestSpec::default;
        assert_eq!(field_of(check(BacktestSpec { window: 10, ..d() })), "window");
        assert_eq!(field_of(check(BacktestSpec { window: 200, ..d() })), "window");
        assert_eq!(field_of(check(BacktestSpec { step: 0, ..d() })), "step");
        assert_eq!(field_of(check(BacktestSpec { step: 81, ..d() })), "step");
        assert!(check(BacktestSpec { step: 80, ..d() }).is_ok());
        assert_eq!(field_of(check(BacktestSpec { step: usize::MAX, ..d() })), "step");
        assert_eq!(field_of(check(BacktestSpec { sweep_max_k: Some(4_000_000_000), ..d() })), "sweep_max_k");
        assert_eq!(field_of(check(BacktestSpec { sweep_max_k: Some(7), ..d() })), "sweep_max_k");
        assert_eq!(check(BacktestSpec { sweep_max_k: Some(6), ..d() }).unwrap().sweep_max_k(), 6);
        // Unset: the default K of 10, lowered to the six factors.
        assert_eq!(check(d()).unwrap().sweep_max_k(), 6);
        for bad in [f64::NAN, f64::INFINITY, -1.0, 10_000.5] {
            assert_eq!(field_of(check(BacktestSpec { cost_bps: bad, ..d() })), "cost_bps");
        }
        for bad in [f64::NAN, 0.0, -1.0, f64::INFINITY] {
            assert_eq!(field_of(check(BacktestSpec { cer_risk_aversion: bad, ..d() })), "cer_risk_aversion");
        }
        assert_eq!(field_of(check(BacktestSpec { threads: 0, ..d() })), "threads");
        assert_eq!(field_of(check(BacktestSpec { nw_lag: Some(80), ..d() })), "nw_lag");
        // Five folds need 40 periods, above min_periods = 24.
        let five = Settings { folds: 5, ..Settings::default() }.check().unwrap();
        assert_eq!(field_of(BacktestSpec { window: 30, ..d() }.check(&p, &five)), "window");
        assert!(BacktestSpec { window: 40, ..d() }.check(&p, &five).is_ok());
    }

    #[test]
    fn benchmark_names_must_exist_once_each() {
        let p = panel(200, 6);
        let s = Settings::default().check().unwrap();
        let sets = |v: Vec<Vec<&str>>| BacktestSpec {
            benchmark_sets: v.into_iter().map(|s| s.into_iter().map(str::to_owned).collect()).collect(),
            ..BacktestSpec::default()
        };
        let f0 = p.factor_names[0].as_str();
        assert_eq!(field_of(sets(vec![vec![f0, "nope"]]).check(&p, &s)), "benchmark_sets[0].names[1]");
        assert_eq!(field_of(sets(vec![vec![f0], vec![MARKET, MARKET]]).check(&p, &s)), "benchmark_sets[1].names[1]");
        assert_eq!(field_of(sets(vec![vec![]]).check(&p, &s)), "benchmark_sets[0].names");
        let many = vec![vec![f0]; MAX_BENCHMARK_SETS + 1];
        assert_eq!(field_of(sets(many).check(&p, &s)), "benchmark_sets");
        let ok = sets(vec![vec![f0, MARKET], vec![MARKET], vec![f0, MARKET]]).check(&p, &s).unwrap();
        assert_eq!(ok.benchmark_sets().len(), 2, "the market alone once, the caller's set once");
    }

    #[test]
    fn budget_grows_with_the_shape() {
        let s = Settings::default().check().unwrap();
        let small = BacktestSpec { step: 12, ..BacktestSpec::default() }.check(&panel(240, 8), &s).unwrap().budget();
        let big = BacktestSpec::default().check(&panel(600, 40), &s).unwrap().budget();
        assert_eq!(small.refits, 10);
        // 13 strategies with a market (the configured blend, 6 scalings, plug-in, Ledoit-Wolf,
        // 2 KNS ridges, equal weight, market) and the blend's sweep: the covariance basis × 8 K.
        assert_eq!(small.fits, 10 * (13 + 8));
        assert_eq!((small.stages, small.draws), (0, 0), "no limit, cost or bagging");
        assert_eq!(big.refits, 480);
        assert!(big.fits > small.fits && big.cells > small.cells && big.bytes > small.bytes);
        assert!(big.bytes < 256 << 20, "a 40-factor, 600-month research backtest is well within 256 MiB");
    }
}

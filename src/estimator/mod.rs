//! The pure estimator: a window of factor returns in, the shrunk
//! mean–variance portfolio of its principal components (by default the ridge
//! on every component of the covariance; the leading components of a scaling
//! such as Sharpe-scaled PCA on request) and its diagnostics out (SPEC §1–8,
//! §10, §13). No async runtime and no protobuf types live here.
//!
//! The entry point is [`fit`]: validate the window ([`ReturnWindow`]),
//! demarket and take moments, build the [`ComponentBasis`] of the chosen
//! scaling, choose K and κ by [`CrossValidation`], solve the shrunk
//! mean–variance problem on the components ([`ShrinkagePath`]) and normalise
//! the result into a [`WeightSet`].

pub mod basis;
pub mod bootstrap;
pub mod budget;
pub mod calibration;
pub mod components;
pub mod cv;
mod dense;
pub mod desk;
pub mod error;
pub(crate) mod fanout;
pub mod fingerprint;
pub mod frequency;
pub mod moments;
pub mod options;
pub mod output;
pub mod settings;
pub mod shrinkage;
pub mod stop;
pub mod warning;
pub mod weights;
pub mod window;

pub use basis::{ComponentBasis, EigenPath};
pub use calibration::Calibration;
pub use cv::{CrossValidation, CvSurface};
pub use dense::PARALLEL_FLOPS;
pub use desk::{BindingConstraint, Implementation, Limits};
pub use error::{EstimateError, InputError, Location, SettingsError};
pub use frequency::FrequencySource;
pub use moments::Moments;
pub use options::{FitOptions, PhaseTimes};
pub use output::{
    ComponentReport, Diagnostics, ESTIMATOR_VERSION, ExcludedReport, FactorReport, ScalingScore, WeightSet,
};
pub use settings::{
    Aggregate, Cap, Choice, CvCriterion, FittedChoice, MIN_LIMIT, Method, MissingPolicy, Normalization,
    RiskCalibration, Scaling, SettingInfo, Settings, SettingsPatch, ValidSettings, closest_name,
};
pub use shrinkage::{LedoitWolf, PlugIn, ShrinkagePath, kns_gamma, plug_in, plug_in_ledoit_wolf};
pub use stop::Stop;
pub use warning::{Warning, WarningCode, warning_meaning, warning_words};
pub use window::{Exclusion, ExclusionReason, ReturnPanel, ReturnWindow};

use std::time::{Duration, Instant};

pub use components::fit_component_sweep;
use components::{
    ComponentFit, KPolicy, Member, assemble_model, choose_scaling, direction_of, needs_held_out_risk, scaling_members,
};
use cv::fold_bounds;
use dense::Kernels;

/// Fits one window with default options.
///
/// # Errors
/// See [`fit_with`].
pub fn fit(panel: &ReturnPanel, settings: &ValidSettings) -> Result<WeightSet, EstimateError> {
    fit_with(panel, settings, &FitOptions::default())
}

/// Values in a window from which its fingerprint is hashed on a thread of
/// its own while the fit runs (when the fit has threads): about a 250 × 120
/// window, whose SHA-256 takes as long as a few small kernels.
const PARALLEL_HASH_VALUES: usize = 30_000;

/// Fits one window.
///
/// # Errors
/// [`EstimateError::Input`] for a malformed window (naming field, row and
/// column), [`EstimateError::TooManyComponents`] when a fixed K does not fit
/// the window, [`EstimateError::CriterionUnavailable`],
/// [`EstimateError::DegeneratePortfolio`], and [`EstimateError::Cancelled`] /
/// [`EstimateError::DeadlineExceeded`] when `options.stop` fires.
pub fn fit_with(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    options: &FitOptions,
) -> Result<WeightSet, EstimateError> {
    fit_with_phases(panel, settings, options).0
}

/// [`fit_with`], also reporting the time spent in each phase (as far as the
/// fit got when it fails).
pub fn fit_with_phases(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    options: &FitOptions,
) -> (Result<WeightSet, EstimateError>, PhaseTimes) {
    fit_full(panel, settings, options, true)
}

/// [`fit_with`] with the fingerprint left empty: for fits whose fingerprint
/// nobody reads (bootstrap draws, a backtest's refits before the latest),
/// which would otherwise hash their whole window every time.
pub(crate) fn fit_unhashed(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    options: &FitOptions,
) -> Result<WeightSet, EstimateError> {
    fit_full(panel, settings, options, false).0
}

fn fit_full(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    options: &FitOptions,
    hash: bool,
) -> (Result<WeightSet, EstimateError>, PhaseTimes) {
    let mut phases = PhaseTimes::default();
    // The frequency in force for this panel (SPEC §13), before anything is annualised.
    let (resolved, source) = match settings.for_panel(panel) {
        Ok(r) => r,
        Err(e) => return (Err(e), phases),
    };
    let settings = &resolved;
    // Large kernels of this fit may use its threads (see `dense`); folds and
    // draws on worker threads stay sequential inside. With threads to spare,
    // a large window's fingerprint is hashed on one of them meanwhile.
    let fit = |phases: &mut PhaseTimes| fit_phased(panel, settings, options, phases);
    let fingerprint = || fingerprint::fingerprint(panel, settings.settings());
    let (r, hashed) = if !hash {
        (fit(&mut phases), Some(String::new()))
    } else if options.threads > 1 && panel.returns.len() >= PARALLEL_HASH_VALUES {
        fanout::beside(fingerprint, || fit(&mut phases))
    } else {
        (fit(&mut phases), None)
    };
    let r = r.map(|mut ws| {
        ws.fingerprint = hashed.unwrap_or_else(fingerprint);
        ws.diagnostics.note_frequency(source);
        ws
    });
    if settings.bootstrap_draws == 0 {
        return (r, phases);
    }
    let mut mark = Instant::now();
    let r = r.and_then(|point| with_bootstrap(panel, settings, point, options)).map(|mut ws| {
        warning::merge_repeated_warnings(&mut ws.diagnostics.warnings);
        ws
    });
    lap(&mut mark, &mut phases.solve);
    (r, phases)
}

/// The stationary bootstrap around a point fit (SPEC §11): intervals, and
/// with `aggregate = bagged` the draws' mean weights, normalised again, in
/// place of the point fit's (the point fit's choices stay in the diagnostics).
fn with_bootstrap(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    point: WeightSet,
    options: &FitOptions,
) -> Result<WeightSet, EstimateError> {
    let (report, mean) = bootstrap::run(panel, settings, &point, options, &fit_unhashed)?;
    if settings.aggregate == Aggregate::Point {
        let mut ws = point;
        ws.diagnostics.bootstrap = Some(report);
        return Ok(ws);
    }
    let window = ReturnWindow::new(panel, settings)?;
    let market = if settings.demarket { window.market.as_deref() } else { None };
    let mom = Moments::compute(window.returns.as_ref(), market);
    let direction: Vec<f64> = window.used.iter().map(|&c| mean[c]).collect();
    // The mean of scaled portfolios is renormalised as a fixed direction (as the ensemble is).
    let as_average = Settings { method: Method::Ensemble, ..settings.settings().clone() }.check()?;
    let warnings = point.diagnostics.warnings.clone();
    // The point fit's risk calibration carries over to the draws' mean.
    let held_out = point.diagnostics.risk_calibration.map(|c| calibration::HeldOutRatio {
        measured: c.measured_ratio,
        standard_error: c.standard_error,
        corrected: 1.0 / c.factor,
        periods: c.held_out_periods,
    });
    let mut ws =
        weights::assemble(panel, &window, &mom, &as_average, &direction, None, held_out, warnings, &options.stop)?;
    let d = &point.diagnostics;
    ws.diagnostics.num_components = d.num_components;
    ws.diagnostics.kappa = d.kappa;
    ws.diagnostics.gamma = d.gamma;
    ws.diagnostics.components_cross_validated = d.components_cross_validated;
    ws.diagnostics.kappa_cross_validated = d.kappa_cross_validated;
    ws.diagnostics.cv_surface = d.cv_surface.clone();
    ws.diagnostics.cv_best_score = d.cv_best_score;
    ws.diagnostics.cv_sharpe = d.cv_sharpe;
    ws.diagnostics.chosen_scaling = d.chosen_scaling;
    ws.diagnostics.scaling_scores = d.scaling_scores.clone();
    ws.diagnostics.bootstrap = Some(report);
    for (f, p) in ws.factors.iter_mut().zip(&point.factors) {
        f.scale = p.scale;
    }
    ws.components = point.components;
    // The same window and settings as the point fit: its fingerprint.
    ws.fingerprint = point.fingerprint;
    ws.settings = settings.settings().clone();
    Ok(ws)
}

/// Adds the time since `*mark` to `slot` and moves the mark.
fn lap(mark: &mut Instant, slot: &mut Duration) {
    let now = Instant::now();
    *slot += now - *mark;
    *mark = now;
}

fn fit_phased(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    options: &FitOptions,
    ph: &mut PhaseTimes,
) -> Result<WeightSet, EstimateError> {
    options.stop.check()?;
    let mut mark = Instant::now();
    // Large kernels of this fit may use its threads (see `dense`).
    let kernels = Kernels::with_threads(options.threads);
    let window = ReturnWindow::new_with(panel, settings, kernels)?;
    lap(&mut mark, &mut ph.validate);
    let market = if settings.demarket { window.market.as_deref() } else { None };
    let mom = Moments::compute_with(window.returns.as_ref(), market, kernels);
    lap(&mut mark, &mut ph.moments);
    let mut warnings = Vec::new();
    match settings.method {
        Method::Components if settings.scaling == Scaling::Auto => {
            let members = scaling_members(&window, &mom, settings, options)?;
            lap(&mut mark, &mut ph.components);
            let scores: Vec<ScalingScore> = members.iter().map(Member::score).collect();
            let best = choose_scaling(&members);
            let Member { model, warnings: mut chosen_warnings, .. } =
                members.into_iter().nth(best).ok_or_else(|| EstimateError::NoFiniteScore {
                    reason: "no scaling gave a finite cross-validation score".into(),
                })?;
            warnings.append(&mut chosen_warnings);
            let chosen = Scaling::ALL[best];
            lap(&mut mark, &mut ph.solve);
            let r = assemble_model(panel, &window, &mom, settings, model, warnings, &options.stop).map(|mut ws| {
                ws.diagnostics.chosen_scaling = Some(chosen);
                ws.diagnostics.scaling_scores = scores;
                ws
            });
            lap(&mut mark, &mut ph.assemble);
            r
        }
        Method::Ensemble => {
            let members = scaling_members(&window, &mom, settings, options)?;
            lap(&mut mark, &mut ph.components);
            let scores: Vec<ScalingScore> = members.iter().map(Member::score).collect();
            // Each member normalised as the settings say, then the equal-weight average.
            let n = window.factors_used();
            let mut average = vec![0.0; n];
            for m in &members {
                let w = weights::normalized_weights(&window, &mom, &m.settings, &direction_of(&m.model))?;
                for (a, x) in average.iter_mut().zip(&w) {
                    *a += x / members.len() as f64;
                }
            }
            let risk = ensemble_risk(&members);
            lap(&mut mark, &mut ph.solve);
            let r = weights::assemble(panel, &window, &mom, settings, &average, None, risk, warnings, &options.stop)
                .map(|mut ws| {
                    ws.diagnostics.scaling_scores = scores;
                    ws
                });
            lap(&mut mark, &mut ph.assemble);
            r
        }
        Method::Components | Method::KnsRidge => {
            let policy = match (settings.method, settings.components.fixed()) {
                (Method::KnsRidge, _) => KPolicy::All,
                (_, Some(k)) => KPolicy::Fixed(k as usize),
                (_, None) => KPolicy::Grid,
            };
            let prepared = ComponentFit::prepare(&window, &mom, settings, policy, options)?;
            lap(&mut mark, &mut ph.components);
            let model = prepared.solve(settings, policy, options, &mut warnings)?;
            lap(&mut mark, &mut ph.solve);
            let r = assemble_model(panel, &window, &mom, settings, model, warnings, &options.stop);
            lap(&mut mark, &mut ph.assemble);
            r
        }
        Method::Blend => fit_blend(panel, &window, &mom, settings, options, warnings, ph, &mut mark),
        Method::PlugIn | Method::PlugInLedoitWolf => {
            let plug = if settings.method == Method::PlugIn {
                shrinkage::plug_in(&mom)?
            } else {
                shrinkage::plug_in_ledoit_wolf(&mom)?
            };
            if plug.singular {
                warnings.push(Warning {
                    code: WarningCode::SingularCovariance,
                    message: format!(
                        "the factor covariance has rank {} < {}; the minimum-norm least-squares solution is used",
                        plug.rank,
                        window.factors_used()
                    ),
                });
            }
            let risk = baseline_risk(&window, &mom, settings);
            lap(&mut mark, &mut ph.solve);
            let r =
                weights::assemble(panel, &window, &mom, settings, &plug.weights, None, risk, warnings, &options.stop);
            lap(&mut mark, &mut ph.assemble);
            r
        }
        Method::EqualWeight => {
            let n = window.factors_used();
            let direction = vec![1.0 / n as f64; n];
            let risk = baseline_risk(&window, &mom, settings);
            let r = weights::assemble(panel, &window, &mom, settings, &direction, None, risk, warnings, &options.stop);
            lap(&mut mark, &mut ph.assemble);
            r
        }
    }
}

/// The held-out volatility ratio of a baseline (SPEC §13): the method refitted
/// on the cross-validation's folds.
/// The unshrunk plug-in gets the window-length correction for its N
/// parameters (see [`calibration::held_out_ratio`]).
fn baseline_risk(window: &ReturnWindow, mom: &Moments, settings: &ValidSettings) -> Option<calibration::HeldOutRatio> {
    if !needs_held_out_risk(settings) {
        return None;
    }
    let t = window.periods();
    let n = window.factors_used() as f64;
    let parameters = if settings.method == Method::PlugIn { n } else { 0.0 };
    let market = if settings.demarket { window.market.as_deref() } else { None };
    let bounds = fold_bounds(t, settings.folds as usize);
    let samples = calibration::baseline_samples(window.returns.as_ref(), market, &bounds, settings.method, mom.kernels);
    calibration::held_out_ratio(&samples, t, parameters)
}

/// The blend (SPEC §11): the ridge and the Ledoit–Wolf plug-in, each
/// normalised, averaged, with the members' mean risk calibration; the ridge
/// member's choices in the diagnostics (and for the bootstrap's draws).
#[allow(clippy::too_many_arguments)]
fn fit_blend(
    panel: &ReturnPanel,
    window: &ReturnWindow,
    mom: &Moments,
    settings: &ValidSettings,
    options: &FitOptions,
    mut warnings: Vec<Warning>,
    ph: &mut PhaseTimes,
    mark: &mut Instant,
) -> Result<WeightSet, EstimateError> {
    let (ridge_settings, lw_settings) = blend_members(settings)?;
    let prepared = ComponentFit::prepare(window, mom, &ridge_settings, KPolicy::All, options)?;
    lap(mark, &mut ph.components);
    let ridge = prepared.solve(&ridge_settings, KPolicy::All, options, &mut warnings)?;
    options.stop.check()?;
    let lw = shrinkage::plug_in_ledoit_wolf(mom)?;
    let members = [
        weights::normalized_weights(window, mom, &ridge_settings, &direction_of(&ridge))?,
        weights::normalized_weights(window, mom, &lw_settings, &lw.weights)?,
    ];
    let average: Vec<f64> = members[0].iter().zip(&members[1]).map(|(a, b)| 0.5 * (a + b)).collect();
    let risks: Vec<calibration::HeldOutRatio> =
        ridge.risk.into_iter().chain(baseline_risk(window, mom, &lw_settings)).collect();
    lap(mark, &mut ph.solve);
    let r = weights::assemble(panel, window, mom, settings, &average, None, mean_risk(&risks), warnings, &options.stop)
        .map(|mut ws| {
            weights::record_choices(&mut ws.diagnostics, ridge, &ridge_settings);
            // The ridge uses every component: K is not a cross-validated choice here.
            ws.diagnostics.components_cross_validated = false;
            ws
        });
    lap(mark, &mut ph.assemble);
    r
}

/// The blend's two members (SPEC §11): the KNS ridge and the Ledoit–Wolf
/// plug-in under the blend's other settings.
fn blend_members(settings: &ValidSettings) -> Result<(ValidSettings, ValidSettings), EstimateError> {
    let member = |method: Method| Settings { method, ..settings.settings().clone() }.check();
    Ok((member(Method::KnsRidge)?, member(Method::PlugInLedoitWolf)?))
}

/// The ensemble's held-out ratio (SPEC §13): the members' calibration factors
/// averaged (the average of calibrated members, renormalised).
fn ensemble_risk(members: &[Member]) -> Option<calibration::HeldOutRatio> {
    let risks: Vec<calibration::HeldOutRatio> = members.iter().filter_map(|m| m.model.risk).collect();
    mean_risk(&risks)
}

/// Members' held-out ratios combined: their calibration factors averaged.
fn mean_risk(risks: &[calibration::HeldOutRatio]) -> Option<calibration::HeldOutRatio> {
    if risks.is_empty() {
        return None;
    }
    let k = risks.len() as f64;
    let mean = |f: fn(&calibration::HeldOutRatio) -> f64| risks.iter().map(f).sum::<f64>() / k;
    Some(calibration::HeldOutRatio {
        measured: mean(|r| r.measured),
        standard_error: mean(|r| r.standard_error),
        corrected: 1.0 / mean(|r| 1.0 / r.corrected),
        periods: risks[0].periods,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sweep_fits_equal_fixed_fits_and_share_one_basis() {
        let panel = crate::demo::synthetic_panel(9, 120, 12);
        let base = Settings {
            method: Method::Components,
            kappa: Choice::Fixed(0.8),
            held_out_check: false,
            ..Settings::default()
        };
        let s = base.clone().check().unwrap();
        let ks = [1, 2, 3, 5];
        let sweep = fit_component_sweep(&panel, &s, &ks, &FitOptions::default()).unwrap();
        for (&k, got) in ks.iter().zip(&sweep) {
            let got = got.as_ref().unwrap();
            let fixed = fit(&panel, &Settings { components: Choice::Fixed(k as u32), ..base.clone() }.check().unwrap())
                .unwrap();
            for (a, b) in got.factors.iter().zip(&fixed.factors) {
                assert!((a.weight - b.weight).abs() <= 1e-12 * b.weight.abs().max(1e-6), "K = {k}");
            }
        }
        // Component c has the same loadings whatever K: the backtest keeps only the largest K's.
        let largest = sweep.last().unwrap().as_ref().unwrap();
        for got in &sweep {
            for (c, comp) in got.as_ref().unwrap().components.iter().enumerate() {
                assert_eq!(comp.loadings, largest.components[c].loadings);
            }
        }
    }

    #[test]
    fn a_stopped_fit_says_so() {
        let panel = crate::demo::synthetic_panel(9, 120, 12);
        let s = Settings::default().check().unwrap();
        let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(true));
        let options = FitOptions { stop: Stop::never().with_flag(flag), ..FitOptions::default() };
        assert_eq!(fit_with(&panel, &s, &options).unwrap_err(), EstimateError::Cancelled);
        let sweep = fit_component_sweep(&panel, &s, &[1, 2], &options);
        assert!(matches!(sweep, Err(EstimateError::Cancelled)));
    }
}

//! Normalisation of a portfolio direction into weights and the market hedge
//! (SPEC §7), and every diagnostic of SPEC §8: the [`WeightSet`].

use super::basis::ComponentBasis;
use super::calibration::{self, Calibration, HeldOutRatio};
use super::cv::CvSurface;
use super::dense;
use super::desk::{self, Limits, Positions};
use super::error::{EstimateError, InputError, Location};
use super::moments::Moments;
use super::output::{ComponentReport, Diagnostics, ESTIMATOR_VERSION, ExcludedReport, FactorReport, WeightSet};
use super::settings::{Method, Normalization, RiskCalibration, Scaling, ValidSettings};
use super::stop::Stop;
use super::warning::{Warning, WarningCode};
use super::window::{ReturnPanel, ReturnWindow};

/// What the components method decided, for the diagnostics.
pub(crate) struct ComponentModel {
    pub basis: ComponentBasis,
    pub k: usize,
    pub kappa: f64,
    pub gamma: f64,
    pub b: Vec<f64>,
    pub surface: Option<CvSurface>,
    pub best_score: f64,
    pub held_out_sharpe: f64,
    /// The folds' out-of-sample volatility ratio at the chosen point (SPEC §13).
    pub risk: Option<HeldOutRatio>,
}

/// Condition number of Σ above which a fit carries the `ill-conditioned-covariance` warning
/// (the same bound as the GLS pricing criterion's).
pub const ILL_CONDITIONED: f64 = super::cv::GLS_MAX_CONDITION;

/// Eigenvalues K and K+1 closer than this times the largest make the K-component
/// subspace numerically arbitrary (`components-not-separated`).
pub const EIGEN_TIE_RELATIVE: f64 = 1e-8;

/// Builds the weight set from a direction w̃ over the usable demarketed factors.
#[allow(clippy::too_many_arguments)]
pub(crate) fn assemble(
    panel: &ReturnPanel,
    window: &ReturnWindow,
    mom: &Moments,
    settings: &ValidSettings,
    direction: &[f64],
    model: Option<ComponentModel>,
    held_out: Option<HeldOutRatio>,
    mut warnings: Vec<Warning>,
    stop: &Stop,
) -> Result<WeightSet, EstimateError> {
    let n = window.factors_used();
    let t = window.periods();
    let p = f64::from(settings.periods_per_year());
    let mut calibration = calibrate(settings, mom, direction, held_out, &mut warnings);
    let scaled = Normalized::new(window, mom, settings, direction, calibration.map_or(1.0, |c| c.factor))?;
    if let Some(c) = calibration.as_mut() {
        // In-window volatility of the scaled model portfolio (on the covariance the target uses).
        c.in_window_volatility = (p * risk_variance(mom, settings, &scaled.weights)).sqrt();
        c.calibrated_volatility = c.in_window_volatility / c.factor;
    }
    let held = Previous::of(panel, window, &mut warnings)?;
    let hedged = settings.demarket && window.market.is_some();
    let (implemented, market_weight, implementation) = if settings.implementation_active() {
        // The model's own Sharpe ratio: held-out when cross-validated, else in-window.
        let model_sharpe = model
            .as_ref()
            .map(|m| m.held_out_sharpe)
            .filter(|v| v.is_finite())
            .unwrap_or_else(|| scaled.in_sample_sharpe(p));
        // The implementation stage (SPEC §10) from the positions held.
        let omega = super::shrinkage::LedoitWolf::new(mom);
        let problem =
            desk::Problem::from_window(window, mom, &omega, settings, &scaled.weights, model_sharpe, &held.positions);
        let done = desk::implement(&problem, &Limits::of(settings), stop, &mut warnings)?;
        (Some(done.weights), done.market_weight, Some(done.report))
    } else {
        (None, scaled.market_weight, None)
    };
    let w = implemented.as_deref().unwrap_or(&scaled.weights);
    let sigma_w = mom.sigma_times(w);
    let var_w: f64 = w.iter().zip(&sigma_w).map(|(a, b)| a * b).sum();
    let var_risk = if settings.volatility_halflife > 0.0 { risk_variance(mom, settings, w) } else { var_w };
    let sharpe_ann: Vec<f64> = (0..n).map(|j| p.sqrt() * mom.sharpe(j)).collect();
    let (mut factors, excluded) = factor_reports(window, mom, model.as_ref(), w, &sigma_w, var_w, &sharpe_ann, p);
    for (j, &col) in window.used.iter().enumerate() {
        factors[col].model_weight = scaled.weights[j];
    }
    data_warnings(window, mom, excluded.len(), &mut warnings);
    let turnover = held.given.then(|| match &implementation {
        Some(imp) => imp.turnover,
        None => held.positions.turnover(w, market_weight, hedged),
    });
    let covariance_condition_number = condition_number(mom, model.as_ref(), t, n)?;
    spectrum_warnings(model.as_ref(), covariance_condition_number, t, n, &mut warnings);

    // Concentration diagnostics.
    let gross: f64 = w.iter().map(|x| x.abs()).sum();
    let effective_factors = 1.0 / w.iter().map(|x| (x.abs() / gross).powi(2)).sum::<f64>();
    let top_sharpe_gross_share = desk::top_sharpe_share(w, &sharpe_ann);
    let in_sample_sharpe = match implemented {
        None => scaled.in_sample_sharpe(p),
        Some(_) => {
            let mean: f64 = w.iter().zip(&mom.mean).map(|(a, b)| a * b).sum();
            p.sqrt() * mean / var_w.sqrt()
        }
    };

    let mut diagnostics = Diagnostics {
        num_components: 0,
        kappa: 0.0,
        gamma: 0.0,
        components_cross_validated: false,
        kappa_cross_validated: false,
        cv_surface: None,
        cv_best_score: f64::NAN,
        cv_sharpe: f64::NAN,
        in_sample_sharpe,
        ex_ante_volatility: (p * var_risk).sqrt(),
        effective_factors,
        top_sharpe_gross_share,
        turnover,
        covariance_condition_number,
        excluded,
        warnings,
        periods: t,
        factors_used: n,
        implementation,
        chosen_scaling: None,
        scaling_scores: Vec::new(),
        bootstrap: None,
        risk_calibration: calibration,
        periods_per_year: settings.periods_per_year(),
        frequency: super::frequency::FrequencySource::Given,
    };
    let components = match model {
        Some(m) => model_reports(m, window, settings, p, &mut diagnostics),
        None => Vec::new(),
    };
    Ok(WeightSet {
        factors,
        market_weight,
        model_market_weight: scaled.market_weight,
        components,
        diagnostics,
        // Filled by the caller (`fit_with_phases`), which may hash beside the fit.
        fingerprint: String::new(),
        estimator_version: ESTIMATOR_VERSION,
        settings: settings.settings().clone(),
    })
}

/// Variance of the portfolio `w` on the covariance the volatility target
/// uses: exponentially weighted with `volatility_halflife`, else the sample one.
fn risk_variance(mom: &Moments, settings: &ValidSettings, w: &[f64]) -> f64 {
    match settings.volatility_halflife {
        h if h > 0.0 => mom.portfolio_variance_ew(w, h),
        _ => mom.portfolio_variance(w),
    }
}

/// The direction scaled by the normalisation (SPEC §7): the weights over the
/// usable factors (what an ensemble averages).
pub(crate) fn normalized_weights(
    window: &ReturnWindow,
    mom: &Moments,
    settings: &ValidSettings,
    direction: &[f64],
) -> Result<Vec<f64>, EstimateError> {
    Normalized::new(window, mom, settings, direction, 1.0).map(|n| n.weights)
}

/// The risk calibration in force for `direction` (SPEC §13): none unless the
/// weights are scaled to a volatility target and a rule is on. The
/// volatilities are filled in once the weights are scaled.
fn calibrate(
    settings: &ValidSettings,
    mom: &Moments,
    direction: &[f64],
    held_out: Option<HeldOutRatio>,
    warnings: &mut Vec<Warning>,
) -> Option<Calibration> {
    if settings.normalization != Normalization::TargetVolatility {
        return None;
    }
    let (measured, standard_error, periods, raw) = match settings.risk_calibration {
        RiskCalibration::Off => return None,
        RiskCalibration::HeldOut => match held_out.filter(|h| h.corrected.is_finite() && h.corrected > 0.0) {
            Some(h) => (h.measured, h.standard_error, h.periods, 1.0 / h.corrected),
            None => {
                warnings.push(Warning {
                    code: WarningCode::RiskCalibrationUnavailable,
                    message: "no cross-validation fold gave a portfolio with variance; the in-window volatility \
                              is the target"
                        .into(),
                });
                return None;
            }
        },
        RiskCalibration::LedoitWolf => match calibration::ledoit_wolf_factor(mom, direction) {
            Some(f) => (1.0 / f, f64::NAN, 0, f),
            None => {
                warnings.push(Warning {
                    code: WarningCode::RiskCalibrationUnavailable,
                    message: "the Ledoit–Wolf variance of the portfolio is not usable; the in-window volatility \
                              is the target"
                        .into(),
                });
                return None;
            }
        },
    };
    let (factor, limited) = calibration::limit(raw);
    if limited {
        warnings.push(Warning {
            code: WarningCode::RiskCalibrationLimited,
            message: format!(
                "the risk calibration asked for a factor of {raw:.3}; it is held at {factor} (the documented limit)"
            ),
        });
    }
    Some(Calibration {
        rule: settings.risk_calibration,
        factor,
        measured_ratio: measured,
        standard_error,
        held_out_periods: periods,
        in_window_volatility: f64::NAN,
        calibrated_volatility: f64::NAN,
        limited,
    })
}

/// The direction scaled by the normalisation (SPEC §7), with its hedge.
struct Normalized {
    weights: Vec<f64>,
    market_weight: f64,
    /// The scale c applied to the direction.
    scale: f64,
    /// Mean and variance of the unscaled direction.
    mean_dir: f64,
    var_dir: f64,
}

impl Normalized {
    /// In-window annualised Sharpe ratio of the scaled direction.
    fn in_sample_sharpe(&self, p: f64) -> f64 {
        p.sqrt() * self.mean_dir * self.scale.signum() / self.var_dir.sqrt()
    }

    fn new(
        window: &ReturnWindow,
        mom: &Moments,
        settings: &ValidSettings,
        direction: &[f64],
        risk_factor: f64,
    ) -> Result<Normalized, EstimateError> {
        let p = f64::from(settings.periods_per_year());
        let var_dir = mom.portfolio_variance(direction);
        if !(var_dir > 0.0 && var_dir.is_finite()) {
            return Err(EstimateError::DegeneratePortfolio {
                reason: if direction.iter().all(|&w| w == 0.0) {
                    "every weight is zero (for example the L1 penalty removed every component; lower l1_penalty)".into()
                } else {
                    "the portfolio has zero in-window variance".into()
                },
            });
        }
        let mean_dir: f64 = direction.iter().zip(&mom.mean).map(|(w, m)| w * m).sum();
        let hedge_dir: f64 = -direction.iter().zip(&mom.beta).map(|(w, b)| w * b).sum::<f64>();
        let c = match settings.normalization {
            Normalization::TargetVolatility => {
                // Honest risk (SPEC §10): the target on an exponentially weighted covariance.
                let var_risk =
                    if settings.volatility_halflife > 0.0 { risk_variance(mom, settings, direction) } else { var_dir };
                // Out-of-sample calibration (SPEC §13): the target met on returns not fitted.
                risk_factor * settings.target_volatility / (p * var_risk).sqrt()
            }
            Normalization::RiskAversion => match settings.method {
                // b-implied mean–variance weights divided by γ (SPEC §7).
                Method::Components | Method::KnsRidge | Method::PlugIn | Method::PlugInLedoitWolf => {
                    1.0 / settings.risk_aversion
                }
                // A fixed direction: its mean–variance optimal scale μ'w̃/(γ w̃'Σw̃); the
                // ensemble's average of scaled portfolios is one too.
                Method::EqualWeight | Method::Ensemble | Method::Blend => mean_dir / (settings.risk_aversion * var_dir),
            },
            Normalization::GrossExposure => 1.0 / (direction.iter().map(|w| w.abs()).sum::<f64>() + hedge_dir.abs()),
        };
        if !(c.is_finite() && c != 0.0) {
            return Err(EstimateError::DegeneratePortfolio {
                reason: format!("normalisation scale {c} is not usable"),
            });
        }
        Ok(Normalized {
            weights: direction.iter().map(|x| c * x).collect(),
            market_weight: if settings.demarket && window.market.is_some() { c * hedge_dir } else { 0.0 },
            scale: c,
            mean_dir,
            var_dir,
        })
    }
}

/// Per-factor reports in panel order, and the excluded factors.
#[allow(clippy::too_many_arguments)]
fn factor_reports(
    window: &ReturnWindow,
    mom: &Moments,
    model: Option<&ComponentModel>,
    w: &[f64],
    sigma_w: &[f64],
    var_w: f64,
    sharpe_ann: &[f64],
    p: f64,
) -> (Vec<FactorReport>, Vec<ExcludedReport>) {
    let mut factors: Vec<FactorReport> = window
        .names
        .iter()
        .map(|name| FactorReport {
            name: name.clone(),
            weight: 0.0,
            model_weight: 0.0,
            mean_annualized: 0.0,
            volatility_annualized: 0.0,
            sharpe_annualized: 0.0,
            market_beta: 0.0,
            scale: 0.0,
            risk_contribution: 0.0,
            excluded: None,
        })
        .collect();
    for (j, &col) in window.used.iter().enumerate() {
        let f = &mut factors[col];
        f.weight = w[j];
        f.mean_annualized = p * mom.mean[j];
        f.volatility_annualized = p.sqrt() * mom.sd[j];
        f.sharpe_annualized = sharpe_ann[j];
        f.market_beta = mom.beta[j];
        f.scale = model.map_or(0.0, |m| m.basis.scale[j]);
        f.risk_contribution = if w[j] == 0.0 { 0.0 } else { w[j] * sigma_w[j] / var_w };
    }
    let excluded: Vec<ExcludedReport> = window
        .excluded
        .iter()
        .map(|e| ExcludedReport {
            factor: window.names[e.column].clone(),
            code: e.reason.code(),
            reason: e.reason.describe(&window.labels),
        })
        .collect();
    for (e, r) in window.excluded.iter().zip(&excluded) {
        factors[e.column].excluded = Some((r.code, r.reason.clone()));
    }
    (factors, excluded)
}

/// Warnings about the data: exclusions, units, a short window.
fn data_warnings(window: &ReturnWindow, mom: &Moments, excluded: usize, warnings: &mut Vec<Warning>) {
    let (n, t) = (window.factors_used(), window.periods());
    if excluded > 0 {
        warnings.push(Warning {
            code: WarningCode::FactorsExcluded,
            message: format!("{excluded} of {} factors were excluded; see `excluded`", window.names.len()),
        });
    }
    // Units: decimal returns have per-period volatilities far inside (1e-6, 1).
    let mut sds = mom.sd.clone();
    sds.sort_by(f64::total_cmp);
    let median_sd = sds[sds.len() / 2];
    if median_sd > 1.0 {
        warnings.push(Warning {
            code: WarningCode::ReturnScale,
            message: format!(
                "the median factor volatility is {median_sd:.3} per period: returns look like percent, not decimals (0.01 = 1%)"
            ),
        });
    } else if median_sd < 1e-6 {
        warnings.push(Warning {
            code: WarningCode::ReturnScale,
            message: format!(
                "the median factor volatility is {median_sd:.3e} per period: check the units of the returns"
            ),
        });
    }
    if t < 2 * n {
        warnings.push(Warning {
            code: WarningCode::ShortWindow,
            message: format!(
                "{t} periods for {n} factors (fewer than 2N): sample covariances are noisy; expect heavy shrinkage"
            ),
        });
    }
}

/// The condition number of the factor covariance (infinite when T ≤ N).
fn condition_number(mom: &Moments, model: Option<&ComponentModel>, t: usize, n: usize) -> Result<f64, EstimateError> {
    if t <= n {
        // With T ≤ N the sample covariance is singular: no decomposition needed.
        return Ok(f64::INFINITY);
    }
    // The extreme eigenvalues of X'X (the ratio is the same for
    // Σ = X'X/(T−1)), accurate to about ε·cond relative, so a ratio
    // beyond N/ε is reported as numerically singular. A covariance basis of
    // this window on the factor path already holds all of Σ's eigenvalues
    // (every scale is 1 there): no second decomposition.
    let at_hand = model.map(|m| &m.basis).filter(|b| {
        b.scaling == Scaling::Covariance
            && !b.used_gram
            && b.eigenvalues.len() == n
            && b.scale.iter().all(|&s| s == 1.0)
    });
    let (hi, lo) = match at_hand {
        Some(b) => (b.eigenvalues[0], b.eigenvalues[n - 1]),
        None => {
            let gram = dense::gram_tn(mom.kernels, mom.centered.as_ref());
            dense::sym_extreme_eigenvalues(mom.kernels, gram.as_ref(), "covariance condition number")?
        }
    };
    Ok(if lo > hi * n as f64 * f64::EPSILON { hi / lo } else { f64::INFINITY })
}

/// Warnings about the spectrum: near-collinear factors, components that are
/// not separated at the chosen K.
fn spectrum_warnings(model: Option<&ComponentModel>, cond: f64, t: usize, n: usize, warnings: &mut Vec<Warning>) {
    if t > n && cond > ILL_CONDITIONED {
        warnings.push(Warning {
            code: WarningCode::IllConditionedCovariance,
            message: format!(
                "the factor covariance has condition number {cond:.2e} (above {ILL_CONDITIONED:.0e}): some factors are nearly collinear, and weights along the weakest directions are unreliable"
            ),
        });
    }
    if let Some(m) = model
        && let (Some(&lk), Some(&lnext), Some(&l1)) = (
            m.k.checked_sub(1).and_then(|i| m.basis.eigenvalues.get(i)),
            m.basis.eigenvalues.get(m.k),
            m.basis.eigenvalues.first(),
        )
        && lnext > 0.0
        && lk - lnext <= EIGEN_TIE_RELATIVE * l1
    {
        warnings.push(Warning {
            code: WarningCode::ComponentsNotSeparated,
            message: format!(
                "eigenvalues {} and {} are equal to within {EIGEN_TIE_RELATIVE:.0e} of the largest ({lk:.6e} vs {lnext:.6e}): the first {} components are not uniquely determined; choose a K at a gap in the spectrum",
                m.k,
                m.k + 1,
                m.k
            ),
        });
    }
}

/// The component reports, and the model's choices in the diagnostics.
fn model_reports(
    m: ComponentModel,
    window: &ReturnWindow,
    settings: &ValidSettings,
    p: f64,
    diag: &mut Diagnostics,
) -> Vec<ComponentReport> {
    let components = (0..m.k)
        .map(|k| {
            let sf = m.basis.sigma_f[(k, k)];
            let mut loadings = vec![0.0; window.names.len()];
            for (j, &col) in window.used.iter().enumerate() {
                loadings[col] = m.basis.q[(j, k)];
            }
            ComponentReport {
                index: k + 1,
                eigenvalue: m.basis.eigenvalues[k],
                trace_share: m.basis.eigenvalues[k] / m.basis.trace,
                sharpe_annualized: if sf > 0.0 { p.sqrt() * m.basis.mu_f[k] / sf.sqrt() } else { 0.0 },
                coefficient: m.b[k],
                shrinkage_factor: sf / (sf + m.gamma),
                loadings,
            }
        })
        .collect();
    record_choices(diag, m, settings);
    components
}

/// A component model's choices (K, κ, γ, the CV surface and scores) in the
/// diagnostics: for the model itself, or for the ridge member of a blend.
pub(crate) fn record_choices(diag: &mut Diagnostics, m: ComponentModel, settings: &ValidSettings) {
    diag.num_components = m.k;
    diag.kappa = m.kappa;
    diag.gamma = m.gamma;
    diag.components_cross_validated = settings.components.fixed().is_none();
    diag.kappa_cross_validated = settings.kappa.fixed().is_none();
    diag.cv_best_score = m.best_score;
    diag.cv_sharpe = m.held_out_sharpe;
    diag.cv_surface = m.surface;
}

/// The positions held before this fit, as the implementation stage and the
/// turnover diagnostic need them.
struct Previous {
    /// Whether previous weights were given at all.
    given: bool,
    /// Over the window's usable factors; the hedge is the entry named after the market.
    positions: Positions,
}

impl Previous {
    fn of(panel: &ReturnPanel, window: &ReturnWindow, warnings: &mut Vec<Warning>) -> Result<Previous, EstimateError> {
        let mut out = Previous {
            given: !panel.previous_weights.is_empty(),
            positions: Positions { used: vec![0.0; window.used.len()], ..Positions::default() },
        };
        if !out.given {
            return Ok(out);
        }
        let column: std::collections::HashMap<&str, usize> =
            window.names.iter().enumerate().map(|(c, n)| (n.as_str(), c)).collect();
        let slot: std::collections::HashMap<usize, usize> =
            window.used.iter().enumerate().map(|(j, &c)| (c, j)).collect();
        let market_name = panel.market_name.as_deref().filter(|_| panel.market.is_some());
        let mut seen: std::collections::HashMap<&str, usize> = std::collections::HashMap::new();
        let mut unknown: Vec<&str> = Vec::new();
        for (i, (name, w)) in panel.previous_weights.iter().enumerate() {
            if let Some(first) = seen.insert(name.as_str(), i) {
                return Err(InputError::DuplicateName {
                    at: Location::field("previous_weights").column(i, Some(name)),
                    name: name.clone(),
                    first_column: first,
                }
                .into());
            }
            match column.get(name.as_str()) {
                Some(c) => match slot.get(c) {
                    Some(&j) => out.positions.used[j] = *w,
                    None => out.positions.outside += w.abs(),
                },
                None if Some(name.as_str()) == market_name => out.positions.market = *w,
                None => {
                    out.positions.outside += w.abs();
                    unknown.push(name);
                }
            }
        }
        if let Some(first) = unknown.first() {
            warnings.push(Warning {
                code: WarningCode::PreviousWeightsUnknownFactor,
                message: format!(
                    "{} previous weight(s) name factors not in the window (first: \"{}\"); they count as sold",
                    unknown.len(),
                    super::error::truncate_for_display(first)
                ),
            });
        }
        Ok(out)
    }
}

#[cfg(test)]
mod tests {
    use crate::estimator::{Choice, Normalization, Settings, fit};

    #[test]
    fn repeated_warning_codes_are_listed_once() {
        let w = |code, message: &str| super::Warning { code, message: message.to_owned() };
        let mut ws = vec![
            w(crate::estimator::WarningCode::ModelNoEdge, "a"),
            w(crate::estimator::WarningCode::ShortWindow, "b"),
            w(crate::estimator::WarningCode::ModelNoEdge, "c"),
            w(crate::estimator::WarningCode::ModelNoEdge, "d"),
        ];
        crate::estimator::warning::merge_repeated_warnings(&mut ws);
        assert_eq!(ws.iter().map(|w| w.code.word()).collect::<Vec<_>>(), ["model-no-edge", "short-window"]);
        assert_eq!(ws[0].message, "a (and 2 more like it)");
        assert_eq!(ws[1].message, "b");
    }

    fn fitted(edit: impl FnOnce(&mut Settings)) -> super::WeightSet {
        let panel = crate::demo::synthetic_panel(5, 120, 10);
        let mut s = Settings {
            method: crate::estimator::Method::Components,
            components: Choice::Fixed(3),
            kappa: Choice::Fixed(0.5),
            ..Settings::default()
        };
        edit(&mut s);
        fit(&panel, &s.check().unwrap()).unwrap()
    }

    #[test]
    fn each_normalisation_meets_its_definition() {
        // SPEC §7: target volatility, gross exposure Σ|wᵢ| + |w_m| = 1.
        let tv = fitted(|s| {
            s.target_volatility = 0.07;
            s.risk_calibration = crate::estimator::RiskCalibration::Off;
        });
        assert!((tv.diagnostics.ex_ante_volatility - 0.07).abs() < 1e-12);
        assert_eq!(tv.diagnostics.risk_calibration, None);
        // SPEC §13: with the calibration the in-window volatility is the target times its factor,
        // and the forecast out-of-sample volatility is the target.
        let cal = fitted(|s| s.target_volatility = 0.07);
        let c = cal.diagnostics.risk_calibration.unwrap();
        assert!(!c.limited && c.factor != 1.0);
        assert!((cal.diagnostics.ex_ante_volatility - 0.07 * c.factor).abs() < 1e-12);
        assert!((c.calibrated_volatility - 0.07).abs() < 1e-12);
        for (a, b) in cal.factors.iter().zip(&tv.factors) {
            assert!((a.weight - c.factor * b.weight).abs() <= 1e-12 * b.weight.abs().max(1e-9));
        }
        let gross = fitted(|s| s.normalization = Normalization::GrossExposure);
        let total: f64 = gross.factors.iter().map(|f| f.weight.abs()).sum::<f64>() + gross.market_weight.abs();
        assert!((total - 1.0).abs() < 1e-12);
        // Risk aversion γ scales the same direction by 1/γ.
        let ra2 = fitted(|s| s.normalization = Normalization::RiskAversion);
        let ra4 = fitted(|s| {
            s.normalization = Normalization::RiskAversion;
            s.risk_aversion = 6.0;
        });
        for (a, b) in ra2.factors.iter().zip(&ra4.factors) {
            assert!((a.weight - 2.0 * b.weight).abs() <= 1e-12 * a.weight.abs().max(1e-12));
        }
    }

    #[test]
    fn reports_agree_with_the_weights() {
        let ws = fitted(|_| {});
        let rc: f64 = ws.factors.iter().map(|f| f.risk_contribution).sum();
        assert!((rc - 1.0).abs() < 1e-12, "risk contributions sum to one");
        // The hedge removes the portfolio's market beta: w_m = −β'w.
        let beta_w: f64 = ws.factors.iter().map(|f| f.market_beta * f.weight).sum();
        assert!((ws.market_weight + beta_w).abs() < 1e-12);
        assert_eq!(ws.components.len(), 3);
        assert_eq!(ws.diagnostics.num_components, 3);
        let d = &ws.diagnostics;
        assert!(d.effective_factors >= 1.0 && d.effective_factors <= 10.0);
        assert!((0.0..=1.0).contains(&d.top_sharpe_gross_share));
        assert_eq!(ws.fingerprint.len(), 71, "sha256: and 64 hex digits");
    }
}

//! The pure estimator: a window of factor returns in, shrunk Sharpe-scaled
//! component weights and their diagnostics out (SPEC §1–8). No async
//! runtime and no protobuf types live here.
//!
//! The entry point is [`fit`]: validate the window ([`ReturnWindow`]),
//! demarket and take moments, build the [`ComponentBasis`] of the chosen
//! scaling, choose K and κ by [`CrossValidation`], solve the shrunk
//! mean–variance problem on the components ([`ShrinkagePath`]) and normalise
//! the result into a [`WeightSet`].

pub mod basis;
pub mod cv;
mod dense;
pub mod error;
pub mod moments;
pub mod settings;
pub mod shrinkage;
pub mod stop;
pub mod weights;
pub mod window;

pub use basis::{ComponentBasis, EigenPath};
pub use cv::{CrossValidation, CvSurface};
pub use error::{EstimateError, InputError, Location, SettingsError};
pub use moments::Moments;
pub use settings::{Choice, CvCriterion, Method, MissingPolicy, Normalization, Scaling, Settings, ValidSettings};
pub use shrinkage::{PlugIn, ShrinkagePath, kns_gamma, plug_in};
pub use stop::Stop;
pub use weights::{ComponentReport, Diagnostics, ExcludedReport, FactorReport, Warning, WeightSet};
pub use window::{Exclusion, ExclusionReason, ReturnPanel, ReturnWindow};

use cv::{Fold, fold_bounds, min_training_periods};
use weights::ComponentModel;

/// Version of the estimator, reported with every weight set.
pub const ESTIMATOR_VERSION: &str = concat!("keelson-estimator/", env!("CARGO_PKG_VERSION"));

/// How a fit runs (not what it computes: results do not depend on these).
#[derive(Clone, Debug)]
pub struct FitOptions {
    /// Worker threads for independent cross-validation folds (1 = sequential).
    pub threads: usize,
    /// Deadline and cancellation.
    pub stop: Stop,
    /// Which eigenproblem to solve.
    pub eigen_path: EigenPath,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions { threads: 1, stop: Stop::never(), eigen_path: EigenPath::Auto }
    }
}

/// Fits one window with default options.
///
/// # Errors
/// See [`fit_with`].
pub fn fit(panel: &ReturnPanel, settings: &ValidSettings) -> Result<WeightSet, EstimateError> {
    fit_with(panel, settings, &FitOptions::default())
}

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
    options.stop.check()?;
    let window = ReturnWindow::new(panel, settings)?;
    let market = if settings.demarket { window.market.as_deref() } else { None };
    let mom = Moments::compute(window.returns.as_ref(), market);
    let mut warnings = Vec::new();
    match settings.method {
        Method::Components => {
            let model = fit_components(&window, &mom, settings, options, &mut warnings)?;
            let direction = direction_of(&model);
            weights::assemble(panel, &window, &mom, settings, &direction, Some(model), None, warnings)
        }
        Method::PlugIn => {
            let plug = shrinkage::plug_in(&mom)?;
            if plug.singular {
                warnings.push(Warning {
                    code: "singular-covariance",
                    message: format!(
                        "the factor covariance has rank {} < {}; the minimum-norm least-squares solution is used",
                        plug.rank,
                        window.factors_used()
                    ),
                });
            }
            weights::assemble(panel, &window, &mom, settings, &plug.weights, None, None, warnings)
        }
        Method::EqualWeight => {
            let n = window.factors_used();
            let direction = vec![1.0 / n as f64; n];
            weights::assemble(panel, &window, &mom, settings, &direction, None, None, warnings)
        }
    }
}

fn direction_of(model: &ComponentModel) -> Vec<f64> {
    let q = &model.basis.q;
    (0..q.nrows()).map(|i| (0..model.k).map(|c| q[(i, c)] * model.b[c]).sum()).collect()
}

fn fit_components(
    window: &ReturnWindow,
    mom: &Moments,
    settings: &ValidSettings,
    options: &FitOptions,
    warnings: &mut Vec<Warning>,
) -> Result<ComponentModel, EstimateError> {
    let t = window.periods();
    let n = window.factors_used();
    let folds = settings.folds as usize;
    let train_min = min_training_periods(t, folds);
    let data_cap = n.min(train_min.saturating_sub(2));
    let fixed_k = settings.components.fixed().map(|k| k as usize);
    let k_need = fixed_k.unwrap_or((settings.max_components as usize).min(data_cap)).clamp(1, n);

    let full = ComponentBasis::compute(mom, settings.scaling, settings.rp_gamma, k_need, options.eigen_path)?;
    let market = if settings.demarket { window.market.as_deref() } else { None };
    let mut fold_data = Vec::with_capacity(folds);
    for (i, &bounds) in fold_bounds(t, folds).iter().enumerate() {
        options.stop.check()?;
        fold_data.push(Fold::prepare(
            window.returns.as_ref(),
            market,
            bounds,
            i,
            settings,
            k_need,
            options.eigen_path,
        )?);
    }
    let fold_rank = fold_data.iter().map(|f| f.basis.rank).min().unwrap_or(0);
    let allowed = data_cap.min(full.rank).min(fold_rank);
    let reason = || {
        format!(
            "{n} usable factors, {train_min} periods in the shortest training sample (K ≤ T_train − 2 = {}), numerical rank {} in the window and {fold_rank} in the folds",
            train_min.saturating_sub(2),
            full.rank
        )
    };
    if let Some(k) = fixed_k
        && k > allowed
    {
        return Err(EstimateError::TooManyComponents { requested: k, allowed, reason: reason() });
    }
    if allowed == 0 {
        return Err(EstimateError::DegeneratePortfolio {
            reason: format!("no component has positive variance ({})", reason()),
        });
    }
    let ks: Vec<usize> = match fixed_k {
        Some(k) => vec![k],
        None => {
            let top = (settings.max_components as usize).min(allowed);
            if top < (settings.max_components as usize).min(data_cap) {
                warnings.push(Warning {
                    code: "components-capped-by-rank",
                    message: format!("the component grid stops at K = {top}: {}", reason()),
                });
            }
            (1..=top).collect()
        }
    };
    let kappas = settings.kappa_grid();
    let cv = cv::cross_validate(settings, &ks, &kappas, &fold_data, &options.stop, options.threads)?;
    if cv.solver_limit_hit {
        warnings.push(Warning {
            code: "solver-not-converged",
            message: format!("coordinate descent reached {} sweeps at some grid points", shrinkage::MAX_SWEEPS),
        });
    }
    if fixed_k.is_none() && ks.len() > 1 && cv.k == *ks.last().unwrap_or(&0) && cv.k < n {
        warnings.push(Warning {
            code: "components-at-grid-edge",
            message: format!(
                "cross-validation chose K = {}, the largest in its grid; raise max_components if the window allows",
                cv.k
            ),
        });
    }
    if settings.kappa.fixed().is_none() && (cv.kappa == kappas[0] || cv.kappa == kappas[kappas.len() - 1]) {
        warnings.push(Warning {
            code: "kappa-at-grid-edge",
            message: format!(
                "cross-validation chose κ = {:.4}, an end of its grid [{}, {}]",
                cv.kappa,
                kappas[0],
                kappas[kappas.len() - 1]
            ),
        });
    }

    let gamma = kns_gamma(full.trace_f(cv.k), settings.kappa_per_period(cv.kappa), t);
    let mut b = vec![0.0; full.len()];
    let info = ShrinkagePath::new(&full, settings.scaling.has_diagonal_components(), settings.l1_penalty)
        .solve(cv.k, gamma, &mut b);
    if !info.converged {
        warnings.push(Warning {
            code: "solver-not-converged",
            message: format!("coordinate descent on the final fit reached {} sweeps", shrinkage::MAX_SWEEPS),
        });
    }
    b.truncate(cv.k);
    Ok(ComponentModel {
        basis: full,
        k: cv.k,
        kappa: cv.kappa,
        gamma,
        b,
        best_score: cv.best_score,
        held_out_sharpe: cv.held_out_sharpe,
        surface: cv.surface,
    })
}

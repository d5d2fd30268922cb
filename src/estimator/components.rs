//! The components method (SPEC §4–7): the K-independent preparation of a
//! window (the full basis and every fold's), cross-validation over (K, κ),
//! the final shrunk fit, the scalings' members for `auto` and `ensemble`, and
//! the sweep over fixed K that a backtest plots.

use super::basis::ComponentBasis;
use super::calibration;
use super::cv::{self, CvSurface, Fold, fold_bounds, min_training_periods};
use super::dense::{Kernels, Workspace};
use super::error::EstimateError;
use super::fingerprint;
use super::moments::Moments;
use super::options::FitOptions;
use super::output::{ScalingScore, WeightSet};
use super::settings::{Method, Normalization, RiskCalibration, Scaling, Settings, ValidSettings};
use super::shrinkage::{self, ShrinkagePath, kns_gamma};
use super::stop::Stop;
use super::warning::{Warning, WarningCode};
use super::weights::{self, ComponentModel};
use super::window::{ReturnPanel, ReturnWindow};

/// Fits the components method once for every fixed K in `ks` (κ as the
/// settings say), sharing the window's validation, moments, eigenproblems
/// and fold preparation: the OOS-Sharpe-against-K sweep of a backtest.
/// Entry i is the fit with K = ks[i], or its error (for example a K larger
/// than the window supports).
///
/// # Errors
/// Errors that concern the whole window (input, settings, cancellation).
pub fn fit_component_sweep(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    ks: &[usize],
    options: &FitOptions,
) -> Result<Vec<Result<WeightSet, EstimateError>>, EstimateError> {
    options.stop.check()?;
    let (resolved, source) = settings.for_panel(panel)?;
    let settings = &resolved;
    let kernels = Kernels::with_threads(options.threads);
    let window = ReturnWindow::new_with(panel, settings, kernels)?;
    let market = if settings.demarket { window.market.as_deref() } else { None };
    let mom = Moments::compute_with(window.returns.as_ref(), market, kernels);
    let top = ks.iter().copied().max().unwrap_or(1);
    let prepared = ComponentFit::prepare(&window, &mom, settings, KPolicy::Fixed(top), options)?;
    // One window, one settings: one fingerprint for every K.
    let fingerprint = fingerprint::fingerprint(panel, settings.settings());
    let mut out = Vec::with_capacity(ks.len());
    for &k in ks {
        // The caller chooses how many K to solve: stop between them.
        options.stop.check()?;
        let mut warnings = Vec::new();
        let r = prepared
            .solve(settings, KPolicy::Fixed(k), options, &mut warnings)
            .and_then(|model| assemble_model(panel, &window, &mom, settings, model, warnings, &options.stop));
        out.push(r.map(|mut ws| {
            ws.fingerprint = fingerprint.clone();
            ws.diagnostics.note_frequency(source);
            ws
        }));
    }
    Ok(out)
}

/// One scaling's cross-validated components fit, for `auto` and `ensemble`.
pub(super) struct Member {
    pub(super) settings: ValidSettings,
    pub(super) model: ComponentModel,
    pub(super) warnings: Vec<Warning>,
}

impl Member {
    pub(super) fn score(&self) -> ScalingScore {
        ScalingScore {
            scaling: self.settings.scaling,
            best_score: self.model.best_score,
            components: self.model.k,
            kappa: self.model.kappa,
        }
    }
}

/// The components method under every concrete scaling, each cross-validated
/// on its own (the window's validation and moments shared); with K and κ both
/// fixed the folds still run, since the choice needs their scores.
pub(super) fn scaling_members(
    window: &ReturnWindow,
    mom: &Moments,
    settings: &ValidSettings,
    options: &FitOptions,
) -> Result<Vec<Member>, EstimateError> {
    let mut out = Vec::with_capacity(Scaling::ALL.len());
    for sc in Scaling::ALL {
        options.stop.check()?;
        let member =
            Settings { method: Method::Components, scaling: sc, held_out_check: true, ..settings.settings().clone() }
                .check()?;
        let policy = match member.components.fixed() {
            Some(k) => KPolicy::Fixed(k as usize),
            None => KPolicy::Grid,
        };
        let mut warnings = Vec::new();
        let prepared = ComponentFit::prepare(window, mom, &member, policy, options)?;
        let model = prepared.solve(&member, policy, options, &mut warnings)?;
        out.push(Member { settings: member, model, warnings });
    }
    Ok(out)
}

/// The member with the highest finite score; scores within 1e-10 (relative)
/// of the best are ties, which go to the earlier scaling of [`Scaling::ALL`]
/// (the tie rule of SPEC §6 carried over).
pub(super) fn choose_scaling(members: &[Member]) -> usize {
    let top = members.iter().map(|m| m.model.best_score).filter(|v| v.is_finite()).fold(f64::NEG_INFINITY, f64::max);
    let floor = top - cv::TIE_TOLERANCE * top.abs().max(f64::MIN_POSITIVE);
    members.iter().position(|m| m.model.best_score.is_finite() && m.model.best_score >= floor).unwrap_or(members.len())
}

/// Whether the weights are scaled by the held-out risk calibration (SPEC §13).
pub(super) fn needs_held_out_risk(settings: &ValidSettings) -> bool {
    settings.normalization == Normalization::TargetVolatility && settings.risk_calibration == RiskCalibration::HeldOut
}

/// The weight set of a components model: its direction, with the folds'
/// risk calibration.
pub(super) fn assemble_model(
    panel: &ReturnPanel,
    window: &ReturnWindow,
    mom: &Moments,
    settings: &ValidSettings,
    model: ComponentModel,
    warnings: Vec<Warning>,
    stop: &Stop,
) -> Result<WeightSet, EstimateError> {
    let direction = direction_of(&model);
    let risk = model.risk;
    weights::assemble(panel, window, mom, settings, &direction, Some(model), risk, warnings, stop)
}

pub(super) fn direction_of(model: &ComponentModel) -> Vec<f64> {
    let q = &model.basis.q;
    (0..q.nrows()).map(|i| (0..model.k).map(|c| q[(i, c)] * model.b[c]).sum()).collect()
}

/// How the number of components is set.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum KPolicy {
    /// Cross-validated over 1..=K_max.
    Grid,
    /// Fixed by the caller.
    Fixed(usize),
    /// Every component the window supports (KNS ridge on all factors).
    All,
}

/// The expensive, K-independent part of a components fit: the window's
/// basis and every fold's training basis and held-out forms.
pub(super) struct ComponentFit {
    full: ComponentBasis,
    folds: Vec<Fold>,
    periods: usize,
    factors: usize,
    data_cap: usize,
    allowed: usize,
    train_min: usize,
    scaling: Scaling,
}

impl ComponentFit {
    pub(super) fn prepare(
        window: &ReturnWindow,
        mom: &Moments,
        settings: &ValidSettings,
        policy: KPolicy,
        options: &FitOptions,
    ) -> Result<ComponentFit, EstimateError> {
        let t = window.periods();
        let n = window.factors_used();
        let folds = settings.folds as usize;
        let train_min = min_training_periods(t, folds);
        let data_cap = n.min(train_min.saturating_sub(2));
        // KNS ridge on all factors is covariance PCA with every component.
        let scaling = if settings.method == Method::KnsRidge { Scaling::Covariance } else { settings.scaling };
        let k_need = match policy {
            KPolicy::Grid => (settings.max_components as usize).min(data_cap),
            KPolicy::Fixed(k) => k,
            KPolicy::All => data_cap,
        }
        .clamp(1, n);
        let market = if settings.demarket { window.market.as_deref() } else { None };
        // With K and κ both fixed the folds only feed the held-out Sharpe
        // diagnostic and the held-out risk calibration.
        let fold_count = match policy {
            KPolicy::Fixed(_)
                if settings.kappa.fixed().is_some() && !settings.held_out_check && !needs_held_out_risk(settings) =>
            {
                0
            }
            _ => folds,
        };
        let bounds: Vec<(usize, usize)> = fold_bounds(t, folds).into_iter().take(fold_count).collect();
        // One scratch workspace for the decompositions of every basis below.
        let mut ws = Workspace::default();
        let one_fold = |i: usize, ws: &mut Workspace| {
            options.stop.check()?;
            let (r, path) = (window.returns.as_ref(), options.eigen_path);
            Fold::prepare(r, market, bounds[i], i, settings, scaling, k_need, path, mom.kernels, ws)
        };
        // One basis after the other: large ones use the fit's threads inside
        // their kernels (see `dense`). Preparing small ones side by side on
        // scoped threads measured slower on two cores than in sequence.
        let full = ComponentBasis::compute_in(mom, scaling, settings.rp_gamma, k_need, options.eigen_path, &mut ws);
        let fold_data: Vec<Result<Fold, EstimateError>> = (0..fold_count).map(|i| one_fold(i, &mut ws)).collect();
        let full = full?;
        let fold_data: Vec<Fold> = fold_data.into_iter().collect::<Result<_, _>>()?;
        let fold_rank = fold_data.iter().map(|f| f.basis.rank).min().unwrap_or(full.rank);
        let allowed = data_cap.min(full.rank).min(fold_rank);
        Ok(ComponentFit { full, folds: fold_data, periods: t, factors: n, data_cap, allowed, train_min, scaling })
    }

    fn reason(&self) -> String {
        let head = format!(
            "{} usable factors, {} periods in the shortest training sample (K ≤ T_train − 2 = {}), numerical rank {} in the window",
            self.factors,
            self.train_min,
            self.train_min.saturating_sub(2),
            self.full.rank
        );
        match self.folds.iter().map(|f| f.basis.rank).min() {
            Some(fold_rank) => format!("{head} and {fold_rank} in the folds"),
            None => head,
        }
    }

    pub(super) fn solve(
        &self,
        settings: &ValidSettings,
        policy: KPolicy,
        options: &FitOptions,
        warnings: &mut Vec<Warning>,
    ) -> Result<ComponentModel, EstimateError> {
        let (n, allowed) = (self.factors, self.allowed);
        if let KPolicy::Fixed(k) = policy
            && k > allowed
        {
            return Err(EstimateError::TooManyComponents { requested: k, allowed, reason: self.reason() });
        }
        if allowed == 0 {
            return Err(EstimateError::DegeneratePortfolio {
                reason: format!("no component has positive variance ({})", self.reason()),
            });
        }
        let ks: Vec<usize> = match policy {
            KPolicy::Fixed(k) => vec![k],
            KPolicy::All => vec![allowed],
            KPolicy::Grid => {
                let top = (settings.max_components as usize).min(allowed);
                if top < (settings.max_components as usize).min(self.data_cap) {
                    warnings.push(Warning {
                        code: WarningCode::ComponentsCappedByRank,
                        message: format!("the component grid stops at K = {top}: {}", self.reason()),
                    });
                }
                (1..=top).collect()
            }
        };
        if policy == KPolicy::All && allowed < n {
            warnings.push(Warning {
                code: WarningCode::ComponentsCappedByRank,
                message: format!("the ridge on all factors uses {allowed} of {n} components: {}", self.reason()),
            });
        }
        let diagonal = self.scaling.has_diagonal_components();
        if self.folds.is_empty() {
            // K and κ fixed and the held-out check switched off: no cross-validation at all.
            let (KPolicy::Fixed(k), Some(kappa)) = (policy, settings.kappa.fixed()) else {
                return Err(EstimateError::DegeneratePortfolio {
                    reason: "cross-validation needs folds (internal: folds skipped for a non-fixed fit)".into(),
                });
            };
            return self.final_model(settings, k, kappa, None, f64::NAN, f64::NAN, &[], warnings);
        }
        let kappas = settings.kappa_grid();
        let cv = cv::cross_validate(settings, diagonal, &ks, &kappas, &self.folds, &options.stop, options.threads)?;
        if cv.solver_limit_hit {
            warnings.push(Warning {
                code: WarningCode::SolverNotConverged,
                message: format!("coordinate descent reached {} sweeps at some grid points", shrinkage::MAX_SWEEPS),
            });
        }
        if policy == KPolicy::Grid && ks.len() > 1 && cv.k == *ks.last().unwrap_or(&0) && cv.k < n {
            warnings.push(Warning {
                code: WarningCode::ComponentsAtGridEdge,
                message: format!(
                    "cross-validation chose K = {}, the largest in its grid; raise max_components if the window allows",
                    cv.k
                ),
            });
        }
        if settings.kappa.fixed().is_none() && (cv.kappa == kappas[0] || cv.kappa == kappas[kappas.len() - 1]) {
            warnings.push(Warning {
                code: WarningCode::KappaAtGridEdge,
                message: format!(
                    "cross-validation chose κ = {:.4}, an end of its grid [{}, {}]",
                    cv.kappa,
                    kappas[0],
                    kappas[kappas.len() - 1]
                ),
            });
        }

        let (surface, held_out) = (Some(cv.surface), cv.held_out);
        self.final_model(settings, cv.k, cv.kappa, surface, cv.best_score, cv.held_out_sharpe, &held_out, warnings)
    }

    /// Solves the shrunk problem on the full window at the chosen (K, κ).
    #[allow(clippy::too_many_arguments)]
    fn final_model(
        &self,
        settings: &ValidSettings,
        k: usize,
        kappa: f64,
        surface: Option<CvSurface>,
        best_score: f64,
        held_out_sharpe: f64,
        held_out: &[calibration::HeldOutSample],
        warnings: &mut Vec<Warning>,
    ) -> Result<ComponentModel, EstimateError> {
        let diagonal = self.scaling.has_diagonal_components();
        let gamma = kns_gamma(self.full.trace_f(k), settings.kappa_per_period(kappa), self.periods);
        let mut b = vec![0.0; self.full.len()];
        let info = ShrinkagePath::new(&self.full, diagonal, settings.l1_penalty).solve(k, gamma, &mut b);
        if !info.converged {
            warnings.push(Warning {
                code: WarningCode::SolverNotConverged,
                message: format!("coordinate descent on the final fit reached {} sweeps", shrinkage::MAX_SWEEPS),
            });
        }
        b.truncate(k);
        let risk = calibration::held_out_ratio(held_out, self.periods, 0.0);
        Ok(ComponentModel { basis: self.full.clone(), k, kappa, gamma, b, best_score, held_out_sharpe, risk, surface })
    }
}

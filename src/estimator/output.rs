//! What a fit answers: the [`WeightSet`] with its per-factor and
//! per-component reports and its [`Diagnostics`]. The stages write into these
//! types; nothing here computes.

use super::calibration::Calibration;
use super::cv::CvSurface;
use super::desk::Implementation;
use super::frequency::FrequencySource;
use super::settings::{ASSUMED_PERIODS_PER_YEAR, Scaling, Settings};
use super::warning::{Warning, WarningCode};

/// Version of the estimator, reported with every weight set.
pub const ESTIMATOR_VERSION: &str = concat!("keelson-estimator/", env!("CARGO_PKG_VERSION"));

/// Weight and diagnostics of one factor of the panel.
#[derive(Clone, Debug, PartialEq)]
pub struct FactorReport {
    /// Factor name.
    pub name: String,
    /// Implemented portfolio weight (0 when excluded).
    pub weight: f64,
    /// Model portfolio weight w* (SPEC §7), before limits and costs; equal
    /// to `weight` when the implementation stage is off.
    pub model_weight: f64,
    /// Annualised mean of the demarketed return, P·μ.
    pub mean_annualized: f64,
    /// Annualised volatility of the demarketed return, √P·σ.
    pub volatility_annualized: f64,
    /// Annualised Sharpe ratio, √P·μ/σ.
    pub sharpe_annualized: f64,
    /// Market beta in the window (0 without demarketing).
    pub market_beta: f64,
    /// Column scale s_i of the PCA step (0 for the baselines).
    pub scale: f64,
    /// w_i(Σw)_i / w'Σw.
    pub risk_contribution: f64,
    /// Exclusion code and reason, when excluded.
    pub excluded: Option<(&'static str, String)>,
}

/// Diagnostics of one component.
#[derive(Clone, Debug, PartialEq)]
pub struct ComponentReport {
    /// One-based index.
    pub index: usize,
    /// Eigenvalue of C.
    pub eigenvalue: f64,
    /// Eigenvalue over tr(C).
    pub trace_share: f64,
    /// Annualised Sharpe ratio of the component portfolio.
    pub sharpe_annualized: f64,
    /// Coefficient b_k.
    pub coefficient: f64,
    /// Σ_F,kk/(Σ_F,kk + γ).
    pub shrinkage_factor: f64,
    /// The component portfolio q_k over the panel's factors (0 for excluded
    /// ones); its return is q_k'(r − β m).
    pub loadings: Vec<f64>,
}

/// A factor left out.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ExcludedReport {
    /// Factor name.
    pub factor: String,
    /// Stable code.
    pub code: &'static str,
    /// Explanation.
    pub reason: String,
}

/// Overall diagnostics (SPEC §8).
#[derive(Clone, Debug, PartialEq)]
pub struct Diagnostics {
    /// Components used (0 for the baselines).
    pub num_components: usize,
    /// Annualised κ used (0 for the baselines).
    pub kappa: f64,
    /// Ridge penalty γ.
    pub gamma: f64,
    /// K chosen by CV.
    pub components_cross_validated: bool,
    /// κ chosen by CV.
    pub kappa_cross_validated: bool,
    /// The CV surface (components method only).
    pub cv_surface: Option<CvSurface>,
    /// Best CV score.
    pub cv_best_score: f64,
    /// Mean held-out annualised Sharpe ratio at the chosen point.
    pub cv_sharpe: f64,
    /// In-window annualised Sharpe ratio.
    pub in_sample_sharpe: f64,
    /// Ex-ante annualised volatility.
    pub ex_ante_volatility: f64,
    /// 1/Σ(|w_i|/Σ|w_j|)².
    pub effective_factors: f64,
    /// Gross-weight share of the ⌈0.3N⌉ highest-Sharpe factors.
    pub top_sharpe_gross_share: f64,
    /// Σ|w − w_prev| + |w_m − w_m,prev| when previous weights were given.
    pub turnover: Option<f64>,
    /// Condition number of Σ (infinite when singular).
    pub covariance_condition_number: f64,
    /// Factors left out.
    pub excluded: Vec<ExcludedReport>,
    /// Warnings.
    pub warnings: Vec<Warning>,
    /// Periods in the window.
    pub periods: usize,
    /// Factors used.
    pub factors_used: usize,
    /// The implementation stage (SPEC §10), when a limit or a cost is set.
    pub implementation: Option<Implementation>,
    /// The scaling cross-validation chose, with `scaling = auto` (SPEC §11).
    pub chosen_scaling: Option<Scaling>,
    /// Each scaling's best score, K and κ, with `scaling = auto` or `method = ensemble`.
    pub scaling_scores: Vec<ScalingScore>,
    /// The stationary bootstrap (SPEC §11), when `bootstrap_draws` > 0.
    pub bootstrap: Option<BootstrapReport>,
    /// The out-of-sample risk calibration (SPEC §13), with
    /// `normalization = target-volatility` and `risk_calibration` on.
    pub risk_calibration: Option<Calibration>,
    /// Periods per year in force (SPEC §13).
    pub periods_per_year: u32,
    /// Where that frequency came from.
    pub frequency: FrequencySource,
}

/// One scaling's best cross-validation score (SPEC §11).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ScalingScore {
    /// The scaling.
    pub scaling: Scaling,
    /// Its best mean held-out score.
    pub best_score: f64,
    /// K at that score.
    pub components: usize,
    /// Annualised κ at that score.
    pub kappa: f64,
}

/// Weights and diagnostics for one window: the estimator's answer.
#[derive(Clone, Debug, PartialEq)]
pub struct WeightSet {
    /// One entry per panel factor, in panel order.
    pub factors: Vec<FactorReport>,
    /// Implemented market hedge weight.
    pub market_weight: f64,
    /// The model's market hedge weight.
    pub model_market_weight: f64,
    /// Components used, in order.
    pub components: Vec<ComponentReport>,
    /// Overall diagnostics.
    pub diagnostics: Diagnostics,
    /// `sha256:` hash of the window and the settings.
    pub fingerprint: String,
    /// Estimator version.
    pub estimator_version: &'static str,
    /// Settings in force.
    pub settings: Settings,
}

/// One factor's bootstrap distribution.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FactorInterval {
    /// 5% quantile of the weight.
    pub q05: f64,
    /// Median weight.
    pub q50: f64,
    /// 95% quantile of the weight.
    pub q95: f64,
    /// Share of draws whose weight has the fitted model weight's sign (0 counts as its own sign).
    pub sign_agreement: f64,
}

/// The bootstrap's report (SPEC §11).
#[derive(Clone, Debug, PartialEq)]
pub struct BootstrapReport {
    /// Draws that gave weights.
    pub draws: usize,
    /// Draws whose fit failed (for example K above a resampled window's rank); left out.
    pub failed: usize,
    /// Mean block length used.
    pub mean_block: f64,
    /// Seed used.
    pub seed: u64,
    /// Whether each draw reran the cross-validation.
    pub cross_validated: bool,
    /// Whether the weights are the draws' mean (bagging).
    pub bagged: bool,
    /// Per panel factor, in panel order.
    pub factors: Vec<FactorInterval>,
    /// With cross-validation in every draw: (K, number of draws that chose it), ascending K.
    pub components: Vec<(usize, usize)>,
}

impl Diagnostics {
    /// Records where the frequency came from, with the `frequency-assumed`
    /// warning when nothing said.
    pub(crate) fn note_frequency(&mut self, source: FrequencySource) {
        self.frequency = source;
        if source == FrequencySource::Assumed {
            self.warnings.push(Warning {
                code: WarningCode::FrequencyAssumed,
                message: format!(
                    "no period labels and no periods_per_year: {ASSUMED_PERIODS_PER_YEAR} periods a year (monthly) \
                     assumed for every annualised figure"
                ),
            });
        }
    }
}

//! Estimator settings, declared once in [`settings_table!`]: each setting's
//! name, type, default, range and meaning. The declaration generates
//! [`Settings`] (every default in one place), [`SettingsPatch`] (every field
//! optional: what a request, a file or `--set` changes), the range checks of
//! [`Settings::check`] and the documentation table [`Settings::TABLE`] that
//! the README, `GetServiceInfo` and a test share. [`ValidSettings`] is the
//! only form the estimator accepts, and only `check()` makes one.

use std::fmt;

use serde::{Deserialize, Deserializer, Serialize, Serializer};

use super::error::SettingsError;

/// Frequency when neither the settings nor the labels say (monthly).
pub const ASSUMED_PERIODS_PER_YEAR: u32 = 12;

/// Portfolio rule that turns the window into weights.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// Shrunk mean–variance portfolio of the leading components of the chosen scaling.
    Components,
    /// Unshrunk Σ⁻¹μ on all usable factors (a baseline).
    PlugIn,
    /// The equal-weight average of the normalised component portfolios of
    /// every scaling, each cross-validated on its own, normalised again (SPEC §11).
    Ensemble,
    /// Σ_LW⁻¹μ with the Ledoit & Wolf (2004) shrunk covariance (a baseline).
    PlugInLedoitWolf,
    /// KNS ridge on all factors: covariance PCA with every component, κ
    /// cross-validated by `cv_criterion`.
    KnsRidge,
    /// Equal weight over the demarketed factors (DeMiguel, Garlappi & Uppal 2009).
    EqualWeight,
    /// The equal-weight average of the KNS ridge (κ cross-validated) and the
    /// Ledoit–Wolf plug-in portfolios, each normalised as the settings say,
    /// normalised again (the default, chosen by evidence: SPEC §11, README).
    #[default]
    Blend,
}

/// Column scaling before the principal-component step (SPEC §4).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Scaling {
    /// Standardised factor times its Sharpe ratio: s = SR/σ (scaled PCA).
    #[default]
    Sharpe,
    /// Raw factor times its Sharpe ratio: s = SR.
    SharpeRaw,
    /// Correlation-matrix PCA: s = 1/σ.
    Standardized,
    /// Covariance-matrix PCA: s = 1.
    Covariance,
    /// Risk-premium PCA (Lettau & Pelger 2020).
    RiskPremium,
    /// As `sharpe`, with the Sharpe ratios shrunk toward their
    /// cross-sectional mean (James–Stein) before scaling (SPEC §11).
    SharpeShrunk,
    /// Chosen by cross-validation among every other scaling (SPEC §11).
    Auto,
}

impl Scaling {
    /// Every concrete scaling (all but `auto`), in documentation order; `auto`
    /// chooses among these, and ties go to the earlier one.
    pub const ALL: [Scaling; 6] = [
        Scaling::Sharpe,
        Scaling::SharpeRaw,
        Scaling::Standardized,
        Scaling::Covariance,
        Scaling::RiskPremium,
        Scaling::SharpeShrunk,
    ];

    /// Whether the component covariance Q'ΣQ is diagonal in the fitting sample,
    /// so that ridge and elastic net have closed forms per component.
    pub fn has_diagonal_components(self) -> bool {
        !matches!(self, Scaling::RiskPremium)
    }
}

/// Cross-validation score (SPEC §6).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum CvCriterion {
    /// Mean held-out Sharpe ratio of the component portfolio.
    #[default]
    Sharpe,
    /// KNS held-out pricing R².
    PricingR2,
    /// Pricing R² weighted by the inverse held-out covariance.
    PricingR2Gls,
}

/// How the final weights are scaled (SPEC §7).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Normalization {
    /// In-window annualised volatility equals `target_volatility`.
    #[default]
    TargetVolatility,
    /// Mean–variance optimum divided by `risk_aversion`.
    RiskAversion,
    /// Σ|wᵢ| + |w_m| = 1.
    GrossExposure,
}

/// What the weights are when the bootstrap runs (SPEC §11).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Aggregate {
    /// The fit on the window itself; the draws give intervals only.
    #[default]
    Point,
    /// The mean of the draws' weights, normalised again (bagging; Breiman 1996).
    Bagged,
}

/// How the volatility target is carried out of sample (SPEC §13).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum RiskCalibration {
    /// Scale by the ratio of held-out to training volatility of the
    /// cross-validation's fold portfolios (fold refits for the baselines).
    #[default]
    HeldOut,
    /// Scale by the Ledoit–Wolf volatility of the portfolio over its sample volatility.
    LedoitWolf,
    /// The in-window volatility is the target (no calibration).
    Off,
}

/// Rule for missing (NaN) returns (SPEC §1).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum MissingPolicy {
    /// Exclude every factor with a missing value and report it.
    #[default]
    DropFactor,
    /// Reject the window on the first missing value.
    Reject,
}

/// The enums print as their names in files, flags and the README (`kns-ridge`).
macro_rules! display_as_serde_name {
    ($($t:ty),+) => {$(
        impl fmt::Display for $t {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                match serde_json::to_value(self) {
                    Ok(serde_json::Value::String(s)) => f.write_str(&s),
                    _ => write!(f, "{self:?}"),
                }
            }
        }
    )+};
}
display_as_serde_name!(Method, Scaling, CvCriterion, Normalization, MissingPolicy, Aggregate, RiskCalibration);

/// A value that is either chosen by cross-validation or fixed by the user.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub enum Choice<T> {
    /// Chosen by cross-validation.
    #[default]
    Auto,
    /// Fixed by the user.
    Fixed(T),
}

impl<T: Copy> Choice<T> {
    /// The fixed value, if any.
    pub fn fixed(self) -> Option<T> {
        match self {
            Choice::Auto => None,
            Choice::Fixed(v) => Some(v),
        }
    }
}

impl<T: fmt::Display> fmt::Display for Choice<T> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Choice::Auto => f.write_str("auto"),
            Choice::Fixed(v) => v.fmt(f),
        }
    }
}

impl<T: Serialize> Serialize for Choice<T> {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        match self {
            Choice::Auto => serializer.serialize_str("auto"),
            Choice::Fixed(v) => v.serialize(serializer),
        }
    }
}

impl<'de, T: Deserialize<'de>> Deserialize<'de> for Choice<T> {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        #[derive(Deserialize)]
        #[serde(untagged)]
        enum Repr<T> {
            Value(T),
            Word(String),
        }
        match Repr::<T>::deserialize(deserializer)? {
            Repr::Value(v) => Ok(Choice::Fixed(v)),
            Repr::Word(w) if w == "auto" => Ok(Choice::Auto),
            Repr::Word(w) => Err(serde::de::Error::custom(format!("expected \"auto\" or a number, found \"{w}\""))),
        }
    }
}

/// A limit of the implementation stage (SPEC §10): off, or a positive bound.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub enum Cap {
    /// No such constraint.
    #[default]
    Off,
    /// The bound.
    At(f64),
}

impl Cap {
    /// The bound, if the constraint is on.
    pub fn limit(self) -> Option<f64> {
        match self {
            Cap::Off => None,
            Cap::At(v) => Some(v),
        }
    }

    /// Off, or a finite bound in [[`MIN_LIMIT`], `hi`].
    fn within(self, hi: f64) -> bool {
        self.limit().is_none_or(|v| v.is_finite() && (MIN_LIMIT..=hi).contains(&v))
    }
}

impl fmt::Display for Cap {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Cap::Off => f.write_str("off"),
            Cap::At(v) => v.fmt(f),
        }
    }
}

impl Serialize for Cap {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        match self {
            Cap::Off => serializer.serialize_str("off"),
            Cap::At(v) => v.serialize(serializer),
        }
    }
}

impl<'de> Deserialize<'de> for Cap {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        #[derive(Deserialize)]
        #[serde(untagged)]
        enum Repr {
            Value(f64),
            Word(String),
        }
        match Repr::deserialize(deserializer)? {
            Repr::Value(v) => Ok(Cap::At(v)),
            Repr::Word(w) if w == "off" => Ok(Cap::Off),
            Repr::Word(w) => Err(serde::de::Error::custom(format!("expected \"off\" or a number, found \"{w}\""))),
        }
    }
}

/// The smallest limit of the implementation stage, in multiples of NAV
/// (one millionth: $1 on $1m). Smaller caps are refused: the interior-point
/// solver's tolerance is absolute, so a limit of 1e-9 could not be held to
/// a relative accuracy a desk can rely on (SPEC §10).
pub const MIN_LIMIT: f64 = 1e-6;

/// One row of the settings table: what the README and `GetServiceInfo` show.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct SettingInfo {
    /// Name in files, `--set`, the API and environment variables.
    pub name: &'static str,
    /// Accepted values.
    pub range: &'static str,
    /// What it does.
    pub meaning: &'static str,
}

/// Declares every setting once: doc comment, `name: Type = default`, the
/// accepted `range` (text, and a check on `|v|`), and its `meaning`.
macro_rules! settings_table {
    ($(
        $(#[doc = $doc:literal])+
        $name:ident: $ty:ty = $default:expr;
        range $range:literal if |$v:ident| $ok:expr;
        meaning $meaning:literal;
    )+) => {
        /// Estimator settings as a user gives them. Unset keys in a file take the
        /// defaults of [`Settings::default`]; [`Settings::check`] validates them.
        #[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
        #[serde(default, deny_unknown_fields)]
        pub struct Settings {
            $( $(#[doc = $doc])+ pub $name: $ty, )+
        }

        impl Default for Settings {
            fn default() -> Self {
                Settings { $( $name: $default, )+ }
            }
        }

        /// Settings with every field optional: the changes a request, a file
        /// or `--set` makes to a base (the built-in or the server's defaults).
        #[derive(Clone, Debug, Default, PartialEq)]
        pub struct SettingsPatch {
            $( $(#[doc = $doc])+ pub $name: Option<$ty>, )+
        }

        impl Settings {
            /// Names of every setting, as used in files, `--set` and the API.
            pub const KEYS: &'static [&'static str] = &[$( stringify!($name), )+];

            /// Every setting's name, range and meaning, in declaration order.
            pub const TABLE: &'static [SettingInfo] =
                &[$( SettingInfo { name: stringify!($name), range: $range, meaning: $meaning }, )+];

            /// These settings with the patch's fields applied.
            pub fn apply(&mut self, patch: &SettingsPatch) {
                $( if let Some(v) = &patch.$name { self.$name = v.clone(); } )+
            }

            /// A patch holding the named settings of `self` (unknown names are ignored).
            pub fn patch_of(&self, keys: &[&str]) -> SettingsPatch {
                SettingsPatch { $( $name: keys.contains(&stringify!($name)).then(|| self.$name.clone()), )+ }
            }

            /// Each setting against its own range.
            fn check_each(&self) -> Result<(), SettingsError> {
                $(
                    let $v = &self.$name;
                    if !($ok) {
                        return Err(SettingsError::OutOfRange {
                            field: stringify!($name),
                            value: $v.to_string(),
                            range: $range,
                        });
                    }
                )+
                Ok(())
            }
        }
    };
}

/// Largest fixed number of components accepted.
pub const MAX_COMPONENTS_LIMIT: u32 = 1000;
/// Most bootstrap draws accepted.
pub const MAX_BOOTSTRAP_DRAWS: u32 = 10_000;
/// Largest number of κ grid points accepted.
pub const MAX_KAPPA_POINTS: u32 = 500;

fn within(v: f64, lo_open: f64, hi: f64) -> bool {
    v.is_finite() && v > lo_open && v <= hi
}

settings_table! {
    /// Portfolio rule.
    method: Method = Method::Blend;
    range "`blend`, `kns-ridge`, `components`, `ensemble`, `plug-in`, `plug-in-ledoit-wolf`, `equal-weight`" if |_v| true;
    meaning "`blend` = the average of the ridge on every component and the Ledoit–Wolf plug-in, each at the target; \
             `kns-ridge` = the ridge on every principal component of the covariance (κ cross-validated); \
             `components` = the leading components of the chosen scaling (K and κ cross-validated); \
             `ensemble` = the average of every scaling's; or a baseline";

    /// Factor scaling before PCA.
    scaling: Scaling = Scaling::Sharpe;
    range "`sharpe`, `sharpe-raw`, `sharpe-shrunk`, `standardized`, `covariance`, `risk-premium`, `auto`" if |_v| true;
    meaning "factor scaling before PCA (see Method); `auto` = chosen by cross-validation";

    /// Number of components K.
    components: Choice<u32> = Choice::Auto;
    range "`auto` or 1..=1000" if |v| v.fixed().is_none_or(|k| (1..=MAX_COMPONENTS_LIMIT).contains(&k));
    meaning "number of components K; `auto` = cross-validated";

    /// Largest K that cross-validation may choose.
    max_components: u32 = 30;
    range "1..=1000" if |v| (1..=MAX_COMPONENTS_LIMIT).contains(v);
    meaning "largest K cross-validation may choose";

    /// Annualised κ.
    kappa: Choice<f64> = Choice::Auto;
    range "`auto` or (0, 100]" if |v| v.fixed().is_none_or(|k| within(k, 0.0, 100.0));
    meaning "κ, annualised: prior root expected maximum squared Sharpe ratio";

    /// Smallest κ of the CV grid (annualised).
    kappa_grid_min: f64 = 0.01;
    range "(0, 100]" if |v| within(*v, 0.0, 100.0);
    meaning "smallest κ of the cross-validation grid";

    /// Largest κ of the CV grid (annualised).
    kappa_grid_max: f64 = 10.0;
    range "(`kappa_grid_min`, 100]" if |v| within(*v, 0.0, 100.0);
    meaning "largest κ of the grid";

    /// Number of log-spaced κ values in the CV grid.
    kappa_grid_points: u32 = 40;
    range "2..=500" if |v| (2..=MAX_KAPPA_POINTS).contains(v);
    meaning "log-spaced κ values in the grid";

    /// Elastic-net L1 penalty γ₁ (0: ridge only).
    l1_penalty: f64 = 0.0;
    range "[0, 1e6]" if |v| v.is_finite() && (0.0..=1e6).contains(v);
    meaning "elastic-net L1 penalty γ₁ in units of component mean returns per period; 0 = ridge";

    /// Number of contiguous CV blocks.
    folds: u32 = 3;
    range "2..=20" if |v| (2..=20).contains(v);
    meaning "contiguous cross-validation blocks";

    /// CV score.
    cv_criterion: CvCriterion = CvCriterion::Sharpe;
    range "`sharpe`, `pricing-r2`, `pricing-r2-gls`" if |_v| true;
    meaning "held-out score maximised";

    /// Weight scale rule.
    normalization: Normalization = Normalization::TargetVolatility;
    range "`target-volatility`, `risk-aversion`, `gross-exposure`" if |_v| true;
    meaning "how weights are scaled";

    /// Annualised volatility target.
    target_volatility: f64 = 0.10;
    range "(0, 10]" if |v| within(*v, 0.0, 10.0);
    meaning "annualised in-window volatility for `target-volatility`";

    /// Relative risk aversion.
    risk_aversion: f64 = 3.0;
    range "(0, 1e6]" if |v| within(*v, 0.0, 1e6);
    meaning "relative risk aversion for `risk-aversion`";

    /// Periods per year; `auto` reads it from the period labels (SPEC §13).
    periods_per_year: Choice<u32> = Choice::Auto;
    range "`auto` or 1..=100000" if |v| v.fixed().is_none_or(|p| (1..=100_000).contains(&p));
    meaning "12 monthly, 52 weekly, 252 daily; `auto` = read from the period labels' median spacing \
             (monthly when there are no labels)";

    /// Refuse a fixed `periods_per_year` that the period labels contradict (SPEC §13).
    frequency_check: bool = true;
    range "bool" if |_v| true;
    meaning "refuse a set `periods_per_year` that the period labels contradict (`FREQUENCY_MISMATCH`); \
             `false` accepts it";

    /// Remove market exposure inside the window.
    demarket: bool = true;
    range "bool" if |_v| true;
    meaning "remove each factor's market beta inside the window";

    /// Missing-value rule.
    missing_policy: MissingPolicy = MissingPolicy::DropFactor;
    range "`drop-factor`, `reject`" if |_v| true;
    meaning "exclude factors with missing values, or reject the window";

    /// Weight of the mean in risk-premium PCA.
    rp_gamma: f64 = 10.0;
    range "[-1, 1e6]" if |v| v.is_finite() && (-1.0..=1e6).contains(v);
    meaning "weight on the mean in risk-premium PCA";

    /// Fewest periods a window may have.
    min_periods: u32 = 24;
    range "3..=1000000" if |v| (3..=1_000_000).contains(v);
    meaning "fewest periods accepted";

    /// With K and κ both fixed, still refit on the CV folds to report the
    /// held-out Sharpe ratio (one extra eigensolve per fold); `false` skips
    /// the folds and leaves that diagnostic unset, unless the held-out risk
    /// calibration needs them (SPEC §13).
    held_out_check: bool = true;
    range "bool" if |_v| true;
    meaning "with `components` and `kappa` both fixed, still refit the folds to report the held-out Sharpe ratio; \
             `false` skips them (about 4× faster for a 50 × 120 window) and leaves `cv_sharpe` unset, \
             unless `risk_calibration = held-out` needs the folds";

    /// Largest absolute weight on any one factor (SPEC §10).
    max_weight: Cap = Cap::Off;
    range "`off` or [1e-6, 100]" if |v| v.within(100.0);
    meaning "implementation: |wᵢ| ≤ this for every factor";

    /// Largest gross exposure Σ|wᵢ| + |w_m| (SPEC §10).
    max_gross: Cap = Cap::Off;
    range "`off` or [1e-6, 1000]" if |v| v.within(1000.0);
    meaning "implementation: gross exposure Σ|wᵢ| + |w_m| ≤ this (NAV = 1)";

    /// Largest absolute market hedge |w_m| (SPEC §10).
    max_market_weight: Cap = Cap::Off;
    range "`off` or [1e-6, 100]" if |v| v.within(100.0);
    meaning "implementation: |w_m| ≤ this";

    /// Largest turnover against the previous weights (SPEC §10).
    max_turnover: Cap = Cap::Off;
    range "`off` or [1e-6, 1000]" if |v| v.within(1000.0);
    meaning "implementation: Σ|wᵢ − pᵢ| + |w_m − p_m| ≤ this, p the previous weights (0 where none are given)";

    /// Proportional trading cost, in basis points of the weight traded (SPEC §10).
    cost_bps: f64 = 0.0;
    range "[0, 10000]" if |v| v.is_finite() && (0.0..=10_000.0).contains(v);
    meaning "implementation: cost per unit of weight traded, in basis points, priced in the objective; 0 = free";

    /// Periods over which a trade's cost is amortised (SPEC §10).
    holding_periods: Choice<f64> = Choice::Auto;
    range "`auto` or [1, 1e6]" if |v| v.fixed().is_none_or(|h| h.is_finite() && (1.0..=1e6).contains(&h));
    meaning "implementation: periods a trade is expected to be held, over which its cost is amortised; \
             `auto` = one year (`periods_per_year`)";

    /// Half-life of the volatility estimate used for the volatility target, in periods (SPEC §10).
    volatility_halflife: f64 = 0.0;
    range "0 or [1, 1e6]" if |v| *v == 0.0 || (v.is_finite() && (1.0..=1e6).contains(v));
    meaning "`target-volatility` scales with an exponentially weighted covariance of this half-life (periods); \
             0 = the sample covariance";

    /// How the volatility target is carried out of sample (SPEC §13).
    risk_calibration: RiskCalibration = RiskCalibration::HeldOut;
    range "`held-out`, `ledoit-wolf`, `off`" if |_v| true;
    meaning "`target-volatility` is met out of sample: `held-out` = scaled by the cross-validation folds' held-out \
             over training volatility; `ledoit-wolf` = by the Ledoit–Wolf over the sample volatility; \
             `off` = the in-window volatility is the target";

    /// Stationary-bootstrap draws of the window (SPEC §11); 0 = off.
    bootstrap_draws: u32 = 0;
    range "0..=10000" if |v| *v <= MAX_BOOTSTRAP_DRAWS;
    meaning "stationary-bootstrap draws of whole rows, each refitted: weight intervals and sign agreement; 0 = off";

    /// Mean block length of the stationary bootstrap, periods; 0 = ⌈T^(1/3)⌉.
    bootstrap_block: f64 = 0.0;
    range "0 or [1, 1e6]" if |v| *v == 0.0 || (v.is_finite() && (1.0..=1e6).contains(v));
    meaning "mean block length of the bootstrap in periods; 0 = ⌈T^(1/3)⌉";

    /// Rerun the cross-validation in every draw instead of keeping the chosen K and κ.
    bootstrap_cv: bool = false;
    range "bool" if |_v| true;
    meaning "rerun the cross-validation in every draw (and report the distribution of K) instead of keeping K and κ";

    /// Seed of the bootstrap's random numbers.
    seed: u64 = 0;
    range "0..=9223372036854775807" if |v| *v <= i64::MAX as u64;
    meaning "seed of the bootstrap; equal seeds give equal draws whatever the thread count";

    /// The weights returned when the bootstrap runs.
    aggregate: Aggregate = Aggregate::Point;
    range "`point`, `bagged`" if |_v| true;
    meaning "`point` = the window's own fit (the draws give intervals); `bagged` = the mean of the draws, normalised again";
}

impl Settings {
    /// Whether `key` has any effect under these settings: the method's own
    /// settings, the normalisation's, the bootstrap's when it runs, and so on.
    /// What a report lists as "in force".
    pub fn is_used(&self, key: &str) -> bool {
        let components = matches!(self.method, Method::Components | Method::Ensemble);
        let cross_validated = components || matches!(self.method, Method::KnsRidge | Method::Blend);
        let target = self.normalization == Normalization::TargetVolatility;
        let bootstrap = self.bootstrap_draws > 0;
        match key {
            "scaling" => self.method == Method::Components,
            "components" | "max_components" => components,
            "rp_gamma" => {
                self.method == Method::Ensemble
                    || self.method == Method::Components && matches!(self.scaling, Scaling::RiskPremium | Scaling::Auto)
            }
            "kappa" | "kappa_grid_min" | "kappa_grid_max" | "kappa_grid_points" | "l1_penalty" | "cv_criterion"
            | "held_out_check" => cross_validated,
            // The folds also measure the held-out risk of every method.
            "folds" => cross_validated || target && self.risk_calibration == RiskCalibration::HeldOut,
            "target_volatility" | "risk_calibration" | "volatility_halflife" => target,
            "risk_aversion" => self.normalization == Normalization::RiskAversion,
            "holding_periods" => self.cost_bps > 0.0,
            "bootstrap_block" | "bootstrap_cv" | "seed" | "aggregate" => bootstrap,
            _ => true,
        }
    }

    /// The default of `key` as the README shows it: words in backticks,
    /// numbers and booleans plain.
    pub fn shown_value(&self, key: &str) -> Option<String> {
        let table = toml::Table::try_from(self).ok()?;
        Some(match table.get(key)? {
            toml::Value::String(s) => format!("`{s}`"),
            toml::Value::Float(f) => format!("{f}"),
            other => other.to_string(),
        })
    }

    /// Sets one key from its textual value (`components=5`, `scaling=covariance`,
    /// `kappa=auto`). Hyphens in the key are read as underscores.
    ///
    /// # Errors
    /// [`SettingsError::UnknownField`] for a key that is not a setting, and
    /// [`SettingsError::InvalidValue`] for a value of the wrong type.
    pub fn set(&mut self, key: &str, value: &str) -> Result<(), SettingsError> {
        let key = key.trim().replace('-', "_");
        let Some(&field) = Self::KEYS.iter().find(|k| **k == key) else {
            let closest = closest_key(&key);
            return Err(SettingsError::UnknownField { field: key, closest, known: Settings::KEYS });
        };
        let value = value.trim();
        // Numbers and booleans parse as TOML scalars; anything else is a word.
        let parsed = toml::from_str::<toml::Table>(&format!("v = {value}"))
            .ok()
            .and_then(|mut t| t.remove("v"))
            .unwrap_or_else(|| toml::Value::String(value.to_owned()));
        let mut table = toml::Table::try_from(&*self).map_err(|e| SettingsError::InvalidValue {
            field,
            value: value.to_owned(),
            reason: e.to_string(),
        })?;
        table.insert(field.to_owned(), parsed);
        *self = table.try_into().map_err(|e: toml::de::Error| SettingsError::InvalidValue {
            field,
            value: value.to_owned(),
            reason: e.message().to_owned(),
        })?;
        Ok(())
    }

    /// Reads settings from TOML text; keys not given keep their defaults.
    ///
    /// # Errors
    /// [`SettingsError::File`] naming the offending key or line.
    pub fn from_toml(text: &str) -> Result<Settings, SettingsError> {
        toml::from_str(text).map_err(|e| SettingsError::File { message: e.to_string() })
    }

    /// Validates every field against its documented range.
    ///
    /// # Errors
    /// [`SettingsError::OutOfRange`] naming the first field out of range.
    pub fn check(self) -> Result<ValidSettings, SettingsError> {
        self.check_each()?;
        if !(self.kappa_grid_max > self.kappa_grid_min) {
            return Err(SettingsError::OutOfRange {
                field: "kappa_grid_max",
                value: self.kappa_grid_max.to_string(),
                range: "(`kappa_grid_min`, 100]",
            });
        }
        if matches!(self.method, Method::KnsRidge | Method::Blend)
            && let Choice::Fixed(k) = self.components
        {
            return Err(SettingsError::InvalidValue {
                field: "components",
                value: k.to_string(),
                reason: format!("method `{}` uses every component; a fixed K needs `method = components`", self.method),
            });
        }
        Ok(ValidSettings { inner: self })
    }
}

/// The setting nearest to `key` by edit distance, if it is near enough to be a typo.
fn closest_key(key: &str) -> Option<&'static str> {
    closest_name(key, Settings::KEYS)
}

/// The name in `names` nearest to `word` by Levenshtein distance, if it is
/// near enough to be a typo (at most 3 edits and a third of the word's length).
pub fn closest_name(word: &str, names: &[&'static str]) -> Option<&'static str> {
    let (best, d) = names.iter().map(|k| (*k, strsim::levenshtein(word, k))).min_by_key(|&(_, d)| d)?;
    (d <= 3 && d * 3 <= word.chars().count().max(3)).then_some(best)
}

/// The choices a fit made, fixed for the bootstrap's draws.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FittedChoice {
    /// The scaling `auto` chose, if any.
    pub scaling: Option<Scaling>,
    /// K.
    pub components: usize,
    /// κ, annualised.
    pub kappa: f64,
}

/// Settings that passed [`Settings::check`]: the only form the estimator takes.
#[derive(Clone, Debug, PartialEq)]
pub struct ValidSettings {
    inner: Settings,
}

impl std::ops::Deref for ValidSettings {
    type Target = Settings;
    fn deref(&self) -> &Settings {
        &self.inner
    }
}

impl ValidSettings {
    /// The validated settings.
    pub fn settings(&self) -> &Settings {
        &self.inner
    }

    /// Settings already known to pass [`Settings::check`] (a checked value
    /// with a field fixed inside its range).
    pub(crate) fn trusted(inner: Settings) -> ValidSettings {
        debug_assert!(inner.clone().check().is_ok());
        ValidSettings { inner }
    }

    /// The model portfolio's settings: the implementation stage off (no
    /// limit, no cost) and, with point aggregation, no bootstrap (intervals
    /// at every refit serve no one; bagging changes the weights and stays).
    /// Turning a limit, the cost or the bootstrap off never leaves a range:
    /// valid by construction, no second check.
    pub fn model_only(&self) -> ValidSettings {
        let mut m = self.inner.clone();
        m.max_weight = Cap::Off;
        m.max_gross = Cap::Off;
        m.max_market_weight = Cap::Off;
        m.max_turnover = Cap::Off;
        m.cost_bps = 0.0;
        if m.aggregate == Aggregate::Point {
            m.bootstrap_draws = 0;
        }
        ValidSettings::trusted(m)
    }

    /// The settings of one bootstrap draw (SPEC §11): the model alone (no
    /// limits, no nested bootstrap, no held-out check, no risk calibration of
    /// its own: each draw takes the point fit's) and, when `fixed` holds the
    /// point fit's choices, those choices fixed. `fixed` comes from a fit of
    /// these settings, so K ∈ [1, max_components] and κ on the grid inside
    /// (0, 100]: valid by construction.
    pub fn for_draw(&self, fixed: Option<FittedChoice>) -> ValidSettings {
        let mut s = self.model_only().inner;
        s.bootstrap_draws = 0;
        s.aggregate = Aggregate::Point;
        s.held_out_check = false;
        s.risk_calibration = RiskCalibration::Off;
        if let Some(f) = fixed {
            match s.method {
                Method::Components => {
                    if let Some(chosen) = f.scaling.filter(|_| s.scaling == Scaling::Auto) {
                        s.scaling = chosen;
                    }
                    s.components = Choice::Fixed(f.components as u32);
                    s.kappa = Choice::Fixed(f.kappa);
                }
                Method::KnsRidge | Method::Blend => s.kappa = Choice::Fixed(f.kappa),
                Method::Ensemble | Method::PlugIn | Method::PlugInLedoitWolf | Method::EqualWeight => {}
            }
        }
        ValidSettings::trusted(s)
    }

    /// The same settings with another concrete scaling (every scaling is in range).
    pub fn with_scaling(&self, scaling: Scaling) -> ValidSettings {
        ValidSettings::trusted(Settings { scaling, ..self.inner.clone() })
    }

    /// Periods per year in force: the value set or resolved for a panel
    /// ([`ValidSettings::for_panel`]), else monthly.
    pub fn periods_per_year(&self) -> u32 {
        self.inner.periods_per_year.fixed().unwrap_or(ASSUMED_PERIODS_PER_YEAR)
    }

    /// κ per period from an annualised κ: κ/√P (SPEC §5).
    pub fn kappa_per_period(&self, kappa_annual: f64) -> f64 {
        kappa_annual / f64::from(self.periods_per_year()).sqrt()
    }

    /// The annualised κ grid: `kappa_grid_points` values log-spaced on
    /// [`kappa_grid_min`, `kappa_grid_max`] (as `numpy.logspace`), or the
    /// fixed κ alone.
    pub fn kappa_grid(&self) -> Vec<f64> {
        if let Choice::Fixed(k) = self.inner.kappa {
            return vec![k];
        }
        let n = self.inner.kappa_grid_points as usize;
        let lo = self.inner.kappa_grid_min.log10();
        let hi = self.inner.kappa_grid_max.log10();
        let step = (hi - lo) / (n - 1) as f64;
        // numpy.linspace sets the last point to the end exactly.
        (0..n).map(|i| if i + 1 == n { hi } else { lo + step * i as f64 }).map(|e| 10f64.powf(e)).collect()
    }

    /// Whether the implementation stage of SPEC §10 runs: some limit is on
    /// or trades cost something. Otherwise the weights are the model's.
    pub fn implementation_active(&self) -> bool {
        let s = &self.inner;
        [s.max_weight, s.max_gross, s.max_market_weight, s.max_turnover].iter().any(|c| c.limit().is_some())
            || s.cost_bps > 0.0
    }

    /// Cost per unit of weight traded, per period of holding: c_b·1e-4/h (SPEC §10).
    pub fn cost_per_unit(&self) -> f64 {
        let h = self.inner.holding_periods.fixed().unwrap_or(f64::from(self.periods_per_year()));
        self.inner.cost_bps * 1e-4 / h
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn derived_settings_are_valid_and_change_only_what_they_say() {
        let base = Settings {
            max_weight: Cap::At(0.1),
            max_turnover: Cap::At(0.5),
            cost_bps: 10.0,
            bootstrap_draws: 50,
            method: Method::Components,
            scaling: Scaling::Auto,
            ..Settings::default()
        }
        .check()
        .unwrap();
        let model = base.model_only();
        assert_eq!(model.max_weight, Cap::Off);
        assert_eq!(model.max_turnover, Cap::Off);
        assert_eq!(model.cost_bps, 0.0);
        assert_eq!(model.bootstrap_draws, 0, "point aggregation: no intervals at every refit");
        assert!(model.settings().clone().check().is_ok());
        let bagged = Settings { aggregate: Aggregate::Bagged, ..base.settings().clone() }.check().unwrap();
        assert_eq!(bagged.model_only().bootstrap_draws, 50, "bagging changes the weights and stays");
        let fixed = FittedChoice { scaling: Some(Scaling::Covariance), components: 4, kappa: 0.37 };
        let draw = base.for_draw(Some(fixed));
        assert_eq!(
            (draw.scaling, draw.components, draw.kappa),
            (Scaling::Covariance, Choice::Fixed(4), Choice::Fixed(0.37))
        );
        assert!(!draw.held_out_check && draw.bootstrap_draws == 0 && draw.risk_calibration == RiskCalibration::Off);
        assert!(draw.settings().clone().check().is_ok());
        let free = base.for_draw(None);
        assert_eq!((free.scaling, free.components), (Scaling::Auto, Choice::Auto));
        assert_eq!(base.with_scaling(Scaling::Standardized).scaling, Scaling::Standardized);
    }

    #[test]
    fn settings_in_force_follow_the_method() {
        let d = Settings::default();
        assert!(!d.is_used("scaling") && !d.is_used("components") && !d.is_used("risk_aversion"));
        assert!(d.is_used("kappa") && d.is_used("folds") && d.is_used("risk_calibration") && d.is_used("method"));
        assert!(!d.is_used("seed") && !d.is_used("holding_periods"));
        let c = Settings { method: Method::Components, scaling: Scaling::RiskPremium, ..Settings::default() };
        assert!(c.is_used("scaling") && c.is_used("components") && c.is_used("rp_gamma"));
        let p = Settings { method: Method::PlugIn, normalization: Normalization::GrossExposure, ..Settings::default() };
        assert!(!p.is_used("kappa") && !p.is_used("folds") && !p.is_used("target_volatility"));
    }

    #[test]
    fn set_parses_words_numbers_and_auto() {
        let mut s = Settings::default();
        s.set("scaling", "risk-premium").unwrap();
        s.set("components", "7").unwrap();
        s.set("kappa", "0.5").unwrap();
        s.set("demarket", "false").unwrap();
        s.set("max-components", "12").unwrap();
        assert_eq!(s.scaling, Scaling::RiskPremium);
        assert_eq!(s.components, Choice::Fixed(7));
        assert_eq!(s.kappa, Choice::Fixed(0.5));
        assert!(!s.demarket);
        assert_eq!(s.max_components, 12);
        s.set("components", "auto").unwrap();
        assert_eq!(s.components, Choice::Auto);
    }

    #[test]
    fn set_rejects_unknown_keys_and_bad_values() {
        let mut s = Settings::default();
        assert!(matches!(s.set("kapa", "1"), Err(SettingsError::UnknownField { closest: Some("kappa"), .. })));
        let e = s.set("scalng", "sharpe").unwrap_err().to_string();
        assert!(e.contains("did you mean `scaling`?") && e.contains("max_components"), "{e}");
        assert!(matches!(s.set("zzzzzzzz", "1"), Err(SettingsError::UnknownField { closest: None, .. })));
        assert!(matches!(s.set("scaling", "sharp"), Err(SettingsError::InvalidValue { field: "scaling", .. })));
        assert!(matches!(s.set("folds", "-3"), Err(SettingsError::InvalidValue { field: "folds", .. })));
        assert_eq!(s, Settings::default(), "a failed set leaves settings unchanged");
    }

    #[test]
    fn check_names_the_field_out_of_range() {
        let s = Settings { target_volatility: -0.1, ..Settings::default() };
        match s.check() {
            Err(SettingsError::OutOfRange { field, .. }) => assert_eq!(field, "target_volatility"),
            other => panic!("unexpected {other:?}"),
        }
        let s = Settings { kappa: Choice::Fixed(f64::NAN), ..Settings::default() };
        assert!(matches!(s.check(), Err(SettingsError::OutOfRange { field: "kappa", .. })));
    }

    #[test]
    fn kappa_grid_matches_numpy_logspace_endpoints() {
        // numpy.logspace(-2, 1, 40): first 0.01, last 10 (numpy documentation).
        let g = Settings::default().check().unwrap().kappa_grid();
        assert_eq!(g.len(), 40);
        assert!((g[0] - 0.01).abs() < 1e-15);
        assert!((g[39] - 10.0).abs() < 1e-12);
    }

    /// The README's Settings table, row for row, as the declaration renders it.
    fn table_rows() -> Vec<String> {
        let d = Settings::default();
        Settings::TABLE
            .iter()
            .map(|i| format!("| `{}` | {} | {} | {} |", i.name, d.shown_value(i.name).unwrap(), i.range, i.meaning))
            .collect()
    }

    #[test]
    fn readme_settings_table_is_the_declared_table() {
        let readme = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/README.md")).unwrap();
        let rows: Vec<&str> = readme
            .lines()
            .skip_while(|l| !l.starts_with("## Settings"))
            .skip(1)
            .take_while(|l| !l.starts_with("## "))
            .filter(|l| l.starts_with("| `"))
            .collect();
        let want = table_rows();
        assert_eq!(rows, want, "the README's Settings table should read:\n{}", want.join("\n"));
        assert_eq!(Settings::KEYS.len(), Settings::TABLE.len());
    }

    #[test]
    fn every_key_sets_and_every_default_is_in_range() {
        let d = Settings::default();
        for &key in Settings::KEYS {
            let shown = d.shown_value(key).unwrap().replace('`', "");
            let mut s = Settings::default();
            s.set(key, &shown).unwrap_or_else(|e| panic!("{key}={shown}: {e}"));
            assert_eq!(s, d, "{key}: its shown default sets the same value");
        }
        assert!(d.check().is_ok());
    }

    #[test]
    fn toml_file_round_trip() {
        let s = Settings::from_toml("scaling = \"covariance\"\ncomponents = 4\n").unwrap();
        assert_eq!(s.scaling, Scaling::Covariance);
        assert_eq!(s.components, Choice::Fixed(4));
        assert_eq!(s.folds, 3);
        assert!(matches!(Settings::from_toml("nope = 1"), Err(SettingsError::File { .. })));
    }
}

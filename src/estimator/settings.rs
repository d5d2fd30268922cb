//! Estimator settings: the public [`Settings`] with every default in one place,
//! and [`ValidSettings`], the only form the estimator accepts.
//!
//! | name | default | range | meaning |
//! |---|---|---|---|
//! | `method` | `components` | `components`, `kns-ridge`, `plug-in`, `plug-in-ledoit-wolf`, `equal-weight` | portfolio rule |
//! | `scaling` | `sharpe` | `sharpe`, `sharpe-raw`, `standardized`, `covariance`, `risk-premium` | factor scaling before PCA |
//! | `components` | `auto` | `auto` or 1..=1000 | number of components K |
//! | `max_components` | 30 | 1..=1000 | largest K cross-validation may choose |
//! | `kappa` | `auto` | `auto` or (0, 100] | annualised prior root max squared Sharpe |
//! | `kappa_grid_min` | 0.01 | (0, 100] | smallest κ of the grid |
//! | `kappa_grid_max` | 10 | (0, 100], > min | largest κ of the grid |
//! | `kappa_grid_points` | 40 | 2..=500 | log-spaced κ values |
//! | `l1_penalty` | 0 | [0, 1e6] | elastic-net L1 penalty γ₁ (per period, units of component means) |
//! | `folds` | 3 | 2..=20 | contiguous CV blocks |
//! | `cv_criterion` | `sharpe` | `sharpe`, `pricing-r2`, `pricing-r2-gls` | CV score |
//! | `normalization` | `target-volatility` | `target-volatility`, `risk-aversion`, `gross-exposure` | weight scale |
//! | `target_volatility` | 0.10 | (0, 10] | annualised volatility target |
//! | `risk_aversion` | 3 | (0, 1e6] | relative risk aversion |
//! | `periods_per_year` | 12 | 1..=100000 | 12 monthly, 52 weekly, 252 daily |
//! | `demarket` | true | bool | remove market exposure in the window |
//! | `missing_policy` | `drop-factor` | `drop-factor`, `reject` | missing-value rule |
//! | `rp_gamma` | 10 | [-1, 1e6] | mean weight of risk-premium PCA |
//! | `min_periods` | 24 | 3..=1000000 | fewest periods in a window |
//! | `held_out_check` | true | bool | with K and κ both fixed, still refit the folds to report the held-out Sharpe |

use std::fmt;

use serde::{Deserialize, Deserializer, Serialize, Serializer};

use super::error::SettingsError;

/// Portfolio rule that turns the window into weights.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Method {
    /// Shrunk mean–variance portfolio of the leading components (KNS).
    #[default]
    Components,
    /// Unshrunk Σ⁻¹μ on all usable factors (a baseline).
    PlugIn,
    /// Σ_LW⁻¹μ with the Ledoit & Wolf (2004) shrunk covariance (a baseline).
    PlugInLedoitWolf,
    /// KNS ridge on all factors: covariance PCA with every component, κ as set (a baseline).
    KnsRidge,
    /// Equal weight over the demarketed factors (DeMiguel, Garlappi & Uppal 2009).
    EqualWeight,
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
}

impl Scaling {
    /// Every scaling, in documentation order.
    pub const ALL: [Scaling; 5] =
        [Scaling::Sharpe, Scaling::SharpeRaw, Scaling::Standardized, Scaling::Covariance, Scaling::RiskPremium];

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

/// Estimator settings as a user gives them. Unset keys in a file take the
/// defaults of [`Settings::default`]; [`Settings::check`] validates them.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Settings {
    /// Portfolio rule.
    pub method: Method,
    /// Factor scaling before PCA.
    pub scaling: Scaling,
    /// Number of components K.
    pub components: Choice<u32>,
    /// Largest K that cross-validation may choose.
    pub max_components: u32,
    /// Annualised κ.
    pub kappa: Choice<f64>,
    /// Smallest κ of the CV grid (annualised).
    pub kappa_grid_min: f64,
    /// Largest κ of the CV grid (annualised).
    pub kappa_grid_max: f64,
    /// Number of log-spaced κ values in the CV grid.
    pub kappa_grid_points: u32,
    /// Elastic-net L1 penalty γ₁ (0: ridge only).
    pub l1_penalty: f64,
    /// Number of contiguous CV blocks.
    pub folds: u32,
    /// CV score.
    pub cv_criterion: CvCriterion,
    /// Weight scale rule.
    pub normalization: Normalization,
    /// Annualised volatility target.
    pub target_volatility: f64,
    /// Relative risk aversion.
    pub risk_aversion: f64,
    /// Periods per year.
    pub periods_per_year: u32,
    /// Remove market exposure inside the window.
    pub demarket: bool,
    /// Missing-value rule.
    pub missing_policy: MissingPolicy,
    /// Weight of the mean in risk-premium PCA.
    pub rp_gamma: f64,
    /// Fewest periods a window may have.
    pub min_periods: u32,
    /// With K and κ both fixed, still refit on the CV folds to report the
    /// held-out Sharpe ratio (one extra eigensolve per fold); `false` skips
    /// the folds and leaves that diagnostic unset.
    pub held_out_check: bool,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            method: Method::Components,
            scaling: Scaling::Sharpe,
            components: Choice::Auto,
            max_components: 30,
            kappa: Choice::Auto,
            kappa_grid_min: 0.01,
            kappa_grid_max: 10.0,
            kappa_grid_points: 40,
            l1_penalty: 0.0,
            folds: 3,
            cv_criterion: CvCriterion::Sharpe,
            normalization: Normalization::TargetVolatility,
            target_volatility: 0.10,
            risk_aversion: 3.0,
            periods_per_year: 12,
            demarket: true,
            missing_policy: MissingPolicy::DropFactor,
            rp_gamma: 10.0,
            min_periods: 24,
            held_out_check: true,
        }
    }
}

/// Largest fixed number of components accepted.
pub const MAX_COMPONENTS_LIMIT: u32 = 1000;
/// Largest number of κ grid points accepted.
pub const MAX_KAPPA_POINTS: u32 = 500;

fn check_range<T: PartialOrd + Copy + fmt::Display>(
    field: &'static str,
    value: T,
    ok: bool,
    range: &'static str,
) -> Result<(), SettingsError> {
    if ok { Ok(()) } else { Err(SettingsError::OutOfRange { field, value: value.to_string(), range }) }
}

impl Settings {
    /// Names of every setting, as used in files, `--set` and the API.
    pub const KEYS: [&'static str; 20] = [
        "method",
        "scaling",
        "components",
        "max_components",
        "kappa",
        "kappa_grid_min",
        "kappa_grid_max",
        "kappa_grid_points",
        "l1_penalty",
        "folds",
        "cv_criterion",
        "normalization",
        "target_volatility",
        "risk_aversion",
        "periods_per_year",
        "demarket",
        "missing_policy",
        "rp_gamma",
        "min_periods",
        "held_out_check",
    ];

    /// Sets one key from its textual value (`components=5`, `scaling=covariance`,
    /// `kappa=auto`). Hyphens in the key are read as underscores.
    ///
    /// # Errors
    /// [`SettingsError::UnknownField`] for a key that is not a setting, and
    /// [`SettingsError::InvalidValue`] for a value of the wrong type.
    pub fn set(&mut self, key: &str, value: &str) -> Result<(), SettingsError> {
        let key = key.trim().replace('-', "_");
        let Some(&field) = Self::KEYS.iter().find(|k| **k == key) else {
            return Err(SettingsError::UnknownField { field: key });
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
        let s = &self;
        if let Choice::Fixed(k) = s.components {
            check_range("components", k, (1..=MAX_COMPONENTS_LIMIT).contains(&k), "auto or 1..=1000")?;
        }
        check_range(
            "max_components",
            s.max_components,
            (1..=MAX_COMPONENTS_LIMIT).contains(&s.max_components),
            "1..=1000",
        )?;
        if let Choice::Fixed(k) = s.kappa {
            check_range("kappa", k, k.is_finite() && k > 0.0 && k <= 100.0, "auto or (0, 100]")?;
        }
        let kmin = s.kappa_grid_min;
        let kmax = s.kappa_grid_max;
        check_range("kappa_grid_min", kmin, kmin.is_finite() && kmin > 0.0 && kmin <= 100.0, "(0, 100]")?;
        check_range("kappa_grid_max", kmax, kmax.is_finite() && kmax > kmin && kmax <= 100.0, "(kappa_grid_min, 100]")?;
        check_range(
            "kappa_grid_points",
            s.kappa_grid_points,
            (2..=MAX_KAPPA_POINTS).contains(&s.kappa_grid_points),
            "2..=500",
        )?;
        let l1 = s.l1_penalty;
        check_range("l1_penalty", l1, l1.is_finite() && (0.0..=1e6).contains(&l1), "[0, 1e6]")?;
        check_range("folds", s.folds, (2..=20).contains(&s.folds), "2..=20")?;
        let tv = s.target_volatility;
        check_range("target_volatility", tv, tv.is_finite() && tv > 0.0 && tv <= 10.0, "(0, 10]")?;
        let ra = s.risk_aversion;
        check_range("risk_aversion", ra, ra.is_finite() && ra > 0.0 && ra <= 1e6, "(0, 1e6]")?;
        check_range("periods_per_year", s.periods_per_year, (1..=100_000).contains(&s.periods_per_year), "1..=100000")?;
        let g = s.rp_gamma;
        check_range("rp_gamma", g, g.is_finite() && (-1.0..=1e6).contains(&g), "[-1, 1e6]")?;
        check_range("min_periods", s.min_periods, (3..=1_000_000).contains(&s.min_periods), "3..=1000000")?;
        Ok(ValidSettings { inner: self })
    }
}

/// Settings that passed [`Settings::check`]: the only form the estimator takes.
#[derive(Clone, Debug, PartialEq, Default)]
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

    /// κ per period from an annualised κ: κ/√P (SPEC §5).
    pub fn kappa_per_period(&self, kappa_annual: f64) -> f64 {
        kappa_annual / f64::from(self.inner.periods_per_year).sqrt()
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
}

#[cfg(test)]
mod tests {
    use super::*;

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
        assert!(matches!(s.set("kapa", "1"), Err(SettingsError::UnknownField { .. })));
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
        let g = ValidSettings::default().kappa_grid();
        assert_eq!(g.len(), 40);
        assert!((g[0] - 0.01).abs() < 1e-15);
        assert!((g[39] - 10.0).abs() < 1e-12);
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

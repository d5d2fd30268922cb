//! `Settings` messages: the whole settings, a patch of some of them, and the enums.

use crate::estimator::{Aggregate, Cap, RiskCalibration};
use crate::estimator::{
    Choice, CvCriterion, Method, MissingPolicy, Normalization, Scaling, Settings, SettingsError, SettingsPatch,
};
use crate::proto;
use crate::proto::settings::{
    ComponentsChoice, HoldingPeriodsChoice, KappaChoice, MaxGrossChoice, MaxMarketWeightChoice, MaxTurnoverChoice,
    MaxWeightChoice, PeriodsPerYearChoice,
};

/// Proto enum for a scaling.
pub fn scaling_to_proto(s: Scaling) -> proto::Scaling {
    match s {
        Scaling::Sharpe => proto::Scaling::Sharpe,
        Scaling::SharpeRaw => proto::Scaling::SharpeRaw,
        Scaling::Standardized => proto::Scaling::Standardized,
        Scaling::Covariance => proto::Scaling::Covariance,
        Scaling::RiskPremium => proto::Scaling::RiskPremium,
        Scaling::SharpeShrunk => proto::Scaling::SharpeShrunk,
        Scaling::Auto => proto::Scaling::Auto,
    }
}

pub(super) fn criterion_to_proto(c: CvCriterion) -> proto::CvCriterion {
    match c {
        CvCriterion::Sharpe => proto::CvCriterion::Sharpe,
        CvCriterion::PricingR2 => proto::CvCriterion::PricingR2,
        CvCriterion::PricingR2Gls => proto::CvCriterion::PricingR2Gls,
    }
}

fn normalization_to_proto(n: Normalization) -> proto::Normalization {
    match n {
        Normalization::TargetVolatility => proto::Normalization::TargetVolatility,
        Normalization::RiskAversion => proto::Normalization::RiskAversion,
        Normalization::GrossExposure => proto::Normalization::GrossExposure,
    }
}

fn missing_to_proto(m: MissingPolicy) -> proto::MissingPolicy {
    match m {
        MissingPolicy::DropFactor => proto::MissingPolicy::DropFactor,
        MissingPolicy::Reject => proto::MissingPolicy::Reject,
    }
}

fn method_to_proto(m: Method) -> proto::Method {
    match m {
        Method::Components => proto::Method::Components,
        Method::PlugIn => proto::Method::PlugIn,
        Method::EqualWeight => proto::Method::EqualWeight,
        Method::KnsRidge => proto::Method::KnsRidge,
        Method::Blend => proto::Method::Blend,
        Method::PlugInLedoitWolf => proto::Method::PlugInLedoitWolf,
        Method::Ensemble => proto::Method::Ensemble,
    }
}

/// The proto enum number of `v`, or 0 (`_UNSPECIFIED`: the server's default) when unset.
fn enum_or_unset<T: Copy, P: Into<i32>>(v: Option<T>, to: fn(T) -> P) -> i32 {
    v.map_or(0, |v| to(v).into())
}

/// A patch as a proto message: set fields are sent, the others stay unset so
/// that the server's defaults apply to them.
pub fn patch_to_proto(p: &SettingsPatch) -> proto::Settings {
    let SettingsPatch {
        method,
        scaling,
        components,
        max_components,
        kappa,
        kappa_grid_min,
        kappa_grid_max,
        kappa_grid_points,
        l1_penalty,
        folds,
        cv_criterion,
        normalization,
        target_volatility,
        risk_aversion,
        periods_per_year,
        demarket,
        missing_policy,
        rp_gamma,
        min_periods,
        held_out_check,
        max_weight,
        max_gross,
        max_market_weight,
        max_turnover,
        cost_bps,
        holding_periods,
        volatility_halflife,
        bootstrap_draws,
        bootstrap_block,
        bootstrap_cv,
        seed,
        aggregate,
        risk_calibration,
        frequency_check,
    } = p.clone();
    proto::Settings {
        scaling: enum_or_unset(scaling, scaling_to_proto),
        components_choice: components.map(|c| match c {
            Choice::Auto => ComponentsChoice::ComponentsAuto(true),
            Choice::Fixed(k) => ComponentsChoice::Components(k),
        }),
        max_components,
        kappa_choice: kappa.map(|c| match c {
            Choice::Auto => KappaChoice::KappaAuto(true),
            Choice::Fixed(k) => KappaChoice::Kappa(k),
        }),
        kappa_grid_min,
        kappa_grid_max,
        kappa_grid_points,
        l1_penalty,
        folds,
        cv_criterion: enum_or_unset(cv_criterion, criterion_to_proto),
        normalization: enum_or_unset(normalization, normalization_to_proto),
        target_volatility,
        risk_aversion,
        periods_per_year_choice: periods_per_year.map(|c| match c {
            Choice::Auto => PeriodsPerYearChoice::PeriodsPerYearAuto(true),
            Choice::Fixed(p) => PeriodsPerYearChoice::PeriodsPerYear(p),
        }),
        demarket,
        missing_policy: enum_or_unset(missing_policy, missing_to_proto),
        rp_gamma,
        min_periods,
        method: enum_or_unset(method, method_to_proto),
        held_out_check,
        max_weight_choice: max_weight
            .map(|c| cap_to_proto(c, MaxWeightChoice::MaxWeight, MaxWeightChoice::MaxWeightOff)),
        max_gross_choice: max_gross.map(|c| cap_to_proto(c, MaxGrossChoice::MaxGross, MaxGrossChoice::MaxGrossOff)),
        max_market_weight_choice: max_market_weight.map(|c| {
            cap_to_proto(c, MaxMarketWeightChoice::MaxMarketWeight, MaxMarketWeightChoice::MaxMarketWeightOff)
        }),
        max_turnover_choice: max_turnover
            .map(|c| cap_to_proto(c, MaxTurnoverChoice::MaxTurnover, MaxTurnoverChoice::MaxTurnoverOff)),
        cost_bps,
        holding_periods_choice: holding_periods.map(|c| match c {
            Choice::Auto => HoldingPeriodsChoice::HoldingPeriodsAuto(true),
            Choice::Fixed(h) => HoldingPeriodsChoice::HoldingPeriods(h),
        }),
        volatility_halflife,
        bootstrap_draws,
        bootstrap_block,
        bootstrap_cv,
        seed,
        aggregate: enum_or_unset(aggregate, |a| match a {
            Aggregate::Point => proto::Aggregate::Point,
            Aggregate::Bagged => proto::Aggregate::Bagged,
        }),
        risk_calibration: enum_or_unset(risk_calibration, risk_calibration_to_proto),
        frequency_check,
    }
}

/// Proto enum for a risk calibration rule.
pub(super) fn risk_calibration_to_proto(r: RiskCalibration) -> proto::RiskCalibration {
    match r {
        RiskCalibration::HeldOut => proto::RiskCalibration::HeldOut,
        RiskCalibration::LedoitWolf => proto::RiskCalibration::LedoitWolf,
        RiskCalibration::Off => proto::RiskCalibration::Off,
    }
}

fn risk_calibration_from_proto(r: proto::RiskCalibration) -> Option<RiskCalibration> {
    match r {
        proto::RiskCalibration::Unspecified => None,
        proto::RiskCalibration::HeldOut => Some(RiskCalibration::HeldOut),
        proto::RiskCalibration::LedoitWolf => Some(RiskCalibration::LedoitWolf),
        proto::RiskCalibration::Off => Some(RiskCalibration::Off),
    }
}

/// Every setting, explicitly, as a proto message.
pub fn settings_to_proto(s: &Settings) -> proto::Settings {
    patch_to_proto(&s.patch_of(Settings::KEYS))
}

/// A proto `Settings` carrying only the named keys of `s` (the others unset,
/// so that the server's defaults apply to them).
pub fn settings_to_proto_only(s: &Settings, keys: &[&str]) -> proto::Settings {
    patch_to_proto(&s.patch_of(keys))
}

fn unknown_enum(field: &'static str, value: i32) -> SettingsError {
    SettingsError::InvalidValue { field, value: value.to_string(), reason: "unknown enum value".into() }
}

/// A proto enum number as an optional setting: `_UNSPECIFIED` is unset.
fn enum_from<P: TryFrom<i32>, T>(
    field: &'static str,
    n: i32,
    from: fn(P) -> Option<T>,
) -> Result<Option<T>, SettingsError> {
    P::try_from(n).map(from).map_err(|_| unknown_enum(field, n))
}

fn auto_false(field: &'static str) -> SettingsError {
    SettingsError::InvalidValue {
        field,
        value: "false".into(),
        reason: "set it to true for cross-validation, or leave the choice unset for the server's default".into(),
    }
}

/// A limit as its proto oneof: the bound, or `*_off = true`.
fn cap_to_proto<T>(c: Cap, at: fn(f64) -> T, off: fn(bool) -> T) -> T {
    match c {
        Cap::Off => off(true),
        Cap::At(v) => at(v),
    }
}

/// A limit from its proto oneof (`Ok` the bound, `Err` the `*_off` flag); `*_off = false` is rejected.
fn cap_from_proto(off_field: &'static str, choice: Option<Result<f64, bool>>) -> Result<Option<Cap>, SettingsError> {
    match choice {
        None => Ok(None),
        Some(Ok(v)) => Ok(Some(Cap::At(v))),
        Some(Err(true)) => Ok(Some(Cap::Off)),
        Some(Err(false)) => Err(off_false(off_field)),
    }
}

fn off_false(field: &'static str) -> SettingsError {
    SettingsError::InvalidValue {
        field,
        value: "false".into(),
        reason: "set it to true to switch the limit off, or leave the choice unset for the server's default".into(),
    }
}

fn method_from_proto(m: proto::Method) -> Option<Method> {
    match m {
        proto::Method::Unspecified => None,
        proto::Method::Components => Some(Method::Components),
        proto::Method::PlugIn => Some(Method::PlugIn),
        proto::Method::EqualWeight => Some(Method::EqualWeight),
        proto::Method::KnsRidge => Some(Method::KnsRidge),
        proto::Method::Blend => Some(Method::Blend),
        proto::Method::PlugInLedoitWolf => Some(Method::PlugInLedoitWolf),
        proto::Method::Ensemble => Some(Method::Ensemble),
    }
}

fn scaling_from_proto(s: proto::Scaling) -> Option<Scaling> {
    match s {
        proto::Scaling::Unspecified => None,
        proto::Scaling::Sharpe => Some(Scaling::Sharpe),
        proto::Scaling::SharpeRaw => Some(Scaling::SharpeRaw),
        proto::Scaling::Standardized => Some(Scaling::Standardized),
        proto::Scaling::Covariance => Some(Scaling::Covariance),
        proto::Scaling::RiskPremium => Some(Scaling::RiskPremium),
        proto::Scaling::SharpeShrunk => Some(Scaling::SharpeShrunk),
        proto::Scaling::Auto => Some(Scaling::Auto),
    }
}

fn cv_criterion_from_proto(c: proto::CvCriterion) -> Option<CvCriterion> {
    match c {
        proto::CvCriterion::Unspecified => None,
        proto::CvCriterion::Sharpe => Some(CvCriterion::Sharpe),
        proto::CvCriterion::PricingR2 => Some(CvCriterion::PricingR2),
        proto::CvCriterion::PricingR2Gls => Some(CvCriterion::PricingR2Gls),
    }
}

fn normalization_from_proto(n: proto::Normalization) -> Option<Normalization> {
    match n {
        proto::Normalization::Unspecified => None,
        proto::Normalization::TargetVolatility => Some(Normalization::TargetVolatility),
        proto::Normalization::RiskAversion => Some(Normalization::RiskAversion),
        proto::Normalization::GrossExposure => Some(Normalization::GrossExposure),
    }
}

fn missing_policy_from_proto(m: proto::MissingPolicy) -> Option<MissingPolicy> {
    match m {
        proto::MissingPolicy::Unspecified => None,
        proto::MissingPolicy::DropFactor => Some(MissingPolicy::DropFactor),
        proto::MissingPolicy::Reject => Some(MissingPolicy::Reject),
    }
}

fn aggregate_from_proto(a: proto::Aggregate) -> Option<Aggregate> {
    match a {
        proto::Aggregate::Unspecified => None,
        proto::Aggregate::Point => Some(Aggregate::Point),
        proto::Aggregate::Bagged => Some(Aggregate::Bagged),
    }
}

/// The settings a message sets; unset fields and `_UNSPECIFIED` enums stay unset.
///
/// # Errors
/// [`SettingsError::InvalidValue`] for an enum number this version does not
/// know, or `components_auto`/`kappa_auto` sent as false.
pub fn patch_from_proto(p: &proto::Settings) -> Result<SettingsPatch, SettingsError> {
    let proto::Settings {
        scaling,
        components_choice,
        max_components,
        kappa_choice,
        kappa_grid_min,
        kappa_grid_max,
        kappa_grid_points,
        l1_penalty,
        folds,
        cv_criterion,
        normalization,
        target_volatility,
        risk_aversion,
        periods_per_year_choice,
        demarket,
        missing_policy,
        rp_gamma,
        min_periods,
        method,
        held_out_check,
        max_weight_choice,
        max_gross_choice,
        max_market_weight_choice,
        max_turnover_choice,
        cost_bps,
        holding_periods_choice,
        volatility_halflife,
        bootstrap_draws,
        bootstrap_block,
        bootstrap_cv,
        seed,
        aggregate,
        risk_calibration,
        frequency_check,
    } = *p;
    Ok(SettingsPatch {
        method: enum_from("method", method, method_from_proto)?,
        scaling: enum_from("scaling", scaling, scaling_from_proto)?,
        components: match components_choice {
            None => None,
            Some(ComponentsChoice::Components(k)) => Some(Choice::Fixed(k)),
            Some(ComponentsChoice::ComponentsAuto(true)) => Some(Choice::Auto),
            Some(ComponentsChoice::ComponentsAuto(false)) => return Err(auto_false("components_auto")),
        },
        max_components,
        kappa: match kappa_choice {
            None => None,
            Some(KappaChoice::Kappa(k)) => Some(Choice::Fixed(k)),
            Some(KappaChoice::KappaAuto(true)) => Some(Choice::Auto),
            Some(KappaChoice::KappaAuto(false)) => return Err(auto_false("kappa_auto")),
        },
        kappa_grid_min,
        kappa_grid_max,
        kappa_grid_points,
        l1_penalty,
        folds,
        cv_criterion: enum_from("cv_criterion", cv_criterion, cv_criterion_from_proto)?,
        normalization: enum_from("normalization", normalization, normalization_from_proto)?,
        target_volatility,
        risk_aversion,
        periods_per_year: match periods_per_year_choice {
            None => None,
            Some(PeriodsPerYearChoice::PeriodsPerYear(v)) => Some(Choice::Fixed(v)),
            Some(PeriodsPerYearChoice::PeriodsPerYearAuto(true)) => Some(Choice::Auto),
            Some(PeriodsPerYearChoice::PeriodsPerYearAuto(false)) => return Err(auto_false("periods_per_year_auto")),
        },
        demarket,
        missing_policy: enum_from("missing_policy", missing_policy, missing_policy_from_proto)?,
        rp_gamma,
        min_periods,
        held_out_check,
        max_weight: cap_from_proto(
            "max_weight_off",
            max_weight_choice.map(|c| match c {
                MaxWeightChoice::MaxWeight(v) => Ok(v),
                MaxWeightChoice::MaxWeightOff(off) => Err(off),
            }),
        )?,
        max_gross: cap_from_proto(
            "max_gross_off",
            max_gross_choice.map(|c| match c {
                MaxGrossChoice::MaxGross(v) => Ok(v),
                MaxGrossChoice::MaxGrossOff(off) => Err(off),
            }),
        )?,
        max_market_weight: cap_from_proto(
            "max_market_weight_off",
            max_market_weight_choice.map(|c| match c {
                MaxMarketWeightChoice::MaxMarketWeight(v) => Ok(v),
                MaxMarketWeightChoice::MaxMarketWeightOff(off) => Err(off),
            }),
        )?,
        max_turnover: cap_from_proto(
            "max_turnover_off",
            max_turnover_choice.map(|c| match c {
                MaxTurnoverChoice::MaxTurnover(v) => Ok(v),
                MaxTurnoverChoice::MaxTurnoverOff(off) => Err(off),
            }),
        )?,
        cost_bps,
        holding_periods: match holding_periods_choice {
            None => None,
            Some(HoldingPeriodsChoice::HoldingPeriods(h)) => Some(Choice::Fixed(h)),
            Some(HoldingPeriodsChoice::HoldingPeriodsAuto(true)) => Some(Choice::Auto),
            Some(HoldingPeriodsChoice::HoldingPeriodsAuto(false)) => return Err(auto_false("holding_periods_auto")),
        },
        volatility_halflife,
        bootstrap_draws,
        bootstrap_block,
        bootstrap_cv,
        seed,
        aggregate: enum_from("aggregate", aggregate, aggregate_from_proto)?,
        risk_calibration: enum_from("risk_calibration", risk_calibration, risk_calibration_from_proto)?,
        frequency_check,
    })
}

/// Applies a proto `Settings` on top of `base`: unset fields keep the base value.
///
/// # Errors
/// As [`patch_from_proto`].
pub fn settings_from_proto(p: &proto::Settings, base: &Settings) -> Result<Settings, SettingsError> {
    let mut s = base.clone();
    s.apply(&patch_from_proto(p)?);
    Ok(s)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn settings_round_trip_through_proto() {
        let s = Settings {
            scaling: Scaling::RiskPremium,
            components: Choice::Fixed(4),
            kappa: Choice::Fixed(0.7),
            normalization: Normalization::GrossExposure,
            method: Method::PlugIn,
            max_weight: Cap::At(0.2),
            max_gross: Cap::At(2.0),
            max_market_weight: Cap::At(0.5),
            max_turnover: Cap::At(0.4),
            cost_bps: 25.0,
            holding_periods: Choice::Fixed(6.0),
            volatility_halflife: 36.0,
            bootstrap_draws: 50,
            bootstrap_block: 4.0,
            bootstrap_cv: true,
            seed: 42,
            aggregate: Aggregate::Bagged,
            ..Settings::default()
        };
        let back = settings_from_proto(&settings_to_proto(&s), &Settings::default()).unwrap();
        assert_eq!(back, s);
    }

    #[test]
    fn only_named_keys_are_sent() {
        let s = Settings { scaling: Scaling::Covariance, folds: 5, ..Settings::default() };
        let p = settings_to_proto_only(&s, &["scaling"]);
        assert_eq!(p.scaling, proto::Scaling::Covariance as i32);
        assert_eq!(p.folds, None);
        assert_eq!(p.components_choice, None);
        // Every key of Settings is handled.
        let all = settings_to_proto_only(&s, Settings::KEYS);
        assert_eq!(all, settings_to_proto(&s));
    }

    #[test]
    fn unset_proto_settings_keep_the_base_and_unknown_enums_fail() {
        let base = Settings::default();
        assert_eq!(settings_from_proto(&proto::Settings::default(), &base).unwrap(), base);
        // A base with every field changed: an empty message changes none of them.
        let other = Settings {
            method: Method::KnsRidge,
            scaling: Scaling::Covariance,
            components: Choice::Fixed(3),
            kappa: Choice::Fixed(0.7),
            folds: 4,
            demarket: false,
            ..Settings::default()
        };
        assert_eq!(settings_from_proto(&proto::Settings::default(), &other).unwrap(), other);
        let bad = proto::Settings { scaling: 99, ..Default::default() };
        assert!(matches!(settings_from_proto(&bad, &base), Err(SettingsError::InvalidValue { field: "scaling", .. })));
        let no =
            proto::Settings { components_choice: Some(ComponentsChoice::ComponentsAuto(false)), ..Default::default() };
        assert!(matches!(patch_from_proto(&no), Err(SettingsError::InvalidValue { field: "components_auto", .. })));
        // A limit switched off by a request overrides a server default that sets it.
        let capped = Settings { max_gross: Cap::At(3.0), ..Settings::default() };
        let off = proto::Settings { max_gross_choice: Some(MaxGrossChoice::MaxGrossOff(true)), ..Default::default() };
        assert_eq!(settings_from_proto(&off, &capped).unwrap().max_gross, Cap::Off);
        let no = proto::Settings { max_gross_choice: Some(MaxGrossChoice::MaxGrossOff(false)), ..Default::default() };
        assert!(matches!(patch_from_proto(&no), Err(SettingsError::InvalidValue { field: "max_gross_off", .. })));
    }
}

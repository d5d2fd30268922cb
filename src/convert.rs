//! Translation between the estimator's types and the `keelson.v1` protobuf
//! messages. Conversions destructure every field, so a new field on either
//! side fails to compile until it is handled here.

use crate::estimator::{
    Choice, CvCriterion, CvSurface, Method, MissingPolicy, Normalization, ReturnPanel, Scaling, Settings,
    SettingsError, WeightSet,
};
use crate::proto;

/// Proto enum for a scaling.
pub fn scaling_to_proto(s: Scaling) -> proto::Scaling {
    match s {
        Scaling::Sharpe => proto::Scaling::Sharpe,
        Scaling::SharpeRaw => proto::Scaling::SharpeRaw,
        Scaling::Standardized => proto::Scaling::Standardized,
        Scaling::Covariance => proto::Scaling::Covariance,
        Scaling::RiskPremium => proto::Scaling::RiskPremium,
    }
}

fn criterion_to_proto(c: CvCriterion) -> proto::CvCriterion {
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
        Method::PlugInLedoitWolf => proto::Method::PlugInLedoitWolf,
    }
}

/// Every setting, explicitly, as a proto message.
pub fn settings_to_proto(s: &Settings) -> proto::Settings {
    let Settings {
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
    } = s.clone();
    proto::Settings {
        scaling: scaling_to_proto(scaling).into(),
        components_choice: Some(match components {
            Choice::Auto => proto::settings::ComponentsChoice::ComponentsAuto(true),
            Choice::Fixed(k) => proto::settings::ComponentsChoice::Components(k),
        }),
        max_components: Some(max_components),
        kappa_choice: Some(match kappa {
            Choice::Auto => proto::settings::KappaChoice::KappaAuto(true),
            Choice::Fixed(k) => proto::settings::KappaChoice::Kappa(k),
        }),
        kappa_grid_min: Some(kappa_grid_min),
        kappa_grid_max: Some(kappa_grid_max),
        kappa_grid_points: Some(kappa_grid_points),
        l1_penalty: Some(l1_penalty),
        folds: Some(folds),
        cv_criterion: criterion_to_proto(cv_criterion).into(),
        normalization: normalization_to_proto(normalization).into(),
        target_volatility: Some(target_volatility),
        risk_aversion: Some(risk_aversion),
        periods_per_year: Some(periods_per_year),
        demarket: Some(demarket),
        missing_policy: missing_to_proto(missing_policy).into(),
        rp_gamma: Some(rp_gamma),
        min_periods: Some(min_periods),
        method: method_to_proto(method).into(),
        held_out_check: Some(held_out_check),
    }
}

fn unknown_enum(field: &'static str, value: i32) -> SettingsError {
    SettingsError::InvalidValue { field, value: value.to_string(), reason: "unknown enum value".into() }
}

/// Applies a proto `Settings` on top of `base`: unset fields keep the base value.
///
/// # Errors
/// [`SettingsError::InvalidValue`] for an enum number this version does not know.
pub fn settings_from_proto(p: &proto::Settings, base: &Settings) -> Result<Settings, SettingsError> {
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
        periods_per_year,
        demarket,
        missing_policy,
        rp_gamma,
        min_periods,
        method,
        held_out_check,
    } = *p;
    let mut s = base.clone();
    let auto_false = |field: &'static str| SettingsError::InvalidValue {
        field,
        value: "false".into(),
        reason: "set it to true for cross-validation, or leave the choice unset for the server's default".into(),
    };
    s.scaling = match proto::Scaling::try_from(scaling).map_err(|_| unknown_enum("scaling", scaling))? {
        proto::Scaling::Unspecified => base.scaling,
        proto::Scaling::Sharpe => Scaling::Sharpe,
        proto::Scaling::SharpeRaw => Scaling::SharpeRaw,
        proto::Scaling::Standardized => Scaling::Standardized,
        proto::Scaling::Covariance => Scaling::Covariance,
        proto::Scaling::RiskPremium => Scaling::RiskPremium,
    };
    s.cv_criterion =
        match proto::CvCriterion::try_from(cv_criterion).map_err(|_| unknown_enum("cv_criterion", cv_criterion))? {
            proto::CvCriterion::Unspecified => base.cv_criterion,
            proto::CvCriterion::Sharpe => CvCriterion::Sharpe,
            proto::CvCriterion::PricingR2 => CvCriterion::PricingR2,
            proto::CvCriterion::PricingR2Gls => CvCriterion::PricingR2Gls,
        };
    s.normalization = match proto::Normalization::try_from(normalization)
        .map_err(|_| unknown_enum("normalization", normalization))?
    {
        proto::Normalization::Unspecified => base.normalization,
        proto::Normalization::TargetVolatility => Normalization::TargetVolatility,
        proto::Normalization::RiskAversion => Normalization::RiskAversion,
        proto::Normalization::GrossExposure => Normalization::GrossExposure,
    };
    s.missing_policy = match proto::MissingPolicy::try_from(missing_policy)
        .map_err(|_| unknown_enum("missing_policy", missing_policy))?
    {
        proto::MissingPolicy::Unspecified => base.missing_policy,
        proto::MissingPolicy::DropFactor => MissingPolicy::DropFactor,
        proto::MissingPolicy::Reject => MissingPolicy::Reject,
    };
    s.method = match proto::Method::try_from(method).map_err(|_| unknown_enum("method", method))? {
        proto::Method::Unspecified => base.method,
        proto::Method::Components => Method::Components,
        proto::Method::PlugIn => Method::PlugIn,
        proto::Method::EqualWeight => Method::EqualWeight,
        proto::Method::KnsRidge => Method::KnsRidge,
        proto::Method::PlugInLedoitWolf => Method::PlugInLedoitWolf,
    };
    s.components = match components_choice {
        None => base.components,
        Some(proto::settings::ComponentsChoice::Components(k)) => Choice::Fixed(k),
        Some(proto::settings::ComponentsChoice::ComponentsAuto(true)) => Choice::Auto,
        Some(proto::settings::ComponentsChoice::ComponentsAuto(false)) => return Err(auto_false("components_auto")),
    };
    s.kappa = match kappa_choice {
        None => base.kappa,
        Some(proto::settings::KappaChoice::Kappa(k)) => Choice::Fixed(k),
        Some(proto::settings::KappaChoice::KappaAuto(true)) => Choice::Auto,
        Some(proto::settings::KappaChoice::KappaAuto(false)) => return Err(auto_false("kappa_auto")),
    };
    s.max_components = max_components.unwrap_or(base.max_components);
    s.kappa_grid_min = kappa_grid_min.unwrap_or(base.kappa_grid_min);
    s.kappa_grid_max = kappa_grid_max.unwrap_or(base.kappa_grid_max);
    s.kappa_grid_points = kappa_grid_points.unwrap_or(base.kappa_grid_points);
    s.l1_penalty = l1_penalty.unwrap_or(base.l1_penalty);
    s.folds = folds.unwrap_or(base.folds);
    s.target_volatility = target_volatility.unwrap_or(base.target_volatility);
    s.risk_aversion = risk_aversion.unwrap_or(base.risk_aversion);
    s.periods_per_year = periods_per_year.unwrap_or(base.periods_per_year);
    s.demarket = demarket.unwrap_or(base.demarket);
    s.rp_gamma = rp_gamma.unwrap_or(base.rp_gamma);
    s.min_periods = min_periods.unwrap_or(base.min_periods);
    s.held_out_check = held_out_check.unwrap_or(base.held_out_check);
    Ok(s)
}

fn surface_to_proto(s: &CvSurface) -> proto::CvSurface {
    let CvSurface { components, kappas, scores, criterion, folds } = s;
    proto::CvSurface {
        components: components.iter().map(|&k| k as u32).collect(),
        kappas: kappas.clone(),
        scores: Some(proto::Matrix {
            rows: components.len() as u32,
            cols: kappas.len() as u32,
            values: scores.clone(),
        }),
        criterion: criterion_to_proto(*criterion).into(),
        folds: *folds as u32,
    }
}

/// The proto response for a weight set.
pub fn weight_set_to_proto(ws: &WeightSet, request_id: &str) -> proto::ComputeWeightsResponse {
    let WeightSet { factors, market_weight, components, diagnostics, fingerprint, estimator_version, settings } = ws;
    let d = diagnostics;
    proto::ComputeWeightsResponse {
        weights: factors
            .iter()
            .map(|f| proto::FactorWeight {
                factor: f.name.clone(),
                weight: f.weight,
                mean_annualized: f.mean_annualized,
                volatility_annualized: f.volatility_annualized,
                sharpe_annualized: f.sharpe_annualized,
                market_beta: f.market_beta,
                scale: f.scale,
                risk_contribution: f.risk_contribution,
                excluded: f.excluded.is_some(),
                exclusion_reason: f.excluded.as_ref().map(|(_, r)| r.clone()).unwrap_or_default(),
            })
            .collect(),
        market_weight: *market_weight,
        components: components
            .iter()
            .map(|c| proto::ComponentDiagnostics {
                index: c.index as u32,
                eigenvalue: c.eigenvalue,
                trace_share: c.trace_share,
                sharpe_annualized: c.sharpe_annualized,
                coefficient: c.coefficient,
                shrinkage_factor: c.shrinkage_factor,
                loadings: c.loadings.clone(),
            })
            .collect(),
        diagnostics: Some(proto::Diagnostics {
            num_components: d.num_components as u32,
            kappa: d.kappa,
            gamma: d.gamma,
            components_cross_validated: d.components_cross_validated,
            kappa_cross_validated: d.kappa_cross_validated,
            cv_surface: d.cv_surface.as_ref().map(surface_to_proto),
            cv_best_score: d.cv_best_score,
            cv_sharpe: d.cv_sharpe,
            in_sample_sharpe: d.in_sample_sharpe,
            ex_ante_volatility: d.ex_ante_volatility,
            effective_factors: d.effective_factors,
            top_sharpe_gross_share: d.top_sharpe_gross_share,
            turnover: d.turnover,
            covariance_condition_number: d.covariance_condition_number,
            excluded: d
                .excluded
                .iter()
                .map(|e| proto::ExcludedFactor {
                    factor: e.factor.clone(),
                    reason: e.reason.clone(),
                    code: e.code.to_owned(),
                })
                .collect(),
            warnings: d
                .warnings
                .iter()
                .map(|w| proto::Warning { code: w.code.to_owned(), message: w.message.clone() })
                .collect(),
            periods: d.periods as u32,
            factors_used: d.factors_used as u32,
            effective_settings: Some(settings_to_proto(settings)),
        }),
        fingerprint: fingerprint.clone(),
        estimator_version: (*estimator_version).to_owned(),
        request_id: request_id.to_owned(),
    }
}

/// Splits a request into its window, its settings and its id, without
/// copying the returns. Validation is the estimator's job.
pub fn request_into_parts(req: proto::ComputeWeightsRequest) -> (ReturnPanel, proto::Settings, String) {
    let proto::ComputeWeightsRequest {
        factor_names,
        period_labels,
        returns,
        market_returns,
        previous_weights,
        settings,
        request_id,
    } = req;
    let (rows, cols, values) = returns.map_or((0, 0, Vec::new()), |m| (m.rows as usize, m.cols as usize, m.values));
    let panel = ReturnPanel {
        factor_names,
        period_labels,
        returns: values,
        rows,
        cols,
        // An empty list means "no market" (SPEC §1).
        market: (!market_returns.is_empty()).then_some(market_returns),
        previous_weights: previous_weights.into_iter().map(|w| (w.factor, w.weight)).collect(),
    };
    (panel, settings.unwrap_or_default(), request_id)
}

/// A request carrying `panel` with the given settings.
pub fn request_from_panel(
    panel: &ReturnPanel,
    settings: proto::Settings,
    request_id: &str,
) -> proto::ComputeWeightsRequest {
    let ReturnPanel { factor_names, period_labels, returns, rows, cols, market, previous_weights } = panel;
    proto::ComputeWeightsRequest {
        factor_names: factor_names.clone(),
        period_labels: period_labels.clone(),
        returns: Some(proto::Matrix { rows: *rows as u32, cols: *cols as u32, values: returns.clone() }),
        market_returns: market.clone().unwrap_or_default(),
        previous_weights: previous_weights
            .iter()
            .map(|(f, w)| proto::FactorWeight { factor: f.clone(), weight: *w, ..Default::default() })
            .collect(),
        settings: Some(settings),
        request_id: request_id.to_owned(),
    }
}

/// A proto `Settings` carrying only the named keys of `s` (the others unset,
/// so that the server's defaults apply to them).
pub fn settings_to_proto_only(s: &Settings, keys: &[&str]) -> proto::Settings {
    let full = settings_to_proto(s);
    let mut out = proto::Settings::default();
    for &k in keys {
        match k {
            "method" => out.method = full.method,
            "scaling" => out.scaling = full.scaling,
            "components" => out.components_choice = full.components_choice,
            "max_components" => out.max_components = full.max_components,
            "kappa" => out.kappa_choice = full.kappa_choice,
            "kappa_grid_min" => out.kappa_grid_min = full.kappa_grid_min,
            "kappa_grid_max" => out.kappa_grid_max = full.kappa_grid_max,
            "kappa_grid_points" => out.kappa_grid_points = full.kappa_grid_points,
            "l1_penalty" => out.l1_penalty = full.l1_penalty,
            "folds" => out.folds = full.folds,
            "cv_criterion" => out.cv_criterion = full.cv_criterion,
            "normalization" => out.normalization = full.normalization,
            "target_volatility" => out.target_volatility = full.target_volatility,
            "risk_aversion" => out.risk_aversion = full.risk_aversion,
            "periods_per_year" => out.periods_per_year = full.periods_per_year,
            "demarket" => out.demarket = full.demarket,
            "missing_policy" => out.missing_policy = full.missing_policy,
            "rp_gamma" => out.rp_gamma = full.rp_gamma,
            "min_periods" => out.min_periods = full.min_periods,
            "held_out_check" => out.held_out_check = full.held_out_check,
            _ => {}
        }
    }
    out
}

/// Splits a backtest request into its history, its settings, the backtest
/// specification (unset options take their defaults) and its id.
pub fn backtest_request_into_parts(
    req: proto::RunBacktestRequest,
) -> (ReturnPanel, proto::Settings, crate::evaluate::BacktestSpec, String) {
    let proto::RunBacktestRequest {
        factor_names,
        period_labels,
        returns,
        market_returns,
        settings,
        window,
        expanding,
        step,
        cost_bps,
        cer_risk_aversion,
        sweep_max_k,
        benchmark_sets,
        skip_baselines,
        request_id,
    } = req;
    let (panel, settings, request_id) = request_into_parts(proto::ComputeWeightsRequest {
        factor_names,
        period_labels,
        returns,
        market_returns,
        previous_weights: Vec::new(),
        settings,
        request_id,
    });
    let d = crate::evaluate::BacktestSpec::default();
    let spec = crate::evaluate::BacktestSpec {
        window: if window == 0 { d.window } else { window as usize },
        expanding,
        step: if step == 0 { d.step } else { step as usize },
        cost_bps: cost_bps.unwrap_or(d.cost_bps),
        cer_risk_aversion: cer_risk_aversion.unwrap_or(d.cer_risk_aversion),
        sweep_max_k: sweep_max_k.map(|k| k as usize),
        benchmark_sets: benchmark_sets.into_iter().map(|b| b.names).collect(),
        nw_lag: None,
        baselines: !skip_baselines,
        threads: 1,
    };
    (panel, settings, spec, request_id)
}

/// The proto message of a backtest result.
pub fn backtest_result_to_proto(r: &crate::evaluate::BacktestResult, request_id: &str) -> proto::BacktestResult {
    proto::BacktestResult {
        periods: r.periods.clone(),
        refits: r.refits as u32,
        strategies: r
            .strategies
            .iter()
            .map(|s| proto::StrategyPerformance {
                name: s.name.clone(),
                returns: s.returns.clone(),
                net_returns: s.net_returns.clone(),
                mean: s.metrics.mean,
                volatility: s.metrics.volatility,
                sharpe: s.metrics.sharpe,
                sharpe_se_iid: s.metrics.sharpe_se_iid,
                sharpe_se_newey_west: s.metrics.sharpe_se_nw,
                cer: s.metrics.cer,
                max_drawdown: s.metrics.max_drawdown,
                net_sharpe: s.net_metrics.sharpe,
                average_turnover: s.average_turnover,
                chosen_components: s.chosen_k.iter().map(|&k| k as u32).collect(),
                chosen_kappa: s.chosen_kappa.clone(),
                top_sharpe_share: s.top_sharpe_share.clone(),
            })
            .collect(),
        sweep: r
            .sweep
            .iter()
            .map(|p| proto::SweepPoint {
                scaling: scaling_to_proto(p.scaling).into(),
                components: p.k as u32,
                sharpe: p.sharpe,
            })
            .collect(),
        comparisons: r
            .comparisons
            .iter()
            .map(|c| proto::SharpeComparison {
                against: c.against.clone(),
                difference: c.test.difference,
                z: c.test.z,
                p_value: c.test.p_value,
            })
            .collect(),
        probabilistic_sharpe: r.psr,
        deflated_sharpe: r.dsr,
        trials: r.trials as u32,
        alphas: r
            .alphas
            .iter()
            .map(|a| proto::AlphaTest {
                strategy: a.strategy.clone(),
                benchmarks: a.benchmarks.clone(),
                alpha: a.alpha,
                t_newey_west: a.t_nw,
                t_robust: a.t_robust,
                r_squared: a.r2,
            })
            .collect(),
        pricing: r.pricing.as_ref().map(|p| proto::PricingTest {
            components: p.k as u32,
            assets: p.assets as u32,
            significant: p.significant as u32,
            grs: p.grs.as_ref().map_or(f64::NAN, |g| g.statistic),
            grs_p_value: p.grs.as_ref().map_or(f64::NAN, |g| g.p_value),
        }),
        newey_west_lag: r.nw_lag as u32,
        latest_fit: r.last_fit.as_ref().map(|ws| weight_set_to_proto(ws, request_id)),
    }
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
        let all = settings_to_proto_only(&s, &Settings::KEYS);
        assert_eq!(all, settings_to_proto(&s));
    }

    #[test]
    fn request_round_trip() {
        let panel = crate::demo::synthetic_panel(1, 30, 4);
        let req = request_from_panel(&panel, proto::Settings::default(), "r1");
        let (back, _, id) = request_into_parts(req);
        assert_eq!(back, panel);
        assert_eq!(id, "r1");
    }

    #[test]
    fn unset_proto_settings_keep_defaults_and_unknown_enums_fail() {
        let base = Settings::default();
        assert_eq!(settings_from_proto(&proto::Settings::default(), &base).unwrap(), base);
        let bad = proto::Settings { scaling: 99, ..Default::default() };
        assert!(matches!(settings_from_proto(&bad, &base), Err(SettingsError::InvalidValue { field: "scaling", .. })));
    }
}

//! `RunBacktestRequest` → the history and a [`BacktestSpec`]; a
//! [`BacktestResult`] → the `BacktestResult` message.

use super::settings::{scaling_to_proto, settings_to_proto};
use super::weights::{request_into_parts, weight_set_to_proto};
use crate::estimator::ReturnPanel;
use crate::evaluate::stats::{Grs, SharpeDifference};
use crate::evaluate::{
    AlphaTest, BacktestResult, BacktestSpec, Comparison, Metrics, PricingTest, Provenance, StrategyResult, SweepPoint,
};
use crate::proto;

/// Splits a backtest request into its history, its settings, the backtest
/// specification (unset options take their defaults) and its id.
pub fn backtest_request_into_parts(
    req: proto::RunBacktestRequest,
) -> (ReturnPanel, proto::Settings, BacktestSpec, String) {
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
        market_name: String::new(),
        settings,
        request_id,
    });
    let d = BacktestSpec::default();
    let spec = BacktestSpec {
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

fn strategy_to_proto(s: &StrategyResult) -> proto::StrategyPerformance {
    let StrategyResult {
        id,
        name,
        settings,
        warnings,
        returns,
        net_returns,
        metrics,
        net_metrics,
        average_turnover,
        chosen_k,
        chosen_kappa,
        top_sharpe_share,
        gross_median,
        gross_max,
        target_volatility,
        kappa_at_edge,
        components_at_cap,
        missing_holding_returns,
        limit_bound_refits,
        binding_limits,
    } = s;
    let Metrics { mean, volatility, sharpe, sharpe_se_iid, sharpe_se_nw, cer, max_drawdown, skewness, kurtosis } =
        metrics;
    proto::StrategyPerformance {
        name: name.clone(),
        returns: returns.clone(),
        net_returns: net_returns.clone(),
        mean: *mean,
        volatility: *volatility,
        sharpe: *sharpe,
        sharpe_se_iid: *sharpe_se_iid,
        sharpe_se_newey_west: *sharpe_se_nw,
        cer: *cer,
        max_drawdown: *max_drawdown,
        net_sharpe: net_metrics.sharpe,
        average_turnover: *average_turnover,
        chosen_components: chosen_k.iter().map(|&k| k as u32).collect(),
        chosen_kappa: chosen_kappa.clone(),
        top_sharpe_share: top_sharpe_share.clone(),
        gross_median: *gross_median,
        gross_max: *gross_max,
        target_volatility: *target_volatility,
        kappa_at_edge: *kappa_at_edge as u32,
        components_at_cap: *components_at_cap as u32,
        id: id.clone(),
        settings: settings.as_ref().map(settings_to_proto),
        warnings: warnings
            .iter()
            .map(|w| proto::WarningCount { code: w.code.clone(), refits: w.refits as u32 })
            .collect(),
        skewness: *skewness,
        kurtosis: *kurtosis,
        missing_holding_returns: *missing_holding_returns as u32,
        limit_bound_refits: *limit_bound_refits as u32,
        binding_limits: binding_limits
            .iter()
            .map(|l| proto::LimitCount { limit: l.limit.clone(), refits: l.refits as u32 })
            .collect(),
    }
}

fn sweep_to_proto(p: &SweepPoint) -> proto::SweepPoint {
    let SweepPoint { scaling, k, sharpe } = p;
    proto::SweepPoint { scaling: scaling_to_proto(*scaling).into(), components: *k as u32, sharpe: *sharpe }
}

fn comparison_to_proto(c: &Comparison) -> proto::SharpeComparison {
    let Comparison { against, test: SharpeDifference { difference, z, p_value }, p_holm, p_romano_wolf } = c;
    proto::SharpeComparison {
        against: against.clone(),
        difference: *difference,
        z: *z,
        p_value: *p_value,
        p_value_holm: *p_holm,
        p_value_romano_wolf: *p_romano_wolf,
    }
}

fn alpha_to_proto(a: &AlphaTest) -> proto::AlphaTest {
    let AlphaTest { strategy, benchmarks, alpha, t_nw, t_robust, r2, note } = a;
    proto::AlphaTest {
        strategy: strategy.clone(),
        benchmarks: benchmarks.clone(),
        alpha: *alpha,
        t_newey_west: *t_nw,
        t_robust: *t_robust,
        r_squared: *r2,
        note: note.clone().unwrap_or_default(),
    }
}

fn pricing_to_proto(p: &PricingTest) -> proto::PricingTest {
    let PricingTest { k, assets, significant, grs } = p;
    let (statistic, p_value) = grs.as_ref().map_or((f64::NAN, f64::NAN), |g| {
        // The GRS sample sizes repeat the test's own (assets, K plus the market, periods).
        let Grs { statistic, p_value, assets: _, factors: _, periods: _ } = g;
        (*statistic, *p_value)
    });
    proto::PricingTest {
        components: *k as u32,
        assets: *assets as u32,
        significant: *significant as u32,
        grs: statistic,
        grs_p_value: p_value,
    }
}

/// A backtest request carrying the history `panel` with the given settings;
/// every backtest option is unset (the defaults), for the caller to set.
pub fn backtest_request_from_panel(
    panel: &ReturnPanel,
    settings: proto::Settings,
    request_id: &str,
) -> proto::RunBacktestRequest {
    let proto::ComputeWeightsRequest {
        factor_names,
        period_labels,
        returns,
        market_returns,
        // A backtest starts from nothing held.
        previous_weights: _,
        market_name: _,
        settings,
        request_id,
    } = super::weights::request_from_panel(panel, settings, request_id);
    proto::RunBacktestRequest {
        factor_names,
        period_labels,
        returns,
        market_returns,
        settings,
        request_id,
        ..Default::default()
    }
}

/// The proto message of a backtest result.
pub fn backtest_result_to_proto(r: &BacktestResult, request_id: &str) -> proto::BacktestResult {
    let BacktestResult {
        spec,
        periods_per_year,
        periods,
        refits,
        strategies,
        sweep,
        comparisons,
        psr,
        dsr,
        trials,
        alphas,
        pricing,
        last_fit,
        nw_lag,
        // Every fitted strategy's settings hold the limits; the report prints them in one line.
        constraints: _,
        provenance,
    } = r;
    proto::BacktestResult {
        periods: periods.clone(),
        refits: *refits as u32,
        strategies: strategies.iter().map(strategy_to_proto).collect(),
        sweep: sweep.iter().map(sweep_to_proto).collect(),
        comparisons: comparisons.iter().map(comparison_to_proto).collect(),
        probabilistic_sharpe: *psr,
        deflated_sharpe: *dsr,
        trials: trials.len() as u32,
        trial_names: trials.clone(),
        verdict: crate::evaluate::verdict::verdict(r).sentences,
        alphas: alphas.iter().map(alpha_to_proto).collect(),
        pricing: pricing.as_ref().map(pricing_to_proto),
        newey_west_lag: *nw_lag as u32,
        latest_fit: last_fit.as_ref().map(|l| weight_set_to_proto(&l.fit, request_id)),
        options: Some(options_to_proto(spec, *periods_per_year)),
        provenance: Some(provenance_to_proto(provenance)),
        latest_fit_first_period: last_fit.as_ref().map(|l| l.first_period.clone()).unwrap_or_default(),
        latest_fit_last_period: last_fit.as_ref().map(|l| l.last_period.clone()).unwrap_or_default(),
    }
}

fn options_to_proto(spec: &BacktestSpec, periods_per_year: u32) -> proto::BacktestOptions {
    let BacktestSpec {
        window,
        expanding,
        step,
        cost_bps,
        cer_risk_aversion,
        sweep_max_k,
        benchmark_sets,
        // Not options of the result: the lag is reported as newey_west_lag, threads do not change it.
        nw_lag: _,
        baselines,
        threads: _,
    } = spec;
    proto::BacktestOptions {
        window: *window as u32,
        expanding: *expanding,
        step: *step as u32,
        cost_bps: *cost_bps,
        cer_risk_aversion: *cer_risk_aversion,
        sweep_max_k: sweep_max_k.unwrap_or(0) as u32,
        benchmark_sets: benchmark_sets.iter().map(|names| proto::BenchmarkSet { names: names.clone() }).collect(),
        baselines: *baselines,
        periods_per_year,
    }
}

fn provenance_to_proto(p: &Provenance) -> proto::Provenance {
    let Provenance {
        keelson_version,
        estimator_version,
        run_time,
        invocation,
        input,
        input_sha256,
        first_period,
        last_period,
        periods,
        factors,
        market,
        configured,
    } = p;
    proto::Provenance {
        keelson_version: keelson_version.clone(),
        estimator_version: estimator_version.clone(),
        run_time: run_time.clone(),
        invocation: invocation.clone(),
        input: input.clone(),
        input_sha256: input_sha256.clone(),
        first_period: first_period.clone(),
        last_period: last_period.clone(),
        periods: *periods as u32,
        factors: *factors as u32,
        market: market.clone().unwrap_or_default(),
        configured: configured.clone(),
    }
}

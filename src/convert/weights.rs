//! `ComputeWeightsRequest` ⇄ the window, and a [`WeightSet`] → `ComputeWeightsResponse`.

use super::settings::{criterion_to_proto, scaling_to_proto, settings_to_proto};
use crate::estimator::output::{BootstrapReport, FactorInterval};
use crate::estimator::{
    BindingConstraint, ComponentReport, CvSurface, Diagnostics, ExcludedReport, FactorReport, Implementation,
    ReturnPanel, ScalingScore, Settings, Warning, WeightSet,
};
use crate::estimator::{Calibration, FrequencySource};
use crate::proto;

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

fn factor_to_proto(f: &FactorReport) -> proto::FactorWeight {
    let FactorReport {
        name,
        weight,
        model_weight,
        mean_annualized,
        volatility_annualized,
        sharpe_annualized,
        market_beta,
        scale,
        risk_contribution,
        excluded,
    } = f;
    proto::FactorWeight {
        factor: name.clone(),
        weight: *weight,
        mean_annualized: *mean_annualized,
        volatility_annualized: *volatility_annualized,
        sharpe_annualized: *sharpe_annualized,
        market_beta: *market_beta,
        scale: *scale,
        risk_contribution: *risk_contribution,
        excluded: excluded.is_some(),
        exclusion_reason: excluded.as_ref().map(|(_, r)| r.clone()).unwrap_or_default(),
        model_weight: *model_weight,
    }
}

fn component_to_proto(c: &ComponentReport) -> proto::ComponentDiagnostics {
    let ComponentReport { index, eigenvalue, trace_share, sharpe_annualized, coefficient, shrinkage_factor, loadings } =
        c;
    proto::ComponentDiagnostics {
        index: *index as u32,
        eigenvalue: *eigenvalue,
        trace_share: *trace_share,
        sharpe_annualized: *sharpe_annualized,
        coefficient: *coefficient,
        shrinkage_factor: *shrinkage_factor,
        loadings: loadings.clone(),
    }
}

fn diagnostics_to_proto(d: &Diagnostics, settings: &Settings, names: &[String]) -> proto::Diagnostics {
    let Diagnostics {
        num_components,
        kappa,
        gamma,
        components_cross_validated,
        kappa_cross_validated,
        cv_surface,
        cv_best_score,
        cv_sharpe,
        in_sample_sharpe,
        ex_ante_volatility,
        effective_factors,
        top_sharpe_gross_share,
        turnover,
        covariance_condition_number,
        excluded,
        warnings,
        periods,
        factors_used,
        implementation,
        chosen_scaling,
        scaling_scores,
        bootstrap,
        risk_calibration,
        periods_per_year,
        frequency,
    } = d;
    proto::Diagnostics {
        num_components: *num_components as u32,
        kappa: *kappa,
        gamma: *gamma,
        components_cross_validated: *components_cross_validated,
        kappa_cross_validated: *kappa_cross_validated,
        cv_surface: cv_surface.as_ref().map(surface_to_proto),
        cv_best_score: *cv_best_score,
        cv_sharpe: *cv_sharpe,
        in_sample_sharpe: *in_sample_sharpe,
        ex_ante_volatility: *ex_ante_volatility,
        effective_factors: *effective_factors,
        top_sharpe_gross_share: *top_sharpe_gross_share,
        turnover: *turnover,
        covariance_condition_number: *covariance_condition_number,
        excluded: excluded
            .iter()
            .map(|ExcludedReport { factor, code, reason }| proto::ExcludedFactor {
                factor: factor.clone(),
                reason: reason.clone(),
                code: (*code).to_owned(),
            })
            .collect(),
        warnings: warnings
            .iter()
            .map(|Warning { code, message }| proto::Warning { code: code.word().to_owned(), message: message.clone() })
            .collect(),
        periods: *periods as u32,
        factors_used: *factors_used as u32,
        effective_settings: Some(settings_to_proto(settings)),
        implementation: implementation.as_ref().map(implementation_to_proto),
        chosen_scaling: chosen_scaling.map_or(0, |sc| scaling_to_proto(sc).into()),
        scaling_scores: scaling_scores
            .iter()
            .map(|ScalingScore { scaling, best_score, components, kappa }| proto::ScalingScore {
                scaling: scaling_to_proto(*scaling).into(),
                best_score: *best_score,
                components: *components as u32,
                kappa: *kappa,
            })
            .collect(),
        bootstrap: bootstrap.as_ref().map(|b| bootstrap_to_proto(b, names)),
        risk_calibration: risk_calibration.as_ref().map(calibration_to_proto),
        periods_per_year: *periods_per_year,
        periods_per_year_inferred: match frequency {
            FrequencySource::Inferred => true,
            FrequencySource::Given | FrequencySource::Assumed => false,
        },
    }
}

fn calibration_to_proto(c: &Calibration) -> proto::RiskCalibrationReport {
    let Calibration {
        rule,
        factor,
        measured_ratio,
        standard_error,
        held_out_periods,
        in_window_volatility,
        calibrated_volatility,
        limited,
    } = *c;
    proto::RiskCalibrationReport {
        rule: super::settings::risk_calibration_to_proto(rule).into(),
        factor,
        measured_ratio,
        standard_error,
        held_out_periods: held_out_periods as u32,
        in_window_volatility,
        calibrated_volatility,
        limited,
    }
}

fn bootstrap_to_proto(b: &BootstrapReport, names: &[String]) -> proto::Bootstrap {
    let BootstrapReport { draws, failed, mean_block, seed, cross_validated, bagged, factors, components } = b;
    proto::Bootstrap {
        draws: *draws as u32,
        failed: *failed as u32,
        mean_block: *mean_block,
        seed: *seed,
        cross_validated: *cross_validated,
        bagged: *bagged,
        factors: factors
            .iter()
            .zip(names)
            .map(|(FactorInterval { q05, q50, q95, sign_agreement }, name)| proto::FactorInterval {
                factor: name.clone(),
                q05: *q05,
                q50: *q50,
                q95: *q95,
                sign_agreement: *sign_agreement,
            })
            .collect(),
        components: components
            .iter()
            .map(|&(k, n)| proto::ComponentCount { components: k as u32, draws: n as u32 })
            .collect(),
    }
}

fn implementation_to_proto(i: &Implementation) -> proto::Implementation {
    let Implementation {
        tracking_error,
        turnover,
        cost,
        gross,
        model_gross,
        gamma,
        model_sharpe,
        binding,
        solver_status,
        iterations,
        omega_form,
        dust_cleared,
    } = i;
    proto::Implementation {
        tracking_error: *tracking_error,
        turnover: *turnover,
        cost: *cost,
        gross: *gross,
        model_gross: *model_gross,
        gamma: *gamma,
        model_sharpe: *model_sharpe,
        binding: binding
            .iter()
            .map(|BindingConstraint { constraint, factor, value, limit, dual }| proto::BindingConstraint {
                constraint: (*constraint).to_owned(),
                factor: factor.clone().unwrap_or_default(),
                value: *value,
                limit: *limit,
                dual: *dual,
            })
            .collect(),
        solver_status: (*solver_status).to_owned(),
        iterations: *iterations,
        omega_form: (*omega_form).to_owned(),
        dust_cleared: *dust_cleared,
    }
}

/// The proto response for a weight set.
pub fn weight_set_to_proto(ws: &WeightSet, request_id: &str) -> proto::ComputeWeightsResponse {
    let WeightSet {
        factors,
        market_weight,
        model_market_weight,
        components,
        diagnostics,
        fingerprint,
        estimator_version,
        settings,
    } = ws;
    proto::ComputeWeightsResponse {
        weights: factors.iter().map(factor_to_proto).collect(),
        market_weight: *market_weight,
        model_market_weight: *model_market_weight,
        components: components.iter().map(component_to_proto).collect(),
        diagnostics: Some(diagnostics_to_proto(
            diagnostics,
            settings,
            &factors.iter().map(|f| f.name.clone()).collect::<Vec<_>>(),
        )),
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
        market_name,
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
        market_name: (!market_name.is_empty()).then_some(market_name),
    };
    (panel, settings.unwrap_or_default(), request_id)
}

/// A request carrying `panel` with the given settings.
pub fn request_from_panel(
    panel: &ReturnPanel,
    settings: proto::Settings,
    request_id: &str,
) -> proto::ComputeWeightsRequest {
    let ReturnPanel { factor_names, period_labels, returns, rows, cols, market, previous_weights, market_name } = panel;
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
        market_name: market_name.clone().unwrap_or_default(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn request_round_trip() {
        let panel = crate::demo::synthetic_panel(1, 30, 4);
        let req = request_from_panel(&panel, proto::Settings::default(), "r1");
        let (back, _, id) = request_into_parts(req);
        assert_eq!(back, panel);
        assert_eq!(id, "r1");
    }
}

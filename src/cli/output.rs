//! Rendering of a `ComputeWeightsResponse` for people (a table) and programs
//! (proto3 JSON). `fit`, `call` and `demo` all print through here, so a
//! local fit and a remote call look the same.

use std::fmt::Write as _;

use keelson::proto::{self, ComputeWeightsResponse};

/// `SCALING_SHARPE_RAW` → `sharpe-raw`: the name used in files and flags.
fn setting_word(enum_name: &str, prefix: &str) -> String {
    enum_name.strip_prefix(prefix).unwrap_or(enum_name).to_ascii_lowercase().replace('_', "-")
}

/// One line per factor sorted by absolute weight, then the key diagnostics.
pub fn table(r: &ComputeWeightsResponse, source: &str, labels: &[String]) -> String {
    let default = proto::Diagnostics::default();
    let d = r.diagnostics.as_ref().unwrap_or(&default);
    let mut out = String::new();
    let span = match (labels.first(), labels.last()) {
        (Some(a), Some(b)) => format!(" ({a} … {b})"),
        _ => String::new(),
    };
    let _ = writeln!(
        out,
        "Keelson weights · {source}: {} periods{span}, {} factors, {} used",
        d.periods,
        r.weights.len(),
        d.factors_used
    );
    method_line(&mut out, d);
    let _ = writeln!(out);
    let width = r.weights.iter().map(|f| f.factor.chars().count()).max().unwrap_or(6).clamp(14, 40);
    factor_lines(&mut out, r, d.bootstrap.as_ref(), width);
    let _ = writeln!(
        out,
        "{:<width$}  {:>8}  {:>9.4}  {:>9.4}",
        "market hedge", "", r.model_market_weight, r.market_weight
    );
    exposure_lines(&mut out, r, width);
    if let Some(imp) = &d.implementation {
        implementation_lines(&mut out, imp);
    }
    let _ = writeln!(out);
    let _ = writeln!(
        out,
        "in-window Sharpe {:.2} · held-out Sharpe (CV{}) {} · ex-ante volatility {:.2}% · effective factors {:.1}",
        d.in_sample_sharpe,
        if is_blend(d) { ", ridge half" } else { "" },
        if d.cv_sharpe.is_finite() { format!("{:.2}", d.cv_sharpe) } else { "n/a".into() },
        100.0 * d.ex_ante_volatility,
        d.effective_factors
    );
    calibration_line(&mut out, d);
    let _ = writeln!(
        out,
        "top-30% Sharpe factors hold {:.1}% of gross weight · covariance condition number {:.3e}{}",
        100.0 * d.top_sharpe_gross_share,
        d.covariance_condition_number,
        d.turnover.map(|t| format!(" · turnover {t:.4}")).unwrap_or_default()
    );
    if let Some(b) = &d.bootstrap {
        bootstrap_lines(&mut out, b);
    }
    for e in &d.excluded {
        let _ = writeln!(out, "excluded {}: {}", e.factor, e.reason);
    }
    for w in &d.warnings {
        let _ = writeln!(out, "warning [{}]: {}", w.code, w.message);
    }
    let _ = writeln!(out, "fingerprint {} · {}", r.fingerprint, r.estimator_version);
    out
}

/// The method, with its K, κ and γ where it has them.
/// Whether the fit is a blend, whose K, κ and held-out Sharpe ratio are its ridge member's.
pub(crate) fn is_blend(d: &proto::Diagnostics) -> bool {
    d.effective_settings.is_some_and(|s| s.method() == proto::Method::Blend)
}

fn method_line(out: &mut String, d: &proto::Diagnostics) {
    let settings = d.effective_settings.unwrap_or_default();
    let how = |cv: bool| if cv { "cross-validated" } else { "fixed" };
    let _ = match settings.method() {
        proto::Method::Components | proto::Method::Unspecified => writeln!(
            out,
            "method components · scaling {} · K = {} ({}) · κ = {:.4} annualised ({}) · γ = {:.3e}",
            setting_word(settings.scaling().as_str_name(), "SCALING_"),
            d.num_components,
            how(d.components_cross_validated),
            d.kappa,
            how(d.kappa_cross_validated),
            d.gamma
        ),
        proto::Method::KnsRidge => writeln!(
            out,
            "method kns-ridge · every component of the covariance (K = {}) · κ = {:.4} annualised ({}) · γ = {:.3e}",
            d.num_components,
            d.kappa,
            how(d.kappa_cross_validated),
            d.gamma
        ),
        proto::Method::Blend => writeln!(
            out,
            "method blend · ½ ridge on every component of the covariance (κ = {:.4} annualised, {}) + ½ Ledoit–Wolf plug-in",
            d.kappa,
            how(d.kappa_cross_validated)
        ),
        proto::Method::Ensemble => {
            writeln!(out, "method ensemble · the average of every scaling's cross-validated component portfolio")
        }
        m => writeln!(out, "method {} (baseline)", setting_word(m.as_str_name(), "METHOD_")),
    };
}

/// The header and one line per factor, by absolute weight, with the
/// bootstrap's interval and sign agreement when there is one.
fn factor_lines(out: &mut String, r: &ComputeWeightsResponse, boot: Option<&proto::Bootstrap>, width: usize) {
    let _ = write!(out, "{:<width$}  {:>8}  {:>9}  {:>9}  {:>10}", "factor", "Sharpe", "model", "weight", "risk share");
    if boot.is_some() {
        let _ = write!(out, "  {:>9}  {:>9}  {:>9}  {:>5}", "5%", "median", "95%", "sign");
    }
    let _ = writeln!(out);
    let mut order: Vec<usize> = (0..r.weights.len()).collect();
    order.sort_by(|&a, &b| r.weights[b].weight.abs().total_cmp(&r.weights[a].weight.abs()));
    for &i in &order {
        let f = &r.weights[i];
        let name: String = f.factor.chars().take(width).collect();
        if f.excluded {
            let _ = writeln!(out, "{name:<width$}  {:>8}  {:>9}  {:>9}  {:>10}", "-", "-", "excluded", "-");
            continue;
        }
        let _ = write!(
            out,
            "{name:<width$}  {:>8.2}  {:>9.4}  {:>9.4}  {:>9.1}%",
            f.sharpe_annualized,
            f.model_weight,
            f.weight,
            100.0 * f.risk_contribution
        );
        if let Some(iv) = boot.and_then(|b| b.factors.get(i)) {
            let _ =
                write!(out, "  {:>9.4}  {:>9.4}  {:>9.4}  {:>4.0}%", iv.q05, iv.q50, iv.q95, 100.0 * iv.sign_agreement);
        }
        let _ = writeln!(out);
    }
}

/// Gross (Σ|w| + |w_m|) and net (Σw + w_m) exposure of the model and the implemented weights.
/// Gross exposure Σ|wᵢ| + |w_m|. A net (signed) sum is not shown: the factors
/// are self-financing long–short portfolios, so it is no measure of capital.
fn exposure_lines(out: &mut String, r: &ComputeWeightsResponse, width: usize) {
    let model = r.weights.iter().map(|f| f.model_weight.abs()).sum::<f64>() + r.model_market_weight.abs();
    let held = r.weights.iter().map(|f| f.weight.abs()).sum::<f64>() + r.market_weight.abs();
    let _ = writeln!(out, "{:<width$}  {:>8}  {model:>9.4}  {held:>9.4}", "gross exposure", "");
}

/// The risk calibration (SPEC §13) and the frequency in force.
fn calibration_line(out: &mut String, d: &proto::Diagnostics) {
    let freq = format!(
        "{} periods a year ({})",
        d.periods_per_year,
        if d.periods_per_year_inferred { "read from the labels" } else { "as set" }
    );
    let _ = match &d.risk_calibration {
        Some(c) => writeln!(
            out,
            "risk calibration {}: weights × {:.3} (held-out over in-window volatility {:.3}, SE of its log {}, {} periods) · \
             in-window volatility {:.2}%, out-of-sample forecast {:.2}% · {freq}",
            setting_word(c.rule().as_str_name(), "RISK_CALIBRATION_"),
            c.factor,
            c.measured_ratio,
            if c.standard_error.is_finite() { format!("{:.3}", c.standard_error) } else { "n/a".into() },
            c.held_out_periods,
            100.0 * c.in_window_volatility,
            100.0 * c.calibrated_volatility
        ),
        None => writeln!(out, "risk calibration off · {freq}"),
    };
}

/// The implementation stage's lines: tracking error, turnover, cost, γ*, solver, binding limits.
fn implementation_lines(out: &mut String, imp: &proto::Implementation) {
    let _ = writeln!(out);
    let _ = writeln!(
        out,
        "implementation: tracking error {:.2}% · turnover {:.4} · cost {:.2} bp of NAV · γ* {:.4} (model Sharpe {:.2}) · solver {} in {} iterations",
        100.0 * imp.tracking_error,
        imp.turnover,
        1e4 * imp.cost,
        imp.gamma,
        imp.model_sharpe,
        imp.solver_status,
        imp.iterations
    );
    if imp.binding.is_empty() {
        let _ = writeln!(out, "no limit binds");
    }
    for b in &imp.binding {
        let what = if b.factor.is_empty() { b.constraint.clone() } else { format!("{} on {}", b.constraint, b.factor) };
        let _ = writeln!(out, "binds: {what} at {:.4} (limit {}) · dual {:.3e}", b.value, b.limit, b.dual);
    }
}

/// The bootstrap's summary lines under the table.
fn bootstrap_lines(out: &mut String, b: &proto::Bootstrap) {
    let _ = writeln!(
        out,
        "bootstrap: {} stationary draws (mean block {} periods, seed {}{}), {} failed; {}; 5% / median / 95% of each model weight, sign = share of draws with the model weight's sign",
        b.draws,
        b.mean_block,
        b.seed,
        if b.cross_validated { ", cross-validated in every draw" } else { ", K and κ as fitted" },
        b.failed,
        if b.bagged {
            "weights are the draws' mean, normalised again (bagged)"
        } else {
            "weights are the window's own fit"
        }
    );
    if !b.components.is_empty() {
        let ks: Vec<String> = b.components.iter().map(|c| format!("K={}: {}", c.components, c.draws)).collect();
        let _ = writeln!(out, "bootstrap K chosen: {}", ks.join(", "));
    }
}

/// The response in the proto3 JSON mapping.
pub fn json(r: &ComputeWeightsResponse) -> anyhow::Result<String> {
    Ok(serde_json::to_string_pretty(r)? + "\n")
}

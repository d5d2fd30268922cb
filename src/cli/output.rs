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
    let settings = d.effective_settings.unwrap_or_default();
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
    let how = |cv: bool| if cv { "cross-validated" } else { "fixed" };
    match settings.method() {
        proto::Method::Components | proto::Method::Unspecified => {
            let _ = writeln!(
                out,
                "method components · scaling {} · K = {} ({}) · κ = {:.4} annualised ({}) · γ = {:.3e}",
                setting_word(settings.scaling().as_str_name(), "SCALING_"),
                d.num_components,
                how(d.components_cross_validated),
                d.kappa,
                how(d.kappa_cross_validated),
                d.gamma
            );
        }
        m => {
            let _ = writeln!(out, "method {} (baseline)", setting_word(m.as_str_name(), "METHOD_"));
        }
    }
    let _ = writeln!(out);
    let width = r.weights.iter().map(|f| f.factor.chars().count()).max().unwrap_or(6).clamp(12, 40);
    let _ = writeln!(out, "{:<width$}  {:>8}  {:>9}  {:>10}", "factor", "Sharpe", "weight", "risk share");
    let mut order: Vec<usize> = (0..r.weights.len()).collect();
    order.sort_by(|&a, &b| r.weights[b].weight.abs().total_cmp(&r.weights[a].weight.abs()));
    for &i in &order {
        let f = &r.weights[i];
        let name: String = f.factor.chars().take(width).collect();
        if f.excluded {
            let _ = writeln!(out, "{name:<width$}  {:>8}  {:>9}  {:>10}", "-", "excluded", "-");
        } else {
            let _ = writeln!(
                out,
                "{name:<width$}  {:>8.2}  {:>9.4}  {:>9.1}%",
                f.sharpe_annualized,
                f.weight,
                100.0 * f.risk_contribution
            );
        }
    }
    let _ = writeln!(out, "{:<width$}  {:>8}  {:>9.4}", "market hedge", "", r.market_weight);
    let _ = writeln!(out);
    let _ = writeln!(
        out,
        "in-window Sharpe {:.2} · held-out Sharpe (CV) {} · ex-ante volatility {:.2}% · effective factors {:.1}",
        d.in_sample_sharpe,
        if d.cv_sharpe.is_finite() { format!("{:.2}", d.cv_sharpe) } else { "n/a".into() },
        100.0 * d.ex_ante_volatility,
        d.effective_factors
    );
    let _ = writeln!(
        out,
        "top-30% Sharpe factors hold {:.1}% of gross weight · covariance condition number {:.3e}{}",
        100.0 * d.top_sharpe_gross_share,
        d.covariance_condition_number,
        d.turnover.map(|t| format!(" · turnover {t:.4}")).unwrap_or_default()
    );
    for e in &d.excluded {
        let _ = writeln!(out, "excluded {}: {}", e.factor, e.reason);
    }
    for w in &d.warnings {
        let _ = writeln!(out, "warning [{}]: {}", w.code, w.message);
    }
    let _ = writeln!(out, "fingerprint {} · {}", r.fingerprint, r.estimator_version);
    out
}

/// The response in the proto3 JSON mapping.
pub fn json(r: &ComputeWeightsResponse) -> anyhow::Result<String> {
    Ok(serde_json::to_string_pretty(r)? + "\n")
}

//! Rendering of weight sets for people (a table) and programs (proto3 JSON).

use std::fmt::Write as _;

use keelson::estimator::{Method, WeightSet};

/// One line per factor sorted by weight, then the key diagnostics.
pub fn table(ws: &WeightSet, source: &str, labels: &[String]) -> String {
    let d = &ws.diagnostics;
    let s = &ws.settings;
    let mut out = String::new();
    let span = match (labels.first(), labels.last()) {
        (Some(a), Some(b)) => format!(" ({a} … {b})"),
        _ => String::new(),
    };
    let _ = writeln!(
        out,
        "Keelson weights · {source}: {} periods{span}, {} factors, {} used",
        d.periods,
        ws.factors.len(),
        d.factors_used
    );
    let how = |cv: bool| if cv { "cross-validated" } else { "fixed" };
    match s.method {
        Method::Components => {
            let _ = writeln!(
                out,
                "method components · scaling {} · K = {} ({}) · κ = {:.4} annualised ({}) · γ = {:.3e}",
                serde_plain(&s.scaling),
                d.num_components,
                how(d.components_cross_validated),
                d.kappa,
                how(d.kappa_cross_validated),
                d.gamma
            );
        }
        m => {
            let _ = writeln!(out, "method {} (baseline)", serde_plain(&m));
        }
    }
    let _ = writeln!(out);
    let width = ws.factors.iter().map(|f| f.name.chars().count()).max().unwrap_or(6).clamp(6, 40);
    let _ = writeln!(out, "{:<width$}  {:>8}  {:>9}  {:>10}", "factor", "Sharpe", "weight", "risk share");
    let mut order: Vec<usize> = (0..ws.factors.len()).collect();
    order.sort_by(|&a, &b| ws.factors[b].weight.abs().total_cmp(&ws.factors[a].weight.abs()));
    for &i in &order {
        let f = &ws.factors[i];
        let name: String = f.name.chars().take(width).collect();
        if f.excluded.is_some() {
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
    let _ = writeln!(out, "{:<width$}  {:>8}  {:>9.4}", "market hedge", "", ws.market_weight);
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
    let _ = writeln!(out, "fingerprint {} · {}", ws.fingerprint, ws.estimator_version);
    out
}

/// The kebab-case name a settings enum has in files and on the command line.
fn serde_plain<T: serde::Serialize>(v: &T) -> String {
    serde_json::to_value(v).ok().and_then(|v| v.as_str().map(str::to_owned)).unwrap_or_default()
}

/// The `ComputeWeightsResponse` in the proto3 JSON mapping.
pub fn json(ws: &WeightSet, request_id: &str) -> anyhow::Result<String> {
    let msg = keelson::convert::weight_set_to_proto(ws, request_id);
    Ok(serde_json::to_string_pretty(&msg)? + "\n")
}

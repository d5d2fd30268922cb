//! A backtest's report: a self-contained `report.html` with inline SVG
//! charts (also written one file each under `charts/`), `summary.json` (the
//! `BacktestResult` message in the proto3 JSON mapping: one schema with the
//! gRPC API) and `returns.csv` (one column per strategy id).

mod charts;
pub mod palette;

use std::fmt::Write as _;
use std::path::Path;

use anyhow::Context as _;

use crate::estimator::Method;
use crate::evaluate::{BacktestResult, KNS_PUBLISHED, MARKET, MODEL, StrategyResult};
use charts::Series;

/// Text for HTML, in element content or a quoted attribute value alike.
fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;").replace('\'', "&#39;")
}

fn f(v: f64, digits: usize) -> String {
    if v.is_finite() { format!("{v:.digits$}") } else { "n/a".into() }
}

/// The summary table as text (also printed by the command).
pub fn summary_table(r: &BacktestResult) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "{:<40} {:>7} {:>7} {:>6} {:>7} {:>7} {:>8} {:>7} {:>12} {:>8} {:>7}",
        "strategy", "mean", "vol", "target", "Sharpe", "SE(NW)", "CER", "maxDD", "gross med/max", "turnover", "net SR"
    );
    for s in &r.strategies {
        let _ = writeln!(
            out,
            "{:<40} {:>6.2}% {:>6.2}% {:>6} {:>7.2} {:>7.2} {:>7.2}% {:>6.1}% {:>5.2}/{:<6.2} {:>8.3} {:>7.2}",
            s.name.chars().take(40).collect::<String>(),
            100.0 * s.metrics.mean,
            100.0 * s.metrics.volatility,
            s.target_volatility.map_or_else(|| "-".to_owned(), |t| format!("{:.1}%", 100.0 * t)),
            s.metrics.sharpe,
            s.metrics.sharpe_se_nw,
            100.0 * s.metrics.cer,
            100.0 * s.metrics.max_drawdown,
            s.gross_median,
            s.gross_max,
            s.average_turnover,
            s.net_metrics.sharpe
        );
    }
    let _ = writeln!(out, "{}", constraint_line(&r.constraints));
    for line in risk_lines(r) {
        let _ = writeln!(out, "{line}");
    }
    for line in warning_lines(r) {
        let _ = writeln!(out, "{line}");
    }
    out
}

/// The implementation limits of the run, in one line.
pub fn constraint_line(c: &crate::evaluate::ConstraintSet) -> String {
    if !c.active() {
        return format!(
            "limits: none (model portfolios as estimated){}",
            if c.volatility_halflife > 0.0 {
                format!(
                    "; volatility target on an exponentially weighted covariance, half-life {} periods",
                    c.volatility_halflife
                )
            } else {
                String::new()
            }
        );
    }
    let on = |v: Option<f64>| v.map_or_else(|| "off".to_owned(), |x| x.to_string());
    let l = &c.limits;
    format!(
        "limits for every fitted strategy: max_weight {} · max_gross {} · max_market_weight {} · max_turnover {} · cost_bps {} over {} periods{}",
        on(l.max_weight),
        on(l.max_gross),
        on(l.max_market_weight),
        on(l.max_turnover),
        l.cost_bps,
        c.holding_periods,
        if c.volatility_halflife > 0.0 {
            format!(" · volatility half-life {} periods", c.volatility_halflife)
        } else {
            String::new()
        }
    )
}

/// With limits on, what set each fitted strategy's risk (SPEC §10, §13): the
/// volatility target, or a limit that bound (with how often each bound).
pub fn risk_lines(r: &BacktestResult) -> Vec<String> {
    if !r.constraints.active() {
        return Vec::new();
    }
    r.strategies
        .iter()
        .filter(|s| s.target_volatility.is_some() && s.name != crate::evaluate::MODEL)
        .map(|s| {
            let by_target = r.refits - s.limit_bound_refits;
            let limits: Vec<String> = s.binding_limits.iter().map(|l| format!("{} {}", l.limit, l.refits)).collect();
            format!(
                "risk set, {}: by the volatility target in {by_target}/{} refits, by a limit in {}/{}{}",
                s.name,
                r.refits,
                s.limit_bound_refits,
                r.refits,
                if limits.is_empty() { String::new() } else { format!(" ({})", limits.join(", ")) }
            )
        })
        .collect()
}

/// Every warning code each strategy's refits raised, one line per strategy:
/// the number and share of refits.
pub fn warning_lines(r: &BacktestResult) -> Vec<String> {
    let mut out: Vec<String> = r
        .strategies
        .iter()
        .filter(|s| !s.warnings.is_empty())
        .map(|s| {
            let codes: Vec<String> = s
                .warnings
                .iter()
                .map(|w| format!("{} {}/{} ({:.0}%)", w.code, w.refits, r.refits, share(w.refits, r.refits)))
                .collect();
            format!("warnings, {}: {}", s.name, codes.join("; "))
        })
        .collect();
    // Each code once, with what it means.
    let mut codes: Vec<&str> = r.strategies.iter().flat_map(|s| s.warnings.iter().map(|w| w.code.as_str())).collect();
    codes.sort_unstable();
    codes.dedup();
    out.extend(codes.iter().map(|c| format!("  {c}: {}", crate::estimator::warning_meaning(c))));
    out
}

fn share(count: usize, of: usize) -> f64 {
    100.0 * count as f64 / of.max(1) as f64
}

/// Writes `report.html`, `summary.json`, `returns.csv` and `charts/*.svg` into `dir`.
///
/// # Errors
/// I/O errors with the path, or a chart that could not be drawn.
pub fn write(dir: &Path, r: &BacktestResult, title: &str) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    std::fs::write(dir.join("returns.csv"), returns_csv(r)).context("writing returns.csv")?;
    std::fs::write(dir.join("summary.json"), summary_json(r)?).context("writing summary.json")?;
    if let Some(csv) = weights_csv(r) {
        std::fs::write(dir.join("weights.csv"), csv).context("writing weights.csv")?;
    }
    let mut all = performance_charts(r)?;
    all.extend(latest_fit_charts(r)?);
    all.extend(over_time_charts(r)?);
    let chart_dir = dir.join("charts");
    std::fs::create_dir_all(&chart_dir).with_context(|| format!("cannot create {}", chart_dir.display()))?;
    for c in &all {
        std::fs::write(chart_dir.join(format!("{}.svg", c.file)), &c.svg)
            .with_context(|| format!("writing charts/{}.svg", c.file))?;
    }
    let mut html = header(r, title);
    html.push_str(&verdict_section(r));
    html.push_str(&holding_section(r));
    html.push_str(&provenance_section(r));
    html.push_str(&performance_section(r));
    html.push_str(&warning_section(r));
    html.push_str(&comparison_section(r));
    html.push_str(&alpha_section(r));
    html.push_str(&pricing_section(r));
    html.push_str("<h2>Charts</h2>");
    for c in all {
        let _ = write!(
            html,
            "<h3>{}</h3><p class=\"note\">{}</p><div class=\"chart\">{}</div>",
            esc(c.heading),
            esc(&c.caption),
            c.svg
        );
    }
    html.push_str("</body></html>\n");
    std::fs::write(dir.join("report.html"), html).context("writing report.html")?;
    Ok(())
}

/// `summary.json`: the `BacktestResult` message in the proto3 JSON mapping
/// (lowerCamelCase names, NaN as "NaN", 64-bit integers as strings), the
/// same schema the gRPC API streams.
///
/// # Errors
/// When the message cannot be serialised (not expected: every field maps).
pub fn summary_json(r: &BacktestResult) -> anyhow::Result<String> {
    let message = crate::convert::backtest_result_to_proto(r, "");
    Ok(serde_json::to_string_pretty(&message)? + "\n")
}

/// A chart: its file stem, heading, caption and SVG.
struct Chart {
    file: &'static str,
    heading: &'static str,
    caption: String,
    svg: String,
}

fn chart(
    file: &'static str,
    heading: &'static str,
    caption: impl Into<String>,
    res: Result<String, String>,
) -> anyhow::Result<Chart> {
    let svg = res.map_err(|e| anyhow::anyhow!("chart {file}: {e}"))?;
    Ok(Chart { file, heading, caption: caption.into(), svg })
}

/// returns.csv: period, then one column per strategy id, the configured method first.
/// The portfolio to hold (the configured method's fit on the latest window):
/// one row per factor with its model and implemented weight, then the hedge.
fn weights_csv(r: &BacktestResult) -> Option<String> {
    let l = r.last_fit.as_ref()?;
    let mut csv = format!("# fit on {} to {}\nfactor,model_weight,weight\n", l.first_period, l.last_period);
    for fct in &l.fit.factors {
        let _ = writeln!(csv, "{},{},{}", csv_field(&fct.name), fct.model_weight, fct.weight);
    }
    let hedge = if r.strategies.iter().any(|s| s.name == MARKET) { "market hedge" } else { "" };
    if !hedge.is_empty() {
        let _ = writeln!(csv, "{hedge},{},{}", l.fit.model_market_weight, l.fit.market_weight);
    }
    Some(csv)
}

/// The verdict at the top of the report.
fn verdict_section(r: &BacktestResult) -> String {
    let v = crate::evaluate::verdict::verdict(r);
    let mut html = String::from("<h2>Verdict</h2><div class=\"verdict\">");
    for line in &v.sentences {
        let _ = write!(html, "<p>{}</p>", esc(line));
    }
    html.push_str("</div>");
    html
}

/// The portfolio to hold: dated window, model and implemented weights, the hedge.
fn holding_section(r: &BacktestResult) -> String {
    let Some(l) = &r.last_fit else { return String::new() };
    let ws = &l.fit;
    let mut html = String::new();
    let _ = write!(
        html,
        "<h2>The portfolio to hold</h2><p>The configured method fitted on the latest window, {} to {} ({} periods), \
         starting from the weights held after the last refit. Weights are fractions of NAV; the model portfolio is \
         the estimate before limits and costs. The same table is in <code>weights.csv</code>.</p>\
         <table><tr><th>factor</th><th>model weight</th><th>weight to hold</th></tr>",
        esc(&l.first_period),
        esc(&l.last_period),
        ws.diagnostics.periods
    );
    for fct in &ws.factors {
        let _ = write!(
            html,
            "<tr><td>{}</td><td>{}</td><td>{}</td></tr>",
            esc(&fct.name),
            f(fct.model_weight, 4),
            f(fct.weight, 4)
        );
    }
    if r.strategies.iter().any(|s| s.name == MARKET) {
        let _ = write!(
            html,
            "<tr class=\"hedge\"><td>market hedge −β′w</td><td>{}</td><td>{}</td></tr>",
            f(ws.model_market_weight, 4),
            f(ws.market_weight, 4)
        );
    }
    let gross = ws.factors.iter().map(|x| x.weight.abs()).sum::<f64>() + ws.market_weight.abs();
    let cal = ws.diagnostics.risk_calibration.map_or_else(
        || "no risk calibration".to_owned(),
        |c| format!("risk calibration factor {:.3} ({})", c.factor, c.rule),
    );
    let _ = write!(
        html,
        "</table><p class=\"note\">Gross exposure {}; ex-ante volatility {}% in the window; {}.</p>",
        f(gross, 2),
        f(100.0 * ws.diagnostics.ex_ante_volatility, 2),
        esc(&cal)
    );
    html
}

fn returns_csv(r: &BacktestResult) -> String {
    let mut csv = String::from("period");
    for s in &r.strategies {
        csv.push(',');
        csv.push_str(&s.id);
    }
    csv.push('\n');
    for (i, p) in r.periods.iter().enumerate() {
        csv.push_str(&csv_field(p));
        for s in &r.strategies {
            let _ = write!(csv, ",{:?}", s.returns[i]);
        }
        csv.push('\n');
    }
    csv
}

/// A CSV field, quoted when it holds a comma, quote or line break (RFC 4180).
fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) { format!("\"{}\"", s.replace('"', "\"\"")) } else { s.to_owned() }
}

/// A strategy's line: its fixed colour and dash (ember for the configured
/// method, drawn thickest).
fn series_of<T>(index: usize, s: &StrategyResult, values: Vec<T>) -> Series<T> {
    let (colour, dash) = palette::style(&s.id);
    Series { name: s.name.clone(), values, colour, width: if index == 0 { 3 } else { 1 }, dash }
}

/// The strategies drawn where every one would be a tangle: the configured
/// method, its model portfolio, the best other strategy by net Sharpe ratio,
/// the published KNS ridge, equal weight and the market.
fn key_strategies(r: &BacktestResult) -> Vec<usize> {
    let mut keep = vec![0];
    let best = (1..r.strategies.len())
        .filter(|&i| r.strategies[i].net_metrics.sharpe.is_finite())
        .max_by(|&a, &b| r.strategies[a].net_metrics.sharpe.total_cmp(&r.strategies[b].net_metrics.sharpe));
    for (i, s) in r.strategies.iter().enumerate().skip(1) {
        let wanted = [MODEL, KNS_PUBLISHED, "equal weight", MARKET].contains(&s.name.as_str()) || Some(i) == best;
        if wanted {
            keep.push(i);
        }
    }
    keep
}

/// Compounded wealth of one unit, period by period.
fn wealth(returns: &[f64]) -> Vec<f64> {
    let mut w = 1.0;
    returns
        .iter()
        .map(|x| {
            w *= 1.0 + x;
            w
        })
        .collect()
}

/// Drawdown of compounded wealth from its running peak, in percent (≤ 0).
fn drawdown(returns: &[f64]) -> Vec<f64> {
    let mut peak = 1.0f64;
    wealth(returns)
        .into_iter()
        .map(|w| {
            peak = peak.max(w);
            100.0 * (w / peak - 1.0)
        })
        .collect()
}

/// Annualised Sharpe ratio over the trailing `n` periods (NaN before `n`).
fn rolling_sharpe(returns: &[f64], n: usize, periods_per_year: f64) -> Vec<f64> {
    (0..returns.len())
        .map(|t| {
            if t + 1 < n {
                return f64::NAN;
            }
            let w = &returns[t + 1 - n..=t];
            periods_per_year.sqrt() * crate::evaluate::stats::sharpe(w)
        })
        .collect()
}

/// Trailing window of the rolling Sharpe chart, periods.
const ROLLING: usize = 36;

/// Growth of one unit, drawdowns, the rolling Sharpe ratio and the sweep.
fn performance_charts(r: &BacktestResult) -> anyhow::Result<Vec<Chart>> {
    let mut all: Vec<Series<f64>> =
        r.strategies.iter().enumerate().map(|(i, s)| series_of(i, s, wealth(&s.returns))).collect();
    // A strategy whose wealth runs far beyond the others' (an unconstrained model at 10⁶, say)
    // would squeeze every other line: it leaves the chart, and the note says so.
    let peak = |s: &Series<f64>| s.values.iter().copied().filter(|v| v.is_finite()).fold(0.0f64, f64::max);
    let mut peaks: Vec<f64> = all.iter().map(peak).collect();
    peaks.sort_by(f64::total_cmp);
    let typical = peaks.get(peaks.len() / 2).copied().unwrap_or(1.0).max(1.0);
    let (outliers, kept): (Vec<Series<f64>>, Vec<Series<f64>>) =
        all.drain(..).partition(|s| peak(s) > 100.0 * typical && s.name != crate::evaluate::CONFIGURED);
    let left_out = if outliers.is_empty() {
        String::new()
    } else {
        format!(
            " Left out so as not to flatten the others: {} (peak wealth {}).",
            outliers.iter().map(|s| s.name.as_str()).collect::<Vec<_>>().join(", "),
            outliers.iter().map(|s| format!("{:.3e}", peak(s))).collect::<Vec<_>>().join(", ")
        )
    };
    let mut out = vec![chart(
        "growth",
        "Growth of one unit",
        format!(
            "Compounded out-of-sample returns (gross of costs) of every strategy on a log scale: equal vertical distances are equal percentage gains. Ember and thickest: the configured method. Strategies other than the market are scaled to their volatility target inside each window.{left_out}"
        ),
        charts::lines("Growth of one unit invested (log scale)", "wealth", &r.periods, &kept, true, false),
    )?];
    let keys = key_strategies(r);
    let dd: Vec<Series<f64>> =
        keys.iter().map(|&i| series_of(i, &r.strategies[i], drawdown(&r.strategies[i].returns))).collect();
    out.push(chart(
        "drawdown",
        "Drawdowns",
        "Loss of compounded wealth from its previous peak, in percent, for the configured method and reference strategies.",
        charts::lines("Drawdown from the running peak (%)", "drawdown, %", &r.periods, &dd, false, false),
    )?);
    if r.periods.len() > ROLLING {
        let p = f64::from(r.periods_per_year);
        let rs: Vec<Series<f64>> = keys
            .iter()
            .map(|&i| series_of(i, &r.strategies[i], rolling_sharpe(&r.strategies[i].returns, ROLLING, p)))
            .collect();
        out.push(chart(
            "rolling-sharpe",
            "Rolling Sharpe ratio",
            format!("Annualised Sharpe ratio over the trailing {ROLLING} periods: how steady the edge was, not only how large."),
            charts::lines(&format!("Sharpe ratio over the trailing {ROLLING} periods"), "annualised Sharpe ratio", &r.periods, &rs, false, true),
        )?);
    }
    if !r.sweep.is_empty() {
        let configured = r.strategies.first().and_then(|s| s.settings.as_ref()).map(|s| s.scaling);
        let mut by_scaling: Vec<Series<(f64, f64)>> = Vec::new();
        for p in &r.sweep {
            let name = format!("components, scaling {}", p.scaling);
            match by_scaling.iter_mut().find(|s| s.name == name) {
                Some(s) => s.values.push((p.k as f64, p.sharpe)),
                None => {
                    // Each scaling in the colour of its own strategy row.
                    let own = Some(p.scaling) == configured;
                    let (colour, dash) = palette::style(&format!("scaling-{}", p.scaling));
                    by_scaling.push(Series {
                        name,
                        values: vec![(p.k as f64, p.sharpe)],
                        colour,
                        width: if own { 3 } else { 1 },
                        dash,
                    });
                }
            }
        }
        out.push(chart(
            "sharpe-by-k",
            "Out-of-sample Sharpe ratio against K",
            "Annualised out-of-sample Sharpe ratio with a fixed number of components K (κ as configured), one line per scaling; the configured scaling in ember: how many components a scaling needs to get near its best.",
            charts::xy("OOS Sharpe ratio against the number of components", "components K", "annualised Sharpe ratio", &by_scaling),
        )?);
    }
    Ok(out)
}

/// The latest window's CV surface and weights.
fn latest_fit_charts(r: &BacktestResult) -> anyhow::Result<Vec<Chart>> {
    let mut out = Vec::new();
    let Some(latest) = &r.last_fit else { return Ok(out) };
    let ws = &latest.fit;
    if let Some(s) = &ws.diagnostics.cv_surface
        && !s.components.is_empty()
        && !s.kappas.is_empty()
    {
        let d = &ws.diagnostics;
        let row = s.components.iter().position(|&k| k == d.num_components);
        let col = s
            .kappas
            .iter()
            .enumerate()
            .min_by(|a, b| (a.1.ln() - d.kappa.ln()).abs().total_cmp(&(b.1.ln() - d.kappa.ln()).abs()))
            .map(|(c, _)| c);
        if s.components.len() == 1 {
            // One K (fixed, or every component for the ridge): the score against κ as a line.
            let line: Vec<(f64, f64)> = s.kappas.iter().zip(&s.scores).map(|(k, v)| (k.log10(), *v)).collect();
            let chosen = col.map(|c| vec![(s.kappas[c].log10(), s.scores[c])]).unwrap_or_default();
            let series = [
                Series {
                    name: format!("K = {}", s.components[0]),
                    values: line,
                    colour: palette::LONG,
                    width: 1,
                    dash: palette::Dash::Solid,
                },
                Series {
                    name: "the choice".into(),
                    values: chosen,
                    colour: palette::EMBER,
                    width: 3,
                    dash: palette::Dash::Solid,
                },
            ];
            out.push(chart(
                "cv-surface",
                "Cross-validation score against κ",
                format!(
                    "Mean held-out {} against κ (log10 of the annualised κ) in the latest window's {}-fold cross-validation, K = {}; the ember point is the choice (κ = {:.3}), ties going to more shrinkage.",
                    s.criterion, s.folds, s.components[0], d.kappa
                ),
                charts::xy(
                    "Cross-validation score of the latest window",
                    "log10 κ (annualised)",
                    &match s.criterion {
                        crate::estimator::CvCriterion::Sharpe => "mean held-out Sharpe ratio".to_owned(),
                        c => format!("mean held-out {c}"),
                    },
                    &series,
                ),
            )?);
        } else {
            out.push(chart(
            "cv-surface",
            "Cross-validation surface",
            format!(
                "Mean held-out {} of every (K, κ) pair in the latest window's {}-fold cross-validation, darker is better; the outlined cell is the choice (K = {}, κ = {:.3}), ties going to fewer components and more shrinkage.",
                s.criterion, s.folds, d.num_components, d.kappa
            ),
            charts::surface("Cross-validation surface of the latest window", &s.components, &s.kappas, &s.scores, row.zip(col)),
        )?);
        }
    }
    let implemented = ws.diagnostics.implementation.is_some();
    let mut rows: Vec<(String, f64, Option<f64>)> = ws
        .factors
        .iter()
        .filter(|f| f.weight != 0.0 || f.model_weight != 0.0)
        .map(|f| (f.name.clone(), f.weight, implemented.then_some(f.model_weight)))
        .collect();
    rows.sort_by(|a, b| b.1.total_cmp(&a.1));
    // The hedge below the factors, apart: it offsets their market beta and is no factor bet.
    let hedged = ws.market_weight != 0.0 || ws.model_market_weight != 0.0;
    if hedged {
        rows.push(("market hedge −β′w".into(), ws.market_weight, implemented.then_some(ws.model_market_weight)));
    }
    out.push(chart(
        "weights",
        "Latest weights",
        format!(
            "Weights to hold after the latest window, configured method, largest long at the top (blue long, ember short){}; factors with zero weight are left out; the market hedge, in grey below the line, offsets the factors' market beta.",
            if implemented { "; the black tick is the model portfolio's weight before limits and costs" } else { "" }
        ),
        charts::weight_bars("Weights of the latest window (configured method)", &rows, hedged),
    )?);
    Ok(out)
}

/// K and κ at each refit as small multiples, and concentration over time.
fn over_time_charts(r: &BacktestResult) -> anyhow::Result<Vec<Chart>> {
    let mut out = Vec::new();
    let fitted: Vec<usize> =
        (0..r.strategies.len()).filter(|&i| r.strategies[i].chosen_k.iter().any(|&k| k > 0)).collect();
    let Some(&first) = fitted.first() else { return Ok(out) };
    let refit_labels: Vec<String> = (0..r.strategies[first].chosen_k.len())
        .map(|d| r.periods.get(d * r.spec.step).cloned().unwrap_or_default())
        .collect();
    let ks: Vec<Series<f64>> = fitted
        .iter()
        .map(|&i| series_of(i, &r.strategies[i], r.strategies[i].chosen_k.iter().map(|&k| k as f64).collect()))
        .collect();
    out.push(chart(
        "components-over-time",
        "Components chosen over time",
        "Number of components K each fitted strategy chose at each refit, one panel per strategy on a shared scale (the configured method first, in ember); a value holds until the next refit.",
        charts::small_multiples("K chosen at each refit", "K", &refit_labels, &ks, false),
    )?);
    let kappas: Vec<Series<f64>> =
        fitted.iter().map(|&i| series_of(i, &r.strategies[i], r.strategies[i].chosen_kappa.clone())).collect();
    out.push(chart(
        "kappa-over-time",
        "Shrinkage chosen over time",
        "Annualised κ chosen at each refit (log scale, shared across panels): smaller κ means more shrinkage. A line pinned to the top or bottom of its panel is a choice at the edge of the grid.",
        charts::small_multiples("κ chosen at each refit (annualised, log scale)", "κ", &refit_labels, &kappas, true),
    )?);
    let share: Vec<Series<f64>> = key_strategies(r)
        .into_iter()
        .filter(|&i| r.strategies[i].name != MARKET)
        .map(|i| series_of(i, &r.strategies[i], r.strategies[i].top_sharpe_share.iter().map(|v| 100.0 * v).collect()))
        .collect();
    out.push(chart(
        "concentration",
        "Concentration in high-Sharpe factors",
        "Share of gross factor weight held by the 30% of factors with the highest in-window Sharpe ratio, at each refit, in percent.",
        charts::lines("Gross weight in the top-30% Sharpe factors (%)", "share of gross weight, %", &refit_labels, &share, false, false),
    )?);
    Ok(out)
}

/// What was run: build, time, invocation, input and fingerprint, span,
/// options, limits, what "configured" means and every strategy's settings.
fn provenance_section(r: &BacktestResult) -> String {
    let p = &r.provenance;
    let mut html = String::from("<h2>What was run</h2><table class=\"kv\">");
    let spec = &r.spec;
    let sets: Vec<String> = spec.benchmark_sets.iter().map(|s| s.join(" + ")).collect();
    let rows: Vec<(&str, String)> = vec![
        ("Keelson", format!("{} ({})", p.keelson_version, p.estimator_version)),
        ("run at (UTC)", p.run_time.clone()),
        ("invocation", p.invocation.clone()),
        ("input", p.input.clone()),
        ("input SHA-256", p.input_sha256.clone()),
        (
            "history",
            format!(
                "{} to {}: {} periods, {} factors{}",
                p.first_period,
                p.last_period,
                p.periods,
                p.factors,
                p.market.as_ref().map_or_else(|| ", no market".to_owned(), |m| format!(", market column {m}"))
            ),
        ),
        (
            "backtest",
            format!(
                "{} window of {} periods, refit every {}, evaluation cost {} bp, CER risk aversion {}, sweep up to K = {}, {} per year",
                if spec.expanding { "expanding" } else { "rolling" },
                spec.window,
                spec.step,
                spec.cost_bps,
                spec.cer_risk_aversion,
                spec.sweep_max_k.unwrap_or(0),
                r.periods_per_year
            ),
        ),
        ("benchmark sets", if sets.is_empty() { "none".to_owned() } else { sets.join("; ") }),
        ("limits", constraint_line(&r.constraints)),
        ("configured", p.configured.clone()),
    ];
    for (k, v) in rows {
        let _ = write!(html, "<tr><th>{}</th><td>{}</td></tr>", esc(k), esc(&v));
    }
    html.push_str("</table>");
    html.push_str(&settings_tables(r));
    html
}

/// The configured method's full settings, then each other strategy's
/// differences from them.
fn settings_tables(r: &BacktestResult) -> String {
    let flat = |s: &crate::estimator::Settings| -> Vec<(String, String)> {
        match serde_json::to_value(s) {
            Ok(serde_json::Value::Object(m)) => {
                m.into_iter().map(|(k, v)| (k, v.as_str().map_or_else(|| v.to_string(), str::to_owned))).collect()
            }
            _ => Vec::new(),
        }
    };
    let Some(configured) = r.strategies.first().and_then(|s| s.settings.as_ref()) else { return String::new() };
    let base = flat(configured);
    let mut html = String::from(
        "<h3>Settings of the configured method</h3><p class=\"note\">Those in force for its method; the full \
         list is in summary.json.</p><table class=\"settings\"><tr>",
    );
    let in_force: Vec<&(String, String)> = base.iter().filter(|(k, _)| configured.is_used(k)).collect();
    for (i, (k, v)) in in_force.iter().enumerate() {
        if i > 0 && i % 3 == 0 {
            html.push_str("</tr><tr>");
        }
        let _ = write!(html, "<th>{}</th><td>{}</td>", esc(k), esc(v));
    }
    html.push_str("</tr></table><h3>Every other strategy</h3><table class=\"kv\"><tr><th>strategy</th><th>id</th><th>differs from configured in</th></tr>");
    for s in r.strategies.iter().skip(1) {
        let diff = match &s.settings {
            None => "no fit: holds the market".to_owned(),
            Some(own) => {
                let changed: Vec<String> = flat(own)
                    .into_iter()
                    .filter(|(k, v)| base.iter().find(|(bk, _)| bk == k).is_none_or(|(_, bv)| bv != v))
                    .map(|(k, v)| format!("{k} = {v}"))
                    .collect();
                if changed.is_empty() { "nothing".to_owned() } else { changed.join(", ") }
            }
        };
        let _ = write!(
            html,
            "<tr><td>{}</td><td><code>{}</code></td><td>{}</td></tr>",
            esc(&s.name),
            esc(&s.id),
            esc(&diff)
        );
    }
    html.push_str("</table>");
    html
}

/// Every warning code per strategy: refits that raised it and their share.
fn warning_section(r: &BacktestResult) -> String {
    let mut html = String::from("<h2>Warnings across refits</h2>");
    if r.strategies.iter().all(|s| s.warnings.is_empty()) {
        html.push_str("<p>No fit raised a warning.</p>");
        return html;
    }
    html.push_str(
        "<table><tr><th>strategy</th><th>warning code</th><th>refits</th><th>share</th><th>what it means</th></tr>",
    );
    for s in &r.strategies {
        for w in &s.warnings {
            let _ = write!(
                html,
                "<tr><td>{}</td><td><code>{}</code></td><td>{} of {}</td><td>{:.0}%</td><td style=\"text-align:left\">{}</td></tr>",
                esc(&s.name),
                esc(&w.code),
                w.refits,
                r.refits,
                share(w.refits, r.refits),
                esc(crate::estimator::warning_meaning(&w.code))
            );
        }
    }
    html.push_str("</table>");
    html
}

/// The page head, the run's description and the caution.
fn header(r: &BacktestResult, title: &str) -> String {
    let mut html = String::new();
    let _ = write!(
        html,
        "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{t}</title><style>\
         body{{font-family:'DejaVu Sans',Verdana,sans-serif;max-width:940px;margin:0 auto 3em;color:#1e1e1e;background:#fbfaf6}}\
         h1{{background:#1b3a6b;color:#fbfaf6;padding:14px 18px;font-size:22px;margin:0 0 1em;border-bottom:5px solid #bc3d16}}\
         h2{{color:#1b3a6b;border-bottom:1px solid #c9c3b3;padding-bottom:3px;margin-top:1.8em}}h3{{color:#3c3c3c;font-size:15px}}\
         table{{border-collapse:collapse;font-size:12.5px;background:#fff}}td,th{{border:1px solid #d8d3c4;padding:3px 7px;text-align:right}}\
         th{{background:#f1ede2;font-weight:600}}th:first-child,td:first-child{{text-align:left}}\
         table.kv th,table.kv td,table.settings th,table.settings td{{text-align:left}}\
         tr.configured td{{background:#fbe9e2;font-weight:600}}td.na{{color:#7a7a7a}}\
         .note{{color:#555;font-size:12.5px}}.chart{{background:#fff;border:1px solid #e3ded0;margin-bottom:1em}}\
         .caution{{background:#fdf3e1;border-left:5px solid #bc3d16;padding:8px 12px}}\
         .verdict{{background:#eef2f7;border-left:5px solid #1b3a6b;padding:4px 14px}}tr.hedge td{{font-style:italic;border-top:2px solid #c9c3b3}}</style></head><body><h1>{t}</h1>",
        t = esc(title)
    );
    let first = r.periods.first().cloned().unwrap_or_default();
    let last = r.periods.last().cloned().unwrap_or_default();
    let _ = write!(
        html,
        "<p>{} out-of-sample periods ({} to {}), {} refits, {} window of {} periods, refit every {} period(s), \
         costs {} bp of turnover, CER risk aversion {}, Newey–West lag {}.</p>",
        r.periods.len(),
        esc(&first),
        esc(&last),
        r.refits,
        if r.spec.expanding { "expanding" } else { "rolling" },
        r.spec.window,
        r.spec.step,
        r.spec.cost_bps,
        r.spec.cer_risk_aversion,
        r.nw_lag
    );
    html.push_str("<p class=\"caution\">Caution: a backtest is one path of past data. Out-of-sample results carry estimation error, depend on the period and on the configurations tried (see the deflated Sharpe ratio), and do not predict future returns. Validate before live use and apply your own risk and compliance process.</p>");
    html
}

fn performance_section(r: &BacktestResult) -> String {
    let mut html = String::new();
    let _ = write!(html, "<h2>Performance</h2><p>{}</p>", esc(&constraint_line(&r.constraints)));
    let risk = risk_lines(r);
    if !risk.is_empty() {
        html.push_str("<ul class=\"note\">");
        for line in risk {
            let _ = write!(html, "<li>{}</li>", esc(&line));
        }
        html.push_str("</ul>");
    }
    html.push_str("<table><tr><th>strategy</th><th>mean</th><th>vol</th><th>vol target</th><th>Sharpe</th><th>SE iid</th><th>SE NW</th><th>CER</th><th>max DD</th><th>gross median</th><th>gross max</th><th>turnover</th><th>net Sharpe</th></tr>");
    for s in &r.strategies {
        let m = &s.metrics;
        let _ = write!(
            html,
            "<tr{}><td>{}</td><td>{}%</td><td>{}%</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}%</td><td>{}%</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            if s.id == crate::evaluate::CONFIGURED { " class=\"configured\"" } else { "" },
            esc(&s.name),
            f(100.0 * m.mean, 2),
            f(100.0 * m.volatility, 2),
            s.target_volatility.map_or_else(|| "–".to_owned(), |t| format!("{}%", f(100.0 * t, 1))),
            f(m.sharpe, 2),
            f(m.sharpe_se_iid, 2),
            f(m.sharpe_se_nw, 2),
            f(100.0 * m.cer, 2),
            f(100.0 * m.max_drawdown, 1),
            f(s.gross_median, 2),
            f(s.gross_max, 2),
            f(s.average_turnover, 3),
            f(s.net_metrics.sharpe, 2)
        );
    }
    html.push_str("</table><p class=\"note\">Annualised; Sharpe standard errors after Lo (2002), iid and Newey–West; CER = P·(mean − γ/2·var); vol is realised, vol target the normalisation's; gross Σ|w| + |w_m| per refit (multiples of NAV); turnover Σ|Δw| + |Δw_m| per refit; net of linear costs at the backtest's evaluation cost.</p>");
    html
}

fn comparison_section(r: &BacktestResult) -> String {
    let mut html = String::new();
    html.push_str(
        "<h2>Is the configured method better?</h2><table><tr><th>against</th><th>ΔSharpe (gross)</th>\
         <th>z (JKM)</th><th>p raw</th><th>p Holm</th><th>p Romano–Wolf</th></tr>",
    );
    for c in &r.comparisons {
        let _ = write!(
            html,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            esc(&c.against),
            f(c.test.difference, 2),
            f(c.test.z, 2),
            f(c.test.p_value, 3),
            f(c.p_holm, 3),
            f(c.p_romano_wolf, 3)
        );
    }
    let _ = write!(
        html,
        "</table><p class=\"note\">ΔSharpe is the configured method's annualised Sharpe ratio minus the other's, \
         on returns gross of costs. Jobson–Korkie test with Memmel's correction; p Holm adjusts for the {} comparisons \
         (Holm 1979); p Romano–Wolf is the step-down of Romano &amp; Wolf (2005) by {} stationary-bootstrap draws \
         (seed 0). Probabilistic Sharpe ratio (against 0): {}. Deflated Sharpe ratio over {} distinct candidate \
         configurations: {} (Bailey &amp; López de Prado 2014; benchmarks and repeated configurations are not \
         trials).</p><details><summary>The {} trials counted</summary><p>{}</p></details>",
        r.comparisons.len(),
        crate::evaluate::ROMANO_WOLF_DRAWS,
        f(r.psr, 3),
        r.trials.len(),
        f(r.dsr, 3),
        r.trials.len(),
        esc(&r.trials.join("; "))
    );
    html
}

fn alpha_section(r: &BacktestResult) -> String {
    let mut html = String::new();
    if !r.alphas.is_empty() {
        html.push_str("<h2>Alphas against benchmarks</h2><table><tr><th>strategy</th><th>benchmarks</th><th>alpha (ann.)</th><th>t (NW)</th><th>t (robust)</th><th>R²</th></tr>");
        for a in &r.alphas {
            match &a.note {
                Some(note) => {
                    let _ = write!(
                        html,
                        "<tr><td>{}</td><td>{}</td><td class=\"na\" colspan=\"3\">n/a: {}</td><td>{}</td></tr>",
                        esc(&a.strategy),
                        esc(&a.benchmarks.join(" + ")),
                        esc(note),
                        f(a.r2, 3)
                    );
                }
                None => {
                    let _ = write!(
                        html,
                        "<tr><td>{}</td><td>{}</td><td>{}%</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                        esc(&a.strategy),
                        esc(&a.benchmarks.join(" + ")),
                        f(100.0 * a.alpha, 2),
                        f(a.t_nw, 2),
                        f(a.t_robust, 2),
                        f(a.r2, 3)
                    );
                }
            }
        }
        html.push_str("</table><p class=\"note\">Time-series regressions of each strategy's out-of-sample return on the benchmarks; a regression whose R² is 1 to within 1e-10, or whose strategy is one of its benchmarks, has no residual to test and shows n/a.</p>");
    }
    html
}

fn pricing_section(r: &BacktestResult) -> String {
    let mut html = String::new();
    if let Some(p) = &r.pricing {
        let _ = write!(
            html,
            "<h2>Pricing test</h2><p>{} factors regressed on the out-of-sample returns of the configured method's first {} component(s){}: \
             {} with |t (NW)| &gt; 1.96; GRS statistic {} (p = {}).</p>",
            p.assets,
            p.k,
            if r.strategies.iter().any(|s| s.name == MARKET) { " and the market" } else { "" },
            p.significant,
            p.grs.as_ref().map_or("n/a".into(), |g| f(g.statistic, 3)),
            p.grs.as_ref().map_or("n/a".into(), |g| f(g.p_value, 4)),
        );
    } else {
        let why = match r.last_fit.as_ref().map(|l| l.fit.settings.method) {
            Some(Method::Components) => "the configured method's K-component fits did not cover every refit".to_owned(),
            Some(m) => format!(
                "the configured method ({m}) holds no K-component model to test: it weights every principal \
                 component (kns-ridge, blend), averages several (ensemble) or uses none (a baseline); a backtest with \
                 method = components runs the GRS test on the components it chooses"
            ),
            None => "there is no fit of the configured method".to_owned(),
        };
        let _ = write!(html, "<h2>Pricing test</h2><p class=\"note\">Not run: {}.</p>", esc(&why));
    }
    html
}

#[cfg(test)]
mod tests {
    use super::{csv_field, drawdown, esc, rolling_sharpe, wealth};

    /// Wealth compounds, drawdown is measured from the running peak (the
    /// usual definition, common practice), worked by hand: +10%, −20%, +25%.
    #[test]
    fn wealth_and_drawdown_by_hand() {
        let r = [0.10, -0.20, 0.25];
        let w = wealth(&r);
        for (got, want) in w.iter().zip([1.1, 0.88, 1.1]) {
            assert!((got - want).abs() < 1e-12, "{got} vs {want}");
        }
        let d = drawdown(&r);
        for (got, want) in d.iter().zip([0.0, -20.0, 0.0]) {
            assert!((got - want).abs() < 1e-9, "{got} vs {want}");
        }
        // A loss from the start is a drawdown from the initial unit.
        assert!((drawdown(&[-0.5])[0] + 50.0).abs() < 1e-12);
    }

    /// The rolling Sharpe ratio is NaN until its window is full, then √p
    /// times mean over sample standard deviation (ddof 1, as numpy's
    /// `std(ddof=1)`) of the trailing window.
    #[test]
    fn rolling_sharpe_uses_only_the_trailing_window() {
        let r = [0.01, 0.03, -0.02, 0.04];
        let s = rolling_sharpe(&r, 3, 12.0);
        assert!(s[0].is_nan() && s[1].is_nan());
        let w = [0.03, -0.02, 0.04];
        let mean = w.iter().sum::<f64>() / 3.0;
        let sd = (w.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / 2.0).sqrt();
        assert!((s[3] - 12f64.sqrt() * mean / sd).abs() < 1e-12, "{}", s[3]);
    }

    /// Text reaches HTML escaped and CSV quoted (RFC 4180).
    #[test]
    fn names_are_escaped_for_html_and_quoted_for_csv() {
        assert_eq!(esc("<a & \"b\">"), "&lt;a &amp; &quot;b&quot;&gt;");
        assert_eq!(csv_field("plain"), "plain");
        assert_eq!(csv_field("a,\"b\""), "\"a,\"\"b\"\"\"");
        assert_eq!(csv_field("two\nlines"), "\"two\nlines\"");
    }
}

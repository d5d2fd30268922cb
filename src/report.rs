//! A backtest's report: a self-contained `report.html` with inline SVG charts
//! drawn by plotters, `summary.json` and `returns.csv`.

use std::fmt::Write as _;
use std::path::Path;

use anyhow::Context as _;
use plotters::prelude::*;

use crate::evaluate::{BacktestResult, MARKET};

const W: u32 = 820;
const H: u32 = 380;

/// Colours for series, in strategy order.
const PALETTE: [RGBColor; 12] = [
    RGBColor(31, 119, 180),
    RGBColor(255, 127, 14),
    RGBColor(44, 160, 44),
    RGBColor(214, 39, 40),
    RGBColor(148, 103, 189),
    RGBColor(140, 86, 75),
    RGBColor(227, 119, 194),
    RGBColor(127, 127, 127),
    RGBColor(188, 189, 34),
    RGBColor(23, 190, 207),
    RGBColor(0, 0, 0),
    RGBColor(100, 100, 255),
];

fn colour(i: usize) -> RGBColor {
    PALETTE[i % PALETTE.len()]
}

type Plot<'a> = Result<(), Box<dyn std::error::Error + 'a>>;

fn finite_range(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    if hi - lo < 1e-12 {
        return (lo - 0.5, hi + 0.5);
    }
    let pad = 0.05 * (hi - lo);
    (lo - pad, hi + pad)
}

/// A tick label with as many decimals as the axis range needs.
fn tick(v: f64, range: f64) -> String {
    if range >= 20.0 {
        format!("{v:.0}")
    } else if range >= 2.0 {
        format!("{v:.1}")
    } else {
        format!("{v:.3}")
    }
}

/// Lines of `series` (name, y) against period index, x labels from `periods`.
fn line_chart(
    title: &str,
    y_label: &str,
    periods: &[String],
    series: &[(String, Vec<f64>)],
    log_y: bool,
) -> Result<String, String> {
    let mut svg = String::new();
    let mut run = || -> Plot<'_> {
        let root = SVGBackend::with_string(&mut svg, (W, H)).into_drawing_area();
        root.fill(&WHITE)?;
        let n = series.iter().map(|s| s.1.len()).max().unwrap_or(1).max(2);
        let tr = |v: f64| if log_y { v.log10() } else { v };
        let (lo, hi) = finite_range(series.iter().flat_map(|s| s.1.iter().map(|&v| tr(v))));
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(10)
            .x_label_area_size(40)
            .y_label_area_size(70)
            .build_cartesian_2d(0f64..(n - 1) as f64, lo..hi)?;
        let labels = periods.to_vec();
        chart
            .configure_mesh()
            .x_desc("out-of-sample period")
            .y_desc(y_label)
            .x_labels(8)
            .x_label_formatter(&|x| labels.get(x.round() as usize).cloned().unwrap_or_default())
            .y_label_formatter(&|y| if log_y { format!("{:.3}", 10f64.powf(*y)) } else { tick(*y, hi - lo) })
            .draw()?;
        for (i, (name, ys)) in series.iter().enumerate() {
            let c = colour(i);
            chart
                .draw_series(LineSeries::new(
                    ys.iter().enumerate().filter(|(_, v)| v.is_finite()).map(|(x, &v)| (x as f64, tr(v))),
                    c.stroke_width(if i == 0 { 3 } else { 1 }),
                ))?
                .label(name.clone())
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], c.stroke_width(2)));
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperLeft)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK)
            .draw()?;
        root.present()?;
        Ok(())
    };
    run().map_err(|e| e.to_string())?;
    Ok(svg)
}

/// Lines of y against a numeric x.
fn xy_chart(title: &str, x_label: &str, y_label: &str, series: &[(String, Vec<(f64, f64)>)]) -> Result<String, String> {
    let mut svg = String::new();
    let mut run = || -> Plot<'_> {
        let root = SVGBackend::with_string(&mut svg, (W, H)).into_drawing_area();
        root.fill(&WHITE)?;
        let (xlo, xhi) = finite_range(series.iter().flat_map(|s| s.1.iter().map(|p| p.0)));
        let (ylo, yhi) = finite_range(series.iter().flat_map(|s| s.1.iter().map(|p| p.1)));
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(10)
            .x_label_area_size(40)
            .y_label_area_size(70)
            .build_cartesian_2d(xlo..xhi, ylo..yhi)?;
        chart
            .configure_mesh()
            .x_desc(x_label)
            .y_desc(y_label)
            .y_label_formatter(&|y| tick(*y, yhi - ylo))
            .x_label_formatter(&|x| tick(*x, xhi - xlo))
            .draw()?;
        for (i, (name, pts)) in series.iter().enumerate() {
            let c = colour(i);
            let pts: Vec<(f64, f64)> = pts.iter().copied().filter(|p| p.1.is_finite()).collect();
            chart
                .draw_series(LineSeries::new(pts.clone(), c.stroke_width(2)))?
                .label(name.clone())
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], c.stroke_width(2)));
            chart.draw_series(pts.into_iter().map(|p| Circle::new(p, 3, c.filled())))?;
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::LowerRight)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK)
            .draw()?;
        root.present()?;
        Ok(())
    };
    run().map_err(|e| e.to_string())?;
    Ok(svg)
}

/// The CV surface as a heat map: K down, log10 κ across.
fn surface_chart(ks: &[usize], kappas: &[f64], scores: &[f64], criterion: &str) -> Result<String, String> {
    let mut svg = String::new();
    let mut run = || -> Plot<'_> {
        let root = SVGBackend::with_string(&mut svg, (W, H + 40)).into_drawing_area();
        root.fill(&WHITE)?;
        let (lo, hi) = finite_range(scores.iter().copied());
        let lk: Vec<f64> = kappas.iter().map(|k| k.log10()).collect();
        let dx = if lk.len() > 1 { (lk[lk.len() - 1] - lk[0]) / (lk.len() - 1) as f64 } else { 1.0 };
        let (x0, x1) = (lk[0] - dx / 2.0, lk[lk.len() - 1] + dx / 2.0);
        let (y0, y1) = (ks[0] as f64 - 0.5, ks[ks.len() - 1] as f64 + 0.5);
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!("Cross-validation surface of the latest window ({criterion}; dark red = best)"),
                ("sans-serif", 18),
            )
            .margin(10)
            .x_label_area_size(40)
            .y_label_area_size(60)
            .build_cartesian_2d(x0..x1, y0..y1)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc("κ, annualised (log scale)")
            .y_desc("components K")
            .x_label_formatter(&|x| format!("{:.2}", 10f64.powf(*x)))
            .y_label_formatter(&|y| format!("{y:.0}"))
            .draw()?;
        let cols = kappas.len();
        chart.draw_series(ks.iter().enumerate().flat_map(|(r, &k)| {
            let lk = lk.clone();
            (0..cols).map(move |c| {
                let v = scores[r * cols + c];
                let u = if v.is_finite() { ((v - lo) / (hi - lo)).clamp(0.0, 1.0) } else { 0.0 };
                let col = if v.is_finite() {
                    RGBColor((40.0 + 200.0 * u) as u8, (90.0 * (1.0 - u)) as u8, (200.0 * (1.0 - u)) as u8)
                } else {
                    RGBColor(220, 220, 220)
                };
                Rectangle::new([(lk[c] - dx / 2.0, k as f64 - 0.5), (lk[c] + dx / 2.0, k as f64 + 0.5)], col.filled())
            })
        }))?;
        root.draw(&Text::new(
            format!("score range {lo:.3} (blue) to {hi:.3} (red)"),
            (80, (H + 20) as i32),
            ("sans-serif", 14),
        ))?;
        root.present()?;
        Ok(())
    };
    run().map_err(|e| e.to_string())?;
    Ok(svg)
}

/// Bars of the latest weights.
fn weights_chart(names: &[String], weights: &[f64], market: f64) -> Result<String, String> {
    let mut svg = String::new();
    let mut run = || -> Plot<'_> {
        let root = SVGBackend::with_string(&mut svg, (W, H + 60)).into_drawing_area();
        root.fill(&WHITE)?;
        let mut all: Vec<(String, f64)> = names.iter().cloned().zip(weights.iter().copied()).collect();
        all.push(("market hedge".into(), market));
        let (lo, hi) = finite_range(all.iter().map(|p| p.1).chain([0.0]));
        let n = all.len();
        let mut chart = ChartBuilder::on(&root)
            .caption("Weights of the latest window (configured method)", ("sans-serif", 18))
            .margin(10)
            .x_label_area_size(100)
            .y_label_area_size(70)
            .build_cartesian_2d(-0.5f64..(n as f64 - 0.5), lo..hi)?;
        let labels: Vec<String> = all.iter().map(|p| p.0.chars().take(16).collect()).collect();
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_labels(n.min(60))
            .x_label_formatter(&|x| {
                let i = x.round();
                if (x - i).abs() < 1e-6 { labels.get(i as usize).cloned().unwrap_or_default() } else { String::new() }
            })
            .x_label_style(("sans-serif", 10).into_font().transform(FontTransform::Rotate90))
            .y_desc("weight")
            .draw()?;
        chart.draw_series(all.iter().enumerate().map(|(i, (_, w))| {
            let c = if *w >= 0.0 { colour(0) } else { colour(3) };
            Rectangle::new([(i as f64 - 0.35, 0.0), (i as f64 + 0.35, *w)], c.filled())
        }))?;
        root.present()?;
        Ok(())
    };
    run().map_err(|e| e.to_string())?;
    Ok(svg)
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;")
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
    for line in edge_lines(r) {
        let _ = writeln!(out, "{line}");
    }
    out
}

/// Strategies whose cross-validated κ or K sat at an edge of its grid in
/// most refits: the grid, not the data, made the choice there.
pub fn edge_lines(r: &BacktestResult) -> Vec<String> {
    let mut out = Vec::new();
    for s in &r.strategies {
        for (count, what) in [
            (s.kappa_at_edge, "κ at an end of its grid (see kappa_grid_min, kappa_grid_max)"),
            (s.components_at_cap, "K at the top of its grid (see max_components)"),
        ] {
            if 2 * count > r.refits {
                out.push(format!(
                    "note: {}: {what} in {count} of {} refits ({:.0}%)",
                    s.name,
                    r.refits,
                    100.0 * count as f64 / r.refits.max(1) as f64
                ));
            }
        }
    }
    out
}

/// The implementation limits of the run, in one line.
pub fn constraint_line(c: &crate::evaluate::ConstraintSet) -> String {
    if !c.active() {
        return format!(
            "limits: none (model portfolios as estimated){}",
            if c.volatility_halflife > 0.0 {
                format!("; volatility target on an EWMA covariance, half-life {} periods", c.volatility_halflife)
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

/// Writes `report.html`, `summary.json` and `returns.csv` into `dir`.
///
/// # Errors
/// I/O errors with the path, or a chart that could not be drawn.
pub fn write(dir: &Path, r: &BacktestResult, title: &str) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    std::fs::write(dir.join("returns.csv"), returns_csv(r)).context("writing returns.csv")?;
    std::fs::write(dir.join("summary.json"), serde_json::to_string_pretty(r)? + "\n")
        .context("writing summary.json")?;
    let mut charts = performance_charts(r)?;
    charts.extend(latest_fit_charts(r)?);
    charts.extend(over_time_charts(r)?);
    let mut html = header(r, title);
    html.push_str(&performance_section(r));
    html.push_str(&comparison_section(r));
    html.push_str(&alpha_section(r));
    html.push_str(&pricing_section(r));
    html.push_str("<h2>Charts</h2>");
    for (h, caption, svg) in charts {
        let _ = write!(html, "<h3>{}</h3><p class=\"note\">{}</p>{}", esc(h), esc(caption), svg);
    }
    html.push_str("</body></html>\n");
    std::fs::write(dir.join("report.html"), html).context("writing report.html")?;
    Ok(())
}

/// A chart: its heading, caption and SVG.
type Chart = (&'static str, &'static str, String);

fn chart(res: Result<String, String>) -> anyhow::Result<String> {
    res.map_err(|e| anyhow::anyhow!("chart: {e}"))
}

/// returns.csv: period, then one column per strategy, the configured method first.
fn returns_csv(r: &BacktestResult) -> String {
    let mut csv = String::from("period");
    for s in &r.strategies {
        csv.push(',');
        csv.push_str(&s.name.replace(',', ";"));
    }
    csv.push('\n');
    for (i, p) in r.periods.iter().enumerate() {
        csv.push_str(p);
        for s in &r.strategies {
            csv.push_str(&format!(",{:?}", s.returns[i]));
        }
        csv.push('\n');
    }
    csv
}

/// Cumulative returns and the Sharpe-against-K sweep.
fn performance_charts(r: &BacktestResult) -> anyhow::Result<Vec<Chart>> {
    let cumulative: Vec<(String, Vec<f64>)> = r
        .strategies
        .iter()
        .map(|s| {
            let mut acc = 0.0;
            (
                s.name.clone(),
                s.returns
                    .iter()
                    .map(|x| {
                        acc += x;
                        100.0 * acc
                    })
                    .collect(),
            )
        })
        .collect();
    let mut charts = Vec::new();
    charts.push((
        "Cumulative out-of-sample returns",
        "Sum of out-of-sample returns of every strategy, in percent; the configured method is the thick line. Strategies other than the market are scaled to the volatility target inside each window.",
        chart(line_chart("Cumulative out-of-sample return (sum, %)", "cumulative return, %", &r.periods, &cumulative, false))?,
    ));
    if !r.sweep.is_empty() {
        let mut by_scaling: Vec<(String, Vec<(f64, f64)>)> = Vec::new();
        for p in &r.sweep {
            let name =
                serde_json::to_value(p.scaling).ok().and_then(|v| v.as_str().map(str::to_owned)).unwrap_or_default();
            match by_scaling.iter_mut().find(|(n, _)| *n == name) {
                Some((_, pts)) => pts.push((p.k as f64, p.sharpe)),
                None => by_scaling.push((name, vec![(p.k as f64, p.sharpe)])),
            }
        }
        charts.push((
            "Out-of-sample Sharpe ratio against K",
            "Annualised out-of-sample Sharpe ratio with a fixed number of components K (κ as configured) for each scaling: how many components a method needs to get near its best.",
            chart(xy_chart("OOS Sharpe ratio against the number of components", "components K", "annualised Sharpe ratio", &by_scaling))?,
        ));
    }
    Ok(charts)
}

/// The latest window's CV surface and weights.
fn latest_fit_charts(r: &BacktestResult) -> anyhow::Result<Vec<Chart>> {
    let mut charts = Vec::new();
    if let Some(ws) = &r.last_fit {
        if let Some(s) = &ws.diagnostics.cv_surface {
            let crit =
                serde_json::to_value(s.criterion).ok().and_then(|v| v.as_str().map(str::to_owned)).unwrap_or_default();
            charts.push((
                "Cross-validation surface",
                "Mean held-out score of every (K, κ) pair in the latest window's cross-validation; the chosen point is the best cell, ties going to fewer components and more shrinkage.",
                chart(surface_chart(&s.components, &s.kappas, &s.scores, &crit))?,
            ));
        }
        let names: Vec<String> = ws.factors.iter().map(|f| f.name.clone()).collect();
        let weights: Vec<f64> = ws.factors.iter().map(|f| f.weight).collect();
        charts.push((
            "Latest weights",
            "Factor weights and the market hedge fitted on the latest window by the configured method (blue long, red short).",
            chart(weights_chart(&names, &weights, ws.market_weight))?,
        ));
    }
    Ok(charts)
}

/// K, κ and concentration at each refit.
fn over_time_charts(r: &BacktestResult) -> anyhow::Result<Vec<Chart>> {
    let mut charts = Vec::new();
    let fits: Vec<&crate::evaluate::StrategyResult> =
        r.strategies.iter().filter(|s| s.chosen_k.iter().any(|&k| k > 0)).collect();
    if let Some(conf) = fits.first() {
        let refit_labels: Vec<String> =
            (0..conf.chosen_k.len()).map(|d| r.periods.get(d * r.spec.step).cloned().unwrap_or_default()).collect();
        let k_series: Vec<(String, Vec<f64>)> =
            fits.iter().take(6).map(|s| (s.name.clone(), s.chosen_k.iter().map(|&k| k as f64).collect())).collect();
        charts.push((
            "Components chosen over time",
            "Number of components K chosen by cross-validation at each refit (fixed K shows as a flat line).",
            chart(line_chart("K chosen at each refit", "components K", &refit_labels, &k_series, false))?,
        ));
        let kappa_series: Vec<(String, Vec<f64>)> =
            fits.iter().take(6).map(|s| (s.name.clone(), s.chosen_kappa.clone())).collect();
        charts.push((
            "Shrinkage chosen over time",
            "Annualised κ chosen at each refit (log scale): smaller κ means more shrinkage.",
            chart(line_chart(
                "κ chosen at each refit (annualised, log scale)",
                "κ",
                &refit_labels,
                &kappa_series,
                true,
            ))?,
        ));
        let share: Vec<(String, Vec<f64>)> = r
            .strategies
            .iter()
            .filter(|s| s.name != MARKET)
            .take(8)
            .map(|s| (s.name.clone(), s.top_sharpe_share.iter().map(|v| 100.0 * v).collect()))
            .collect();
        charts.push((
            "Concentration in high-Sharpe factors",
            "Share of gross factor weight held by the 30% of factors with the highest in-window Sharpe ratio, at each refit, in percent.",
            chart(line_chart("Gross weight in the top-30% Sharpe factors (%)", "share of gross weight, %", &refit_labels, &share, false))?,
        ));
    }
    Ok(charts)
}

/// The page head, the run's description and the caution.
fn header(r: &BacktestResult, title: &str) -> String {
    let mut html = String::new();
    let _ = write!(
        html,
        "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{t}</title><style>\
         body{{font-family:sans-serif;max-width:900px;margin:2em auto;color:#222}}\
         table{{border-collapse:collapse;font-size:13px}}td,th{{border:1px solid #ccc;padding:3px 6px;text-align:right}}\
         th:first-child,td:first-child{{text-align:left}}.note{{color:#555;font-size:13px}}\
         .caution{{background:#fff4e5;border:1px solid #f0b46c;padding:8px}}</style></head><body><h1>{t}</h1>",
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
    for line in edge_lines(r) {
        let _ = write!(html, "<p class=\"note\">{}</p>", esc(&line));
    }
    html.push_str("<table><tr><th>strategy</th><th>mean</th><th>vol</th><th>vol target</th><th>Sharpe</th><th>SE iid</th><th>SE NW</th><th>CER</th><th>max DD</th><th>gross median</th><th>gross max</th><th>turnover</th><th>net Sharpe</th></tr>");
    for s in &r.strategies {
        let m = &s.metrics;
        let _ = write!(
            html,
            "<tr><td>{}</td><td>{}%</td><td>{}%</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}%</td><td>{}%</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
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
    html.push_str("<h2>Is the configured method better?</h2><table><tr><th>against</th><th>ΔSharpe</th><th>z (JKM)</th><th>p-value</th></tr>");
    for c in &r.comparisons {
        let _ = write!(
            html,
            "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            esc(&c.against),
            f(c.test.difference, 2),
            f(c.test.z, 2),
            f(c.test.p_value, 3)
        );
    }
    let _ = write!(
        html,
        "</table><p>Jobson–Korkie test with Memmel's correction. Probabilistic Sharpe ratio (against 0): {}. \
         Deflated Sharpe ratio over {} configurations tried: {}.</p>",
        f(r.psr, 3),
        r.trials,
        f(r.dsr, 3)
    );
    html
}

fn alpha_section(r: &BacktestResult) -> String {
    let mut html = String::new();
    if !r.alphas.is_empty() {
        html.push_str("<h2>Alphas against benchmarks</h2><table><tr><th>strategy</th><th>benchmarks</th><th>alpha (ann.)</th><th>t (NW)</th><th>t (robust)</th><th>R²</th></tr>");
        for a in &r.alphas {
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
        html.push_str("</table>");
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
    }
    html
}

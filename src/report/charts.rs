//! The report's charts as inline SVG, drawn by plotters. Legends sit in a
//! column right of the plotting area, never over the data; the configured
//! method is always ember and drawn thickest.

use plotters::coord::Shift;
use plotters::prelude::*;

use super::palette::{self, Dash, MUTED};

/// Width of every chart, and of the legend column in it.
const W: u32 = 1000;
const LEGEND: u32 = 250;
const H: u32 = 380;

/// Grid lines of every chart: fine and major.
const GRID_FINE: RGBColor = RGBColor(238, 238, 238);
const GRID_MAJOR: RGBColor = RGBColor(215, 215, 215);

type Plot<'a> = Result<(), Box<dyn std::error::Error + 'a>>;
type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;

/// A named series with its colour and line width.
pub(super) struct Series<T> {
    /// Legend text.
    pub(super) name: String,
    /// Points.
    pub(super) values: Vec<T>,
    /// Colour.
    pub(super) colour: RGBColor,
    /// Stroke width in pixels.
    pub(super) width: u32,
    /// Dash pattern.
    pub(super) dash: Dash,
}

/// Draws `pts` as one line in the series' colour, width and dash.
fn stroke<DB: DrawingBackend, CT: CoordTranslate<From = (f64, f64)>>(
    chart: &mut ChartContext<'_, DB, CT>,
    pts: Vec<(f64, f64)>,
    colour: RGBColor,
    width: u32,
    dash: Dash,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    let style = colour.stroke_width(width);
    match dash {
        Dash::Solid => chart.draw_series(LineSeries::new(pts, style)).map(|_| ()),
        Dash::Dashed => chart.draw_series(DashedLineSeries::new(pts, 9, 5, style)).map(|_| ()),
        Dash::Dotted => chart.draw_series(DashedLineSeries::new(pts, 2, 4, style)).map(|_| ()),
    }
}

/// Draws into a fresh SVG of `w` × `h` pixels.
fn svg(w: u32, h: u32, draw: impl FnOnce(&Area<'_>) -> Plot<'static>) -> Result<String, String> {
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, (w, h)).into_drawing_area();
        let run = || -> Result<(), String> {
            root.fill(&WHITE).map_err(|e| e.to_string())?;
            draw(&root).map_err(|e| e.to_string())?;
            root.present().map_err(|e| e.to_string())
        };
        run()?;
    }
    Ok(out)
}

/// Lower and upper bound of the finite values, padded by 5%.
pub(super) fn finite_range(values: impl Iterator<Item = f64>) -> (f64, f64) {
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
    // A tick that rounds to zero reads 0, not -0.0.
    let digits = if range >= 20.0 {
        0
    } else if range >= 2.0 {
        1
    } else {
        2
    };
    let v = if (v * 10f64.powi(digits)).round() == 0.0 { 0.0 } else { v };
    if range >= 20.0 {
        format!("{v:.0}")
    } else if range >= 2.0 {
        format!("{v:.1}")
    } else {
        format!("{v:.2}")
    }
}

/// The legend column: one swatch and name per series, top to bottom.
fn legend<T>(area: &Area<'_>, series: &[Series<T>]) -> Plot<'static> {
    let font = ("sans-serif", 12).into_font().color(&BLACK);
    for (i, s) in series.iter().enumerate() {
        let y = 40 + 20 * i as i32;
        let style = s.colour.stroke_width(s.width.max(2));
        match s.dash {
            Dash::Solid => area.draw(&PathElement::new(vec![(6, y), (30, y)], style))?,
            Dash::Dashed => {
                for x in [6, 20] {
                    area.draw(&PathElement::new(vec![(x, y), (x + 9, y)], style))?;
                }
            }
            Dash::Dotted => {
                for x in [6, 12, 18, 24] {
                    area.draw(&PathElement::new(vec![(x, y), (x + 2, y)], style))?;
                }
            }
        }
        area.draw(&Text::new(s.name.clone(), (36, y - 7), font.clone()))?;
    }
    Ok(())
}

/// Every `k`-th year boundary in the labels (`YYYY-…`): (index of the first
/// period of that year, the year), at most `most` of them; empty when the
/// labels are not dates.
fn year_ticks(periods: &[String], most: usize) -> Vec<(f64, String)> {
    let year = |l: &String| l.get(..4).filter(|y| y.bytes().all(|b| b.is_ascii_digit())).map(str::to_owned);
    let mut starts: Vec<(f64, String)> = Vec::new();
    for (i, l) in periods.iter().enumerate() {
        let Some(y) = year(l) else { return Vec::new() };
        if i > 0 && year(&periods[i - 1]).as_ref() != Some(&y) {
            starts.push((i as f64, y));
        }
    }
    let years: Vec<u32> = starts.iter().filter_map(|(_, y)| y.parse().ok()).collect();
    let every: u32 =
        [1, 2, 5, 10, 20, 25, 50, 100].into_iter().find(|&k| starts.len().div_ceil(k as usize) <= most).unwrap_or(100);
    starts.into_iter().zip(years).filter(|(_, y)| y % every == 0).map(|(s, _)| s).collect()
}

/// The values 1, 2, 5 × 10ᵏ whose log10 lies in [lo, hi].
fn log_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let mut out = Vec::new();
    for e in (lo.floor() as i32 - 1)..=(hi.ceil() as i32) {
        for m in [1.0, 2.0, 5.0] {
            let v = m * 10f64.powi(e);
            if (lo..=hi).contains(&v.log10()) {
                out.push(v);
            }
        }
    }
    out
}

/// Lines of `series` against period index; `log_y` draws log10 of the values
/// (non-positive values are left out) and labels ticks in the values' units.
pub(super) fn lines(
    title: &str,
    y_label: &str,
    periods: &[String],
    series: &[Series<f64>],
    log_y: bool,
    zero_line: bool,
) -> Result<String, String> {
    svg(W, H, |root| {
        let (plot, side) = root.split_horizontally(W - LEGEND);
        let n = series.iter().map(|s| s.values.len()).max().unwrap_or(1).max(2);
        let tr = |v: f64| if log_y { if v > 0.0 { v.log10() } else { f64::NAN } } else { v };
        let (lo, hi) = finite_range(series.iter().flat_map(|s| s.values.iter().map(|&v| tr(v))));
        let mut chart = ChartBuilder::on(&plot)
            .caption(title, ("sans-serif", 17))
            .margin(10)
            .x_label_area_size(36)
            .y_label_area_size(64)
            .build_cartesian_2d(0f64..(n - 1) as f64, lo..hi)?;
        // Our own ticks: years at year boundaries, and on a log scale the values
        // 1, 2, 5 × 10ᵏ; plotters' own ticks sit at arbitrary values of both.
        let years = year_ticks(periods, 8);
        let log_ticks = if log_y { log_ticks(lo, hi) } else { Vec::new() };
        let labels = periods.to_vec();
        let by_period = |x: &f64| labels.get(x.round() as usize).cloned().unwrap_or_default();
        let linear = |y: &f64| tick(*y, hi - lo);
        let mut mesh = chart.configure_mesh();
        mesh.light_line_style(GRID_FINE).bold_line_style(GRID_MAJOR).y_desc(y_label);
        if years.is_empty() {
            mesh.x_labels(6).x_label_formatter(&by_period);
        } else {
            mesh.x_labels(0).disable_x_mesh();
        }
        if log_y {
            mesh.y_labels(0).disable_y_mesh();
        } else {
            mesh.y_label_formatter(&linear);
        }
        mesh.draw()?;
        let font = ("sans-serif", 12).into_font();
        let (left, bottom) = chart.backend_coord(&(0.0, lo));
        for &(x, ref label) in &years {
            chart.draw_series(LineSeries::new([(x, lo), (x, hi)], GRID_MAJOR.stroke_width(1)))?;
            let (px, _) = chart.backend_coord(&(x, lo));
            plot.draw(&Text::new(label.clone(), (px - 14, bottom + 8), font.clone()))?;
        }
        for &v in &log_ticks {
            let y = v.log10();
            chart.draw_series(LineSeries::new([(0.0, y), ((n - 1) as f64, y)], GRID_MAJOR.stroke_width(1)))?;
            let (_, py) = chart.backend_coord(&(0.0, y));
            let text = if v >= 1.0 { format!("{v:.0}") } else { format!("{v}") };
            plot.draw(&Text::new(text, (left - 36, py - 6), font.clone()))?;
        }
        if zero_line && lo < 0.0 && hi > 0.0 {
            chart.draw_series(LineSeries::new([(0.0, 0.0), ((n - 1) as f64, 0.0)], MUTED.stroke_width(1)))?;
        }
        // The thickest line last, on top.
        let mut order: Vec<&Series<f64>> = series.iter().collect();
        order.sort_by_key(|s| s.width);
        for s in order {
            let pts: Vec<(f64, f64)> =
                s.values.iter().enumerate().map(|(x, &v)| (x as f64, tr(v))).filter(|p| p.1.is_finite()).collect();
            stroke(&mut chart, pts, s.colour, s.width, s.dash)?;
        }
        legend(&side, series)
    })
}

/// Lines with markers of y against a numeric x.
pub(super) fn xy(title: &str, x_label: &str, y_label: &str, series: &[Series<(f64, f64)>]) -> Result<String, String> {
    svg(W, H, |root| {
        let (plot, side) = root.split_horizontally(W - LEGEND);
        let (xlo, xhi) = finite_range(series.iter().flat_map(|s| s.values.iter().map(|p| p.0)));
        // Counts (K) get whole-number ticks only.
        let integer_x = series.iter().flat_map(|s| s.values.iter()).all(|p| p.0 == p.0.round());
        let (ylo, yhi) = finite_range(series.iter().flat_map(|s| s.values.iter().map(|p| p.1)));
        let mut chart = ChartBuilder::on(&plot)
            .caption(title, ("sans-serif", 17))
            .margin(10)
            .x_label_area_size(40)
            .y_label_area_size(64)
            .build_cartesian_2d(xlo..xhi, ylo..yhi)?;
        chart
            .configure_mesh()
            .light_line_style(GRID_FINE)
            .bold_line_style(GRID_MAJOR)
            .x_desc(x_label)
            .y_desc(y_label)
            .y_label_formatter(&|y| tick(*y, yhi - ylo))
            .x_labels(if integer_x { ((xhi - xlo).round() as usize + 1).min(12) } else { 10 })
            .x_label_formatter(&|x| {
                if !integer_x {
                    tick(*x, xhi - xlo)
                } else if (x - x.round()).abs() < 1e-9 {
                    format!("{x:.0}")
                } else {
                    String::new()
                }
            })
            .draw()?;
        for s in series {
            let pts: Vec<(f64, f64)> = s.values.iter().copied().filter(|p| p.1.is_finite()).collect();
            stroke(&mut chart, pts.clone(), s.colour, s.width, s.dash)?;
            chart.draw_series(pts.into_iter().map(|p| Circle::new(p, 2 + s.width / 2, s.colour.filled())))?;
        }
        legend(&side, series)
    })
}

/// One small panel per series, sharing the y range: step lines of a value
/// chosen at each refit (K or κ), the configured method's panel first.
pub(super) fn small_multiples(
    title: &str,
    y_label: &str,
    refits: &[String],
    series: &[Series<f64>],
    log_y: bool,
) -> Result<String, String> {
    let cols = 2usize;
    let rows = series.len().div_ceil(cols).max(1);
    let panel_h = 170u32;
    let height = 40 + panel_h * rows as u32;
    svg(W, height, |root| {
        root.draw(&Text::new(title.to_owned(), (10, 10), ("sans-serif", 17).into_font()))?;
        let body = root.margin(36, 0, 0, 0);
        let panels = body.split_evenly((rows, cols));
        let tr = |v: f64| if log_y { if v > 0.0 { v.log10() } else { f64::NAN } } else { v };
        let (lo, hi) = finite_range(series.iter().flat_map(|s| s.values.iter().map(|&v| tr(v))));
        for (s, area) in series.iter().zip(panels.iter()) {
            let n = s.values.len().max(2);
            let mut chart = ChartBuilder::on(area)
                .caption(&s.name, ("sans-serif", 13).into_font().color(&s.colour))
                .margin(6)
                .x_label_area_size(22)
                .y_label_area_size(46)
                .build_cartesian_2d(0f64..(n - 1) as f64, lo..hi)?;
            let labels = refits.to_vec();
            chart
                .configure_mesh()
                .light_line_style(GRID_FINE)
                .bold_line_style(GRID_MAJOR)
                .x_labels(4)
                .y_labels(if log_y { 4 } else { ((hi - lo).round() as usize + 1).clamp(2, 5) })
                .y_desc(y_label)
                .x_label_formatter(&|x| labels.get(x.round() as usize).cloned().unwrap_or_default())
                .y_label_formatter(&|y| {
                    if log_y {
                        format!("{:.2}", 10f64.powf(*y))
                    } else if (y - y.round()).abs() < 1e-9 {
                        format!("{y:.0}")
                    } else {
                        // A count between whole numbers is no tick.
                        String::new()
                    }
                })
                .label_style(("sans-serif", 12))
                .draw()?;
            // Step lines: a value holds until the next refit.
            let mut pts = Vec::with_capacity(2 * s.values.len());
            for (x, &v) in s.values.iter().enumerate() {
                let y = tr(v);
                if !y.is_finite() {
                    continue;
                }
                if let Some(&(_, prev)) = pts.last() {
                    pts.push((x as f64, prev));
                }
                pts.push((x as f64, y));
            }
            chart.draw_series(LineSeries::new(pts, s.colour.stroke_width(s.width)))?;
        }
        Ok(())
    })
}

/// The cross-validation surface: K down, log10 κ across, a colour scale
/// beside it and the chosen cell outlined.
pub(super) fn surface(
    title: &str,
    ks: &[usize],
    kappas: &[f64],
    scores: &[f64],
    chosen: Option<(usize, usize)>,
) -> Result<String, String> {
    let rows_h = (26 * ks.len() as u32).clamp(140, 420);
    let height = rows_h + 110;
    svg(W, height, |root| {
        let (plot, side) = root.split_horizontally(W - 150);
        let (lo, hi) = finite_range(scores.iter().copied());
        let lk: Vec<f64> = kappas.iter().map(|k| k.log10()).collect();
        let dx = if lk.len() > 1 { (lk[lk.len() - 1] - lk[0]) / (lk.len() - 1) as f64 } else { 1.0 };
        let (x0, x1) = (lk[0] - dx / 2.0, lk[lk.len() - 1] + dx / 2.0);
        let (y0, y1) = (-0.5, ks.len() as f64 - 0.5);
        let mut chart = ChartBuilder::on(&plot)
            .caption(title, ("sans-serif", 17))
            .margin(10)
            .x_label_area_size(40)
            .y_label_area_size(60)
            .build_cartesian_2d(x0..x1, y0..y1)?;
        let k_labels = ks.to_vec();
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc("κ, annualised (log scale)")
            .y_desc("components K")
            .y_labels(ks.len().min(16))
            .x_label_formatter(&|x| format!("{:.2}", 10f64.powf(*x)))
            .y_label_formatter(&|y| {
                let i = y.round();
                if (y - i).abs() < 1e-6 {
                    k_labels.get(i as usize).map(|k| k.to_string()).unwrap_or_default()
                } else {
                    String::new()
                }
            })
            .draw()?;
        let cols = kappas.len();
        let unit = |v: f64| if hi > lo { (v - lo) / (hi - lo) } else { 0.5 };
        chart.draw_series(ks.iter().enumerate().flat_map(|(r, _)| {
            let lk = lk.clone();
            (0..cols).map(move |c| {
                let v = scores[r * cols + c];
                let col = if v.is_finite() { palette::sequential(unit(v)) } else { RGBColor(225, 225, 225) };
                Rectangle::new([(lk[c] - dx / 2.0, r as f64 - 0.5), (lk[c] + dx / 2.0, r as f64 + 0.5)], col.filled())
            })
        }))?;
        if let Some((r, c)) = chosen {
            let cell = [(lk[c] - dx / 2.0, r as f64 - 0.5), (lk[c] + dx / 2.0, r as f64 + 0.5)];
            chart.draw_series([Rectangle::new(cell, palette::EMBER.stroke_width(3))])?;
        }
        // The colour scale: a bar from the lowest score (bottom) to the highest (top).
        let (bx, top, bottom) = (20, 50, height as i32 - 60);
        let steps = 40;
        for i in 0..steps {
            let u0 = f64::from(i) / f64::from(steps);
            let y_hi = bottom - ((bottom - top) as f64 * (u0 + 1.0 / f64::from(steps))).round() as i32;
            let y_lo = bottom - ((bottom - top) as f64 * u0).round() as i32;
            side.draw(&Rectangle::new(
                [(bx, y_hi), (bx + 22, y_lo)],
                palette::sequential(u0 + 0.5 / f64::from(steps)).filled(),
            ))?;
        }
        side.draw(&Rectangle::new([(bx, top), (bx + 22, bottom)], BLACK.stroke_width(1)))?;
        let font = ("sans-serif", 12).into_font();
        for (u, v) in [(0.0, lo), (0.5, 0.5 * (lo + hi)), (1.0, hi)] {
            let y = bottom - ((bottom - top) as f64 * u).round() as i32;
            side.draw(&PathElement::new(vec![(bx + 22, y), (bx + 28, y)], BLACK.stroke_width(1)))?;
            side.draw(&Text::new(format!("{v:.3}"), (bx + 32, y - 6), font.clone()))?;
        }
        side.draw(&Text::new("mean held-out score".to_owned(), (4, top - 30), font.clone()))?;
        side.draw(&Rectangle::new([(bx, bottom + 22), (bx + 22, bottom + 36)], palette::EMBER.stroke_width(3)))?;
        side.draw(&Text::new("chosen".to_owned(), (bx + 30, bottom + 23), font))?;
        Ok(())
    })
}

/// Sorted horizontal bars of weights with full names; `model` marks the
/// model portfolio's weight of each row when it differs.
/// Horizontal weight bars, row 0 at the top; with `hedge_last` the last row
/// is the market hedge, drawn in grey below a rule.
pub(super) fn weight_bars(
    title: &str,
    rows: &[(String, f64, Option<f64>)],
    hedge_last: bool,
) -> Result<String, String> {
    let longest = rows.iter().map(|r| r.0.chars().count()).max().unwrap_or(8) as u32;
    let label_w = (7 * longest + 16).clamp(80, 360);
    let height = 90 + 18 * rows.len() as u32;
    svg(W, height, |root| {
        let (lo, hi) = finite_range(rows.iter().flat_map(|r| [r.1, r.2.unwrap_or(0.0)]).chain([0.0]));
        let n = rows.len().max(1);
        let mut chart = ChartBuilder::on(root)
            .caption(title, ("sans-serif", 17))
            .margin(10)
            .margin_right(30)
            .x_label_area_size(34)
            .y_label_area_size(label_w)
            .build_cartesian_2d(lo..hi, -0.5f64..(n as f64 - 0.5))?;
        let names: Vec<String> = rows.iter().map(|r| r.0.clone()).collect();
        chart
            .configure_mesh()
            .disable_y_mesh()
            .light_line_style(GRID_FINE)
            .bold_line_style(GRID_MAJOR)
            .y_labels(n)
            .x_desc("weight (multiple of capital)")
            .y_label_formatter(&|y| {
                let i = y.round();
                // Row 0 at the top: the largest weight first.
                if (y - i).abs() < 1e-6 && i >= 0.0 {
                    names.get(n - 1 - i as usize).cloned().unwrap_or_default()
                } else {
                    String::new()
                }
            })
            .label_style(("sans-serif", 12))
            .draw()?;
        chart.draw_series(rows.iter().enumerate().map(|(i, (_, w, _))| {
            let y = (n - 1 - i) as f64;
            let c = if hedge_last && i + 1 == rows.len() {
                MUTED
            } else if *w >= 0.0 {
                palette::LONG
            } else {
                palette::SHORT
            };
            Rectangle::new([(0.0, y - 0.36), (*w, y + 0.36)], c.filled())
        }))?;
        if hedge_last {
            chart.draw_series(LineSeries::new([(lo, 0.5), (hi, 0.5)], BLACK.stroke_width(1)))?;
        }
        chart.draw_series(rows.iter().enumerate().filter_map(|(i, (_, w, m))| {
            let y = (n - 1 - i) as f64;
            m.filter(|m| (m - w).abs() > 1e-12)
                .map(|m| PathElement::new(vec![(m, y - 0.45), (m, y + 0.45)], BLACK.stroke_width(2)))
        }))?;
        chart.draw_series(LineSeries::new([(0.0, -0.5), (0.0, n as f64 - 0.5)], BLACK.stroke_width(1)))?;
        Ok(())
    })
}

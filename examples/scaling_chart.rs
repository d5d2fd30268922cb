//! Fit time against the number of factors N for T = 120 and T = 600, drawn
//! as a log–log SVG chart, with the table printed.
//!
//! ```sh
//! cargo run --release --example scaling_chart -- docs/fit-scaling.svg [REPS]
//! ```

use std::time::Instant;

use keelson::demo::synthetic_panel;
use keelson::estimator::{self, Choice, Method, Settings};
use plotters::prelude::*;

fn median_secs(reps: usize, mut f: impl FnMut()) -> f64 {
    f();
    let mut v: Vec<f64> = (0..reps)
        .map(|_| {
            let s = Instant::now();
            f();
            s.elapsed().as_secs_f64()
        })
        .collect();
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1);
    let out = args.next().unwrap_or_else(|| "docs/fit-scaling.svg".into());
    let reps: usize = args.next().unwrap_or_else(|| "7".into()).parse()?;
    let ns = [25usize, 50, 100, 250, 1000, 2000];
    // Every core, as `benches/compare_numpy.py` gives both sides.
    let opts = estimator::FitOptions {
        threads: std::thread::available_parallelism().map_or(1, |n| n.get()),
        ..estimator::FitOptions::default()
    };
    let fixed = Settings {
        method: Method::Components,
        components: Choice::Fixed(5),
        kappa: Choice::Fixed(1.0),
        ..Settings::default()
    }
    .check()?;
    let cv = Settings { method: Method::Components, ..Settings::default() }.check()?;
    let mut series: Vec<(String, Vec<(f64, f64)>)> = Vec::new();
    println!("{:>6} {:>6} {:>12} {:>12}", "N", "T", "fixed ms", "cv ms");
    for t in [120usize, 600] {
        let mut f_pts = Vec::new();
        let mut c_pts = Vec::new();
        for &n in &ns {
            let panel = synthetic_panel((n * 31 + t) as u64, t, n);
            let tf = median_secs(reps, || {
                std::hint::black_box(estimator::fit_with(&panel, &fixed, &opts).expect("fits"));
            });
            let tc = median_secs(reps, || {
                std::hint::black_box(estimator::fit_with(&panel, &cv, &opts).expect("fits"));
            });
            println!("{n:>6} {t:>6} {:>12.3} {:>12.3}", tf * 1e3, tc * 1e3);
            f_pts.push((n as f64, tf * 1e3));
            c_pts.push((n as f64, tc * 1e3));
        }
        series.push((format!("fixed K and κ, T = {t}"), f_pts));
        series.push((format!("cross-validated, T = {t}"), c_pts));
    }
    let root = SVGBackend::new(&out, (760, 460)).into_drawing_area();
    root.fill(&WHITE)?;
    let (lo, hi) =
        series.iter().flat_map(|s| s.1.iter().map(|p| p.1)).fold((f64::MAX, 0f64), |(a, b), v| (a.min(v), b.max(v)));
    let mut chart = ChartBuilder::on(&root)
        .caption("Fit time against the number of factors (log–log)", ("sans-serif", 18))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .build_cartesian_2d((20f64..2500f64).log_scale(), (lo * 0.7..hi * 1.4).log_scale())?;
    chart.configure_mesh().x_desc("factors N").y_desc("median fit time, ms").draw()?;
    let p = keelson::report::palette::SERIES;
    let colours = [p[1], p[4], p[3], p[7]];
    for (i, (name, pts)) in series.iter().enumerate() {
        let c = colours[i % colours.len()];
        chart
            .draw_series(LineSeries::new(pts.clone(), c.stroke_width(2)))?
            .label(name.clone())
            .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], c.stroke_width(2)));
        chart.draw_series(pts.iter().map(|&p| Circle::new(p, 3, c.filled())))?;
    }
    chart.configure_series_labels().position(SeriesLabelPosition::UpperLeft).border_style(BLACK).draw()?;
    root.present()?;
    println!("chart written to {out}");
    Ok(())
}

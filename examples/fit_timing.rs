//! Times the library's fixed and cross-validated fits on windows read from
//! CSV files; `benches/compare_numpy.py` runs it beside a numpy
//! implementation on the same files.
//!
//! ```sh
//! cargo run --release --example fit_timing -- REPS THREADS FILE.csv [FILE.csv...]
//! ```
//! THREADS is the fit's thread count (`FitOptions::threads`: folds, and the
//! kernels of large fits).
//!
//! `fit_timing backtest WINDOW THREADS FILE.csv` instead times one rolling
//! backtest of the cross-validated components method alone (monthly refits,
//! no baselines, no sweep) on THREADS workers and prints its seconds.
//! Prints one JSON object per file: median seconds of the fixed (K = 5,
//! κ = 1) fit with and without the held-out check, of the cross-validated
//! (defaults) fit, and of one 50×50 eigendecomposition.

use std::time::Instant;

use faer::Mat;
use keelson::estimator::{self, Choice, FitOptions, Method, Settings};

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn time(reps: usize, mut f: impl FnMut()) -> f64 {
    f();
    median(
        (0..reps)
            .map(|_| {
                let s = Instant::now();
                f();
                s.elapsed().as_secs_f64()
            })
            .collect(),
    )
}

/// One rolling backtest of the cross-validated components method alone.
fn backtest(mut args: impl Iterator<Item = String>) -> anyhow::Result<()> {
    let window: usize = args.next().unwrap_or_else(|| "120".into()).parse()?;
    let threads: usize = args.next().unwrap_or_else(|| "1".into()).parse()?;
    let path = args.next().ok_or_else(|| anyhow::anyhow!("a CSV file"))?;
    let text = std::fs::read_to_string(&path)?;
    let panel = keelson::panel_csv::parse_returns(&text, &path, Some("MKT"))?.panel;
    let settings = Settings { method: Method::Components, ..Settings::default() }.check()?;
    let spec = keelson::evaluate::BacktestSpec {
        window,
        baselines: false,
        sweep_max_k: Some(0),
        threads,
        ..keelson::evaluate::BacktestSpec::default()
    }
    .check(&panel, &settings)?;
    let s = Instant::now();
    let r = keelson::evaluate::run(&panel, &settings, &spec, &|_| {}, &estimator::Stop::never())?;
    println!(
        "{{\"file\":{path:?},\"refits\":{},\"backtest_s\":{:e},\"sharpe\":{:e}}}",
        r.refits,
        s.elapsed().as_secs_f64(),
        r.strategies[0].metrics.sharpe
    );
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let mut args = std::env::args().skip(1).peekable();
    if args.peek().map(String::as_str) == Some("backtest") {
        args.next();
        return backtest(args);
    }
    let reps: usize = args.next().unwrap_or_else(|| "21".into()).parse()?;
    let threads: usize = args.next().unwrap_or_else(|| "1".into()).parse()?;
    let opts = FitOptions { threads, ..FitOptions::default() };
    let a = Mat::from_fn(50, 50, |i, j| 1.0 / (1.0 + (i as f64 - j as f64).abs()) + if i == j { 2.0 } else { 0.0 });
    let eig = time(reps.max(51), || {
        std::hint::black_box(a.self_adjoint_eigen(faer::Side::Lower).expect("converges"));
    });
    let fixed = Settings {
        method: Method::Components,
        components: Choice::Fixed(5),
        kappa: Choice::Fixed(1.0),
        ..Settings::default()
    }
    .check()?;
    let bare = Settings {
        method: Method::Components,
        components: Choice::Fixed(5),
        kappa: Choice::Fixed(1.0),
        held_out_check: false,
        // No folds at all: the held-out risk calibration would run them.
        risk_calibration: keelson::estimator::RiskCalibration::Off,
        ..Settings::default()
    }
    .check()?;
    let cv = Settings { method: Method::Components, ..Settings::default() }.check()?;
    for path in args {
        let text = std::fs::read_to_string(&path)?;
        let panel = keelson::panel_csv::parse_returns(&text, &path, Some("MKT"))?.panel;
        let tf = time(reps, || {
            std::hint::black_box(estimator::fit_with(&panel, &fixed, &opts).expect("fits"));
        });
        let tb = time(reps, || {
            std::hint::black_box(estimator::fit_with(&panel, &bare, &opts).expect("fits"));
        });
        let tc = time(reps, || {
            std::hint::black_box(estimator::fit_with(&panel, &cv, &opts).expect("fits"));
        });
        println!(
            "{{\"file\":{path:?},\"factors\":{},\"periods\":{},\"fixed_s\":{tf:e},\"bare_s\":{tb:e},\"cv_s\":{tc:e},\"eigensolve_s\":{eig:e}}}",
            panel.cols, panel.rows
        );
    }
    Ok(())
}

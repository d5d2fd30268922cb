//! Fit time over a grid of factors × periods, beside one 50×50 symmetric
//! eigendecomposition (faer, sequential) timed in the same run as the unit
//! of cost.
//!
//! ```sh
//! cargo bench --bench fit                       # the default subset
//! KEELSON_BENCH_GRID=full cargo bench --bench fit   # N ∈ {25..2000} × T ∈ {60..600}, every scaling
//! ```
//! Panels are seeded and built outside the timed loop.

use std::hint::black_box;
use std::time::Duration;

use criterion::{BenchmarkId, Criterion, criterion_group, criterion_main};
use faer::Mat;
use keelson::demo::synthetic_panel;
use keelson::estimator::{
    self, Choice, EigenPath, FitOptions, Method, RiskCalibration, Scaling, Settings, ValidSettings,
};
use keelson::evaluate::{self, BacktestSpec};

/// The three kinds of fit: `fixed` (K = 5, κ = 1, with the held-out check
/// on the folds), `bare` (the same without the folds, so without the held-out
/// risk calibration too) and `cv` (defaults).
fn settings(scaling: Scaling, kind: &str) -> ValidSettings {
    let mut s = Settings { method: Method::Components, scaling, ..Settings::default() };
    if kind != "cv" {
        s.components = Choice::Fixed(5);
        s.kappa = Choice::Fixed(1.0);
        s.held_out_check = kind == "fixed";
        if kind == "bare" {
            s.risk_calibration = RiskCalibration::Off;
        }
    }
    s.check().expect("valid bench settings")
}

fn eigensolve(c: &mut Criterion) {
    // The unit of cost: a 50×50 symmetric eigendecomposition with eigenvectors.
    let a = Mat::from_fn(50, 50, |i, j| 1.0 / (1.0 + (i as f64 - j as f64).abs()) + if i == j { 2.0 } else { 0.0 });
    c.bench_function("eigensolve 50x50", |b| {
        b.iter(|| black_box(a.self_adjoint_eigen(faer::Side::Lower).expect("converges")))
    });
}

fn grid() -> (Vec<usize>, Vec<usize>, Vec<Scaling>) {
    if std::env::var("KEELSON_BENCH_GRID").as_deref() == Ok("full") {
        (vec![25, 50, 100, 250, 1000, 2000], vec![60, 120, 240, 600], Scaling::ALL.to_vec())
    } else {
        (vec![25, 50, 100, 250, 1000, 2000], vec![120, 600], vec![Scaling::Sharpe])
    }
}

fn fits(c: &mut Criterion) {
    let (ns, ts, scalings) = grid();
    for kind in ["fixed", "bare", "cv"] {
        let mut group = c.benchmark_group(format!("fit {kind}"));
        group.sample_size(10).warm_up_time(Duration::from_millis(300)).measurement_time(Duration::from_secs(2));
        for &scaling in &scalings {
            let s = settings(scaling, kind);
            for &t in &ts {
                for &n in &ns {
                    let panel = synthetic_panel(n as u64 * 7919 + t as u64, t, n);
                    let id = BenchmarkId::new(format!("{scaling:?}/T{t}"), n);
                    group.bench_with_input(id, &panel, |b, p| {
                        b.iter(|| black_box(estimator::fit(p, &s).expect("fits")))
                    });
                }
            }
        }
        group.finish();
    }
}

fn gram_versus_factors(c: &mut Criterion) {
    let mut group = c.benchmark_group("fixed fit 2000x120 by eigen path");
    group.sample_size(10).measurement_time(Duration::from_secs(4));
    let panel = synthetic_panel(2000, 120, 2000);
    let s = settings(Scaling::Sharpe, "fixed");
    for path in [EigenPath::Gram, EigenPath::Factors] {
        let o = FitOptions { eigen_path: path, ..FitOptions::default() };
        group.bench_function(format!("{path:?}"), |b| {
            b.iter(|| black_box(estimator::fit_with(&panel, &s, &o).expect("fits")))
        });
    }
    group.finish();
}

fn backtest(c: &mut Criterion) {
    let mut group = c.benchmark_group("backtest 50x540 rolling 120 monthly CV");
    group.sample_size(10).measurement_time(Duration::from_secs(10));
    let panel = synthetic_panel(540, 540, 50);
    let s = Settings { method: Method::Components, ..Settings::default() }.check().expect("valid");
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let spec = BacktestSpec { baselines: false, sweep_max_k: Some(0), threads, ..BacktestSpec::default() }
        .check(&panel, &s)
        .expect("a valid specification");
    group.bench_function("configured", |b| {
        b.iter(|| black_box(evaluate::run(&panel, &s, &spec, &|_| {}, &estimator::Stop::never()).expect("runs")))
    });
    group.finish();
}

/// The implementation stage (SPEC §10) at 50 × 120 with every limit on and
/// costs against previous weights: the stage alone (its window prepared
/// once, as a backtest does), and a bare fit with and without it.
fn implementation(c: &mut Criterion) {
    use keelson::estimator::Cap;
    use keelson::estimator::desk::DeskWindow;
    let mut group = c.benchmark_group("implementation 50x120");
    group.sample_size(20).measurement_time(Duration::from_secs(3));
    let mut panel = synthetic_panel(50 * 7919 + 120, 120, 50);
    panel.previous_weights = panel.factor_names.iter().step_by(3).map(|n| (n.clone(), 0.05)).collect();
    let bare = settings(Scaling::Sharpe, "bare");
    let mut limited = bare.settings().clone();
    limited.max_weight = Cap::At(0.1);
    limited.max_gross = Cap::At(2.0);
    limited.max_market_weight = Cap::At(0.2);
    limited.max_turnover = Cap::At(1.5);
    limited.cost_bps = 20.0;
    let limited = limited.check().expect("valid limits");
    group.bench_function("bare fit", |b| b.iter(|| black_box(estimator::fit(&panel, &bare).expect("fits"))));
    group.bench_function("bare fit, every limit and costs", |b| {
        b.iter(|| black_box(estimator::fit(&panel, &limited).expect("fits")))
    });
    let model = estimator::fit(&panel, &bare).expect("fits");
    let w: Vec<f64> = model.factors.iter().map(|f| f.weight).collect();
    let prev: Vec<f64> = panel
        .factor_names
        .iter()
        .map(|n| panel.previous_weights.iter().find(|(p, _)| p == n).map_or(0.0, |(_, v)| *v))
        .collect();
    let desk = DeskWindow::new(&panel, &limited).expect("window");
    group.bench_function("stage alone", |b| {
        b.iter(|| {
            let mut warnings = Vec::new();
            black_box(
                desk.implement(
                    &limited,
                    &w,
                    model.diagnostics.in_sample_sharpe,
                    keelson::estimator::desk::Holdings { weights: &prev, market: 0.0 },
                    &estimator::Stop::never(),
                    &mut warnings,
                )
                .expect("solves"),
            )
        })
    });
    let factor_form = keelson::estimator::desk::OmegaForm::Factor;
    group.bench_function("stage alone, factor form", |b| {
        b.iter(|| {
            let mut warnings = Vec::new();
            let held = keelson::estimator::desk::Holdings { weights: &prev, market: 0.0 };
            let sharpe = model.diagnostics.in_sample_sharpe;
            let stop = estimator::Stop::never();
            black_box(desk.implement_in(&limited, &w, sharpe, held, factor_form, &stop, &mut warnings).expect("solves"))
        })
    });
    group.finish();
}

/// SPEC §11 at 50 × 120: 200 bootstrap draws with K and κ fixed beside one
/// such fit, and `scaling = auto` beside the single-scaling cross-validated fit.
fn choosing(c: &mut Criterion) {
    let mut group = c.benchmark_group("choosing 50x120");
    group.sample_size(10).measurement_time(Duration::from_secs(5));
    let panel = synthetic_panel(50 * 7919 + 120, 120, 50);
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let bare = settings(Scaling::Sharpe, "bare");
    let boot = Settings { bootstrap_draws: 200, seed: 1, ..bare.settings().clone() }.check().expect("valid");
    let cv = settings(Scaling::Sharpe, "cv");
    let auto = Settings { scaling: Scaling::Auto, ..cv.settings().clone() }.check().expect("valid");
    let options = FitOptions { threads, ..FitOptions::default() };
    group.bench_function("fixed fit, no folds", |b| b.iter(|| black_box(estimator::fit(&panel, &bare).expect("fits"))));
    group.bench_function("200 bootstrap draws, all cores", |b| {
        b.iter(|| black_box(estimator::fit_with(&panel, &boot, &options).expect("fits")))
    });
    group.bench_function("CV fit, sharpe", |b| b.iter(|| black_box(estimator::fit(&panel, &cv).expect("fits"))));
    group.bench_function("CV fit, auto", |b| b.iter(|| black_box(estimator::fit(&panel, &auto).expect("fits"))));
    group.finish();
}

/// `--previous-weights` files of 10,000 and 100,000 rows, with a duplicate
/// name on the last line (the error path reads every row too), beside a bare
/// line count of the same text as the floor: time per row stays flat when the
/// reader is linear (it was quadratic: 72 s at 100,000 rows).
fn weights_file(c: &mut Criterion) {
    let mut group = c.benchmark_group("weights file");
    group.sample_size(10).measurement_time(Duration::from_secs(3));
    for rows in [10_000usize, 100_000] {
        let mut text = String::from("factor,weight\n");
        for i in 0..rows {
            text.push_str(&format!("factor_{i:06},{}\n", 1e-4 * (i % 17) as f64));
        }
        let duplicated = format!("{text}factor_000000,0.5\n");
        group.throughput(criterion::Throughput::Elements(rows as u64));
        group.bench_with_input(BenchmarkId::new("parse", rows), &text, |b, t| {
            b.iter(|| black_box(keelson::panel_csv::parse_weights(t, "w.csv").expect("parses")))
        });
        group.bench_with_input(BenchmarkId::new("duplicate on the last line", rows), &duplicated, |b, t| {
            b.iter(|| black_box(keelson::panel_csv::parse_weights(t, "w.csv").expect_err("a duplicate")))
        });
        group.bench_with_input(BenchmarkId::new("line count (floor)", rows), &text, |b, t| {
            b.iter(|| black_box(t.lines().count()))
        });
    }
    group.finish();
}

criterion_group!(benches, eigensolve, fits, gram_versus_factors, backtest, implementation, choosing, weights_file);
criterion_main!(benches);

//! Wall time of a rolling backtest with monthly cross-validated refits on a
//! seeded synthetic panel.
//!
//! ```sh
//! cargo run --release --example backtest_timing -- [FACTORS] [PERIODS] [THREADS]
//! ```
//! Prints the time of the configured method alone, then with every baseline
//! and the K sweep, and the time of one cross-validated fit for reference.

use std::time::Instant;

use keelson::demo::synthetic_panel;
use keelson::estimator::{self, Settings, Stop};
use keelson::evaluate::{self, BacktestSpec};

fn main() -> anyhow::Result<()> {
    let args: Vec<usize> = std::env::args().skip(1).map(|a| a.parse()).collect::<Result<_, _>>()?;
    let n = args.first().copied().unwrap_or(50);
    let t = args.get(1).copied().unwrap_or(540);
    let threads = args.get(2).copied().unwrap_or(std::thread::available_parallelism().map_or(1, |c| c.get()));
    let panel = synthetic_panel(540, t, n);
    let settings =
        Settings { method: keelson::estimator::Method::Components, ..Settings::default() }.check().expect("valid");

    let window = synthetic_panel(540, 120, n);
    let reps = 50;
    let s = Instant::now();
    for _ in 0..reps {
        std::hint::black_box(estimator::fit(&window, &settings)?);
    }
    let fit = s.elapsed().as_secs_f64() / reps as f64;

    let configured = BacktestSpec { baselines: false, sweep_max_k: Some(0), threads, ..BacktestSpec::default() }
        .check(&panel, &settings)?;
    let s = Instant::now();
    let r = evaluate::run(&panel, &settings, &configured, &|_| {}, &Stop::never())?;
    let alone = s.elapsed().as_secs_f64();
    let full = BacktestSpec { threads, ..BacktestSpec::default() }.check(&panel, &settings)?;
    let s = Instant::now();
    evaluate::run(&panel, &settings, &full, &|_| {}, &Stop::never())?;
    let all = s.elapsed().as_secs_f64();
    println!(
        "{n} factors × {t} periods, 120-period rolling window, monthly cross-validated refits, {threads} thread(s)"
    );
    println!("one cross-validated fit ({n} × 120): {:.2} ms (mean of {reps})", fit * 1e3);
    println!(
        "configured method alone: {} refits in {alone:.2} s; ideal windows × fit ÷ threads = {:.2} s (ratio {:.2})",
        r.refits,
        r.refits as f64 * fit / threads as f64,
        alone / (r.refits as f64 * fit / threads as f64)
    );
    println!("with every baseline and the K sweep (K ≤ 10, five scalings): {all:.2} s");
    Ok(())
}

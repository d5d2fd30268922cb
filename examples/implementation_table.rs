//! The implementation stage at every universe size: time, peak memory and
//! cancel-to-free time of one `ComputeWeights`-sized fit with every limit
//! set, each size in a process of its own (so that peak RSS is that size's).
//!
//! ```sh
//! cargo run --release --example implementation_table            # the README table
//! cargo run --release --example implementation_table -- one N T # one size, JSON
//! cargo run --release --example implementation_table -- forms T # the dense/factor crossover
//! ```
//!
//! Every limit is on (max_weight 0.1, max_gross 2, max_market_weight 0.2,
//! max_turnover 1.5, 20 bp costs) with previous weights 3/N on every third
//! factor (gross 1). "stage" is the stage alone on a prepared window, as a
//! backtest's per-date stage runs; "fit" is the whole default fit (the blend,
//! cross-validated) plus the stage, what `ComputeWeights` does. Cancel-to-free
//! is the time from setting the stop flag, half-way through the stage or the
//! fit, to the call returning.

use std::process::Command;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use keelson::demo::synthetic_panel;
use keelson::estimator::desk::{DeskWindow, Holdings, OmegaForm};
use keelson::estimator::{self, FitOptions, Settings, Stop, ValidSettings};

fn limited() -> ValidSettings {
    keelson::demo::every_limit().check().expect("valid limits")
}

fn peak_rss_mib() -> f64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<f64>().ok())
        .map_or(f64::NAN, |kb| kb / 1024.0)
}

/// Runs `f` with a stop flag set after `after`; returns seconds from the flag to the return.
fn cancel_after<R: Send>(after: Duration, f: impl FnOnce(Stop) -> R + Send) -> f64 {
    let flag = Arc::new(AtomicBool::new(false));
    let stop = Stop::never().with_flag(flag.clone());
    std::thread::scope(|s| {
        let h = s.spawn(move || {
            let r = f(stop);
            (r, Instant::now())
        });
        std::thread::sleep(after);
        let set = Instant::now();
        flag.store(true, Ordering::Relaxed);
        let (_, done) = h.join().expect("the call returns");
        done.saturating_duration_since(set).as_secs_f64()
    })
}

/// The model fit alone (default settings, one thread, as `ComputeWeights`
/// runs it): peak RSS above the process with its window loaded, beside the
/// admission estimate.
fn model(n: usize, t: usize) -> anyhow::Result<()> {
    let settings = Settings::default().check()?;
    let panel = synthetic_panel(n as u64 * 7919 + t as u64, t, n);
    let before = peak_rss_mib();
    let options = FitOptions { threads: 1, ..FitOptions::default() };
    estimator::fit_with(&panel, &settings, &options)?;
    println!(
        "{{\"n\":{n},\"t\":{t},\"fit_rss_mib\":{:.1},\"estimate_mib\":{:.1}}}",
        peak_rss_mib() - before,
        estimator::budget::model_bytes(t, n, &settings) as f64 / f64::from(1u32 << 20)
    );
    Ok(())
}

fn one(n: usize, t: usize) -> anyhow::Result<()> {
    let settings = limited();
    let mut panel = synthetic_panel(n as u64 * 7919 + t as u64, t, n);
    let p = 3.0 / n as f64;
    panel.previous_weights = panel.factor_names.iter().step_by(3).map(|f| (f.clone(), p)).collect();
    let prev: Vec<f64> = (0..n).map(|j| if j % 3 == 0 { p } else { 0.0 }).collect();
    let options = FitOptions { threads: 2, ..FitOptions::default() };
    let start = Instant::now();
    let fitted = estimator::fit_with(&panel, &settings, &options)?;
    let fit_s = start.elapsed().as_secs_f64();
    let model: Vec<f64> = fitted.factors.iter().map(|f| f.model_weight).collect();
    let sharpe = fitted.diagnostics.in_sample_sharpe;
    let desk = DeskWindow::new(&panel, &settings)?;
    let stage = |stop: &Stop| {
        let mut warnings = Vec::new();
        desk.implement(&settings, &model, sharpe, Holdings { weights: &prev, market: 0.0 }, stop, &mut warnings)
    };
    let start = Instant::now();
    let done = stage(&Stop::never())?;
    let stage_s = start.elapsed().as_secs_f64();
    let cancel_stage = cancel_after(Duration::from_secs_f64(stage_s / 2.0), |stop| stage(&stop).is_err());
    let cancel_fit = cancel_after(Duration::from_secs_f64(fit_s / 2.0), |stop| {
        estimator::fit_with(&panel, &settings, &FitOptions { stop, ..options.clone() }).is_err()
    });
    println!(
        "{{\"n\":{n},\"t\":{t},\"fit_s\":{fit_s:.6},\"stage_s\":{stage_s:.6},\"peak_rss_mib\":{:.1},\"estimate_mib\":{:.1},\"cancel_stage_s\":{cancel_stage:.6},\"cancel_fit_s\":{cancel_fit:.6},\"form\":\"{}\",\"iterations\":{},\"status\":\"{}\"}}",
        peak_rss_mib(),
        keelson::estimator::budget::fit_bytes(t, n, &settings) as f64 / f64::from(1u32 << 20),
        done.report.omega_form,
        done.report.iterations,
        done.report.solver_status
    );
    Ok(())
}

/// The stage alone in each form, for the crossover.
fn forms(t: usize) -> anyhow::Result<()> {
    let settings = limited();
    for n in [10usize, 20, 30, 40, 60, 80, 120, 160, 240, 320] {
        let mut panel = synthetic_panel(n as u64 * 31 + t as u64, t, n);
        let p = 3.0 / n as f64;
        panel.previous_weights = panel.factor_names.iter().step_by(3).map(|f| (f.clone(), p)).collect();
        let fitted = estimator::fit(&panel, &settings)?;
        let model: Vec<f64> = fitted.factors.iter().map(|f| f.model_weight).collect();
        let prev: Vec<f64> = (0..n).map(|j| if j % 3 == 0 { p } else { 0.0 }).collect();
        let desk = DeskWindow::new(&panel, &settings)?;
        let mut times = Vec::new();
        let mut weights = Vec::new();
        for form in [OmegaForm::Dense, OmegaForm::Factor] {
            let run = || {
                let mut w = Vec::new();
                desk.implement_in(
                    &settings,
                    &model,
                    fitted.diagnostics.in_sample_sharpe,
                    Holdings { weights: &prev, market: 0.0 },
                    form,
                    &Stop::never(),
                    &mut w,
                )
            };
            let reps = 20;
            let mut best = f64::INFINITY;
            for _ in 0..reps {
                let s = Instant::now();
                let done = run()?;
                best = best.min(s.elapsed().as_secs_f64());
                weights.push(done.weights);
            }
            times.push(best);
        }
        let diff = weights[0].iter().zip(&weights[weights.len() - 1]).map(|(a, b)| (a - b).abs()).fold(0.0, f64::max);
        println!(
            "{{\"n\":{n},\"t\":{t},\"dense_ms\":{:.3},\"factor_ms\":{:.3},\"factor_over_dense\":{:.2},\"max_weight_diff\":{diff:.1e}}}",
            1e3 * times[0],
            1e3 * times[1],
            times[1] / times[0]
        );
    }
    Ok(())
}

/// The stage alone `reps` times (for a profiler); prints the median milliseconds.
fn repeat(n: usize, t: usize, reps: usize) -> anyhow::Result<()> {
    let settings = limited();
    let mut panel = synthetic_panel(n as u64 * 7919 + t as u64, t, n);
    let p = 3.0 / n as f64;
    panel.previous_weights = panel.factor_names.iter().step_by(3).map(|f| (f.clone(), p)).collect();
    let prev: Vec<f64> = (0..n).map(|j| if j % 3 == 0 { p } else { 0.0 }).collect();
    let fitted = estimator::fit(&panel, &settings)?;
    let model: Vec<f64> = fitted.factors.iter().map(|f| f.model_weight).collect();
    let desk = DeskWindow::new(&panel, &settings)?;
    let mut times = Vec::with_capacity(reps);
    for _ in 0..reps {
        let s = Instant::now();
        let mut w = Vec::new();
        let h = Holdings { weights: &prev, market: 0.0 };
        desk.implement(&settings, &model, fitted.diagnostics.in_sample_sharpe, h, &Stop::never(), &mut w)?;
        times.push(s.elapsed().as_secs_f64());
    }
    times.sort_by(f64::total_cmp);
    println!("{{\"n\":{n},\"t\":{t},\"median_ms\":{:.4}}}", 1e3 * times[reps / 2]);
    Ok(())
}

/// What a server with the default configuration does with this size and
/// every limit set: serves it, or names the limit that refuses it before any work.
fn default_server(n: usize, t: usize) -> String {
    let s = keelson::service::config::ServerConfig::default().server;
    let bytes = estimator::budget::fit_bytes(t, n, &limited());
    if n * t > s.max_cells {
        format!("refused: `max_cells` {}", s.max_cells)
    } else if n > s.max_stage_factors {
        format!("refused: `max_stage_factors` {}", s.max_stage_factors)
    } else if (n * t) as u64 > s.max_stage_cells {
        format!("refused: `max_stage_cells` {}", s.max_stage_cells)
    } else if bytes > s.max_request_bytes_estimate {
        "refused: `max_request_bytes_estimate`".to_owned()
    } else {
        "served".to_owned()
    }
}

fn table() -> anyhow::Result<()> {
    let exe = std::env::current_exe()?;
    println!(
        "| N | T | fit + stage (s) | stage alone (s) | peak RSS (MiB) | estimate (MiB) | cancel in stage (ms) | cancel in fit (ms) | Ω form | default server |"
    );
    println!("|---|---|---|---|---|---|---|---|---|---|");
    let sizes = [120usize, 600].iter().flat_map(|&t| [50usize, 200, 500, 1_000, 2_000, 5_000, 10_000].map(|n| (n, t)));
    // The largest windows a default server serves with the stage, at two shapes.
    for (n, t) in sizes.chain([(700, 350), (1_000, 250)]) {
        let server = default_server(n, t);
        if n * t > 4_000_000 {
            println!("| {n} | {t} | not run: {} cells | | | | | | | {server} |", n * t);
            continue;
        }
        let out = Command::new(&exe).args(["one", &n.to_string(), &t.to_string()]).output()?;
        let text = String::from_utf8_lossy(&out.stdout);
        let Ok(v) = serde_json::from_str::<serde_json::Value>(text.trim()) else {
            println!("| {n} | {t} | failed: {} | | | | | | | |", String::from_utf8_lossy(&out.stderr).trim());
            continue;
        };
        let f = |k: &str| v[k].as_f64().unwrap_or(f64::NAN);
        println!(
            "| {n} | {t} | {:.3} | {:.4} | {:.0} | {:.0} | {:.1} | {:.1} | {} | {server} |",
            f("fit_s"),
            f("stage_s"),
            f("peak_rss_mib"),
            f("estimate_mib"),
            1e3 * f("cancel_stage_s"),
            1e3 * f("cancel_fit_s"),
            v["form"].as_str().unwrap_or("")
        );
    }
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let num = |i: usize| args.get(i).and_then(|v| v.parse::<usize>().ok()).ok_or_else(|| anyhow::anyhow!("a number"));
    match args.first().map(String::as_str) {
        Some("one") => one(num(1)?, num(2)?),
        Some("model") => model(num(1)?, num(2)?),
        Some("estimate") => {
            let mib = estimator::budget::fit_bytes(num(2)?, num(1)?, &limited()) as f64 / f64::from(1u32 << 20);
            println!("{{\"n\":{},\"t\":{},\"estimate_mib\":{mib:.1}}}", num(1)?, num(2)?);
            Ok(())
        }
        Some("forms") => forms(num(1)?),
        Some("repeat") => repeat(num(1)?, num(2)?, num(3)?),
        _ => table(),
    }
}

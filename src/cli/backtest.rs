//! `keelson backtest`: the configured method beside its baselines out of
//! sample, with a report written to a folder.

use std::process::ExitCode;

use anyhow::Context as _;
use keelson::estimator::{Stop, ValidSettings};
use keelson::evaluate::{self, BacktestError, BacktestResult, BacktestSpec, MARKET, Progress};

use super::args::BacktestArgs;
use super::{UsageError, located, print, read_window, resolve_settings};

/// A backtest option error in the command line's words: `--sweep-max-k`, not `sweep_max_k`.
fn option_error(e: &BacktestError) -> String {
    match e {
        BacktestError::Spec { field, reason } => {
            let flag = match field.split_once('[').map_or(field.as_str(), |(f, _)| f) {
                "benchmark_sets" => "benchmarks".to_owned(),
                f => f.replace('_', "-"),
            };
            format!("--{flag}: {reason}")
        }
        other => other.to_string(),
    }
}

/// `--benchmarks A,B` sets, with the market column's name read as the market.
fn benchmark_sets(flags: &[String], market: Option<&str>) -> Vec<Vec<String>> {
    flags
        .iter()
        .map(|set| {
            set.split(',')
                .map(str::trim)
                .filter(|n| !n.is_empty())
                .map(|n| if Some(n) == market { MARKET.to_owned() } else { n.to_owned() })
                .collect()
        })
        .collect()
}

/// A progress bar on standard error, when it is a terminal.
fn progress_bar(p: Progress) {
    use std::io::IsTerminal as _;
    if std::io::stderr().is_terminal() && (p.done.is_multiple_of(20) || p.done == p.total) {
        let filled = 40 * p.done / p.total.max(1);
        eprint!("\r[{}{}] {}/{} fits", "#".repeat(filled), " ".repeat(40 - filled), p.done, p.total);
        if p.done == p.total {
            eprintln!();
        }
    }
}

pub(crate) fn run(a: BacktestArgs) -> anyhow::Result<ExitCode> {
    let (settings, _) = resolve_settings(a.settings.config.as_ref(), &a.settings.set)?;
    let settings = settings.check()?;
    let csv = read_window(&a.window)?;
    let spec = BacktestSpec {
        window: a.window_len,
        expanding: a.expanding,
        step: a.step,
        cost_bps: a.cost_bps,
        cer_risk_aversion: a.cer_risk_aversion,
        sweep_max_k: a.sweep_max_k,
        benchmark_sets: benchmark_sets(&a.benchmarks, a.window.market.as_deref()),
        nw_lag: None,
        baselines: !a.no_baselines,
        threads: usize::from(a.threads),
    };
    let spec = match spec.check(&csv.panel, &settings) {
        Ok(spec) => spec,
        Err(BacktestError::History(e)) => return Err(located(e, &csv)),
        Err(e) => return Err(UsageError(option_error(&e)).into()),
    };
    // The report folder must be writable before any work is done.
    writable_dir(&a.out).map_err(|e| UsageError(format!("--out {}: {e}", a.out.display())))?;
    let started = std::time::Instant::now();
    let result = evaluate::run(&csv.panel, &settings, &spec, &progress_bar, &Stop::never())
        .with_context(|| format!("backtesting {csv}"))?;
    let elapsed = started.elapsed();
    keelson::report::write(&a.out, &result, &format!("Keelson backtest: {}", csv.file))?;
    let mut text = keelson::report::summary_table(&result);
    text.push_str(&footer(&result));
    text.push_str(&format!(
        "{} refits in {:.1} s; report written to {}\n",
        result.refits,
        elapsed.as_secs_f64(),
        a.out.join("report.html").display()
    ));
    print(&text)?;
    Ok(ExitCode::SUCCESS)
}

/// Creates `dir` if needed and checks that a file can be written in it.
fn writable_dir(dir: &std::path::Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    let probe = dir.join(".keelson-write-check");
    std::fs::write(&probe, b"")?;
    std::fs::remove_file(&probe)
}

/// Inference lines under the summary table.
pub(crate) fn footer(r: &BacktestResult) -> String {
    let mut out = String::new();
    for c in &r.comparisons {
        out.push_str(&format!(
            "configured vs {:<40} ΔSharpe {:>6.2}  z {:>6.2}  p {:.3}\n",
            c.against, c.test.difference, c.test.z, c.test.p_value
        ));
    }
    out.push_str(&format!(
        "probabilistic Sharpe ratio (vs 0) {:.3}; deflated Sharpe ratio over {} configurations {:.3}\n",
        r.psr, r.trials, r.dsr
    ));
    out
}

/// The demo's closing backtest: the whole invented history, 120-month
/// rolling windows refitted every 3 months, every baseline beside the method.
pub(crate) fn demo_history(settings: &ValidSettings, dir: &std::path::Path) -> anyhow::Result<()> {
    let history = keelson::demo::demo_history();
    let spec = BacktestSpec {
        step: 3,
        threads: std::thread::available_parallelism().map_or(1, |n| n.get()),
        ..BacktestSpec::default()
    }
    .check(&history, settings)
    .context("checking the demo backtest")?;
    print(&format!(
        "Backtest: {} months of invented history, {}-month rolling windows refitted every {} months, \
         the method beside its baselines (net of {} bp costs)…\n",
        history.rows, spec.window, spec.step, spec.cost_bps
    ))?;
    let r =
        evaluate::run(&history, settings, &spec, &|_| {}, &Stop::never()).context("backtesting the demo history")?;
    keelson::report::write(dir, &r, "Keelson demo backtest: the Tessaly Exchange (invented data)")?;
    let mut text = keelson::report::summary_table(&r);
    text.push_str(&footer(&r));
    text.push_str(&format!("Report: {}\n\n", dir.join("report.html").display()));
    print(&text)
}

//! `keelson backtest`: the configured method beside its baselines out of
//! sample, with a report written to a folder.

use std::process::ExitCode;

use anyhow::Context as _;
use keelson::estimator::{Stop, ValidSettings};
use keelson::evaluate::provenance::Origin;
use keelson::evaluate::{self, BacktestError, BacktestResult, BacktestSpec, CONFIGURED, MARKET};

use super::args::BacktestArgs;
use super::progress::Reporter;
use super::{UsageError, fail_on_codes, located, print, read_history, resolve_settings, strict_exit};

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

pub(crate) fn run(a: BacktestArgs) -> anyhow::Result<ExitCode> {
    let fail_on = fail_on_codes(&a.strict)?;
    let (settings, _) = resolve_settings(a.settings.config.as_ref(), &a.settings.set)?;
    let settings = settings.check()?;
    // The report folder must be writable before any work is done.
    writable_dir(&a.out).map_err(|e| UsageError(format!("--out {}: {e}", a.out.display())))?;
    let bytes = std::fs::read(&a.history.returns).ok();
    let csv = read_history(&a.history.returns, a.history.market.as_deref())?;
    let threads = a.threads.map_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()), usize::from);
    let spec = BacktestSpec {
        window: a.window_len,
        expanding: a.expanding,
        step: a.step,
        cost_bps: a.cost_bps,
        cer_risk_aversion: a.cer_risk_aversion,
        sweep_max_k: a.sweep_max_k,
        benchmark_sets: benchmark_sets(&a.benchmarks, a.history.market.as_deref()),
        nw_lag: None,
        baselines: !a.no_baselines,
        threads: threads.min(keelson::evaluate::spec::MAX_THREADS),
    };
    let spec = match spec.check(&csv.panel, &settings) {
        Ok(spec) => spec,
        Err(BacktestError::History(e)) => return Err(located(e, &csv)),
        Err(e) => return Err(UsageError(option_error(&e)).into()),
    };
    let started = std::time::Instant::now();
    let reporter = Reporter::stderr("fits");
    let mut result = evaluate::run(&csv.panel, &settings, &spec, &|p| reporter.update(p), &Stop::never())
        .with_context(|| format!("backtesting {csv}"))?;
    let elapsed = started.elapsed();
    result.provenance.with_origin(
        &settings,
        Origin {
            invocation: &invocation(),
            input: &csv.file,
            input_bytes: bytes.as_deref(),
            settings_source: "the built-in defaults changed by --config and --set",
        },
    );
    keelson::report::write(&a.out, &result, &format!("Keelson backtest: {}", csv.file))?;
    let mut text = keelson::report::summary_table(&result);
    text.push_str(&footer(&result));
    text.push_str(&format!(
        "{} refits in {:.1} s on {} thread(s); input sha256 {}; report written to {}\n",
        result.refits,
        elapsed.as_secs_f64(),
        spec.threads,
        result.provenance.input_sha256,
        a.out.join("report.html").display()
    ));
    print(&text)?;
    // Strict mode looks at the configured method (and its model portfolio): the portfolio to be traded.
    let raised = result.strategies.iter().filter(|s| s.id.starts_with(CONFIGURED)).flat_map(|s| s.warnings.iter());
    Ok(strict_exit(&fail_on, raised.map(|w| w.code.as_str())))
}

/// The command line as typed, arguments with spaces or quotes quoted.
fn invocation() -> String {
    std::env::args()
        .map(|a| {
            if a.is_empty() || a.contains([' ', '"', '\'', '\t']) {
                format!("'{}'", a.replace('\'', "'\\''"))
            } else {
                a
            }
        })
        .collect::<Vec<_>>()
        .join(" ")
}

/// Creates `dir` if needed and checks that a file can be written in it.
fn writable_dir(dir: &std::path::Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    let probe = dir.join(".keelson-write-check");
    std::fs::write(&probe, b"")?;
    std::fs::remove_file(&probe)
}

/// Inference lines under the summary table: each comparison, raw and
/// adjusted, then the verdict.
pub(crate) fn footer(r: &BacktestResult) -> String {
    let mut out = String::from("comparisons of Sharpe ratios, gross of costs (p: raw · Holm · Romano–Wolf):\n");
    for c in &r.comparisons {
        out.push_str(&format!(
            "configured vs {:<40} ΔSharpe {:>6.2}  z {:>6.2}  p {:.3} · {:.3} · {:.3}\n",
            c.against, c.test.difference, c.test.z, c.test.p_value, c.p_holm, c.p_romano_wolf
        ));
    }
    out.push_str(&format!(
        "probabilistic Sharpe ratio (vs 0) {:.3}; deflated Sharpe ratio over {} distinct candidates {:.3}\n",
        r.psr,
        r.trials.len(),
        r.dsr
    ));
    out.push_str("verdict: ");
    out.push_str(&keelson::evaluate::verdict::verdict(r).sentences.join(" "));
    out.push('\n');
    out
}

/// The demo's closing backtest: the whole invented history, 120-month
/// rolling windows refitted every 3 months, every baseline beside the method;
/// `talk` prints the summary and its reading.
pub(crate) fn demo_history(settings: &ValidSettings, dir: &std::path::Path, talk: bool) -> anyhow::Result<()> {
    let history = keelson::demo::demo_history();
    let spec = BacktestSpec {
        step: 3,
        threads: std::thread::available_parallelism().map_or(1, |n| n.get()),
        ..BacktestSpec::default()
    }
    .check(&history, settings)
    .context("checking the demo backtest")?;
    if talk {
        print(&format!(
            "Backtest: {} months of invented history, {}-month rolling windows refitted every {} months, \
             the method beside its baselines (net of {} bp costs)…\n",
            history.rows, spec.window, spec.step, spec.cost_bps
        ))?;
    }
    let mut r =
        evaluate::run(&history, settings, &spec, &|_| {}, &Stop::never()).context("backtesting the demo history")?;
    r.provenance.with_origin(
        settings,
        Origin {
            invocation: &invocation(),
            input: "the built-in invented history (keelson::demo::demo_history)",
            input_bytes: None,
            settings_source: "the built-in defaults changed by --config and --set",
        },
    );
    keelson::report::write(dir, &r, "Keelson demo backtest: the Tessaly Exchange (invented data)")?;
    if talk {
        let mut text = keelson::report::summary_table(&r);
        text.push_str(&footer(&r));
        text.push_str(&demo_reading(&r));
        text.push_str(&format!("Report: {}\n\n", dir.join("report.html").display()));
        print(&text)?;
    }
    Ok(())
}

/// What the demo's backtest shows, whichever strategy comes out ahead.
fn demo_reading(r: &BacktestResult) -> String {
    let by_net = |a: &&keelson::evaluate::StrategyResult, b: &&keelson::evaluate::StrategyResult| {
        a.net_metrics.sharpe.total_cmp(&b.net_metrics.sharpe)
    };
    let Some(conf) = r.strategies.first() else { return String::new() };
    let Some(best) = r.strategies.iter().max_by(by_net) else { return String::new() };
    let mut out = String::from("Reading: ");
    if best.id == conf.id {
        let runner = r.strategies.iter().skip(1).max_by(by_net);
        out.push_str(&format!(
            "the configured method has the highest net Sharpe ratio out of sample ({:.2})",
            conf.net_metrics.sharpe
        ));
        if let Some(ru) = runner {
            let test = r.comparisons.iter().find(|c| c.against == ru.name);
            out.push_str(&format!(
                "; the next best is {} ({:.2}){}",
                ru.name,
                ru.net_metrics.sharpe,
                test.map_or_else(String::new, |c| format!(
                    ", and the gross difference of {:.2} has p = {:.3} (Jobson–Korkie–Memmel)",
                    c.test.difference, c.test.p_value
                ))
            ));
        }
    } else {
        let test = r.comparisons.iter().find(|c| c.against == best.name);
        out.push_str(&format!(
            "{} has the highest net Sharpe ratio out of sample ({:.2}) against {:.2} for the configured method{}",
            best.name,
            best.net_metrics.sharpe,
            conf.net_metrics.sharpe,
            test.map_or_else(String::new, |c| format!(
                "; the gross difference of {:.2} has p = {:.3} (Jobson–Korkie–Memmel)",
                -c.test.difference, c.test.p_value
            ))
        ));
    }
    out.push_str(&format!(
        ". The deflated Sharpe ratio of the configured method over {} distinct candidates tried is {:.2}. \
         On invented data this shows how to read the report, not which method to use: run the backtest on your own history.\n",
        r.trials.len(),
        r.dsr
    ));
    out
}

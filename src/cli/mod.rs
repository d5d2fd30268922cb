//! The `keelson` commands, one room each, and what they share: exit codes,
//! settings from `--config` and `--set`, reading a window, printing.
//!
//! Exit codes: 0 success, 1 an error in the data, the computation or the
//! server's answer, 2 bad usage (unknown flag or a flag of another command,
//! unknown or out-of-range setting or option, unusable server configuration
//! or client options, an unwritable `--out`), 3 a warning named by
//! `--fail-on` was raised (the output is still written).

pub(crate) mod args;
pub(crate) mod backtest;
pub(crate) mod call;
pub(crate) mod demo;
pub(crate) mod fit;
pub(crate) mod healthcheck;
pub(crate) mod output;
pub(crate) mod progress;
pub(crate) mod serve;

use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context as _;
use keelson::estimator::{EstimateError, Settings, SettingsError};
use keelson::panel_csv;
use keelson::proto;
use keelson::service::config::ConfigError;

use args::{Format, StrictArgs, WindowArgs};

/// A mistake in how the command was called (exit code 2).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub(crate) struct UsageError(pub(crate) String);

/// The exit code of a failed command, after printing its cause chain; a
/// broken pipe (the reader went away) is success.
pub(crate) fn exit_code(e: &anyhow::Error) -> ExitCode {
    let broken_pipe = e
        .chain()
        .any(|c| c.downcast_ref::<std::io::Error>().is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe));
    if broken_pipe {
        return ExitCode::SUCCESS;
    }
    eprintln!("error: {e:#}");
    let usage = e.downcast_ref::<UsageError>().is_some()
        || e.downcast_ref::<SettingsError>().is_some()
        || e.downcast_ref::<ConfigError>().is_some()
        || e.downcast_ref::<keelson::client::ClientError>().is_some_and(keelson::client::ClientError::is_usage)
        || e.downcast_ref::<EstimateError>().is_some_and(is_frequency_mismatch)
        || e.downcast_ref::<keelson::evaluate::BacktestError>().is_some_and(|b| match b {
            keelson::evaluate::BacktestError::History(h) => is_frequency_mismatch(h),
            _ => false,
        });
    ExitCode::from(if usage { 2 } else { 1 })
}

/// A stated frequency the labels contradict is a mistake in the call (SPEC §13).
fn is_frequency_mismatch(e: &EstimateError) -> bool {
    matches!(e, EstimateError::FrequencyMismatch { .. })
}

/// A multi-threaded async runtime for the commands that speak gRPC.
pub(crate) fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_multi_thread().enable_all().build().context("cannot start the async runtime")
}

/// Resolves `--config` and `--set` into settings, and the keys `--set` named.
pub(crate) fn resolve_settings(
    config: Option<&PathBuf>,
    set: &[String],
) -> anyhow::Result<(Settings, Vec<&'static str>)> {
    let mut s = match config {
        Some(p) => {
            let text = panel_csv::read_text(p).map_err(|e| UsageError(format!("{e:#}")))?;
            Settings::from_toml(&text).with_context(|| format!("in {}", p.display()))?
        }
        None => Settings::default(),
    };
    let mut keys = Vec::new();
    for kv in set {
        let (k, v) = kv
            .split_once('=')
            .ok_or_else(|| UsageError(format!("--set {kv}: expected KEY=VALUE, e.g. --set components=5")))?;
        s.set(k, v)?;
        let k = k.trim().replace('-', "_");
        keys.extend(Settings::KEYS.iter().find(|key| **key == k));
    }
    Ok((s, keys))
}

/// Reads the window, and previous weights if given.
pub(crate) fn read_window(w: &WindowArgs) -> anyhow::Result<panel_csv::CsvPanel> {
    let mut csv = read_history(&w.returns, w.market.as_deref())?;
    if let Some(p) = &w.previous_weights {
        let text = panel_csv::read_text(p)?;
        csv.panel.previous_weights = panel_csv::parse_weights(&text, &p.display().to_string())?;
    }
    Ok(csv)
}

/// Reads a returns file with its market column.
pub(crate) fn read_history(path: &std::path::Path, market: Option<&str>) -> anyhow::Result<panel_csv::CsvPanel> {
    let text = panel_csv::read_text(path)?;
    Ok(panel_csv::parse_returns(&text, &path.display().to_string(), market)?)
}

/// The warning codes `--fail-on` names: every code for `any`.
pub(crate) fn fail_on_codes(strict: &StrictArgs) -> anyhow::Result<Vec<&'static str>> {
    let Some(list) = &strict.fail_on else { return Ok(Vec::new()) };
    let known: Vec<&'static str> = keelson::estimator::warning_words().collect();
    let mut out = Vec::new();
    for code in list.split(',').map(str::trim).filter(|c| !c.is_empty()) {
        if code == "any" {
            return Ok(known.to_vec());
        }
        match known.iter().find(|k| **k == code) {
            Some(k) => out.push(*k),
            None => {
                let closest = keelson::estimator::closest_name(code, &known);
                return Err(UsageError(format!(
                    "--fail-on {code}: not a warning code{}; the codes are any, {}",
                    closest.map_or_else(String::new, |c| format!(" (did you mean {c}?)")),
                    known.join(", ")
                ))
                .into());
            }
        }
    }
    if out.is_empty() {
        return Err(UsageError("--fail-on: give warning codes separated by commas, or any".into()).into());
    }
    Ok(out)
}

/// Exit 3 when a raised warning is one `--fail-on` names, after saying which.
pub(crate) fn strict_exit<'a>(fail_on: &[&str], raised: impl IntoIterator<Item = &'a str>) -> ExitCode {
    let mut hit: Vec<&str> = raised.into_iter().filter(|c| fail_on.contains(c)).collect();
    hit.sort_unstable();
    hit.dedup();
    if hit.is_empty() {
        return ExitCode::SUCCESS;
    }
    eprintln!("error: --fail-on: warning(s) raised: {} (the output was written)", hit.join(", "));
    ExitCode::from(3)
}

/// An estimator error with the file line and column of its value, when it has one.
pub(crate) fn located(e: EstimateError, csv: &panel_csv::CsvPanel) -> anyhow::Error {
    let pos = match &e {
        EstimateError::Input(ie) => ie.location().and_then(|at| csv.position(at)),
        _ => None,
    };
    let err = anyhow::Error::new(e);
    match pos {
        Some(p) => err.context(format!("at {p}")),
        None => err.context(format!("fitting {csv}")),
    }
}

/// Prints a response as a table or as proto3 JSON.
pub(crate) fn render(
    resp: &proto::ComputeWeightsResponse,
    format: Format,
    source: &str,
    labels: &[String],
) -> anyhow::Result<()> {
    let text = match format {
        Format::Table => output::table(resp, source, labels),
        Format::Json => output::json(resp)?,
    };
    print(&text)
}

/// Writes to standard output and flushes.
pub(crate) fn print(text: &str) -> anyhow::Result<()> {
    let mut out = std::io::stdout().lock();
    out.write_all(text.as_bytes())?;
    out.flush()?;
    Ok(())
}

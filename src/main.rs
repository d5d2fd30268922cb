//! The `keelson` command: `fit` a window from CSV, or run the `demo`.
//!
//! Exit codes: 0 success, 1 an error in the data or the computation,
//! 2 bad usage (unknown flag, unknown or out-of-range setting).

mod cli;

use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Context as _;
use clap::{Parser, Subcommand, ValueEnum};
use keelson::estimator::{self, EstimateError, FitOptions, Method, Scaling, Settings, SettingsError};
use keelson::panel_csv;

/// Shrunk, Sharpe-scaled principal-component weights for factor portfolios.
#[derive(Parser, Debug)]
#[command(name = "keelson", version, about, propagate_version = true)]
struct Args {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Fit one window of factor returns from a CSV file and print the weights.
    Fit(FitArgs),
    /// Fit the built-in invented market (the Tessaly Exchange) and explain the result.
    Demo(DemoArgs),
}

#[derive(clap::Args, Debug)]
struct SettingsArgs {
    /// TOML file of settings; keys not given keep their defaults.
    #[arg(long, value_name = "FILE.toml")]
    config: Option<PathBuf>,
    /// Override one setting, e.g. `--set scaling=covariance --set components=5`.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    set: Vec<String>,
    /// Worker threads for cross-validation folds (results do not depend on it).
    #[arg(long, default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..=256))]
    threads: u16,
}

#[derive(clap::Args, Debug)]
struct FitArgs {
    /// CSV of returns: header row, periods in the first column, one factor per column.
    #[arg(long, value_name = "FILE.csv")]
    returns: PathBuf,
    /// Column holding the market excess return (not a factor).
    #[arg(long, value_name = "COLUMN")]
    market: Option<String>,
    /// CSV `factor,weight` of weights currently held, for turnover.
    #[arg(long, value_name = "FILE.csv")]
    previous_weights: Option<PathBuf>,
    #[command(flatten)]
    settings: SettingsArgs,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
}

#[derive(clap::Args, Debug)]
struct DemoArgs {
    #[command(flatten)]
    settings: SettingsArgs,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
    /// Also write the demo window as CSV to this file.
    #[arg(long, value_name = "FILE.csv")]
    write_csv: Option<PathBuf>,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum Format {
    /// A readable table.
    Table,
    /// The ComputeWeightsResponse in the proto3 JSON mapping.
    Json,
}

/// A mistake in how the command was called (exit code 2).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
struct UsageError(String);

fn main() -> ExitCode {
    let args = match Args::try_parse() {
        Ok(a) => a,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() { ExitCode::from(2) } else { ExitCode::SUCCESS };
        }
    };
    match run(args) {
        Ok(code) => code,
        Err(e) => {
            if is_broken_pipe(&e) {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {e:#}");
            if e.downcast_ref::<UsageError>().is_some() || e.downcast_ref::<SettingsError>().is_some() {
                ExitCode::from(2)
            } else {
                ExitCode::from(1)
            }
        }
    }
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| c.downcast_ref::<std::io::Error>().is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe))
}

fn run(args: Args) -> anyhow::Result<ExitCode> {
    match args.command {
        Command::Fit(a) => fit(a),
        Command::Demo(a) => demo(a),
    }
}

/// Resolves `--config` and `--set` into validated settings.
fn resolve_settings(a: &SettingsArgs) -> anyhow::Result<estimator::ValidSettings> {
    let mut s = match &a.config {
        Some(p) => {
            let text = panel_csv::read_text(p).map_err(|e| UsageError(format!("{e:#}")))?;
            Settings::from_toml(&text).with_context(|| format!("in {}", p.display()))?
        }
        None => Settings::default(),
    };
    for kv in &a.set {
        let (k, v) = kv
            .split_once('=')
            .ok_or_else(|| UsageError(format!("--set {kv}: expected KEY=VALUE, e.g. --set components=5")))?;
        s.set(k, v)?;
    }
    Ok(s.check()?)
}

fn options(a: &SettingsArgs) -> FitOptions {
    FitOptions { threads: usize::from(a.threads), ..FitOptions::default() }
}

fn fit(a: FitArgs) -> anyhow::Result<ExitCode> {
    let settings = resolve_settings(&a.settings)?;
    let file = a.returns.display().to_string();
    let text = panel_csv::read_text(&a.returns)?;
    let mut csv = panel_csv::parse_returns(&text, &file, a.market.as_deref())?;
    if let Some(p) = &a.previous_weights {
        let text = panel_csv::read_text(p)?;
        csv.panel.previous_weights = panel_csv::parse_weights(&text, &p.display().to_string())?;
    }
    let ws = match estimator::fit_with(&csv.panel, &settings, &options(&a.settings)) {
        Ok(ws) => ws,
        Err(e) => {
            let pos = match &e {
                EstimateError::Input(ie) => ie.location().and_then(|at| csv.position(at)),
                _ => None,
            };
            let err = anyhow::Error::new(e);
            return Err(match pos {
                Some(p) => err.context(format!("at {p}")),
                None => err.context(format!("fitting {csv}")),
            });
        }
    };
    let text = match a.format {
        Format::Table => cli::output::table(&ws, &file, &csv.panel.period_labels),
        Format::Json => cli::output::json(&ws, "")?,
    };
    print(&text)?;
    Ok(ExitCode::SUCCESS)
}

fn demo(a: DemoArgs) -> anyhow::Result<ExitCode> {
    let settings = resolve_settings(&a.settings)?;
    let panel = keelson::demo::demo_panel();
    if let Some(p) = &a.write_csv {
        std::fs::write(p, keelson::demo::to_csv(&panel)).with_context(|| format!("cannot write {}", p.display()))?;
    }
    let ws = estimator::fit_with(&panel, &settings, &options(&a.settings)).context("fitting the demo window")?;
    match a.format {
        Format::Json => print(&cli::output::json(&ws, "demo")?)?,
        Format::Table => {
            let mut text = String::new();
            text.push_str(cli::DEMO_INTRO);
            text.push('\n');
            text.push_str(&cli::output::table(&ws, "Tessaly Exchange (invented)", &panel.period_labels));
            text.push('\n');
            let plain = (settings.scaling != Scaling::Covariance && settings.method == Method::Components)
                .then(|| {
                    let mut s = settings.settings().clone();
                    s.scaling = Scaling::Covariance;
                    s.check().ok().and_then(|s| estimator::fit_with(&panel, &s, &options(&a.settings)).ok())
                })
                .flatten();
            text.push_str(&cli::demo_explanation(&ws, plain.as_ref()));
            text.push_str(cli::CAUTION);
            print(&text)?;
        }
    }
    Ok(ExitCode::SUCCESS)
}

fn print(text: &str) -> anyhow::Result<()> {
    let mut out = std::io::stdout().lock();
    out.write_all(text.as_bytes())?;
    out.flush()?;
    Ok(())
}

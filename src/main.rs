//! The `keelson` command: `fit` a window from CSV, `serve` the gRPC API,
//! `call` a running server, `healthcheck` it, or run the `demo`.
//!
//! Exit codes: 0 success, 1 an error in the data, the computation or the
//! server's answer, 2 bad usage (unknown flag, unknown or out-of-range
//! setting, unusable server configuration).

mod cli;

use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use anyhow::Context as _;
use clap::{Parser, Subcommand, ValueEnum};
use keelson::convert::{request_from_panel, settings_to_proto_only, weight_set_to_proto};
use keelson::estimator::{self, EstimateError, FitOptions, Settings, SettingsError};
use keelson::proto::{self, weights_service_client::WeightsServiceClient};
use keelson::service::{self, config::ConfigError, config::ServerConfig};
use keelson::{demo, panel_csv};
use tonic_types::StatusExt as _;

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
    /// Run the built-in invented market through the gRPC service, as a rebalancing job would.
    Demo(DemoArgs),
    /// Serve the gRPC API (keelson.v1.WeightsService, health, reflection).
    Serve(ServeArgs),
    /// Send a window from a CSV file to a running server and print the weights.
    Call(CallArgs),
    /// Exit 0 when a server reports SERVING (for container health checks).
    Healthcheck(HealthArgs),
    /// Backtest the configured method against its baselines out of sample and write a report.
    Backtest(BacktestArgs),
}

#[derive(clap::Args, Debug)]
struct BacktestArgs {
    #[command(flatten)]
    window: WindowArgs,
    #[command(flatten)]
    settings: SettingsArgs,
    /// A benchmark set for alphas, comma-separated column names (repeatable); the market alone is always tested.
    #[arg(long, value_name = "NAME,NAME...")]
    benchmarks: Vec<String>,
    /// Estimation window in periods (the minimum when --expanding).
    #[arg(long = "window", default_value_t = 120)]
    window_len: usize,
    /// Expanding instead of rolling windows.
    #[arg(long)]
    expanding: bool,
    /// Refit every STEP periods.
    #[arg(long, default_value_t = 1)]
    step: usize,
    /// Linear trading cost, basis points of turnover.
    #[arg(long, default_value_t = 10.0)]
    cost_bps: f64,
    /// Risk aversion of the certainty-equivalent return.
    #[arg(long, default_value_t = 3.0)]
    cer_risk_aversion: f64,
    /// Largest K of the OOS Sharpe-against-K sweep (0 = no sweep; default 10, lowered to what the window supports).
    #[arg(long)]
    sweep_max_k: Option<usize>,
    /// Only the configured method, no baselines.
    #[arg(long)]
    no_baselines: bool,
    /// Worker threads over refit dates (results do not depend on it).
    #[arg(long, default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..=256))]
    threads: u16,
    /// Folder for report.html, summary.json and returns.csv.
    #[arg(long, value_name = "DIR")]
    out: PathBuf,
}

#[derive(clap::Args, Debug)]
struct SettingsArgs {
    /// TOML file of settings; keys not given keep their defaults.
    #[arg(long, value_name = "FILE.toml")]
    config: Option<PathBuf>,
    /// Override one setting, e.g. `--set scaling=covariance --set components=5`.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    set: Vec<String>,
}

#[derive(clap::Args, Debug)]
struct WindowArgs {
    /// CSV of returns: header row, periods in the first column, one factor per column.
    #[arg(long, value_name = "FILE.csv")]
    returns: PathBuf,
    /// Column holding the market excess return (not a factor).
    #[arg(long, value_name = "COLUMN")]
    market: Option<String>,
    /// CSV `factor,weight` of weights currently held, for turnover.
    #[arg(long, value_name = "FILE.csv")]
    previous_weights: Option<PathBuf>,
}

#[derive(clap::Args, Debug)]
struct FitArgs {
    #[command(flatten)]
    window: WindowArgs,
    #[command(flatten)]
    settings: SettingsArgs,
    /// Worker threads for cross-validation folds (results do not depend on it).
    #[arg(long, default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..=256))]
    threads: u16,
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
    /// Folder for the report of the demo's closing backtest.
    #[arg(long, value_name = "DIR", default_value = "keelson-demo-report")]
    report_dir: PathBuf,
    /// Skip the closing backtest.
    #[arg(long)]
    skip_backtest: bool,
}

#[derive(clap::Args, Debug)]
struct ServeArgs {
    /// TOML server configuration (sections server, estimator, log).
    #[arg(long, value_name = "FILE.toml")]
    config: Option<PathBuf>,
    /// gRPC listen address; overrides `server.address`.
    #[arg(long, value_name = "HOST:PORT")]
    addr: Option<String>,
}

/// How a client reaches the server: address, TLS material, token.
#[derive(clap::Args, Debug)]
struct ConnectArgs {
    /// Server address, e.g. http://127.0.0.1:50051 (https:// with TLS). Default: the port of
    /// KEELSON__SERVER__ADDRESS on 127.0.0.1 when that is set, else 127.0.0.1:50051.
    #[arg(long, value_name = "URL")]
    addr: Option<String>,
    /// PEM CA bundle that signed the server certificate; turns TLS on.
    #[arg(long, value_name = "FILE.pem")]
    ca_cert: Option<PathBuf>,
    /// PEM client certificate, for servers that require mutual TLS.
    #[arg(long, value_name = "FILE.pem", requires = "client_key")]
    client_cert: Option<PathBuf>,
    /// PEM private key of the client certificate.
    #[arg(long, value_name = "FILE.pem", requires = "client_cert")]
    client_key: Option<PathBuf>,
    /// Name to verify in the server certificate, when it differs from the address host.
    #[arg(long, value_name = "NAME")]
    server_name: Option<String>,
}

#[derive(clap::Args, Debug)]
struct CallArgs {
    #[command(flatten)]
    connect: ConnectArgs,
    /// File whose first line is the bearer token (the KEELSON_TOKEN environment variable also works).
    #[arg(long, value_name = "FILE")]
    token_file: Option<PathBuf>,
    #[command(flatten)]
    window: WindowArgs,
    /// Set one setting in the request, e.g. `--set components=5`; unset ones take the server's defaults.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    set: Vec<String>,
    /// Request id, echoed back and logged by the server.
    #[arg(long, default_value = "")]
    request_id: String,
    /// Deadline of the call in milliseconds.
    #[arg(long, default_value_t = 30_000)]
    timeout_ms: u64,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    format: Format,
}

#[derive(clap::Args, Debug)]
struct HealthArgs {
    #[command(flatten)]
    connect: ConnectArgs,
    /// Health-check name: empty for the whole server, or liveness, readiness, keelson.v1.WeightsService.
    #[arg(long, default_value = "")]
    service: String,
    /// Deadline in milliseconds.
    #[arg(long, default_value_t = 2_000)]
    timeout_ms: u64,
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
            let usage = e.downcast_ref::<UsageError>().is_some()
                || e.downcast_ref::<SettingsError>().is_some()
                || e.downcast_ref::<ConfigError>().is_some();
            ExitCode::from(if usage { 2 } else { 1 })
        }
    }
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| c.downcast_ref::<std::io::Error>().is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe))
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_multi_thread().enable_all().build().context("cannot start the async runtime")
}

fn run(args: Args) -> anyhow::Result<ExitCode> {
    match args.command {
        Command::Fit(a) => fit(a),
        Command::Demo(a) => runtime()?.block_on(demo(a)),
        Command::Serve(a) => serve(a),
        Command::Call(a) => runtime()?.block_on(call(a)),
        Command::Healthcheck(a) => runtime()?.block_on(healthcheck(a)),
        Command::Backtest(a) => backtest(a),
    }
}

/// Resolves `--config` and `--set` into settings, and the keys `--set` named.
fn resolve_settings(config: Option<&PathBuf>, set: &[String]) -> anyhow::Result<(Settings, Vec<&'static str>)> {
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
fn read_window(w: &WindowArgs) -> anyhow::Result<panel_csv::CsvPanel> {
    let file = w.returns.display().to_string();
    let text = panel_csv::read_text(&w.returns)?;
    let mut csv = panel_csv::parse_returns(&text, &file, w.market.as_deref())?;
    if let Some(p) = &w.previous_weights {
        let text = panel_csv::read_text(p)?;
        csv.panel.previous_weights = panel_csv::parse_weights(&text, &p.display().to_string())?;
    }
    Ok(csv)
}

fn render(resp: &proto::ComputeWeightsResponse, format: Format, source: &str, labels: &[String]) -> anyhow::Result<()> {
    let text = match format {
        Format::Table => cli::output::table(resp, source, labels),
        Format::Json => cli::output::json(resp)?,
    };
    print(&text)
}

fn fit(a: FitArgs) -> anyhow::Result<ExitCode> {
    let (settings, _) = resolve_settings(a.settings.config.as_ref(), &a.settings.set)?;
    let settings = settings.check()?;
    let csv = read_window(&a.window)?;
    let options = FitOptions { threads: usize::from(a.threads), ..FitOptions::default() };
    let ws = estimator::fit_with(&csv.panel, &settings, &options).map_err(|e| located(e, &csv))?;
    render(&weight_set_to_proto(&ws, ""), a.format, &csv.file, &csv.panel.period_labels)?;
    Ok(ExitCode::SUCCESS)
}

/// An estimator error with the file line and column of its value, when it has one.
fn located(e: EstimateError, csv: &panel_csv::CsvPanel) -> anyhow::Error {
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

fn serve(a: ServeArgs) -> anyhow::Result<ExitCode> {
    let mut raw = ServerConfig::load(a.config.as_deref(), std::env::vars())?;
    if let Some(addr) = a.addr {
        raw.server.address = addr;
    }
    let config = raw.check()?;
    init_logging(&config.raw.log);
    tracing::info!(config = %config.redacted_json(), "effective configuration");
    let rt = runtime()?;
    rt.block_on(async move {
        let listener = tokio::net::TcpListener::bind(config.address)
            .await
            .with_context(|| format!("cannot listen on {}", config.address))?;
        tracing::info!(address = %listener.local_addr()?, "serving keelson.v1.WeightsService");
        service::serve(config, listener, service::termination_signal()).await.context("server failed")?;
        Ok::<_, anyhow::Error>(())
    })?;
    Ok(ExitCode::SUCCESS)
}

fn init_logging(log: &service::config::LogSection) {
    let filter = tracing_subscriber::EnvFilter::try_new(&log.level).unwrap_or_else(|_| "info".into());
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stdout);
    let _ = match log.format {
        service::config::LogFormat::Json => builder.json().flatten_event(true).with_current_span(false).try_init(),
        service::config::LogFormat::Text => builder.try_init(),
    };
}

impl ConnectArgs {
    /// `--addr`, or the local port of the server's own configured address (so that a
    /// container's healthcheck follows `KEELSON__SERVER__ADDRESS`).
    fn address(&self) -> String {
        if let Some(a) = &self.addr {
            return a.clone();
        }
        let port = std::env::var("KEELSON__SERVER__ADDRESS")
            .ok()
            .and_then(|a| a.parse::<std::net::SocketAddr>().ok())
            .map_or(50051, |a| a.port());
        format!("127.0.0.1:{port}")
    }
}

fn endpoint(c: &ConnectArgs) -> anyhow::Result<tonic::transport::Endpoint> {
    let addr = &c.address();
    let tls = c.ca_cert.is_some();
    let url = if addr.contains("://") {
        addr.clone()
    } else if tls {
        format!("https://{addr}")
    } else {
        format!("http://{addr}")
    };
    let mut ep = tonic::transport::Endpoint::from_shared(url).map_err(|e| UsageError(format!("--addr {addr}: {e}")))?;
    if let Some(ca) = &c.ca_cert {
        let read = |p: &PathBuf| std::fs::read(p).with_context(|| format!("cannot read {}", p.display()));
        let mut t =
            tonic::transport::ClientTlsConfig::new().ca_certificate(tonic::transport::Certificate::from_pem(read(ca)?));
        if let (Some(cert), Some(key)) = (&c.client_cert, &c.client_key) {
            t = t.identity(tonic::transport::Identity::from_pem(read(cert)?, read(key)?));
        }
        if let Some(name) = &c.server_name {
            t = t.domain_name(name.clone());
        }
        ep = ep.tls_config(t).map_err(|e| UsageError(format!("TLS settings: {e}")))?;
    } else if c.client_cert.is_some() || c.server_name.is_some() {
        return Err(UsageError("--client-cert and --server-name need --ca-cert (TLS)".into()).into());
    }
    Ok(ep)
}

async fn client(c: &ConnectArgs) -> anyhow::Result<WeightsServiceClient<tonic::transport::Channel>> {
    let channel = endpoint(c)?
        .connect_timeout(Duration::from_secs(5))
        .connect()
        .await
        .with_context(|| format!("cannot connect to {}", c.address()))?;
    Ok(WeightsServiceClient::new(channel).max_decoding_message_size(256 << 20).max_encoding_message_size(256 << 20))
}

/// The bearer token from `--token-file` or `KEELSON_TOKEN`, if any.
fn bearer_token(
    file: Option<&PathBuf>,
) -> anyhow::Result<Option<tonic::metadata::MetadataValue<tonic::metadata::Ascii>>> {
    let token = match file {
        Some(p) => Some(
            std::fs::read_to_string(p)
                .with_context(|| format!("cannot read {}", p.display()))?
                .lines()
                .next()
                .unwrap_or("")
                .trim()
                .to_owned(),
        ),
        None => std::env::var("KEELSON_TOKEN").ok().map(|t| t.trim().to_owned()),
    };
    match token {
        None => Ok(None),
        Some(t) if t.is_empty() => Err(UsageError("the bearer token is empty".into()).into()),
        Some(t) => Ok(Some(
            format!("Bearer {t}").parse().map_err(|_| UsageError("the bearer token is not printable ASCII".into()))?,
        )),
    }
}

/// Describes a failed call: code, message and field violations.
fn describe_status(s: &tonic::Status) -> String {
    let mut out = format!("{:?}: {}", s.code(), s.message());
    if let Some(br) = s.get_details_bad_request() {
        for v in &br.field_violations {
            if v.description == s.message() {
                out.push_str(&format!("\n  field violation: {}", v.field));
            } else {
                out.push_str(&format!("\n  field violation: {}: {}", v.field, v.description));
            }
        }
    }
    out
}

/// A backtest option error in the command line's words: `--sweep-max-k`, not `sweep_max_k`.
fn cli_option_error(e: &keelson::evaluate::BacktestError) -> String {
    match e {
        keelson::evaluate::BacktestError::Spec { field, reason } => {
            let flag = match field.split_once('[').map_or(field.as_str(), |(f, _)| f) {
                "benchmark_sets" => "benchmarks".to_owned(),
                f => f.replace('_', "-"),
            };
            format!("--{flag}: {reason}")
        }
        other => other.to_string(),
    }
}

async fn call(a: CallArgs) -> anyhow::Result<ExitCode> {
    let (settings, keys) = resolve_settings(None, &a.set)?;
    // The same checks as `fit`, before anything is sent: a bad setting is a usage error.
    settings.clone().check()?;
    let settings_msg = settings_to_proto_only(&settings, &keys);
    let csv = read_window(&a.window)?;
    let mut request = tonic::Request::new(request_from_panel(&csv.panel, settings_msg, &a.request_id));
    request.set_timeout(Duration::from_millis(a.timeout_ms));
    if let Some(token) = bearer_token(a.token_file.as_ref())? {
        request.metadata_mut().insert("authorization", token);
    }
    let mut c = client(&a.connect).await?;
    let resp = c.compute_weights(request).await.map_err(|s| anyhow::anyhow!(describe_status(&s)))?.into_inner();
    render(&resp, a.format, &csv.file, &csv.panel.period_labels)?;
    Ok(ExitCode::SUCCESS)
}

async fn healthcheck(a: HealthArgs) -> anyhow::Result<ExitCode> {
    use tonic_health::pb::{HealthCheckRequest, health_check_response::ServingStatus, health_client::HealthClient};
    let channel = endpoint(&a.connect)?
        .connect_timeout(Duration::from_millis(a.timeout_ms))
        .timeout(Duration::from_millis(a.timeout_ms))
        .connect()
        .await
        .with_context(|| format!("cannot connect to {}", a.connect.address()))?;
    let resp = HealthClient::new(channel)
        .check(HealthCheckRequest { service: a.service.clone() })
        .await
        .map_err(|s| anyhow::anyhow!(describe_status(&s)))?
        .into_inner();
    let status = ServingStatus::try_from(resp.status).unwrap_or(ServingStatus::Unknown);
    println!("{}", status.as_str_name());
    Ok(if status == ServingStatus::Serving { ExitCode::SUCCESS } else { ExitCode::from(1) })
}

/// The demo runs the whole path a rebalancing job takes: an in-process
/// server on an ephemeral loopback port, a gRPC client, the invented window.
async fn demo(a: DemoArgs) -> anyhow::Result<ExitCode> {
    let (settings, keys) = resolve_settings(a.settings.config.as_ref(), &a.settings.set)?;
    let checked = settings.clone().check()?;
    let panel = demo::demo_panel();
    if let Some(p) = &a.write_csv {
        std::fs::write(p, demo::to_csv(&panel)).with_context(|| format!("cannot write {}", p.display()))?;
    }
    let mut config = ServerConfig::default();
    config.server.address = "127.0.0.1:0".to_owned();
    config.metrics.address = String::new();
    config.estimator = checked.settings().clone();
    let config = config.check()?;
    let listener = tokio::net::TcpListener::bind(config.address).await.context("cannot bind a loopback port")?;
    let addr = listener.local_addr()?;
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(service::serve(config, listener, async {
        let _ = stop_rx.await;
    }));
    let run = async {
        let local = ConnectArgs {
            addr: Some(format!("http://{addr}")),
            ca_cert: None,
            client_cert: None,
            client_key: None,
            server_name: None,
        };
        let mut c = client(&local).await?;
        let sent = settings_to_proto_only(&settings, &keys);
        let req = request_from_panel(&panel, sent, "demo");
        let resp = c.compute_weights(req).await.map_err(|s| anyhow::anyhow!(describe_status(&s)))?.into_inner();
        let plain =
            if checked.scaling != estimator::Scaling::Covariance && checked.method == estimator::Method::Components {
                let mut s = sent;
                s.scaling = proto::Scaling::Covariance.into();
                c.compute_weights(request_from_panel(&panel, s, "demo-plain-pca")).await.ok().map(|r| r.into_inner())
            } else {
                None
            };
        Ok::<_, anyhow::Error>((resp, plain))
    };
    let result = run.await;
    let _ = stop_tx.send(());
    let _ = server.await;
    let (resp, plain) = result.context("calling the in-process demo server")?;
    match a.format {
        Format::Json => print(&cli::output::json(&resp)?)?,
        Format::Table => {
            let mut text = String::new();
            text.push_str(cli::DEMO_INTRO);
            text.push_str(&format!("(served over gRPC by an in-process server on {addr})\n\n"));
            text.push_str(&cli::output::table(&resp, "Tessaly Exchange (invented)", &panel.period_labels));
            text.push('\n');
            text.push_str(&cli::demo_explanation(&resp, plain.as_ref()));
            print(&text)?;
            if !a.skip_backtest {
                demo_backtest(&checked, &a.report_dir)?;
            }
            print(cli::CAUTION)?;
        }
    }
    Ok(ExitCode::SUCCESS)
}

fn backtest(a: BacktestArgs) -> anyhow::Result<ExitCode> {
    use std::io::IsTerminal as _;
    let (settings, _) = resolve_settings(a.settings.config.as_ref(), &a.settings.set)?;
    let settings = settings.check()?;
    let csv = read_window(&a.window)?;
    let market_name = a.window.market.clone();
    let benchmark_sets = a
        .benchmarks
        .iter()
        .map(|set| {
            set.split(',')
                .map(str::trim)
                .filter(|n| !n.is_empty())
                .map(|n| {
                    if Some(n) == market_name.as_deref() { keelson::evaluate::MARKET.to_owned() } else { n.to_owned() }
                })
                .collect()
        })
        .collect();
    let spec = keelson::evaluate::BacktestSpec {
        window: a.window_len,
        expanding: a.expanding,
        step: a.step,
        cost_bps: a.cost_bps,
        cer_risk_aversion: a.cer_risk_aversion,
        sweep_max_k: a.sweep_max_k,
        benchmark_sets,
        nw_lag: None,
        baselines: !a.no_baselines,
        threads: usize::from(a.threads),
    };
    let spec = match spec.check(&csv.panel, &settings) {
        Ok(spec) => spec,
        Err(keelson::evaluate::BacktestError::History(e)) => return Err(located(e, &csv)),
        Err(e) => return Err(UsageError(cli_option_error(&e)).into()),
    };
    let tty = std::io::stderr().is_terminal();
    let progress = |p: keelson::evaluate::Progress| {
        if tty && (p.done.is_multiple_of(20) || p.done == p.total) {
            let filled = 40 * p.done / p.total.max(1);
            eprint!("\r[{}{}] {}/{} fits", "#".repeat(filled), " ".repeat(40 - filled), p.done, p.total);
            if p.done == p.total {
                eprintln!();
            }
        }
    };
    let started = std::time::Instant::now();
    let result = keelson::evaluate::run(&csv.panel, &settings, &spec, &progress, &estimator::Stop::never())
        .with_context(|| format!("backtesting {csv}"))?;
    let elapsed = started.elapsed();
    keelson::report::write(&a.out, &result, &format!("Keelson backtest: {}", csv.file))?;
    let mut text = keelson::report::summary_table(&result);
    text.push_str(&backtest_footer(&result));
    text.push_str(&format!(
        "{} refits in {:.1} s; report written to {}\n",
        result.refits,
        elapsed.as_secs_f64(),
        a.out.join("report.html").display()
    ));
    print(&text)?;
    Ok(ExitCode::SUCCESS)
}

/// Inference lines under the summary table.
fn backtest_footer(r: &keelson::evaluate::BacktestResult) -> String {
    let mut out = String::new();
    for c in &r.comparisons {
        out.push_str(&format!(
            "configured vs {:<24} ΔSharpe {:>6.2}  z {:>6.2}  p {:.3}\n",
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
fn demo_backtest(settings: &estimator::ValidSettings, dir: &std::path::Path) -> anyhow::Result<()> {
    let history = demo::demo_history();
    let spec = keelson::evaluate::BacktestSpec {
        step: 3,
        threads: std::thread::available_parallelism().map_or(1, |n| n.get()),
        ..keelson::evaluate::BacktestSpec::default()
    }
    .check(&history, settings)
    .context("checking the demo backtest")?;
    print(&format!(
        "Backtest: {} months of invented history, {}-month rolling windows refitted every {} months, \
         the method beside its baselines (net of {} bp costs)…\n",
        history.rows, spec.window, spec.step, spec.cost_bps
    ))?;
    let r = keelson::evaluate::run(&history, settings, &spec, &|_| {}, &estimator::Stop::never())
        .context("backtesting the demo history")?;
    keelson::report::write(dir, &r, "Keelson demo backtest: the Tessaly Exchange (invented data)")?;
    let mut text = keelson::report::summary_table(&r);
    text.push_str(&backtest_footer(&r));
    text.push_str(&format!("Report: {}\n\n", dir.join("report.html").display()));
    print(&text)
}

fn print(text: &str) -> anyhow::Result<()> {
    let mut out = std::io::stdout().lock();
    out.write_all(text.as_bytes())?;
    out.flush()?;
    Ok(())
}

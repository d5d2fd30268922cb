//! The command line as clap parses it: one struct per command, flattened
//! groups for the window, the settings and the connection.

use std::path::PathBuf;

use clap::{Parser, Subcommand, ValueEnum};

/// Shrunk, Sharpe-scaled principal-component weights for factor portfolios.
#[derive(Parser, Debug)]
#[command(name = "keelson", version, about, propagate_version = true)]
pub(crate) struct Args {
    #[command(subcommand)]
    pub(crate) command: Command,
}

#[derive(Subcommand, Debug)]
pub(crate) enum Command {
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
pub(crate) struct BacktestArgs {
    #[command(flatten)]
    pub(crate) history: HistoryArgs,
    #[command(flatten)]
    pub(crate) settings: SettingsArgs,
    /// A benchmark set for alphas, comma-separated column names (repeatable); the market alone is always tested.
    #[arg(long, value_name = "NAME,NAME...")]
    pub(crate) benchmarks: Vec<String>,
    /// Estimation window in periods (the minimum when --expanding).
    #[arg(long = "window", default_value_t = 120)]
    pub(crate) window_len: usize,
    /// Expanding instead of rolling windows.
    #[arg(long)]
    pub(crate) expanding: bool,
    /// Refit every STEP periods.
    #[arg(long, default_value_t = 1)]
    pub(crate) step: usize,
    /// Linear trading cost, basis points of turnover.
    #[arg(long, default_value_t = 10.0)]
    pub(crate) cost_bps: f64,
    /// Risk aversion of the certainty-equivalent return.
    #[arg(long, default_value_t = 3.0)]
    pub(crate) cer_risk_aversion: f64,
    /// Largest K of the OOS Sharpe-against-K sweep (0 = no sweep; default 10, lowered to what the window supports).
    #[arg(long)]
    pub(crate) sweep_max_k: Option<usize>,
    /// Only the configured method, no baselines.
    #[arg(long)]
    pub(crate) no_baselines: bool,
    /// Worker threads over refit dates and strategies (results do not depend on it). Default: every core.
    #[arg(long, value_parser = clap::value_parser!(u16).range(1..=256))]
    pub(crate) threads: Option<u16>,
    /// Folder for report.html, summary.json, returns.csv and charts/ (created; checked before any work).
    #[arg(long, value_name = "DIR")]
    pub(crate) out: PathBuf,
    #[command(flatten)]
    pub(crate) strict: StrictArgs,
}

/// Strict mode for schedulers: warnings that fail the command.
#[derive(clap::Args, Debug)]
pub(crate) struct StrictArgs {
    /// Exit 3 (after writing the output) when a fit raises one of these warning codes
    /// (comma-separated), or any warning with `any`. In a backtest: any refit of the configured method.
    #[arg(long, value_name = "CODE,CODE...|any")]
    pub(crate) fail_on: Option<String>,
}

/// The history a backtest reads.
#[derive(clap::Args, Debug)]
pub(crate) struct HistoryArgs {
    /// CSV of returns: header row, periods in the first column, one factor per column.
    #[arg(long, value_name = "FILE.csv")]
    pub(crate) returns: PathBuf,
    /// Column holding the market excess return (not a factor).
    #[arg(long, value_name = "COLUMN")]
    pub(crate) market: Option<String>,
}

#[derive(clap::Args, Debug)]
pub(crate) struct SettingsArgs {
    /// TOML file of settings; keys not given keep their defaults.
    #[arg(long, value_name = "FILE.toml")]
    pub(crate) config: Option<PathBuf>,
    /// Override one setting, e.g. `--set method=components --set scaling=covariance --set components=5`.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub(crate) set: Vec<String>,
}

#[derive(clap::Args, Debug)]
pub(crate) struct WindowArgs {
    /// CSV of returns: header row, periods in the first column, one factor per column.
    #[arg(long, value_name = "FILE.csv")]
    pub(crate) returns: PathBuf,
    /// Column holding the market excess return (not a factor).
    #[arg(long, value_name = "COLUMN")]
    pub(crate) market: Option<String>,
    /// CSV `factor,weight` of weights currently held, for turnover.
    #[arg(long, value_name = "FILE.csv")]
    pub(crate) previous_weights: Option<PathBuf>,
}

#[derive(clap::Args, Debug)]
pub(crate) struct FitArgs {
    #[command(flatten)]
    pub(crate) window: WindowArgs,
    #[command(flatten)]
    pub(crate) settings: SettingsArgs,
    /// Worker threads for cross-validation folds (results do not depend on it).
    #[arg(long, default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..=256))]
    pub(crate) threads: u16,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub(crate) format: Format,
    #[command(flatten)]
    pub(crate) strict: StrictArgs,
}

#[derive(clap::Args, Debug)]
pub(crate) struct DemoArgs {
    #[command(flatten)]
    pub(crate) settings: SettingsArgs,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub(crate) format: Format,
    /// Also write the demo window as CSV to this file.
    #[arg(long, value_name = "FILE.csv")]
    pub(crate) write_csv: Option<PathBuf>,
    /// Folder for the report of the demo's closing backtest.
    #[arg(long, value_name = "DIR", default_value = "keelson-demo-report")]
    pub(crate) report_dir: PathBuf,
    /// Skip the closing backtest.
    #[arg(long)]
    pub(crate) skip_backtest: bool,
}

#[derive(clap::Args, Debug)]
pub(crate) struct ServeArgs {
    /// TOML server configuration (sections server, estimator, log).
    #[arg(long, value_name = "FILE.toml")]
    pub(crate) config: Option<PathBuf>,
    /// gRPC listen address; overrides `server.address`.
    #[arg(long, value_name = "HOST:PORT")]
    pub(crate) addr: Option<String>,
}

/// How a client reaches the server: address, TLS material, token.
#[derive(clap::Args, Debug)]
pub(crate) struct ConnectArgs {
    /// Server address, e.g. http://127.0.0.1:50051 (https:// with TLS). Default: the port of
    /// KEELSON__SERVER__ADDRESS on 127.0.0.1 when that is set, else 127.0.0.1:50051.
    #[arg(long, value_name = "URL")]
    pub(crate) addr: Option<String>,
    /// PEM CA bundle that signed the server certificate; turns TLS on.
    #[arg(long, value_name = "FILE.pem")]
    pub(crate) ca_cert: Option<PathBuf>,
    /// PEM client certificate, for servers that require mutual TLS.
    #[arg(long, value_name = "FILE.pem", requires = "client_key")]
    pub(crate) client_cert: Option<PathBuf>,
    /// PEM private key of the client certificate.
    #[arg(long, value_name = "FILE.pem", requires = "client_cert")]
    pub(crate) client_key: Option<PathBuf>,
    /// Name to verify in the server certificate, when it differs from the address host.
    #[arg(long, value_name = "NAME")]
    pub(crate) server_name: Option<String>,
}

#[derive(clap::Args, Debug)]
pub(crate) struct CallArgs {
    #[command(flatten)]
    pub(crate) connect: ConnectArgs,
    /// File whose first line is the bearer token (the KEELSON_TOKEN environment variable also works).
    #[arg(long, value_name = "FILE")]
    pub(crate) token_file: Option<PathBuf>,
    #[command(flatten)]
    pub(crate) window: WindowArgs,
    /// Set one setting in the request, e.g. `--set kappa=0.8`; unset ones take the server's defaults.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub(crate) set: Vec<String>,
    /// Request id, echoed back and logged by the server.
    #[arg(long, default_value = "")]
    pub(crate) request_id: String,
    /// Deadline of the call in milliseconds.
    #[arg(long, default_value_t = 30_000)]
    pub(crate) timeout_ms: u64,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub(crate) format: Format,
    #[command(flatten)]
    pub(crate) strict: StrictArgs,
}

#[derive(clap::Args, Debug)]
pub(crate) struct HealthArgs {
    #[command(flatten)]
    pub(crate) connect: ConnectArgs,
    /// Health-check name: empty for the whole server, or liveness, readiness, keelson.v1.WeightsService.
    #[arg(long, default_value = "")]
    pub(crate) service: String,
    /// Deadline in milliseconds.
    #[arg(long, default_value_t = 2_000)]
    pub(crate) timeout_ms: u64,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
pub(crate) enum Format {
    /// A readable table.
    Table,
    /// The ComputeWeightsResponse in the proto3 JSON mapping.
    Json,
}

impl ConnectArgs {
    /// `--addr`, or the local port of the server's own configured address (so that a
    /// container's healthcheck follows `KEELSON__SERVER__ADDRESS`).
    pub(crate) fn address(&self) -> String {
        if let Some(a) = &self.addr {
            return a.clone();
        }
        let port = std::env::var("KEELSON__SERVER__ADDRESS")
            .ok()
            .and_then(|a| a.parse::<std::net::SocketAddr>().ok())
            .map_or(50051, |a| a.port());
        format!("127.0.0.1:{port}")
    }

    /// The client library's target.
    pub(crate) fn target(&self) -> keelson::client::Target {
        keelson::client::Target {
            addr: self.address(),
            ca_cert: self.ca_cert.clone(),
            client_identity: self.client_cert.clone().zip(self.client_key.clone()),
            server_name: self.server_name.clone(),
        }
    }
}

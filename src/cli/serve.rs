//! `keelson serve`: the gRPC API until SIGTERM or SIGINT, then a drain.

use std::process::ExitCode;

use anyhow::Context as _;
use keelson::service::{self, config::ServerConfig};

use super::args::ServeArgs;
use super::runtime;

pub(crate) fn run(a: ServeArgs) -> anyhow::Result<ExitCode> {
    let mut raw = ServerConfig::load(a.config.as_deref(), std::env::vars())?;
    if let Some(addr) = a.addr {
        raw.server.address = addr;
    }
    let config = raw.check()?;
    init_logging(&config.raw.log);
    tracing::info!(config = %config.redacted_json(), "effective configuration");
    runtime()?.block_on(async move {
        let listener = tokio::net::TcpListener::bind(config.address)
            .await
            .with_context(|| format!("cannot listen on {}", config.address))?;
        tracing::info!(address = %listener.local_addr()?, "serving keelson.v1.WeightsService");
        service::serve(config, listener, service::termination_signal()).await.context("server failed")
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

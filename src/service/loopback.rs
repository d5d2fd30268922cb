//! A server on an ephemeral loopback port inside this process, for the
//! demo, the examples and the integration tests.

use std::net::SocketAddr;

use tokio::net::TcpListener;
use tokio::sync::oneshot;

use super::config::{ConfigError, ServerConfig};
use super::{Listeners, ServeError, WeightsApi, serve_api};

/// A running in-process server and the handles its owner needs.
#[derive(Debug)]
pub struct LoopbackServer {
    /// gRPC address.
    pub addr: SocketAddr,
    /// The service, for its counters.
    pub api: WeightsApi,
    /// Metrics address, when `metrics.address` was set.
    pub metrics: Option<SocketAddr>,
    /// Plaintext health address, when `server.health_address` was set.
    pub health: Option<SocketAddr>,
    stop: Option<oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), ServeError>>,
}

/// Why a loopback server could not start.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum LoopbackError {
    /// The configuration is unusable.
    #[error(transparent)]
    Config(#[from] ConfigError),
    /// A loopback port could not be bound.
    #[error("cannot bind a loopback port: {0}")]
    Bind(#[from] std::io::Error),
}

async fn bind(addr: Option<SocketAddr>) -> Result<Option<TcpListener>, std::io::Error> {
    match addr {
        Some(a) => TcpListener::bind(a).await.map(Some),
        None => Ok(None),
    }
}

impl LoopbackServer {
    /// Starts a server on `127.0.0.1:0` with metrics off, after `edit` (which
    /// may turn metrics on, on a loopback address).
    ///
    /// # Errors
    /// An unusable configuration or a port that cannot be bound.
    pub async fn start(edit: impl FnOnce(&mut ServerConfig)) -> Result<LoopbackServer, LoopbackError> {
        let mut c = ServerConfig::default();
        c.server.address = "127.0.0.1:0".into();
        c.metrics.address = String::new();
        edit(&mut c);
        let config = c.check()?;
        let grpc = TcpListener::bind(config.address).await?;
        let metrics = bind(config.metrics_address).await?;
        let health = bind(config.health_address).await?;
        let addr = grpc.local_addr()?;
        let metrics_addr = metrics.as_ref().map(TcpListener::local_addr).transpose()?;
        let health_addr = health.as_ref().map(TcpListener::local_addr).transpose()?;
        let api = WeightsApi::new(config);
        let (tx, rx) = oneshot::channel::<()>();
        let task = tokio::spawn(serve_api(api.clone(), Listeners { grpc, metrics, health }, async {
            let _ = rx.await;
        }));
        Ok(LoopbackServer { addr, api, metrics: metrics_addr, health: health_addr, stop: Some(tx), task })
    }

    /// The server's URL, `http://127.0.0.1:PORT`.
    pub fn url(&self) -> String {
        format!("http://{}", self.addr)
    }

    /// Signals shutdown without waiting.
    pub fn begin_shutdown(&mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
    }

    /// Waits for the server task to end.
    ///
    /// # Errors
    /// The server's own error, or [`ServeError::Stopped`] when its task ended abnormally.
    pub async fn finished(self) -> Result<(), ServeError> {
        self.task.await.map_err(|e| ServeError::Stopped(e.to_string()))?
    }

    /// Signals shutdown and waits for the drain to end.
    ///
    /// # Errors
    /// As [`LoopbackServer::finished`].
    pub async fn shutdown(mut self) -> Result<(), ServeError> {
        self.begin_shutdown();
        self.finished().await
    }
}

//! A `keelson` server in-process on loopback ports, shared by the
//! integration tests.
#![allow(dead_code)]

use std::net::SocketAddr;
use std::time::Duration;

use keelson::proto::weights_service_client::WeightsServiceClient;
use keelson::service::config::ServerConfig;
use keelson::service::{self, Listeners, WeightsApi};
use tokio::net::TcpListener;
use tokio::sync::oneshot;
use tonic::transport::Channel;

/// A running server and the handles a test needs.
pub struct Server {
    /// gRPC address.
    pub addr: SocketAddr,
    /// The service, for its counters.
    pub api: WeightsApi,
    /// Metrics address, when `metrics.address` was set by the test.
    pub metrics: Option<SocketAddr>,
    /// Plaintext health address, when `server.health_address` was set by the test.
    pub health: Option<SocketAddr>,
    stop: Option<oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), service::ServeError>>,
}

async fn bind(addr: Option<SocketAddr>) -> Option<TcpListener> {
    match addr {
        Some(a) => Some(TcpListener::bind(a).await.unwrap()),
        None => None,
    }
}

impl Server {
    /// Starts a server on `127.0.0.1:0` with metrics off, after `edit`.
    pub async fn start(edit: impl FnOnce(&mut ServerConfig)) -> Server {
        let mut c = ServerConfig::default();
        c.server.address = "127.0.0.1:0".into();
        c.metrics.address = String::new();
        edit(&mut c);
        let config = c.check().unwrap();
        let grpc = TcpListener::bind(config.address).await.unwrap();
        let metrics = bind(config.metrics_address).await;
        let health = bind(config.health_address).await;
        let addr = grpc.local_addr().unwrap();
        let metrics_addr = metrics.as_ref().map(|l| l.local_addr().unwrap());
        let health_addr = health.as_ref().map(|l| l.local_addr().unwrap());
        let api = WeightsApi::new(config);
        let (tx, rx) = oneshot::channel::<()>();
        let task = tokio::spawn(service::serve_api(api.clone(), Listeners { grpc, metrics, health }, async {
            let _ = rx.await;
        }));
        Server { addr, api, metrics: metrics_addr, health: health_addr, stop: Some(tx), task }
    }

    /// A plaintext channel to the gRPC port.
    pub async fn channel(&self) -> Channel {
        Channel::from_shared(format!("http://{}", self.addr)).unwrap().connect().await.unwrap()
    }

    /// A client without message-size limits of its own.
    pub async fn client(&self) -> WeightsServiceClient<Channel> {
        WeightsServiceClient::new(self.channel().await)
            .max_encoding_message_size(1 << 30)
            .max_decoding_message_size(1 << 30)
    }

    /// Signals shutdown without waiting.
    pub fn begin_shutdown(&mut self) {
        if let Some(tx) = self.stop.take() {
            let _ = tx.send(());
        }
    }

    /// Waits for the server task to end; it must end without error.
    pub async fn finished(self) {
        self.task.await.unwrap().unwrap();
    }

    /// Signals shutdown and waits for the drain to end.
    pub async fn shutdown(mut self) {
        self.begin_shutdown();
        self.finished().await;
    }
}

/// Polls `cond` every 10 ms, at most `limit` times; true when it held.
pub async fn eventually(limit: usize, cond: impl Fn() -> bool) -> bool {
    for _ in 0..limit {
        if cond() {
            return true;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    cond()
}

//! The library's in-process loopback server, with the shortcuts the
//! integration tests use.
#![allow(dead_code)]

use std::time::Duration;

use keelson::client::Target;
use keelson::proto::weights_service_client::WeightsServiceClient;
use keelson::service::config::ServerConfig;
use keelson::service::loopback::LoopbackServer;
use tonic::transport::Channel;

/// A running server; its fields (`addr`, `api`, `metrics`, `health`) through `Deref`.
pub struct Server(LoopbackServer);

impl std::ops::Deref for Server {
    type Target = LoopbackServer;
    fn deref(&self) -> &LoopbackServer {
        &self.0
    }
}

impl Server {
    /// Starts a server on `127.0.0.1:0` with metrics off, after `edit`.
    pub async fn start(edit: impl FnOnce(&mut ServerConfig)) -> Server {
        Server(LoopbackServer::start(edit).await.expect("the loopback server starts"))
    }

    /// A plaintext channel to the gRPC port, through the library's client.
    pub async fn channel(&self) -> Channel {
        Target::plaintext(self.0.url()).channel(Duration::from_secs(5), None).await.unwrap()
    }

    /// A client without message-size limits of its own.
    pub async fn client(&self) -> WeightsServiceClient<Channel> {
        WeightsServiceClient::new(self.channel().await)
            .max_encoding_message_size(1 << 30)
            .max_decoding_message_size(1 << 30)
    }

    /// Signals shutdown without waiting.
    pub fn begin_shutdown(&mut self) {
        self.0.begin_shutdown();
    }

    /// Waits for the server task to end; it must end without error.
    pub async fn finished(self) {
        self.0.finished().await.unwrap();
    }

    /// Signals shutdown and waits for the drain to end.
    pub async fn shutdown(self) {
        self.0.shutdown().await.unwrap();
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

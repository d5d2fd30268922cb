//! The gRPC client side: where a server is ([`Target`]), its TLS material and
//! bearer token, a connected `WeightsService` client, a health check, and a
//! readable account of a failed call. Used by the `call`, `healthcheck` and
//! `demo` commands, the examples and the tests.

use std::path::PathBuf;
use std::time::Duration;

use thiserror::Error;
use tonic::metadata::{Ascii, MetadataValue};
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint, Identity};
use tonic_types::StatusExt as _;

use crate::proto::weights_service_client::WeightsServiceClient;

/// Largest message the client sends or accepts (a server's own limit is
/// usually lower and decides).
pub const MAX_MESSAGE_BYTES: usize = 256 << 20;

/// Where a server is and how to reach it.
#[derive(Clone, Debug, Default)]
pub struct Target {
    /// `http://HOST:PORT`, `https://HOST:PORT`, or `HOST:PORT` (then the
    /// scheme follows whether TLS is on).
    pub addr: String,
    /// PEM bundle of the CAs that signed the server certificate; set = TLS.
    pub ca_cert: Option<PathBuf>,
    /// PEM client certificate and key, for servers that require mutual TLS.
    pub client_identity: Option<(PathBuf, PathBuf)>,
    /// Name to verify in the server certificate, when it differs from the host.
    pub server_name: Option<String>,
}

/// Why a client could not be set up or connect.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum ClientError {
    /// The address is not a URL.
    #[error("address {addr}: {reason}")]
    Address {
        /// The address given.
        addr: String,
        /// What is wrong.
        reason: String,
    },
    /// TLS options that do not go together or cannot be used.
    #[error("TLS settings: {0}")]
    Tls(String),
    /// A TLS file could not be read.
    #[error("cannot read {path}: {source}")]
    Read {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The bearer token is empty or not printable ASCII.
    #[error("the bearer token {0}")]
    Token(&'static str),
    /// No connection could be made.
    #[error("cannot connect to {addr}: {reason}")]
    Connect {
        /// The address.
        addr: String,
        /// The transport's account, its causes joined once each.
        reason: String,
    },
}

impl ClientError {
    /// Whether the caller's options are at fault (rather than the network or server).
    pub fn is_usage(&self) -> bool {
        match self {
            ClientError::Address { .. } | ClientError::Tls(_) | ClientError::Token(_) => true,
            ClientError::Read { .. } | ClientError::Connect { .. } => false,
        }
    }
}

/// An error and its causes, each told once ("tcp connect error: Connection
/// refused", not the same words twice).
fn causes(e: &(dyn std::error::Error + 'static)) -> String {
    let mut parts: Vec<String> = Vec::new();
    let mut next = Some(e);
    while let Some(err) = next {
        let text = err.to_string();
        if !parts.iter().any(|p| p.contains(&text)) {
            parts.push(text);
        }
        next = err.source();
    }
    parts.join(": ")
}

impl Target {
    /// A plaintext target.
    pub fn plaintext(addr: impl Into<String>) -> Target {
        Target { addr: addr.into(), ..Target::default() }
    }

    /// The endpoint with its TLS configuration.
    ///
    /// # Errors
    /// An unusable address, unreadable or inconsistent TLS options.
    pub fn endpoint(&self) -> Result<Endpoint, ClientError> {
        let tls = self.ca_cert.is_some();
        let url = if self.addr.contains("://") {
            self.addr.clone()
        } else if tls {
            format!("https://{}", self.addr)
        } else {
            format!("http://{}", self.addr)
        };
        let mut ep = Endpoint::from_shared(url)
            .map_err(|e| ClientError::Address { addr: self.addr.clone(), reason: e.to_string() })?;
        let read = |p: &PathBuf| std::fs::read(p).map_err(|source| ClientError::Read { path: p.clone(), source });
        match &self.ca_cert {
            Some(ca) => {
                let mut t = ClientTlsConfig::new().ca_certificate(Certificate::from_pem(read(ca)?));
                if let Some((cert, key)) = &self.client_identity {
                    t = t.identity(Identity::from_pem(read(cert)?, read(key)?));
                }
                if let Some(name) = &self.server_name {
                    t = t.domain_name(name.clone());
                }
                ep = ep.tls_config(t).map_err(|e| ClientError::Tls(causes(&e)))?;
            }
            None if self.client_identity.is_some() || self.server_name.is_some() => {
                return Err(ClientError::Tls("a client certificate or server name needs a CA certificate".into()));
            }
            None => {}
        }
        Ok(ep)
    }

    /// A connected channel; `timeout`, when given, also bounds every call.
    ///
    /// # Errors
    /// As [`Target::endpoint`], or [`ClientError::Connect`].
    pub async fn channel(&self, connect_timeout: Duration, timeout: Option<Duration>) -> Result<Channel, ClientError> {
        let mut ep = self.endpoint()?.connect_timeout(connect_timeout);
        if let Some(t) = timeout {
            ep = ep.timeout(t);
        }
        ep.connect().await.map_err(|e| ClientError::Connect { addr: self.addr.clone(), reason: causes(&e) })
    }

    /// A connected `WeightsService` client.
    ///
    /// # Errors
    /// As [`Target::channel`].
    pub async fn weights_client(&self) -> Result<WeightsServiceClient<Channel>, ClientError> {
        let channel = self.channel(Duration::from_secs(5), None).await?;
        Ok(WeightsServiceClient::new(channel)
            .max_decoding_message_size(MAX_MESSAGE_BYTES)
            .max_encoding_message_size(MAX_MESSAGE_BYTES))
    }

    /// The serving status of `service` ("" for the whole server).
    ///
    /// # Errors
    /// As [`Target::channel`], or the health call's status.
    pub async fn health(
        &self,
        service: &str,
        timeout: Duration,
    ) -> Result<tonic_health::pb::health_check_response::ServingStatus, HealthError> {
        use tonic_health::pb::{HealthCheckRequest, health_check_response::ServingStatus, health_client::HealthClient};
        let channel = self.channel(timeout, Some(timeout)).await?;
        let resp = HealthClient::new(channel).check(HealthCheckRequest { service: service.to_owned() }).await?;
        Ok(ServingStatus::try_from(resp.into_inner().status).unwrap_or(ServingStatus::Unknown))
    }
}

/// Why a health check failed.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum HealthError {
    /// No connection.
    #[error(transparent)]
    Client(#[from] ClientError),
    /// The server answered with an error.
    #[error("{}", describe_status(.0))]
    Status(#[from] tonic::Status),
}

/// The `authorization` header value for a bearer token.
///
/// # Errors
/// [`ClientError::Token`] for an empty or non-ASCII token.
pub fn bearer(token: &str) -> Result<MetadataValue<Ascii>, ClientError> {
    let token = token.trim();
    if token.is_empty() {
        return Err(ClientError::Token("is empty"));
    }
    // Header values may carry other bytes; a token is printable ASCII (RFC 6750 b64token).
    if !token.bytes().all(|b| b.is_ascii_graphic()) {
        return Err(ClientError::Token("is not printable ASCII"));
    }
    format!("Bearer {token}").parse().map_err(|_| ClientError::Token("is not printable ASCII"))
}

/// A failed call for people: code, message and field violations.
pub fn describe_status(s: &tonic::Status) -> String {
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn scheme_follows_tls_and_inconsistent_options_are_refused() {
        assert_eq!(Target::plaintext("127.0.0.1:1").endpoint().unwrap().uri().scheme_str(), Some("http"));
        let bad = Target { server_name: Some("x".into()), ..Target::plaintext("127.0.0.1:1") };
        assert!(matches!(bad.endpoint(), Err(ClientError::Tls(_))));
        assert!(Target::plaintext("http://[::1").endpoint().unwrap_err().is_usage());
        let missing = Target { ca_cert: Some("/nonexistent/ca.pem".into()), ..Target::plaintext("h:1") };
        assert!(matches!(missing.endpoint(), Err(ClientError::Read { .. })));
    }

    #[test]
    fn tokens_are_checked() {
        assert!(bearer("  ").is_err());
        assert!(bearer("tök").is_err());
        assert_eq!(bearer(" abc ").unwrap().to_str().unwrap(), "Bearer abc");
    }

    #[test]
    fn causes_are_told_once() {
        #[derive(Debug)]
        struct E(&'static str, Option<Box<E>>);
        impl std::fmt::Display for E {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str(self.0)
            }
        }
        impl std::error::Error for E {
            fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
                self.1.as_deref().map(|e| e as _)
            }
        }
        let e = E("tcp connect error", Some(Box::new(E("tcp connect error", Some(Box::new(E("refused", None)))))));
        assert_eq!(causes(&e), "tcp connect error: refused");
    }
}

//! Server assembly: the gRPC listener with TLS, tokens, reflection and
//! metrics layers, the optional health-only and metrics listeners, and the
//! drain on shutdown.

use std::future::Future;
use std::sync::Arc;
use std::time::Duration;

use tokio::net::TcpListener;
use tonic_health::ServingStatus;

use super::config::ValidConfig;
use super::{FILE_DESCRIPTOR_SET, SERVICE_NAME, WeightsApi, auth, metrics, telemetry};
use crate::proto::weights_service_server::WeightsServiceServer;
use tonic_reflection::server as reflection;

/// Health-check names registered beside the service name and the empty
/// (whole-server) name.
pub const HEALTH_NAMES: [&str; 2] = ["liveness", "readiness"];

/// Serves on `listener` until `shutdown` resolves, then drains: readiness
/// goes NOT_SERVING, new requests get UNAVAILABLE, in-flight requests finish,
/// all within `server.drain_timeout_ms`. The metrics endpoint, when
/// `metrics.address` is set, is bound here and served until the drain ends.
///
/// # Errors
/// A transport error from tonic, or the metrics address cannot be bound.
pub async fn serve(
    config: ValidConfig,
    listener: TcpListener,
    shutdown: impl Future<Output = ()>,
) -> Result<(), ServeError> {
    let bind = |key: &'static str, addr: Option<std::net::SocketAddr>| async move {
        match addr {
            Some(a) => TcpListener::bind(a).await.map(Some).map_err(|e| ServeError::Bind(key, a, e)),
            None => Ok(None),
        }
    };
    let metrics = bind("metrics.address", config.metrics_address).await?;
    let health = bind("server.health_address", config.health_address).await?;
    serve_api(WeightsApi::new(config), Listeners { grpc: listener, metrics, health }, shutdown).await
}

/// The sockets a server answers on.
#[derive(Debug)]
pub struct Listeners {
    /// The gRPC API (with TLS when configured).
    pub grpc: TcpListener,
    /// The Prometheus endpoint.
    pub metrics: Option<TcpListener>,
    /// Plaintext health checks only.
    pub health: Option<TcpListener>,
}

/// Why the server stopped with an error.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ServeError {
    /// The gRPC transport failed (including unusable TLS material).
    #[error("gRPC transport: {0}")]
    Transport(#[from] tonic::transport::Error),
    /// A configured address could not be bound.
    #[error("cannot listen on {0} {1}: {2}")]
    Bind(&'static str, std::net::SocketAddr, std::io::Error),
    /// The server task ended abnormally.
    #[error("the server task ended abnormally: {0}")]
    Stopped(String),
    /// Trace export could not start.
    #[error(transparent)]
    Telemetry(#[from] telemetry::TelemetryError),
}

/// [`serve`] with a service built by the caller, who keeps a handle to it
/// (tests read [`WeightsApi::computing`] and [`WeightsApi::stopped_early`]),
/// and an already-bound metrics listener (or none).
///
/// # Errors
/// A transport error from tonic.
pub async fn serve_api(
    api: WeightsApi,
    listeners: Listeners,
    shutdown: impl Future<Output = ()>,
) -> Result<(), ServeError> {
    let Listeners { grpc: listener, metrics: metrics_listener, health: health_listener } = listeners;
    let config = &api.shared.config;
    let s = config.raw.server.clone();
    let telemetry = telemetry::Telemetry::start(&config.raw.tracing)?;
    if telemetry.is_enabled() {
        tracing::info!(endpoint = %config.raw.tracing.otlp_endpoint, "exporting traces over OTLP/gRPC");
    }
    if api.shared.telemetry.set(telemetry).is_err() {
        tracing::warn!("this service was served before; its first trace exporter stays");
    }
    let (reporter, health) = tonic_health::server::health_reporter();
    for name in ["", SERVICE_NAME, HEALTH_NAMES[0], HEALTH_NAMES[1]] {
        reporter.set_service_status(name, ServingStatus::Serving).await;
    }
    let guard = auth::RequireToken::new(config.tokens.clone());
    let (v1, v1alpha) = reflection_services(s.reflection, &guard);
    let service = tonic::service::interceptor::InterceptedService::new(
        WeightsServiceServer::new(api.clone())
            .max_decoding_message_size(s.max_message_bytes)
            .max_encoding_message_size(s.max_message_bytes),
        guard,
    );
    let metrics_task = metrics_listener.map(|l| {
        let scrape_api = api.clone();
        tokio::spawn(metrics::serve_http(l, Arc::new(move || scrape_api.metrics_text())))
    });
    let health_task = health_listener.map(|l| {
        let health = health.clone();
        tokio::spawn(async move {
            let incoming = tonic::transport::server::TcpIncoming::from(l).with_nodelay(Some(true));
            if let Err(e) = tonic::transport::Server::builder().add_service(health).serve_with_incoming(incoming).await
            {
                tracing::error!(error = %e, "health listener failed");
            }
        })
    });
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let mut builder = tonic::transport::Server::builder();
    if let Some(tls) = &config.tls {
        let mut t = tonic::transport::ServerTlsConfig::new()
            .identity(tonic::transport::Identity::from_pem(&tls.cert, &tls.key))
            .timeout(Duration::from_secs(10));
        if let Some(ca) = &tls.client_ca {
            t = t.client_ca_root(tonic::transport::Certificate::from_pem(ca)).client_auth_optional(false);
        }
        builder = builder.tls_config(t)?;
    }
    if s.max_connection_age_ms > 0 {
        builder = builder
            .max_connection_age(Duration::from_millis(s.max_connection_age_ms))
            .max_connection_age_grace(Duration::from_millis(s.max_connection_age_grace_ms));
    }
    // Nagle's algorithm with delayed ACKs adds ~40 ms to small responses;
    // with a caller-supplied listener tonic leaves TCP_NODELAY to the incoming stream.
    let server = builder
        .layer(metrics::MetricsLayer::new(api.shared.metrics.clone()))
        .add_service(health)
        .add_optional_service(v1)
        .add_optional_service(v1alpha)
        .add_service(service)
        .serve_with_incoming_shutdown(
            tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true)),
            async {
                let _ = stop_rx.await;
            },
        );
    tokio::pin!(server);
    let outcome = tokio::select! {
        r = &mut server => Some(r),
        () = shutdown => None,
    };
    let result = match outcome {
        Some(r) => r.map_err(ServeError::from),
        None => {
            tracing::info!(in_flight = api.in_flight(), "shutdown requested: draining");
            reporter.set_service_status("readiness", ServingStatus::NotServing).await;
            reporter.set_service_status("", ServingStatus::NotServing).await;
            reporter.set_service_status(SERVICE_NAME, ServingStatus::NotServing).await;
            api.start_draining();
            let _ = stop_tx.send(());
            match tokio::time::timeout(Duration::from_millis(s.drain_timeout_ms), &mut server).await {
                Ok(r) => {
                    tracing::info!("drained");
                    r.map_err(ServeError::from)
                }
                Err(_) => {
                    tracing::warn!(
                        in_flight = api.in_flight(),
                        budget_ms = s.drain_timeout_ms,
                        "drain budget exceeded"
                    );
                    Ok(())
                }
            }
        }
    };
    for t in [metrics_task, health_task].into_iter().flatten() {
        t.abort();
    }
    let shared = api.shared.clone();
    let _ = tokio::task::spawn_blocking(move || {
        if let Some(t) = shared.telemetry.get() {
            t.shutdown();
        }
    })
    .await;
    result
}

type Guarded<S> = tonic::service::interceptor::InterceptedService<S, auth::RequireToken>;

fn reflection_builder() -> reflection::Builder<'static> {
    reflection::Builder::configure()
        .register_encoded_file_descriptor_set(FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
}

/// The reflection services (v1 and v1alpha) behind the token guard, when on.
#[allow(clippy::type_complexity)]
fn reflection_services(
    on: bool,
    guard: &auth::RequireToken,
) -> (
    Option<Guarded<reflection::v1::ServerReflectionServer<impl reflection::v1::ServerReflection>>>,
    Option<Guarded<reflection::v1alpha::ServerReflectionServer<impl reflection::v1alpha::ServerReflection>>>,
) {
    if !on {
        return (None, None);
    }
    use tonic::service::interceptor::InterceptedService;
    let v1 = reflection_builder().build_v1().ok().map(|svc| InterceptedService::new(svc, guard.clone()));
    let v1alpha = reflection_builder().build_v1alpha().ok().map(|svc| InterceptedService::new(svc, guard.clone()));
    (v1, v1alpha)
}

/// Resolves on SIGTERM or SIGINT.
pub async fn termination_signal() {
    #[cfg(unix)]
    {
        let mut term = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(s) => s,
            Err(e) => {
                tracing::error!(error = %e, "cannot listen for SIGTERM; only SIGINT stops the server");
                let _ = tokio::signal::ctrl_c().await;
                return;
            }
        };
        tokio::select! {
            _ = term.recv() => tracing::info!("SIGTERM received"),
            _ = tokio::signal::ctrl_c() => tracing::info!("SIGINT received"),
        }
    }
    #[cfg(not(unix))]
    {
        let _ = tokio::signal::ctrl_c().await;
    }
}

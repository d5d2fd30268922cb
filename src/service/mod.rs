//! The gRPC transport around the estimator: `keelson.v1.WeightsService`,
//! health, reflection, limits, load shedding, deadlines and graceful drain.
//! Handlers only validate → convert → compute (on the blocking pool) →
//! convert; every error becomes a status in [`status::to_status`].

pub mod auth;
pub mod config;
pub mod metrics;
pub mod status;
pub mod telemetry;

use std::future::Future;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::{Duration, Instant, SystemTime};

use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tonic::{Request, Response, Status};
use tonic_health::ServingStatus;

use crate::convert::{request_into_parts, settings_from_proto, settings_to_proto, weight_set_to_proto};
use crate::estimator::{self, EstimateError, FitOptions, Stop};
use crate::proto;
use crate::proto::weights_service_server::{WeightsService, WeightsServiceServer};
use config::ValidConfig;
use status::{ServiceError, to_status};
use telemetry::CallSpan;

/// The encoded descriptor set of the `keelson.v1` API, for reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = include_bytes!(concat!(env!("OUT_DIR"), "/keelson_descriptor.bin"));

/// How long a finished backtest waits for its client to take the result.
const RESULT_HANDOFF: Duration = Duration::from_secs(60);

/// Full gRPC name of the weights service, also its health-check name.
pub const SERVICE_NAME: &str = "keelson.v1.WeightsService";

/// State shared by every request.
#[derive(Debug)]
struct Shared {
    config: ValidConfig,
    /// Requests admitted (computing or waiting for a worker).
    admission: Arc<Semaphore>,
    /// Requests computing on the blocking pool.
    workers: Arc<Semaphore>,
    draining: AtomicBool,
    /// Computations that stopped early on a deadline or a cancellation.
    stopped_early: AtomicU64,
    metrics: Arc<metrics::Metrics>,
    /// Trace export, set when serving starts (it needs the runtime).
    telemetry: std::sync::OnceLock<telemetry::Telemetry>,
}

/// The `WeightsService` implementation.
#[derive(Clone, Debug)]
pub struct WeightsApi {
    shared: Arc<Shared>,
}

/// Sets the cancellation flag when the request's future is dropped (the
/// client went away or the transport timed it out), so the blocking
/// computation stops at its next check.
struct CancelOnDrop(Arc<AtomicBool>);

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        self.0.store(true, Ordering::Relaxed);
    }
}

/// The response stream of `RunBacktest`: progress messages, then the result.
pub struct BacktestStream {
    rx: tokio::sync::mpsc::Receiver<Result<proto::RunBacktestResponse, Status>>,
    _cancel: CancelOnDrop,
}

impl tonic::codegen::tokio_stream::Stream for BacktestStream {
    type Item = Result<proto::RunBacktestResponse, Status>;

    fn poll_next(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Option<Self::Item>> {
        self.rx.poll_recv(cx)
    }
}

/// Parses the `grpc-timeout` header (gRPC over HTTP/2 spec: 1–8 digits and a
/// unit H, M, S, m, u or n).
fn grpc_timeout(meta: &tonic::metadata::MetadataMap) -> Option<Duration> {
    let v = meta.get("grpc-timeout")?.to_str().ok()?;
    if v.len() < 2 || v.len() > 9 {
        return None;
    }
    let (digits, unit) = v.split_at(v.len() - 1);
    let n: u64 = digits.parse().ok()?;
    Some(match unit {
        "H" => Duration::from_secs(n.saturating_mul(3600)),
        "M" => Duration::from_secs(n.saturating_mul(60)),
        "S" => Duration::from_secs(n),
        "m" => Duration::from_millis(n),
        "u" => Duration::from_micros(n),
        "n" => Duration::from_nanos(n),
        _ => return None,
    })
}

impl WeightsApi {
    /// A service with the given configuration.
    pub fn new(config: ValidConfig) -> Self {
        let admission = Arc::new(Semaphore::new(config.raw.server.max_in_flight));
        let workers = Arc::new(Semaphore::new(config.workers));
        let draining = AtomicBool::new(false);
        let stopped_early = AtomicU64::new(0);
        let metrics = Arc::new(metrics::Metrics::default());
        let telemetry = std::sync::OnceLock::new();
        WeightsApi {
            shared: Arc::new(Shared { config, admission, workers, draining, stopped_early, metrics, telemetry }),
        }
    }

    /// The Prometheus exposition text of this server's metrics.
    pub fn metrics_text(&self) -> String {
        self.shared.metrics.render(metrics::Gauges {
            in_flight: self.in_flight(),
            computing: self.computing(),
            max_in_flight: self.shared.config.raw.server.max_in_flight,
            stopped_early: self.stopped_early(),
            draining: self.shared.draining.load(Ordering::Relaxed),
        })
    }

    /// Computations running on the blocking pool right now.
    pub fn computing(&self) -> usize {
        self.shared.config.workers - self.shared.workers.available_permits()
    }

    /// Computations that stopped early because their deadline passed or their
    /// caller went away, since start.
    pub fn stopped_early(&self) -> u64 {
        self.shared.stopped_early.load(Ordering::Relaxed)
    }

    /// A span for one call of `method` (a no-op when trace export is off).
    fn call_span(&self, method: &'static str, meta: &tonic::metadata::MetadataMap) -> CallSpan {
        self.shared.telemetry.get().map_or_else(CallSpan::none, |t| t.call_span(method, meta, SystemTime::now()))
    }

    /// Refuses new requests from now on (in-flight ones continue).
    pub fn start_draining(&self) {
        self.shared.draining.store(true, Ordering::SeqCst);
    }

    /// Requests currently admitted.
    pub fn in_flight(&self) -> usize {
        self.shared.config.raw.server.max_in_flight - self.shared.admission.available_permits()
    }

    /// Admits a request unless the server is draining or at its in-flight
    /// limit; the permit is held until the request's work ends.
    fn admit(&self) -> Result<tokio::sync::OwnedSemaphorePermit, ServiceError> {
        if self.shared.draining.load(Ordering::SeqCst) {
            self.shared.metrics.shed(metrics::ShedReason::Draining);
            return Err(ServiceError::Draining);
        }
        self.shared.admission.clone().try_acquire_owned().map_err(|_| {
            self.shared.metrics.shed(metrics::ShedReason::Overloaded);
            ServiceError::Overloaded { limit: self.shared.config.raw.server.max_in_flight }
        })
    }

    /// The request's settings over the server's defaults, validated.
    fn settings(&self, p: &proto::Settings) -> Result<estimator::ValidSettings, ServiceError> {
        Ok(settings_from_proto(p, &self.shared.config.defaults).and_then(|s| s.check()).map_err(EstimateError::from)?)
    }

    /// The earlier of the client's deadline and the server's own limit
    /// (`limit_ms`), and whether the client's is the binding one.
    fn deadline(&self, client_timeout: Option<Duration>, limit_ms: u64) -> (Instant, bool) {
        let server_limit = Duration::from_millis(limit_ms);
        let client_binds = client_timeout.is_some_and(|c| c < server_limit);
        (Instant::now() + client_timeout.map_or(server_limit, |c| c.min(server_limit)), client_binds)
    }

    /// Rejects windows above the configured size limits.
    fn check_size(&self, returns: Option<&proto::Matrix>, names: usize) -> Result<(), ServiceError> {
        let limits = &self.shared.config.raw.server;
        let (rows, cols, values) = returns.map_or((0, 0, 0), |m| (m.rows as u64, m.cols as u64, m.values.len() as u64));
        if cols > limits.max_factors as u64 || names > limits.max_factors {
            return Err(ServiceError::TooLarge {
                field: "returns.cols",
                value: cols.max(names as u64),
                limit: limits.max_factors as u64,
                what: "factors",
            });
        }
        let cells = rows.saturating_mul(cols).max(values);
        if cells > limits.max_cells as u64 {
            return Err(ServiceError::TooLarge {
                field: "returns",
                value: cells,
                limit: limits.max_cells as u64,
                what: "periods × factors",
            });
        }
        Ok(())
    }

    /// Admits a backtest and starts it on the blocking pool; the returned
    /// stream yields progress and then the result. Dropping the stream (the
    /// client cancelled) stops the computation.
    async fn start_backtest(
        &self,
        req: proto::RunBacktestRequest,
        client_timeout: Option<Duration>,
        span: CallSpan,
    ) -> Result<BacktestStream, ServiceError> {
        let sh = self.shared.clone();
        let admitted = self.admit()?;
        self.check_size(req.returns.as_ref(), req.factor_names.len())?;
        let (panel, proto_settings, spec, request_id) = crate::convert::backtest_request_into_parts(req);
        let settings = self.settings(&proto_settings)?;
        span.record(|| {
            [
                opentelemetry::KeyValue::new("keelson.request_id", request_id.clone()),
                opentelemetry::KeyValue::new("keelson.periods", panel.rows as i64),
                opentelemetry::KeyValue::new("keelson.factors", panel.cols as i64),
            ]
        });
        let (deadline, _) = self.deadline(client_timeout, self.shared.config.raw.server.backtest_timeout_ms);
        let flag = Arc::new(AtomicBool::new(false));
        let stop = Stop::never().with_deadline(deadline).with_flag(flag.clone());
        let (tx, rx) = tokio::sync::mpsc::channel::<Result<proto::RunBacktestResponse, Status>>(32);
        let id = request_id.clone();
        tokio::spawn(async move {
            let admitted = admitted;
            let started = Instant::now();
            let tokio_deadline = tokio::time::Instant::from_std(deadline);
            let worker = match tokio::time::timeout_at(tokio_deadline, sh.workers.clone().acquire_owned()).await {
                Ok(Ok(w)) => w,
                _ => {
                    let e = ServiceError::Estimate(EstimateError::DeadlineExceeded);
                    let _ = tx.send(Err(to_status(&e, None))).await;
                    return;
                }
            };
            let progress_tx = tx.clone();
            let progress_id = id.clone();
            let shared = sh.clone();
            let job = tokio::task::spawn_blocking(move || {
                let last = std::sync::atomic::AtomicU64::new(u64::MAX);
                let progress = |p: crate::evaluate::Progress| {
                    let pct = (100 * p.done / p.total.max(1)) as u64;
                    if last.swap(pct, Ordering::Relaxed) != pct {
                        let msg = proto::RunBacktestResponse {
                            event: Some(proto::run_backtest_response::Event::Progress(proto::BacktestProgress {
                                fits_done: p.done as u64,
                                fits_total: p.total as u64,
                            })),
                            request_id: progress_id.clone(),
                        };
                        // Progress is best effort: a slow reader loses updates, never stalls the work.
                        let _ = progress_tx.try_send(Ok(msg));
                    }
                };
                let r = crate::evaluate::run(&panel, &settings, &spec, &progress, &stop);
                if matches!(r, Err(crate::evaluate::BacktestError::Stopped(_))) {
                    shared.stopped_early.fetch_add(1, Ordering::Relaxed);
                }
                drop(worker);
                r
            });
            let outcome = match job.await {
                Ok(Ok(r)) => Ok(proto::RunBacktestResponse {
                    event: Some(proto::run_backtest_response::Event::Result(crate::convert::backtest_result_to_proto(
                        &r, &id,
                    ))),
                    request_id: id.clone(),
                }),
                Ok(Err(e)) => Err(to_status(&ServiceError::Backtest(e), None)),
                Err(join) => Err(to_status(&ServiceError::Internal(format!("worker failed: {join}")), None)),
            };
            let code = outcome.as_ref().map_or_else(|s| s.code(), |_| tonic::Code::Ok);
            span.finish(code, outcome.as_ref().err().map_or("", |s| s.message()));
            tracing::info!(
                target: "keelson::request",
                method = "RunBacktest",
                request_id = %id,
                code = ?code,
                latency_ms = started.elapsed().as_secs_f64() * 1e3,
                "backtest finished"
            );
            // The work is done: a reader that is slow to take the result must not hold an
            // admission slot, and one that never takes it must not hold the result forever.
            drop(admitted);
            if tokio::time::timeout(RESULT_HANDOFF, tx.send(outcome)).await.is_err() {
                tracing::warn!(
                    target: "keelson::request",
                    method = "RunBacktest",
                    request_id = %id,
                    "the client did not read the backtest result within {} s; dropped",
                    RESULT_HANDOFF.as_secs()
                );
            }
        });
        Ok(BacktestStream { rx, _cancel: CancelOnDrop(flag) })
    }

    async fn compute(
        &self,
        req: proto::ComputeWeightsRequest,
        client_timeout: Option<Duration>,
        span: &CallSpan,
    ) -> Result<proto::ComputeWeightsResponse, ServiceError> {
        let sh = &self.shared;
        let limits = &sh.config.raw.server;
        let _admitted = self.admit()?;
        self.check_size(req.returns.as_ref(), req.factor_names.len())?;
        let (panel, proto_settings, request_id) = request_into_parts(req);
        let settings = self.settings(&proto_settings)?;
        sh.metrics.problem_size(panel.rows, panel.cols);
        let (deadline, client_binds) = self.deadline(client_timeout, limits.request_timeout_ms);
        let timed_out = || {
            if client_binds {
                ServiceError::Estimate(EstimateError::DeadlineExceeded)
            } else {
                ServiceError::ServerTimeout { limit_ms: limits.request_timeout_ms }
            }
        };
        let flag = Arc::new(AtomicBool::new(false));
        let _cancel = CancelOnDrop(flag.clone());
        let stop = Stop::never().with_deadline(deadline).with_flag(flag);
        let tokio_deadline = tokio::time::Instant::from_std(deadline);
        let worker = tokio::time::timeout_at(tokio_deadline, sh.workers.clone().acquire_owned())
            .await
            .map_err(|_| timed_out())?
            .map_err(|_| ServiceError::Internal("worker pool closed".into()))?;
        let shared = self.shared.clone();
        let span = span.clone();
        let job = tokio::task::spawn_blocking(move || {
            let fit_start = SystemTime::now();
            let (result, phases) = estimator::fit_with_phases(
                &panel,
                &settings,
                &FitOptions { threads: 1, stop, ..FitOptions::default() },
            );
            shared.metrics.phases(&phases);
            span.phases(fit_start, &phases);
            if matches!(result, Err(EstimateError::Cancelled | EstimateError::DeadlineExceeded)) {
                shared.stopped_early.fetch_add(1, Ordering::Relaxed);
            }
            // The worker slot frees only when the computation has really ended.
            drop(worker);
            result
        });
        let ws = match tokio::time::timeout_at(tokio_deadline, job).await {
            Err(_) => return Err(timed_out()),
            Ok(Err(join)) => return Err(ServiceError::Internal(format!("worker failed: {join}"))),
            Ok(Ok(Err(EstimateError::DeadlineExceeded))) => return Err(timed_out()),
            Ok(Ok(r)) => r?,
        };
        Ok(weight_set_to_proto(&ws, &request_id))
    }
}

#[tonic::async_trait]
impl WeightsService for WeightsApi {
    async fn compute_weights(
        &self,
        request: Request<proto::ComputeWeightsRequest>,
    ) -> Result<Response<proto::ComputeWeightsResponse>, Status> {
        let started = Instant::now();
        let span = self.call_span("ComputeWeights", request.metadata());
        let timeout = grpc_timeout(request.metadata());
        let req = request.into_inner();
        let (periods, factors) = req.returns.as_ref().map_or((0, 0), |m| (m.rows, m.cols));
        let cols = req.returns.as_ref().map(|m| m.cols as usize);
        let request_id = req.request_id.clone();
        span.record(|| {
            [
                opentelemetry::KeyValue::new("keelson.request_id", request_id.clone()),
                opentelemetry::KeyValue::new("keelson.periods", i64::from(periods)),
                opentelemetry::KeyValue::new("keelson.factors", i64::from(factors)),
            ]
        });
        let result = self.compute(req, timeout, &span).await;
        let latency_ms = started.elapsed().as_secs_f64() * 1e3;
        match result {
            Ok(resp) => {
                let d = resp.diagnostics.as_ref();
                tracing::info!(
                    target: "keelson::request",
                    method = "ComputeWeights",
                    request_id = %request_id,
                    periods,
                    factors,
                    components = d.map_or(0, |d| d.num_components),
                    kappa = d.map_or(0.0, |d| d.kappa),
                    fingerprint = %resp.fingerprint,
                    code = "OK",
                    latency_ms,
                    "request served"
                );
                span.record(|| {
                    [
                        opentelemetry::KeyValue::new(
                            "keelson.components",
                            i64::from(d.map_or(0, |d| d.num_components)),
                        ),
                        opentelemetry::KeyValue::new("keelson.kappa", d.map_or(0.0, |d| d.kappa)),
                        opentelemetry::KeyValue::new("keelson.fingerprint", resp.fingerprint.clone()),
                    ]
                });
                span.finish(tonic::Code::Ok, "");
                Ok(Response::new(resp))
            }
            Err(e) => {
                let status = to_status(&e, cols);
                tracing::info!(
                    target: "keelson::request",
                    method = "ComputeWeights",
                    request_id = %request_id,
                    periods,
                    factors,
                    code = ?status.code(),
                    error = %e,
                    latency_ms,
                    "request failed"
                );
                span.finish(status.code(), status.message());
                Err(status)
            }
        }
    }

    type RunBacktestStream = BacktestStream;

    async fn run_backtest(
        &self,
        request: Request<proto::RunBacktestRequest>,
    ) -> Result<Response<Self::RunBacktestStream>, Status> {
        let span = self.call_span("RunBacktest", request.metadata());
        let timeout = grpc_timeout(request.metadata());
        let req = request.into_inner();
        let cols = req.returns.as_ref().map(|m| m.cols as usize);
        match self.start_backtest(req, timeout, span.clone()).await {
            Ok(stream) => Ok(Response::new(stream)),
            Err(e) => {
                let status = to_status(&e, cols);
                span.finish(status.code(), status.message());
                Err(status)
            }
        }
    }

    async fn get_service_info(
        &self,
        request: Request<proto::GetServiceInfoRequest>,
    ) -> Result<Response<proto::GetServiceInfoResponse>, Status> {
        self.call_span("GetServiceInfo", request.metadata()).finish(tonic::Code::Ok, "");
        let c = &self.shared.config;
        let s = &c.raw.server;
        Ok(Response::new(proto::GetServiceInfoResponse {
            estimator_version: estimator::ESTIMATOR_VERSION.to_owned(),
            server_version: env!("CARGO_PKG_VERSION").to_owned(),
            default_settings: Some(settings_to_proto(c.defaults.settings())),
            limits: Some(proto::ServiceLimits {
                max_message_bytes: s.max_message_bytes as u64,
                max_cells: s.max_cells as u64,
                max_factors: s.max_factors as u32,
                max_in_flight: s.max_in_flight as u32,
                workers: c.workers as u32,
                request_timeout_ms: s.request_timeout_ms,
                backtest_timeout_ms: s.backtest_timeout_ms,
            }),
        }))
    }
}

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

impl Listeners {
    /// Only the gRPC listener.
    pub fn grpc_only(grpc: TcpListener) -> Listeners {
        Listeners { grpc, metrics: None, health: None }
    }
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
    let (v1, v1alpha) = if s.reflection {
        let v1 = tonic_reflection::server::Builder::configure()
            .register_encoded_file_descriptor_set(FILE_DESCRIPTOR_SET)
            .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
            .build_v1()
            .ok()
            .map(|svc| tonic::service::interceptor::InterceptedService::new(svc, guard.clone()));
        let v1alpha = tonic_reflection::server::Builder::configure()
            .register_encoded_file_descriptor_set(FILE_DESCRIPTOR_SET)
            .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
            .build_v1alpha()
            .ok()
            .map(|svc| tonic::service::interceptor::InterceptedService::new(svc, guard.clone()));
        (v1, v1alpha)
    } else {
        (None, None)
    };
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

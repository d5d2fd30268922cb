//! Prometheus metrics: a tower layer that counts every gRPC call by service,
//! method and status code under the conventional names
//! (`grpc_server_started_total`, `grpc_server_handled_total`,
//! `grpc_server_handling_seconds`), the service's own gauges and histograms,
//! and a small HTTP/1.1 endpoint that serves them at `GET /metrics`, encoded
//! by the `prometheus-client` crate in the OpenMetrics text format.

use std::convert::Infallible;
use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use bytes::Bytes;
use http_body::{Body, Frame, SizeHint};
use prometheus_client::encoding::EncodeLabelSet;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::{ConstGauge, Gauge};
use prometheus_client::metrics::histogram::Histogram;
use prometheus_client::metrics::info::Info;
use prometheus_client::registry::{Registry, Unit};
use tokio::net::TcpListener;

/// Upper bounds (seconds) of `grpc_server_handling_seconds`.
pub const HANDLING_BUCKETS: [f64; 16] =
    [0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 120.0];
/// Upper bounds (seconds) of `keelson_estimator_phase_seconds`.
pub const PHASE_BUCKETS: [f64; 13] =
    [0.00005, 0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.1, 0.5, 2.5, 10.0];
/// Upper bounds of `keelson_problem_cells` (periods × factors).
pub const CELL_BUCKETS: [f64; 10] = [100.0, 1e3, 3e3, 1e4, 3e4, 1e5, 3e5, 1e6, 3e6, 1e7];

/// Service, method and RPC type of a call, from its HTTP/2 path: the labels
/// of the `grpc_server_*` series.
#[derive(Clone, Debug, PartialEq, Eq, Hash, EncodeLabelSet)]
struct Rpc {
    grpc_service: String,
    grpc_method: String,
    grpc_type: &'static str,
}

/// [`Rpc`] and the status code of a finished call.
#[derive(Clone, Debug, PartialEq, Eq, Hash, EncodeLabelSet)]
struct Handled {
    grpc_service: String,
    grpc_method: String,
    grpc_type: &'static str,
    grpc_code: &'static str,
}

#[derive(Clone, Debug, PartialEq, Eq, Hash, EncodeLabelSet)]
struct ReasonLabel {
    reason: &'static str,
}

#[derive(Clone, Debug, PartialEq, Eq, Hash, EncodeLabelSet)]
struct PhaseLabel {
    phase: &'static str,
}

impl Rpc {
    fn from_path(path: &str) -> Rpc {
        let mut parts = path.trim_start_matches('/').splitn(2, '/');
        let service = parts.next().unwrap_or("").to_owned();
        let method = parts.next().unwrap_or("").to_owned();
        let kind = match (service.as_str(), method.as_str()) {
            (_, "RunBacktest") | ("grpc.health.v1.Health", "Watch") => "server_stream",
            (s, _) if s.starts_with("grpc.reflection.") => "bidi_stream",
            _ => "unary",
        };
        // Bound the label set: anything that is not a gRPC path shares one series.
        if service.is_empty() || method.is_empty() || service.len() > 100 || method.len() > 100 {
            return Rpc { grpc_service: "unknown".into(), grpc_method: "unknown".into(), grpc_type: "unary" };
        }
        Rpc { grpc_service: service, grpc_method: method, grpc_type: kind }
    }

    fn with_code(&self, grpc_code: &'static str) -> Handled {
        Handled {
            grpc_service: self.grpc_service.clone(),
            grpc_method: self.grpc_method.clone(),
            grpc_type: self.grpc_type,
            grpc_code,
        }
    }
}

/// gRPC status code names as conventionally used in metric labels.
fn code_name(code: &[u8]) -> &'static str {
    match std::str::from_utf8(code).ok().and_then(|s| s.trim().parse::<i32>().ok()) {
        Some(0) => "OK",
        Some(1) => "Canceled",
        Some(2) => "Unknown",
        Some(3) => "InvalidArgument",
        Some(4) => "DeadlineExceeded",
        Some(5) => "NotFound",
        Some(6) => "AlreadyExists",
        Some(7) => "PermissionDenied",
        Some(8) => "ResourceExhausted",
        Some(9) => "FailedPrecondition",
        Some(10) => "Aborted",
        Some(11) => "OutOfRange",
        Some(12) => "Unimplemented",
        Some(13) => "Internal",
        Some(14) => "Unavailable",
        Some(15) => "DataLoss",
        Some(16) => "Unauthenticated",
        _ => "Unknown",
    }
}

/// Why a request was refused before any work.
#[derive(Clone, Copy, Debug)]
pub enum ShedReason {
    /// At the in-flight limit.
    Overloaded,
    /// Shutting down.
    Draining,
    /// Its estimated work or memory is above the server's budget.
    OverBudget,
}

type Histograms<L> = Family<L, Histogram, fn() -> Histogram>;

fn handling_histogram() -> Histogram {
    Histogram::new(HANDLING_BUCKETS.iter().copied())
}

fn phase_histogram() -> Histogram {
    Histogram::new(PHASE_BUCKETS.iter().copied())
}

/// Every metric the server exports, registered once in a `prometheus-client`
/// registry; the gauges read at scrape time are set just before encoding.
#[derive(Debug)]
pub struct Metrics {
    registry: Registry,
    started: Family<Rpc, Counter>,
    handled: Family<Handled, Counter>,
    handling: Histograms<Rpc>,
    shed: Family<ReasonLabel, Counter>,
    panics: Counter,
    stopped_early: Counter,
    cells: Histogram,
    phases: Histograms<PhaseLabel>,
    in_flight: Gauge,
    computing: Gauge,
    max_in_flight: Gauge,
    draining: Gauge,
    resident: Gauge,
}

impl Default for Metrics {
    fn default() -> Self {
        let started = Family::<Rpc, Counter>::default();
        let handled = Family::<Handled, Counter>::default();
        let handling: Histograms<Rpc> = Family::new_with_constructor(handling_histogram);
        let shed = Family::<ReasonLabel, Counter>::default();
        let panics = Counter::default();
        let stopped_early = Counter::default();
        let cells = Histogram::new(CELL_BUCKETS.iter().copied());
        let phases: Histograms<PhaseLabel> = Family::new_with_constructor(phase_histogram);
        let (in_flight, computing, max_in_flight, draining, resident) =
            (Gauge::default(), Gauge::default(), Gauge::default(), Gauge::default(), Gauge::default());
        // Every reason is present from the start, at 0.
        for reason in ["overloaded", "draining", "over_budget"] {
            let _ = shed.get_or_create(&ReasonLabel { reason });
        }
        let mut registry = Registry::default();
        registry.register("grpc_server_started", "Total number of RPCs started on the server", started.clone());
        registry.register(
            "grpc_server_handled",
            "Total number of RPCs completed on the server, regardless of success or failure",
            handled.clone(),
        );
        registry.register_with_unit(
            "grpc_server_handling",
            "Histogram of response latency of gRPC that had been application-level handled by the server",
            Unit::Seconds,
            handling.clone(),
        );
        registry.register("keelson_requests_in_flight", "Requests admitted and not finished", in_flight.clone());
        registry.register("keelson_requests_computing", "Requests computing on the worker pool", computing.clone());
        registry.register("keelson_max_in_flight", "Configured admission limit", max_in_flight.clone());
        registry.register("keelson_draining", "1 while the server drains for shutdown", draining.clone());
        registry.register("keelson_requests_shed", "Requests refused before any work, by reason", shed.clone());
        registry.register(
            "keelson_request_panics",
            "Requests whose computation panicked (answered INTERNAL)",
            panics.clone(),
        );
        registry.register(
            "keelson_computations_stopped_early",
            "Computations stopped by a deadline or a cancellation",
            stopped_early.clone(),
        );
        registry.register("keelson_problem_cells", "Periods times factors of admitted windows", cells.clone());
        registry.register_with_unit(
            "keelson_estimator_phase",
            "Time per estimator phase of each fit",
            Unit::Seconds,
            phases.clone(),
        );
        registry.register_with_unit("process_resident_memory", "Resident memory size", Unit::Bytes, resident.clone());
        let start = SystemTime::now().duration_since(UNIX_EPOCH).unwrap_or_default().as_secs() as i64;
        registry.register_with_unit(
            "process_start_time",
            "Start time of the process since the Unix epoch",
            Unit::Seconds,
            ConstGauge::new(start),
        );
        registry.register(
            "keelson_build",
            "Build of the running server",
            Info::new(vec![("version", env!("CARGO_PKG_VERSION")), ("estimator", crate::estimator::ESTIMATOR_VERSION)]),
        );
        Metrics {
            registry,
            started,
            handled,
            handling,
            shed,
            panics,
            stopped_early,
            cells,
            phases,
            in_flight,
            computing,
            max_in_flight,
            draining,
            resident,
        }
    }
}

/// Live values read at scrape time.
#[derive(Clone, Copy, Debug, Default)]
pub struct Gauges {
    /// Requests admitted (computing or waiting for a worker).
    pub in_flight: usize,
    /// Requests computing on the worker pool.
    pub computing: usize,
    /// Admission limit.
    pub max_in_flight: usize,
    /// Whether the server is draining.
    pub draining: bool,
}

impl Metrics {
    fn start(&self, rpc: &Rpc) {
        self.started.get_or_create(rpc).inc();
    }

    fn handled(&self, rpc: &Rpc, code: &'static str, elapsed: Duration) {
        self.handled.get_or_create(&rpc.with_code(code)).inc();
        self.handling.get_or_create(rpc).observe(elapsed.as_secs_f64());
    }

    /// Counts a refused request.
    pub fn shed(&self, reason: ShedReason) {
        let reason = match reason {
            ShedReason::Overloaded => "overloaded",
            ShedReason::Draining => "draining",
            ShedReason::OverBudget => "over_budget",
        };
        self.shed.get_or_create(&ReasonLabel { reason }).inc();
    }

    /// Counts a computation that stopped early on a deadline or a cancellation.
    pub fn stopped_early(&self) {
        self.stopped_early.inc();
    }

    /// Computations stopped early since start.
    pub fn stopped_early_total(&self) -> u64 {
        self.stopped_early.get()
    }

    /// Counts a request whose computation panicked.
    pub fn panicked(&self) {
        self.panics.inc();
    }

    /// Records the size of an admitted problem.
    pub fn problem_size(&self, periods: usize, factors: usize) {
        self.cells.observe(periods.saturating_mul(factors) as f64);
    }

    /// Records the estimator's phase timings of one fit.
    pub fn phases(&self, phases: &crate::estimator::PhaseTimes) {
        for (phase, d) in phases.named() {
            if !d.is_zero() {
                self.phases.get_or_create(&PhaseLabel { phase }).observe(d.as_secs_f64());
            }
        }
    }

    /// The exposition text (OpenMetrics), with the live gauges set first.
    pub fn render(&self, g: Gauges) -> String {
        let gauge = |v: usize| i64::try_from(v).unwrap_or(i64::MAX);
        self.in_flight.set(gauge(g.in_flight));
        self.computing.set(gauge(g.computing));
        self.max_in_flight.set(gauge(g.max_in_flight));
        self.draining.set(i64::from(g.draining));
        self.resident.set(resident_bytes().map_or(0, |b| i64::try_from(b).unwrap_or(i64::MAX)));
        let mut out = String::with_capacity(8192);
        if prometheus_client::encoding::text::encode(&mut out, &self.registry).is_err() {
            out.clear();
        }
        out
    }
}

/// Resident set size from /proc/self/statm (Linux), in bytes.
fn resident_bytes() -> Option<u64> {
    let statm = std::fs::read_to_string("/proc/self/statm").ok()?;
    let pages: u64 = statm.split_whitespace().nth(1)?.parse().ok()?;
    Some(pages * 4096)
}

/// Records one call's outcome exactly once: from the `grpc-status` of a
/// trailers-only response, from the trailers, or, when the body is dropped
/// first, as cancelled.
struct Recorder {
    metrics: Arc<Metrics>,
    rpc: Rpc,
    started: Instant,
    done: bool,
}

impl Recorder {
    fn finish(&mut self, code: &'static str) {
        if !self.done {
            self.done = true;
            self.metrics.handled(&self.rpc, code, self.started.elapsed());
        }
    }
}

impl Drop for Recorder {
    fn drop(&mut self) {
        self.finish("Canceled");
    }
}

/// A response body that reports the call's status when its trailers pass.
pub struct MetricsBody<B> {
    inner: B,
    recorder: Recorder,
}

impl<B> Body for MetricsBody<B>
where
    B: Body<Data = Bytes> + Unpin,
{
    type Data = Bytes;
    type Error = B::Error;

    fn poll_frame(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Option<Result<Frame<Bytes>, B::Error>>> {
        let this = &mut *self;
        let polled = Pin::new(&mut this.inner).poll_frame(cx);
        match &polled {
            Poll::Ready(Some(Ok(frame))) => {
                if let Some(code) = frame.trailers_ref().and_then(|t| t.get("grpc-status")) {
                    this.recorder.finish(code_name(code.as_bytes()));
                }
            }
            Poll::Ready(Some(Err(_))) => this.recorder.finish("Unknown"),
            Poll::Ready(None) => this.recorder.finish("Unknown"),
            Poll::Pending => {}
        }
        polled
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> SizeHint {
        self.inner.size_hint()
    }
}

/// The tower layer that wraps the whole gRPC router.
#[derive(Clone, Debug)]
pub struct MetricsLayer {
    metrics: Arc<Metrics>,
}

impl MetricsLayer {
    /// A layer recording into `metrics`.
    pub fn new(metrics: Arc<Metrics>) -> MetricsLayer {
        MetricsLayer { metrics }
    }
}

impl<S> tower_layer::Layer<S> for MetricsLayer {
    type Service = MetricsService<S>;

    fn layer(&self, inner: S) -> MetricsService<S> {
        MetricsService { inner, metrics: self.metrics.clone() }
    }
}

/// See [`MetricsLayer`].
#[derive(Clone, Debug)]
pub struct MetricsService<S> {
    inner: S,
    metrics: Arc<Metrics>,
}

type BoxFuture<T> = Pin<Box<dyn Future<Output = T> + Send>>;

impl<S, ReqBody, ResBody> tower_service::Service<http::Request<ReqBody>> for MetricsService<S>
where
    S: tower_service::Service<http::Request<ReqBody>, Response = http::Response<ResBody>>,
    S::Future: Send + 'static,
    ResBody: Body<Data = Bytes> + Unpin + Send + 'static,
{
    type Response = http::Response<MetricsBody<ResBody>>;
    type Error = S::Error;
    type Future = BoxFuture<Result<Self::Response, S::Error>>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), S::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, req: http::Request<ReqBody>) -> Self::Future {
        let rpc = Rpc::from_path(req.uri().path());
        self.metrics.start(&rpc);
        let mut recorder = Recorder { metrics: self.metrics.clone(), rpc, started: Instant::now(), done: false };
        let fut = self.inner.call(req);
        Box::pin(async move {
            let resp = match fut.await {
                Ok(r) => r,
                Err(e) => {
                    recorder.finish("Unknown");
                    return Err(e);
                }
            };
            // A trailers-only response (every error of a unary call) carries its status in the headers.
            if let Some(code) = resp.headers().get("grpc-status") {
                recorder.finish(code_name(code.as_bytes()));
            }
            Ok(resp.map(|inner| MetricsBody { inner, recorder }))
        })
    }
}

/// Serves `GET /metrics` on `listener` until the task is dropped or aborted.
pub async fn serve_http(listener: TcpListener, scrape: Arc<dyn Fn() -> String + Send + Sync>) {
    loop {
        let (stream, _) = match listener.accept().await {
            Ok(c) => c,
            Err(e) => {
                tracing::warn!(error = %e, "metrics endpoint: accept failed");
                tokio::time::sleep(Duration::from_millis(50)).await;
                continue;
            }
        };
        let scrape = scrape.clone();
        tokio::spawn(async move {
            let service = hyper::service::service_fn(move |req: http::Request<hyper::body::Incoming>| {
                let scrape = scrape.clone();
                async move {
                    let resp = if req.method() == http::Method::GET && req.uri().path() == "/metrics" {
                        http::Response::builder()
                            .header(
                                http::header::CONTENT_TYPE,
                                "application/openmetrics-text; version=1.0.0; charset=utf-8",
                            )
                            .body(http_body_util::Full::new(Bytes::from(scrape())))
                    } else {
                        http::Response::builder()
                            .status(http::StatusCode::NOT_FOUND)
                            .body(http_body_util::Full::new(Bytes::from_static(b"not found; try GET /metrics\n")))
                    };
                    Ok::<_, Infallible>(resp.unwrap_or_else(|_| http::Response::new(http_body_util::Full::default())))
                }
            });
            let conn = hyper::server::conn::http1::Builder::new()
                .timer(hyper_util::rt::TokioTimer::new())
                .header_read_timeout(Duration::from_secs(10))
                .serve_connection(hyper_util::rt::TokioIo::new(stream), service);
            if let Err(e) = conn.await {
                tracing::debug!(error = %e, "metrics connection ended with an error");
            }
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn paths_become_bounded_labels() {
        let r = Rpc::from_path("/keelson.v1.WeightsService/ComputeWeights");
        assert_eq!(
            (r.grpc_service.as_str(), r.grpc_method.as_str(), r.grpc_type),
            ("keelson.v1.WeightsService", "ComputeWeights", "unary")
        );
        assert_eq!(Rpc::from_path("/keelson.v1.WeightsService/RunBacktest").grpc_type, "server_stream");
        assert_eq!(Rpc::from_path("/nonsense").grpc_service, "unknown");
    }

    #[test]
    fn histogram_buckets_are_cumulative() {
        let m = Metrics::default();
        for cells in [50, 500, 500, 20_000_000] {
            m.problem_size(cells, 1);
        }
        let out = m.render(Gauges::default());
        assert!(out.contains("keelson_problem_cells_bucket{le=\"100.0\"} 1\n"), "{out}");
        assert!(out.contains("keelson_problem_cells_bucket{le=\"1000.0\"} 3\n"), "{out}");
        assert!(out.contains("keelson_problem_cells_bucket{le=\"10000000.0\"} 3\n"), "{out}");
        assert!(out.contains("keelson_problem_cells_bucket{le=\"+Inf\"} 4\n"), "{out}");
        assert!(out.contains("keelson_problem_cells_count 4\n"), "{out}");
        assert!(out.contains("keelson_build_info{version=\""), "{out}");
        assert!(out.contains("keelson_requests_shed_total{reason=\"overloaded\"} 0\n"), "{out}");
    }

    #[test]
    fn codes_use_the_conventional_names() {
        assert_eq!(code_name(b"0"), "OK");
        assert_eq!(code_name(b"3"), "InvalidArgument");
        assert_eq!(code_name(b"16"), "Unauthenticated");
        assert_eq!(code_name(b"x"), "Unknown");
    }
}

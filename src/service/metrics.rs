//! Prometheus metrics: a tower layer that counts every gRPC call by service,
//! method and status code under the conventional names
//! (`grpc_server_started_total`, `grpc_server_handled_total`,
//! `grpc_server_handling_seconds`), the service's own gauges and histograms,
//! and a small HTTP/1.1 endpoint that serves them in the text exposition
//! format (version 0.0.4) at `GET /metrics`.

use std::collections::BTreeMap;
use std::convert::Infallible;
use std::fmt::Write as _;
use std::future::Future;
use std::pin::Pin;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, PoisonError};
use std::task::{Context, Poll};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use bytes::Bytes;
use http_body::{Body, Frame, SizeHint};
use tokio::net::TcpListener;

/// Upper bounds (seconds) of `grpc_server_handling_seconds`.
pub const HANDLING_BUCKETS: [f64; 16] =
    [0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 120.0];
/// Upper bounds (seconds) of `keelson_estimator_phase_seconds`.
pub const PHASE_BUCKETS: [f64; 13] =
    [0.00005, 0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.1, 0.5, 2.5, 10.0];
/// Upper bounds of `keelson_problem_cells` (periods × factors).
pub const CELL_BUCKETS: [f64; 10] = [100.0, 1e3, 3e3, 1e4, 3e4, 1e5, 3e5, 1e6, 3e6, 1e7];

#[derive(Clone, Debug)]
struct Histogram {
    bounds: &'static [f64],
    counts: Vec<u64>,
    sum: f64,
    count: u64,
}

impl Histogram {
    fn new(bounds: &'static [f64]) -> Histogram {
        Histogram { bounds, counts: vec![0; bounds.len()], sum: 0.0, count: 0 }
    }

    fn observe(&mut self, v: f64) {
        if let Some(i) = self.bounds.iter().position(|&b| v <= b) {
            self.counts[i] += 1;
        }
        self.sum += v;
        self.count += 1;
    }

    fn render(&self, out: &mut String, name: &str, labels: &str) {
        let sep = if labels.is_empty() { "" } else { "," };
        let mut cumulative = 0;
        for (b, c) in self.bounds.iter().zip(&self.counts) {
            cumulative += c;
            let _ = writeln!(out, "{name}_bucket{{{labels}{sep}le=\"{b}\"}} {cumulative}");
        }
        let _ = writeln!(out, "{name}_bucket{{{labels}{sep}le=\"+Inf\"}} {}", self.count);
        let braces = if labels.is_empty() { String::new() } else { format!("{{{labels}}}") };
        let _ = writeln!(out, "{name}_sum{braces} {}", self.sum);
        let _ = writeln!(out, "{name}_count{braces} {}", self.count);
    }
}

/// Service, method and RPC type of a call, from its HTTP/2 path.
#[derive(Clone, Debug, PartialEq, Eq, PartialOrd, Ord)]
struct Rpc {
    service: String,
    method: String,
    kind: &'static str,
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
            return Rpc { service: "unknown".into(), method: "unknown".into(), kind: "unary" };
        }
        Rpc { service, method, kind }
    }

    fn labels(&self) -> String {
        format!(
            "grpc_service=\"{}\",grpc_method=\"{}\",grpc_type=\"{}\"",
            escape(&self.service),
            escape(&self.method),
            self.kind
        )
    }
}

fn escape(v: &str) -> String {
    v.replace('\\', "\\\\").replace('"', "\\\"").replace('\n', "\\n")
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

#[derive(Debug, Default)]
struct Calls {
    started: BTreeMap<Rpc, u64>,
    handled: BTreeMap<(Rpc, &'static str), u64>,
    handling: BTreeMap<Rpc, Histogram>,
}

/// Every metric the server exports.
#[derive(Debug)]
pub struct Metrics {
    calls: Mutex<Calls>,
    shed_overloaded: AtomicU64,
    shed_draining: AtomicU64,
    shed_budget: AtomicU64,
    panics: AtomicU64,
    cells: Mutex<Histogram>,
    phases: Mutex<BTreeMap<&'static str, Histogram>>,
    started_at: SystemTime,
}

impl Default for Metrics {
    fn default() -> Self {
        Metrics {
            calls: Mutex::default(),
            shed_overloaded: AtomicU64::new(0),
            shed_draining: AtomicU64::new(0),
            shed_budget: AtomicU64::new(0),
            panics: AtomicU64::new(0),
            cells: Mutex::new(Histogram::new(&CELL_BUCKETS)),
            phases: Mutex::default(),
            started_at: SystemTime::now(),
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
    /// Computations that stopped early on a deadline or cancellation.
    pub stopped_early: u64,
    /// Whether the server is draining.
    pub draining: bool,
}

impl Metrics {
    fn calls(&self) -> std::sync::MutexGuard<'_, Calls> {
        // A panic while holding the lock cannot leave counters inconsistent enough to matter.
        self.calls.lock().unwrap_or_else(PoisonError::into_inner)
    }

    fn start(&self, rpc: &Rpc) {
        *self.calls().started.entry(rpc.clone()).or_default() += 1;
    }

    fn handled(&self, rpc: &Rpc, code: &'static str, elapsed: Duration) {
        let mut c = self.calls();
        *c.handled.entry((rpc.clone(), code)).or_default() += 1;
        c.handling
            .entry(rpc.clone())
            .or_insert_with(|| Histogram::new(&HANDLING_BUCKETS))
            .observe(elapsed.as_secs_f64());
    }

    /// Counts a refused request.
    pub fn shed(&self, reason: ShedReason) {
        match reason {
            ShedReason::Overloaded => self.shed_overloaded.fetch_add(1, Ordering::Relaxed),
            ShedReason::Draining => self.shed_draining.fetch_add(1, Ordering::Relaxed),
            ShedReason::OverBudget => self.shed_budget.fetch_add(1, Ordering::Relaxed),
        };
    }

    /// Counts a request whose computation panicked.
    pub fn panicked(&self) {
        self.panics.fetch_add(1, Ordering::Relaxed);
    }

    /// Records the size of an admitted problem.
    pub fn problem_size(&self, periods: usize, factors: usize) {
        self.cells.lock().unwrap_or_else(PoisonError::into_inner).observe((periods * factors) as f64);
    }

    /// Records the estimator's phase timings of one fit.
    pub fn phases(&self, phases: &crate::estimator::PhaseTimes) {
        let mut m = self.phases.lock().unwrap_or_else(PoisonError::into_inner);
        for (name, d) in phases.named() {
            if !d.is_zero() {
                m.entry(name).or_insert_with(|| Histogram::new(&PHASE_BUCKETS)).observe(d.as_secs_f64());
            }
        }
    }

    /// The exposition text.
    pub fn render(&self, g: Gauges) -> String {
        let mut out = String::with_capacity(8192);
        {
            let c = self.calls();
            out.push_str("# HELP grpc_server_started_total Total number of RPCs started on the server.\n");
            out.push_str("# TYPE grpc_server_started_total counter\n");
            for (rpc, n) in &c.started {
                let _ = writeln!(out, "grpc_server_started_total{{{}}} {n}", rpc.labels());
            }
            out.push_str(
                "# HELP grpc_server_handled_total Total number of RPCs completed on the server, regardless of success or failure.\n",
            );
            out.push_str("# TYPE grpc_server_handled_total counter\n");
            for ((rpc, code), n) in &c.handled {
                let _ = writeln!(out, "grpc_server_handled_total{{{},grpc_code=\"{code}\"}} {n}", rpc.labels());
            }
            out.push_str(
                "# HELP grpc_server_handling_seconds Histogram of response latency (seconds) of gRPC that had been application-level handled by the server.\n",
            );
            out.push_str("# TYPE grpc_server_handling_seconds histogram\n");
            for (rpc, h) in &c.handling {
                h.render(&mut out, "grpc_server_handling_seconds", &rpc.labels());
            }
        }
        let gauge = |out: &mut String, name: &str, help: &str, v: f64| {
            let _ = write!(out, "# HELP {name} {help}\n# TYPE {name} gauge\n{name} {v}\n");
        };
        gauge(&mut out, "keelson_requests_in_flight", "Requests admitted and not finished.", g.in_flight as f64);
        gauge(&mut out, "keelson_requests_computing", "Requests computing on the worker pool.", g.computing as f64);
        gauge(&mut out, "keelson_max_in_flight", "Configured admission limit.", g.max_in_flight as f64);
        gauge(
            &mut out,
            "keelson_draining",
            "1 while the server drains for shutdown.",
            if g.draining { 1.0 } else { 0.0 },
        );
        out.push_str("# HELP keelson_requests_shed_total Requests refused before any work, by reason.\n");
        out.push_str("# TYPE keelson_requests_shed_total counter\n");
        let _ = writeln!(
            out,
            "keelson_requests_shed_total{{reason=\"overloaded\"}} {}",
            self.shed_overloaded.load(Ordering::Relaxed)
        );
        let _ = writeln!(
            out,
            "keelson_requests_shed_total{{reason=\"draining\"}} {}",
            self.shed_draining.load(Ordering::Relaxed)
        );
        let _ = writeln!(
            out,
            "keelson_requests_shed_total{{reason=\"over_budget\"}} {}",
            self.shed_budget.load(Ordering::Relaxed)
        );
        out.push_str("# HELP keelson_request_panics_total Requests whose computation panicked (answered INTERNAL).\n");
        out.push_str("# TYPE keelson_request_panics_total counter\n");
        let _ = writeln!(out, "keelson_request_panics_total {}", self.panics.load(Ordering::Relaxed));
        out.push_str(
            "# HELP keelson_computations_stopped_early_total Computations stopped by a deadline or a cancellation.\n",
        );
        out.push_str("# TYPE keelson_computations_stopped_early_total counter\n");
        let _ = writeln!(out, "keelson_computations_stopped_early_total {}", g.stopped_early);
        out.push_str("# HELP keelson_problem_cells Periods times factors of admitted windows.\n");
        out.push_str("# TYPE keelson_problem_cells histogram\n");
        self.cells.lock().unwrap_or_else(PoisonError::into_inner).render(&mut out, "keelson_problem_cells", "");
        out.push_str("# HELP keelson_estimator_phase_seconds Time per estimator phase of each fit.\n");
        out.push_str("# TYPE keelson_estimator_phase_seconds histogram\n");
        for (phase, h) in self.phases.lock().unwrap_or_else(PoisonError::into_inner).iter() {
            h.render(&mut out, "keelson_estimator_phase_seconds", &format!("phase=\"{phase}\""));
        }
        if let Some(rss) = resident_bytes() {
            gauge(&mut out, "process_resident_memory_bytes", "Resident memory size in bytes.", rss as f64);
        }
        let start = self.started_at.duration_since(UNIX_EPOCH).unwrap_or_default().as_secs_f64();
        gauge(&mut out, "process_start_time_seconds", "Start time of the process since the Unix epoch.", start);
        let _ = write!(
            out,
            "# HELP keelson_build_info Build of the running server.\n# TYPE keelson_build_info gauge\nkeelson_build_info{{version=\"{}\",estimator=\"{}\"}} 1\n",
            env!("CARGO_PKG_VERSION"),
            crate::estimator::ESTIMATOR_VERSION
        );
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
                            .header(http::header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")
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
            (r.service.as_str(), r.method.as_str(), r.kind),
            ("keelson.v1.WeightsService", "ComputeWeights", "unary")
        );
        assert_eq!(Rpc::from_path("/keelson.v1.WeightsService/RunBacktest").kind, "server_stream");
        assert_eq!(Rpc::from_path("/nonsense").service, "unknown");
    }

    #[test]
    fn histogram_buckets_are_cumulative() {
        let mut h = Histogram::new(&CELL_BUCKETS);
        for v in [50.0, 500.0, 500.0, 2e7] {
            h.observe(v);
        }
        let mut out = String::new();
        h.render(&mut out, "x", "");
        assert!(out.contains("x_bucket{le=\"100\"} 1\n"), "{out}");
        assert!(out.contains("x_bucket{le=\"1000\"} 3\n"), "{out}");
        assert!(out.contains("x_bucket{le=\"10000000\"} 3\n"), "{out}");
        assert!(out.contains("x_bucket{le=\"+Inf\"} 4\n"), "{out}");
        assert!(out.contains("x_count 4\n"), "{out}");
    }

    #[test]
    fn codes_use_the_conventional_names() {
        assert_eq!(code_name(b"0"), "OK");
        assert_eq!(code_name(b"3"), "InvalidArgument");
        assert_eq!(code_name(b"16"), "Unauthenticated");
        assert_eq!(code_name(b"x"), "Unknown");
    }
}

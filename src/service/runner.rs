//! The one runner behind both computing RPCs: a worker slot within the
//! deadline, the computation on the blocking pool with a stop flag that the
//! deadline and a departing client both set, timeout classification
//! (the client's deadline → DEADLINE_EXCEEDED, the server's own limit →
//! SERVER_TIMEOUT), and panics kept inside the request.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use super::WeightsApi;
use super::status::{ServiceError, to_status};
use super::telemetry::CallSpan;
use crate::estimator::Stop;

/// In debug builds only, a request with this id panics inside its
/// computation, so that tests can check that a panic stays inside the
/// request. Release builds ignore it.
pub const PANIC_PROBE_REQUEST_ID: &str = "keelson-debug-panic-probe";

/// Parses the `grpc-timeout` header (gRPC over HTTP/2 spec: 1–8 digits and a
/// unit H, M, S, m, u or n).
pub(super) fn grpc_timeout(meta: &tonic::metadata::MetadataMap) -> Option<Duration> {
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

/// Sets the cancellation flag when dropped: with the request's future (the
/// client went away or the transport timed it out) or with a backtest's
/// response stream, so that the blocking computation stops at its next check.
#[derive(Debug)]
pub(super) struct CancelOnDrop(Arc<AtomicBool>);

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        self.0.store(true, Ordering::Relaxed);
    }
}

/// When a request must end, and whose limit that is.
#[derive(Clone, Copy, Debug)]
pub(super) struct Deadline {
    at: Instant,
    client_binds: bool,
    limit_ms: u64,
}

impl Deadline {
    /// The earlier of the client's deadline and the server's own limit.
    pub(super) fn new(client_timeout: Option<Duration>, limit_ms: u64) -> Deadline {
        let server_limit = Duration::from_millis(limit_ms);
        let client_binds = client_timeout.is_some_and(|c| c < server_limit);
        let at = Instant::now() + client_timeout.map_or(server_limit, |c| c.min(server_limit));
        Deadline { at, client_binds, limit_ms }
    }

    /// The error for a request that ran out of time.
    fn timed_out(&self) -> ServiceError {
        if self.client_binds {
            ServiceError::Estimate(crate::estimator::EstimateError::DeadlineExceeded)
        } else {
            ServiceError::ServerTimeout { limit_ms: self.limit_ms }
        }
    }

    /// A stop signal for the computation: this deadline, and a flag set
    /// when the returned guard is dropped.
    pub(super) fn stop(&self) -> (Stop, CancelOnDrop) {
        let flag = Arc::new(AtomicBool::new(false));
        (Stop::never().with_deadline(self.at).with_flag(flag.clone()), CancelOnDrop(flag))
    }
}

/// The text of a panic payload.
fn panic_message(payload: &(dyn std::any::Any + Send)) -> &str {
    payload
        .downcast_ref::<&str>()
        .copied()
        .or_else(|| payload.downcast_ref::<String>().map(String::as_str))
        .unwrap_or("a panic without a message")
}

impl WeightsApi {
    /// Runs `work` on the blocking pool once a worker slot frees, within
    /// `deadline`. The slot is released only when the work has really ended
    /// (a timed-out computation keeps it until it notices its stop flag).
    ///
    /// # Errors
    /// What `work` returns, with a deadline classified as the client's or
    /// the server's; [`ServiceError::Internal`] when the work panicked (the
    /// panic is logged and counted, and the server keeps serving).
    pub(super) async fn run_blocking<T: Send + 'static>(
        &self,
        method: &'static str,
        request_id: &str,
        deadline: &Deadline,
        work: impl FnOnce() -> Result<T, ServiceError> + Send + 'static,
    ) -> Result<T, ServiceError> {
        let sh = self.shared.clone();
        let until = tokio::time::Instant::from_std(deadline.at);
        let worker = tokio::time::timeout_at(until, sh.workers.clone().acquire_owned())
            .await
            .map_err(|_| deadline.timed_out())?
            .map_err(|_| ServiceError::Internal("worker pool closed".into()))?;
        let probe = cfg!(debug_assertions) && request_id == PANIC_PROBE_REQUEST_ID;
        let shared = sh.clone();
        let job = tokio::task::spawn_blocking(move || {
            let _worker = worker;
            assert!(!probe, "panic probe requested (debug builds only)");
            let r = work();
            if r.as_ref().err().is_some_and(ServiceError::stopped_early) {
                shared.metrics.stopped_early();
            }
            r
        });
        match tokio::time::timeout_at(until, job).await {
            Err(_) => Err(deadline.timed_out()),
            Ok(Err(join)) if join.is_panic() => {
                let payload = join.into_panic();
                sh.metrics.panicked();
                tracing::error!(
                    target: "keelson::request",
                    method,
                    request_id,
                    panic = panic_message(payload.as_ref()),
                    "the computation panicked; the request fails with INTERNAL and the server keeps serving"
                );
                Err(ServiceError::Internal("the computation failed unexpectedly".into()))
            }
            Ok(Err(join)) => Err(ServiceError::Internal(format!("worker task failed: {join}"))),
            Ok(Ok(Err(e))) if e.deadline_exceeded() => Err(deadline.timed_out()),
            Ok(Ok(r)) => r,
        }
    }
}

/// The caller's `user-agent` header, at most 200 characters, or empty.
pub(super) fn user_agent(metadata: &tonic::metadata::MetadataMap) -> String {
    let agent = metadata.get("user-agent").and_then(|v| v.to_str().ok()).unwrap_or("");
    agent.chars().take(200).collect()
}

/// One request's log line, for every outcome.
#[derive(Clone, Debug)]
pub(super) struct CallLog {
    pub(super) method: &'static str,
    pub(super) request_id: String,
    pub(super) periods: u32,
    pub(super) factors: u32,
    pub(super) started: Instant,
    /// The caller's `user-agent` (gRPC libraries put theirs after the application's).
    pub(super) user_agent: String,
}

impl CallLog {
    /// A call of `method` carrying `returns`.
    pub(super) fn new(
        method: &'static str,
        request_id: &str,
        returns: Option<&crate::proto::Matrix>,
        user_agent: String,
    ) -> CallLog {
        let (periods, factors) = returns.map_or((0, 0), |m| (m.rows, m.cols));
        CallLog { method, request_id: request_id.to_owned(), periods, factors, started: Instant::now(), user_agent }
    }

    /// Logs a served call with what it chose.
    pub(super) fn served(&self, outcome: &str) {
        tracing::info!(
            target: "keelson::request",
            method = self.method,
            request_id = %self.request_id,
            user_agent = %self.user_agent,
            periods = self.periods,
            factors = self.factors,
            outcome,
            code = "OK",
            latency_ms = self.started.elapsed().as_secs_f64() * 1e3,
            "request served"
        );
    }

    /// Logs a failed or refused call.
    pub(super) fn failed(&self, code: tonic::Code, error: &ServiceError) {
        tracing::info!(
            target: "keelson::request",
            method = self.method,
            request_id = %self.request_id,
            user_agent = %self.user_agent,
            periods = self.periods,
            factors = self.factors,
            code = ?code,
            error = %error,
            latency_ms = self.started.elapsed().as_secs_f64() * 1e3,
            "request failed"
        );
    }
}

/// The request fields a call's log and span name: both computing requests carry them.
pub(super) trait CallRequest {
    fn request_id(&self) -> &str;
    fn returns(&self) -> Option<&crate::proto::Matrix>;
}

impl CallRequest for crate::proto::ComputeWeightsRequest {
    fn request_id(&self) -> &str {
        &self.request_id
    }
    fn returns(&self) -> Option<&crate::proto::Matrix> {
        self.returns.as_ref()
    }
}

impl CallRequest for crate::proto::RunBacktestRequest {
    fn request_id(&self) -> &str {
        &self.request_id
    }
    fn returns(&self) -> Option<&crate::proto::Matrix> {
        self.returns.as_ref()
    }
}

/// One call's span, log line and client deadline: set up in one place
/// ([`WeightsApi::begin_call`]) and ended in one place ([`Call::fail`],
/// [`Call::served`]) for both computing RPCs.
#[derive(Clone)]
pub(super) struct Call {
    pub(super) span: CallSpan,
    pub(super) log: CallLog,
    /// The client's `grpc-timeout`.
    pub(super) timeout: Option<Duration>,
    /// The request's column count, for `returns.values[i]` in field violations.
    cols: Option<usize>,
}

impl Call {
    /// Ends a failed or refused call: its status (from the one map,
    /// [`to_status`]), logged and recorded on the span.
    pub(super) fn fail(self, e: &ServiceError) -> tonic::Status {
        let status = to_status(e, self.cols);
        self.log.failed(status.code(), e);
        self.span.finish(status.code(), status.message());
        status
    }

    /// The call once its work has started on a window of the request (a
    /// backtest's sub-windows): error locations are then relative to that
    /// window, so field violations name `returns.values` without an index.
    pub(super) fn within_windows(self) -> Call {
        Call { cols: None, ..self }
    }

    /// Ends a served call, logging what it chose.
    pub(super) fn served(self, outcome: &str) {
        self.log.served(outcome);
        self.span.finish(tonic::Code::Ok, "");
    }
}

impl WeightsApi {
    /// Begins a call of `method`: its span (a child of the caller's trace
    /// context), its log line's fields and the client's deadline.
    pub(super) fn begin_call<T: CallRequest>(&self, method: &'static str, request: tonic::Request<T>) -> (Call, T) {
        let span = self.call_span(method, request.metadata());
        let timeout = grpc_timeout(request.metadata());
        let agent = user_agent(request.metadata());
        let req = request.into_inner();
        let log = CallLog::new(method, req.request_id(), req.returns(), agent);
        span.record(|| {
            [
                opentelemetry::KeyValue::new("keelson.request_id", log.request_id.clone()),
                opentelemetry::KeyValue::new("keelson.periods", i64::from(log.periods)),
                opentelemetry::KeyValue::new("keelson.factors", i64::from(log.factors)),
            ]
        });
        let cols = req.returns().map(|m| m.cols as usize);
        (Call { span, log, timeout, cols }, req)
    }
}

#[cfg(test)]
mod tests {
    use super::{Deadline, grpc_timeout, panic_message, user_agent};
    use std::time::Duration;
    use tonic::metadata::MetadataMap;

    fn with(key: &'static str, value: &str) -> MetadataMap {
        let mut m = MetadataMap::new();
        m.insert(key, value.parse().unwrap());
        m
    }

    /// `grpc-timeout` as the gRPC over HTTP/2 protocol text defines it:
    /// 1 to 8 digits and one of H, M, S, m, u, n; anything else is no deadline.
    #[test]
    fn grpc_timeout_follows_the_protocol_text() {
        let cases = [
            ("1H", Some(Duration::from_secs(3600))),
            ("2M", Some(Duration::from_secs(120))),
            ("30S", Some(Duration::from_secs(30))),
            ("250m", Some(Duration::from_millis(250))),
            ("7u", Some(Duration::from_micros(7))),
            ("99999999n", Some(Duration::from_nanos(99_999_999))),
            ("123456789S", None),
            ("5", None),
            ("5s", None),
            ("-5S", None),
        ];
        for (v, want) in cases {
            assert_eq!(grpc_timeout(&with("grpc-timeout", v)), want, "{v}");
        }
        assert_eq!(grpc_timeout(&MetadataMap::new()), None);
    }

    /// The earlier of the two limits ends the request, and its error says
    /// whose limit it was.
    #[test]
    fn a_deadline_names_whose_limit_ran_out() {
        let client = Deadline::new(Some(Duration::from_millis(100)), 60_000);
        assert!(client.client_binds);
        assert!(matches!(client.timed_out(), super::ServiceError::Estimate(_)));
        let server = Deadline::new(Some(Duration::from_secs(600)), 1_000);
        assert!(!server.client_binds);
        assert!(matches!(server.timed_out(), super::ServiceError::ServerTimeout { limit_ms: 1_000 }));
        assert!(server.at <= std::time::Instant::now() + Duration::from_millis(1_000));
        let (stop, cancel) = server.stop();
        assert!(stop.check().is_ok());
        drop(cancel);
        assert!(stop.check().is_err(), "dropping the guard cancels the computation");
    }

    #[test]
    fn user_agents_are_cut_and_panic_messages_read() {
        let long = "k".repeat(500);
        assert_eq!(user_agent(&with("user-agent", &long)).len(), 200);
        assert_eq!(user_agent(&MetadataMap::new()), "");
        assert_eq!(panic_message(&"static text"), "static text");
        assert_eq!(panic_message(&String::from("owned text")), "owned text");
        assert_eq!(panic_message(&42u8), "a panic without a message");
    }
}

//! Optional OpenTelemetry trace export over OTLP/gRPC, off unless
//! `tracing.otlp_endpoint` is set. Every API call gets one server span,
//! parented on the caller's W3C `traceparent` when there is one, with the
//! gRPC status and the window's shape as attributes; a `ComputeWeights`
//! span has one child span per estimator phase, laid end to end from the
//! phase durations the estimator measured. Spans are batched and exported
//! from a background thread, so a slow or absent collector never delays a
//! response; spans that do not fit the queue are dropped.

use std::time::{Duration, SystemTime};

use opentelemetry::propagation::{Extractor, TextMapPropagator};
use opentelemetry::trace::{Span as _, SpanKind, Status, TraceContextExt, Tracer as _, TracerProvider as _};
use opentelemetry::{Context, KeyValue};
use opentelemetry_sdk::propagation::TraceContextPropagator;
use opentelemetry_sdk::trace::{BatchConfigBuilder, BatchSpanProcessor, Sampler, SdkTracer, SdkTracerProvider};

use super::config::TracingSection;
use crate::estimator::PhaseTimes;

/// How long shutdown waits for the last spans to reach the collector.
const FLUSH_BUDGET: Duration = Duration::from_secs(5);

/// Why trace export could not start.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum TelemetryError {
    /// The OTLP exporter could not be built.
    #[error("tracing.otlp_endpoint: cannot build the OTLP exporter: {0}")]
    Exporter(String),
    /// The exporter's channel needs a Tokio runtime, and there is none.
    #[error("trace export must start inside the server's Tokio runtime")]
    NoRuntime,
}

/// The trace exporter of one server (or nothing, when tracing is off).
#[derive(Debug, Default)]
pub struct Telemetry {
    inner: Option<(SdkTracerProvider, SdkTracer)>,
}

/// Reads W3C trace context from gRPC metadata.
struct MetadataExtractor<'a>(&'a tonic::metadata::MetadataMap);

impl Extractor for MetadataExtractor<'_> {
    fn get(&self, key: &str) -> Option<&str> {
        self.0.get(key).and_then(|v| v.to_str().ok())
    }

    fn keys(&self) -> Vec<&str> {
        self.0
            .keys()
            .filter_map(|k| match k {
                tonic::metadata::KeyRef::Ascii(k) => Some(k.as_str()),
                tonic::metadata::KeyRef::Binary(_) => None,
            })
            .collect()
    }
}

impl Telemetry {
    /// Starts export to `section.otlp_endpoint`, or returns a disabled
    /// exporter when it is empty. Must run inside a Tokio runtime.
    ///
    /// # Errors
    /// [`TelemetryError`] when the exporter cannot be built.
    pub fn start(section: &TracingSection) -> Result<Telemetry, TelemetryError> {
        if section.otlp_endpoint.is_empty() {
            return Ok(Telemetry::default());
        }
        if tokio::runtime::Handle::try_current().is_err() {
            return Err(TelemetryError::NoRuntime);
        }
        use opentelemetry_otlp::WithExportConfig as _;
        let exporter = opentelemetry_otlp::SpanExporter::builder()
            .with_tonic()
            .with_endpoint(section.otlp_endpoint.clone())
            .with_timeout(Duration::from_millis(section.export_timeout_ms))
            .build()
            .map_err(|e| TelemetryError::Exporter(e.to_string()))?;
        let batch = BatchConfigBuilder::default()
            .with_scheduled_delay(Duration::from_millis(section.export_interval_ms))
            .with_max_queue_size(section.max_queued_spans)
            .build();
        let processor = BatchSpanProcessor::builder(exporter).with_batch_config(batch).build();
        let resource = opentelemetry_sdk::Resource::builder()
            .with_service_name(section.service_name.clone())
            .with_attributes([
                KeyValue::new("service.version", env!("CARGO_PKG_VERSION")),
                KeyValue::new("keelson.estimator_version", crate::estimator::ESTIMATOR_VERSION),
            ])
            .build();
        let provider = SdkTracerProvider::builder()
            .with_span_processor(processor)
            .with_sampler(Sampler::ParentBased(Box::new(Sampler::TraceIdRatioBased(section.sample_ratio))))
            .with_resource(resource)
            .build();
        let tracer = provider.tracer("keelson");
        Ok(Telemetry { inner: Some((provider, tracer)) })
    }

    /// Whether spans are exported.
    pub fn is_enabled(&self) -> bool {
        self.inner.is_some()
    }

    /// A server span for `method` that started at `start`, parented on the
    /// trace context in `meta` (a fresh trace when there is none or it is
    /// malformed).
    pub fn call_span(&self, method: &'static str, meta: &tonic::metadata::MetadataMap, start: SystemTime) -> CallSpan {
        let Some((_, tracer)) = &self.inner else {
            return CallSpan { inner: None };
        };
        let parent = TraceContextPropagator::new().extract(&MetadataExtractor(meta));
        let span = tracer
            .span_builder(format!("{}/{method}", super::SERVICE_NAME))
            .with_kind(SpanKind::Server)
            .with_start_time(start)
            .with_attributes([
                KeyValue::new("rpc.system", "grpc"),
                KeyValue::new("rpc.service", super::SERVICE_NAME),
                KeyValue::new("rpc.method", method),
            ])
            .start_with_context(tracer, &parent);
        CallSpan { inner: Some((tracer.clone(), parent.with_span(span))) }
    }

    /// Exports what is queued and stops the exporter, within a few seconds.
    /// Blocking: call it off the async executor.
    pub fn shutdown(&self) {
        if let Some((provider, _)) = &self.inner
            && let Err(e) = provider.shutdown_with_timeout(FLUSH_BUDGET)
        {
            tracing::warn!(error = %e, "trace export did not finish at shutdown");
        }
    }
}

/// The span of one API call; every method does nothing when tracing is off.
/// Cloning shares the span (the blocking worker adds the phase spans).
#[derive(Clone, Debug)]
pub struct CallSpan {
    inner: Option<(SdkTracer, Context)>,
}

impl CallSpan {
    /// A span that records nothing.
    pub fn none() -> CallSpan {
        CallSpan { inner: None }
    }

    /// Adds the attributes `attributes` builds to the call's span; they are
    /// not built at all when tracing is off.
    pub fn record<I: IntoIterator<Item = KeyValue>>(&self, attributes: impl FnOnce() -> I) {
        if let Some((_, cx)) = &self.inner {
            cx.span().set_attributes(attributes());
        }
    }

    /// One child span per estimator phase, end to end from `fit_start`.
    pub fn phases(&self, fit_start: SystemTime, phases: &PhaseTimes) {
        let Some((tracer, cx)) = &self.inner else {
            return;
        };
        let mut at = fit_start;
        for (name, took) in phases.named() {
            if took.is_zero() {
                continue;
            }
            let mut span = tracer
                .span_builder(format!("estimator.{name}"))
                .with_kind(SpanKind::Internal)
                .with_start_time(at)
                .start_with_context(tracer, cx);
            at += took;
            span.end_with_timestamp(at);
        }
    }

    /// Ends the span with the call's gRPC status. Server spans are errors for
    /// the codes that mean the server failed (OpenTelemetry semantic
    /// conventions for gRPC); a caller's bad input is not a server error.
    pub fn finish(self, code: tonic::Code, message: &str) {
        let Some((_, cx)) = self.inner else {
            return;
        };
        let span = cx.span();
        span.set_attribute(KeyValue::new("rpc.grpc.status_code", code as i64));
        use tonic::Code as C;
        if matches!(
            code,
            C::Unknown | C::DeadlineExceeded | C::Unimplemented | C::Internal | C::Unavailable | C::DataLoss
        ) {
            span.set_status(Status::error(message.to_owned()));
        }
        span.end();
    }
}

//! The gRPC transport around the estimator: `keelson.v1.WeightsService`,
//! health, reflection, limits, load shedding, deadlines and graceful drain.
//! Handlers only validate → convert → compute (on the blocking pool) →
//! convert; every error becomes a status in [`status::to_status`].
//!
//! | module | owns |
//! |---|---|
//! | `admission` | the in-flight limit, size limits and request budgets |
//! | `runner` | the one blocking runner: worker slots, deadlines, cancellation, panics |
//! | `compute`, `backtest`, `info` | one file per RPC |
//! | `server` | server assembly, listeners, drain and signals |
//! | [`status`], [`config`], [`auth`], [`metrics`], [`telemetry`] | errors → statuses, configuration, tokens, Prometheus, traces |

mod admission;
pub mod auth;
mod backtest;
mod compute;
pub mod config;
mod info;
pub mod loopback;
pub mod metrics;
mod runner;
mod server;
pub mod status;
pub mod telemetry;

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::SystemTime;

use tokio::sync::Semaphore;
use tonic::{Request, Response, Status};

use crate::proto;
use crate::proto::weights_service_server::WeightsService;
pub use backtest::BacktestStream;
use config::ValidConfig;
pub use runner::PANIC_PROBE_REQUEST_ID;
pub use server::{HEALTH_NAMES, Listeners, ServeError, serve, serve_api, termination_signal};
use telemetry::CallSpan;

/// The encoded descriptor set of the `keelson.v1` API, for reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = include_bytes!(concat!(env!("OUT_DIR"), "/keelson_descriptor.bin"));

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
    metrics: Arc<metrics::Metrics>,
    /// Trace export, set when serving starts (it needs the runtime).
    telemetry: std::sync::OnceLock<telemetry::Telemetry>,
}

/// The `WeightsService` implementation.
#[derive(Clone, Debug)]
pub struct WeightsApi {
    shared: Arc<Shared>,
}

impl WeightsApi {
    /// A service with the given configuration.
    pub fn new(config: ValidConfig) -> Self {
        let admission = Arc::new(Semaphore::new(config.raw.server.max_in_flight));
        let workers = Arc::new(Semaphore::new(config.workers));
        let draining = AtomicBool::new(false);
        let metrics = Arc::new(metrics::Metrics::default());
        let telemetry = std::sync::OnceLock::new();
        WeightsApi { shared: Arc::new(Shared { config, admission, workers, draining, metrics, telemetry }) }
    }

    /// The Prometheus exposition text of this server's metrics.
    pub fn metrics_text(&self) -> String {
        self.shared.metrics.render(metrics::Gauges {
            in_flight: self.in_flight(),
            computing: self.computing(),
            max_in_flight: self.shared.config.raw.server.max_in_flight,
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
        self.shared.metrics.stopped_early_total()
    }

    /// Refuses new requests from now on (in-flight ones continue).
    pub fn start_draining(&self) {
        self.shared.draining.store(true, Ordering::SeqCst);
    }

    /// Requests currently admitted.
    pub fn in_flight(&self) -> usize {
        self.shared.config.raw.server.max_in_flight - self.shared.admission.available_permits()
    }

    /// A span for one call of `method` (a no-op when trace export is off).
    fn call_span(&self, method: &'static str, meta: &tonic::metadata::MetadataMap) -> CallSpan {
        self.shared.telemetry.get().map_or_else(CallSpan::none, |t| t.call_span(method, meta, SystemTime::now()))
    }
}

#[tonic::async_trait]
impl WeightsService for WeightsApi {
    async fn compute_weights(
        &self,
        request: Request<proto::ComputeWeightsRequest>,
    ) -> Result<Response<proto::ComputeWeightsResponse>, Status> {
        self.handle_compute(request).await
    }

    type RunBacktestStream = BacktestStream;

    async fn run_backtest(
        &self,
        request: Request<proto::RunBacktestRequest>,
    ) -> Result<Response<Self::RunBacktestStream>, Status> {
        self.handle_backtest(request).await
    }

    async fn get_service_info(
        &self,
        request: Request<proto::GetServiceInfoRequest>,
    ) -> Result<Response<proto::GetServiceInfoResponse>, Status> {
        self.handle_info(request)
    }
}

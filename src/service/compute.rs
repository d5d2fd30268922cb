//! `ComputeWeights`: validate → convert → fit on the blocking pool → convert.

use std::time::SystemTime;

use tonic::{Request, Response, Status};

use super::WeightsApi;
use super::runner::Deadline;
use super::status::ServiceError;
use super::telemetry::CallSpan;
use crate::convert::{request_into_parts, weight_set_to_proto};
use crate::estimator::{self, FitOptions};
use crate::proto;

impl WeightsApi {
    pub(super) async fn handle_compute(
        &self,
        request: Request<proto::ComputeWeightsRequest>,
    ) -> Result<Response<proto::ComputeWeightsResponse>, Status> {
        let (call, req) = self.begin_call("ComputeWeights", request);
        match self.compute(req, call.timeout, &call.span).await {
            Ok(resp) => {
                let d = resp.diagnostics.as_ref();
                let (k, kappa) = d.map_or((0, 0.0), |d| (d.num_components, d.kappa));
                call.span.record(|| {
                    [
                        opentelemetry::KeyValue::new("keelson.components", i64::from(k)),
                        opentelemetry::KeyValue::new("keelson.kappa", kappa),
                        opentelemetry::KeyValue::new("keelson.fingerprint", resp.fingerprint.clone()),
                    ]
                });
                call.served(&format!("components={k} kappa={kappa} fingerprint={}", resp.fingerprint));
                Ok(Response::new(resp))
            }
            Err(e) => Err(call.fail(&e)),
        }
    }

    async fn compute(
        &self,
        req: proto::ComputeWeightsRequest,
        client_timeout: Option<std::time::Duration>,
        span: &CallSpan,
    ) -> Result<proto::ComputeWeightsResponse, ServiceError> {
        let sh = &self.shared;
        let _admitted = self.admit()?;
        self.check_size(req.returns.as_ref(), req.factor_names.len())?;
        let (panel, proto_settings, request_id) = request_into_parts(req);
        // Every request within the size limits is recorded, refused ones included.
        sh.metrics.problem_size(panel.rows, panel.cols);
        let settings = self.settings(&proto_settings)?;
        self.check_stage_size(&settings, panel.rows, panel.cols)?;
        self.check_fit_bytes(&settings, panel.rows, panel.cols)?;
        let deadline = Deadline::new(client_timeout, sh.config.raw.server.request_timeout_ms);
        let (stop, _cancel) = deadline.stop();
        let shared = sh.clone();
        let span = span.clone();
        let ws = self
            .run_blocking("ComputeWeights", &request_id, &deadline, move || {
                let fit_start = SystemTime::now();
                let options = FitOptions { threads: 1, stop, ..FitOptions::default() };
                let (result, phases) = estimator::fit_with_phases(&panel, &settings, &options);
                shared.metrics.phases(&phases);
                span.phases(fit_start, &phases);
                Ok(result?)
            })
            .await?;
        Ok(weight_set_to_proto(&ws, &request_id))
    }
}

//! `GetServiceInfo`: versions, the server's default settings and its limits.

use tonic::{Request, Response, Status};

use super::WeightsApi;
use crate::convert::settings_to_proto;
use crate::estimator;
use crate::proto;

impl WeightsApi {
    pub(super) fn handle_info(
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
                max_backtest_fits: s.max_backtest_fits,
                max_request_bytes_estimate: s.max_request_bytes_estimate,
                max_stage_factors: s.max_stage_factors as u32,
                max_stage_cells: s.max_stage_cells,
            }),
            settings: estimator::Settings::TABLE
                .iter()
                .map(|info| proto::SettingDescription {
                    name: info.name.to_owned(),
                    default_value: c.defaults.shown_value(info.name).unwrap_or_default().replace('`', ""),
                    range: info.range.to_owned(),
                    meaning: info.meaning.to_owned(),
                })
                .collect(),
        }))
    }
}

//! `keelson healthcheck`: exit 0 when a server reports SERVING.

use std::process::ExitCode;
use std::time::Duration;

use keelson::client::HealthError;
use tonic_health::pb::health_check_response::ServingStatus;

use super::args::HealthArgs;

pub(crate) async fn run(a: HealthArgs) -> anyhow::Result<ExitCode> {
    let status =
        a.connect.target().health(&a.service, Duration::from_millis(a.timeout_ms)).await.map_err(|e| match e {
            // Keep the client error itself visible, so that bad options exit 2.
            HealthError::Client(c) => anyhow::Error::new(c),
            other => anyhow::Error::new(other),
        })?;
    println!("{}", status.as_str_name());
    Ok(if status == ServingStatus::Serving { ExitCode::SUCCESS } else { ExitCode::from(1) })
}

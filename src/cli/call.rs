//! `keelson call`: a window from CSV sent to a running server.

use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use anyhow::Context as _;
use keelson::client::{bearer, describe_status};
use keelson::convert::{request_from_panel, settings_to_proto_only};

use super::args::CallArgs;
use super::{fail_on_codes, read_window, render, resolve_settings, strict_exit};

/// The bearer token from `--token-file` or `KEELSON_TOKEN`, if any.
fn token(file: Option<&PathBuf>) -> anyhow::Result<Option<String>> {
    Ok(match file {
        Some(p) => Some(
            std::fs::read_to_string(p)
                .with_context(|| format!("cannot read {}", p.display()))?
                .lines()
                .next()
                .unwrap_or("")
                .to_owned(),
        ),
        None => std::env::var("KEELSON_TOKEN").ok(),
    })
}

pub(crate) async fn run(a: CallArgs) -> anyhow::Result<ExitCode> {
    let fail_on = fail_on_codes(&a.strict)?;
    let (settings, keys) = resolve_settings(None, &a.set)?;
    // The same checks as `fit`, before anything is sent: a bad setting is a usage error.
    settings.clone().check()?;
    let settings_msg = settings_to_proto_only(&settings, &keys);
    let csv = read_window(&a.window)?;
    let mut request = tonic::Request::new(request_from_panel(&csv.panel, settings_msg, &a.request_id));
    request.set_timeout(Duration::from_millis(a.timeout_ms));
    if let Some(t) = token(a.token_file.as_ref())? {
        request.metadata_mut().insert("authorization", bearer(&t)?);
    }
    let mut client = a.connect.target().weights_client().await?;
    let resp = client.compute_weights(request).await.map_err(|s| anyhow::anyhow!(describe_status(&s)))?.into_inner();
    render(&resp, a.format, &csv.file, &csv.panel.period_labels)?;
    let raised = resp.diagnostics.iter().flat_map(|d| d.warnings.iter().map(|w| w.code.as_str()));
    Ok(strict_exit(&fail_on, raised))
}

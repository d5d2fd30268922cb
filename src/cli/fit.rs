//! `keelson fit`: one window from CSV, fitted locally.

use std::process::ExitCode;

use keelson::convert::weight_set_to_proto;
use keelson::estimator::{self, FitOptions};

use super::args::FitArgs;
use super::{fail_on_codes, located, read_window, render, resolve_settings, strict_exit};

pub(crate) fn run(a: FitArgs) -> anyhow::Result<ExitCode> {
    let fail_on = fail_on_codes(&a.strict)?;
    let (settings, _) = resolve_settings(a.settings.config.as_ref(), &a.settings.set)?;
    let settings = settings.check()?;
    let csv = read_window(&a.window)?;
    let options = FitOptions { threads: usize::from(a.threads), ..FitOptions::default() };
    let ws = estimator::fit_with(&csv.panel, &settings, &options).map_err(|e| located(e, &csv))?;
    render(&weight_set_to_proto(&ws, ""), a.format, &csv.file, &csv.panel.period_labels)?;
    Ok(strict_exit(&fail_on, ws.diagnostics.warnings.iter().map(|w| w.code.word())))
}

//! `keelson demo`: the invented Tessaly Exchange through an in-process
//! server on a loopback port, as a rebalancing job would call it, then a
//! backtest of its invented history.

use std::process::ExitCode;

use anyhow::Context as _;
use keelson::client::{Target, describe_status};
use keelson::convert::{request_from_panel, settings_to_proto_only};
use keelson::estimator::{Method, Scaling};
use keelson::proto::{self, ComputeWeightsResponse, Diagnostics};
use keelson::service::loopback::LoopbackServer;

use super::args::{DemoArgs, Format};
use super::{output, print, resolve_settings};

pub(crate) async fn run(a: DemoArgs) -> anyhow::Result<ExitCode> {
    let (settings, keys) = resolve_settings(a.settings.config.as_ref(), &a.settings.set)?;
    let checked = settings.clone().check()?;
    let panel = keelson::demo::demo_panel();
    if let Some(p) = &a.write_csv {
        std::fs::write(p, keelson::demo::to_csv(&panel)).with_context(|| format!("cannot write {}", p.display()))?;
    }
    let defaults = checked.settings().clone();
    let server = LoopbackServer::start(|c| c.estimator = defaults).await?;
    let url = server.url();
    let calls = async {
        let mut c = Target::plaintext(url.clone()).weights_client().await?;
        let sent = settings_to_proto_only(&settings, &keys);
        let req = request_from_panel(&panel, sent, "demo");
        let resp = c.compute_weights(req).await.map_err(|s| anyhow::anyhow!(describe_status(&s)))?.into_inner();
        // A contrast on the same window, for the reading below: the Sharpe-scaled leading
        // components beside the ridge on all components, or plain PCA beside another scaling.
        let contrast = match checked.method {
            Method::KnsRidge | Method::Blend => Some((proto::Method::Components, proto::Scaling::Sharpe)),
            Method::Components if checked.scaling != Scaling::Covariance => {
                Some((proto::Method::Components, proto::Scaling::Covariance))
            }
            _ => None,
        };
        let plain = match contrast {
            Some((method, scaling)) => {
                let mut s = sent;
                s.method = method.into();
                s.scaling = scaling.into();
                c.compute_weights(request_from_panel(&panel, s, "demo-contrast")).await.ok().map(|r| r.into_inner())
            }
            None => None,
        };
        Ok::<_, anyhow::Error>((resp, plain))
    };
    let result = calls.await;
    server.shutdown().await?;
    let (resp, plain) = result.context("calling the in-process demo server")?;
    match a.format {
        Format::Json => {
            print(&output::json(&resp)?)?;
            // Standard output stays one JSON document; the report is still written.
            if !a.skip_backtest {
                super::backtest::demo_history(&checked, &a.report_dir, false)?;
                eprintln!("report written to {}", a.report_dir.join("report.html").display());
            }
        }
        Format::Table => {
            let mut text = String::new();
            text.push_str(DEMO_INTRO);
            text.push_str(&format!("(served over gRPC by an in-process server on {url})\n\n"));
            text.push_str(&output::table(&resp, "Tessaly Exchange (invented)", &panel.period_labels));
            text.push('\n');
            text.push_str(&explanation(&resp, plain.as_ref()));
            print(&text)?;
            if !a.skip_backtest {
                super::backtest::demo_history(&checked, &a.report_dir, true)?;
            }
            print(CAUTION)?;
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// What the demo is, printed before its weights.
const DEMO_INTRO: &str = "\
Demo: the Tessaly Exchange, an invented market (not market data). 36 long–short
factors over 120 months. A third of them carry a modest premium through two
quiet styles, with true annualised Sharpe ratios of roughly 0.3 to 0.8 each;
the rest earn nothing and swing with four loud sectors. Estimated on one
window, the factors' Sharpe ratios scatter wider than the truth: that is the
estimation error the method is built to survive. Keelson removes each
factor's market exposure, takes principal components, and shrinks the
mean–variance portfolio of the components toward zero with the shrinkage
chosen by time-series cross-validation; the default `blend` averages that
ridge with the Ledoit–Wolf plug-in, the pair that held up best on simulated
markets of many structures (`--set method=components` keeps only the leading
components of a scaling and chooses their number too).
";

/// The usual cautions for investment analysis.
pub(crate) const CAUTION: &str = "\
Caution: these weights are estimates from one window of past returns. They
carry estimation error, past performance does not predict future results, and
the demo data are invented. Validate any configuration out of sample before
live use and run it through your own risk and compliance process.
";

/// A short reading of the demo's result, against plain PCA (covariance
/// scaling) fitted on the same window with the same settings otherwise.
fn explanation(ws: &ComputeWeightsResponse, plain: Option<&ComputeWeightsResponse>) -> String {
    let none = Diagnostics::default();
    let d = ws.diagnostics.as_ref().unwrap_or(&none);
    let mut top: Vec<_> = ws.weights.iter().filter(|f| !f.excluded).collect();
    top.sort_by(|a, b| b.weight.abs().total_cmp(&a.weight.abs()));
    let names: Vec<&str> = top.iter().take(3).map(|f| f.factor.as_str()).collect();
    let (what, whose) = if output::is_blend(d) {
        (
            format!("half the ridge on all {} components and half the Ledoit–Wolf plug-in", d.num_components),
            "of the ridge half",
        )
    } else {
        (format!("{} component(s)", d.num_components), "")
    };
    let mut out = format!(
        "Reading: the portfolio uses {what}; the largest positions are in {}. \
         The top 30% of factors by Sharpe ratio hold {:.0}% of the gross weight. The held-out \
         Sharpe ratio {whose} estimated by cross-validation is {:.2} against {:.2} in the window: the gap \
         is the optimism of fitting and choosing on the same data.",
        names.join(", "),
        100.0 * d.top_sharpe_gross_share,
        d.cv_sharpe,
        d.in_sample_sharpe
    );
    // Where the largest position is the market hedge, say so: it offsets the
    // factors' market exposure and is no bet on the market.
    let largest_factor = top.first().map_or(0.0, |f| f.weight.abs());
    if ws.market_weight.abs() > largest_factor {
        out.push_str(&format!(
            " The largest single position is the market hedge ({:+.2} × NAV): it offsets the factors' \
             combined market beta, it is not a view on the market.",
            ws.market_weight
        ));
    }
    if let Some(c) = &d.risk_calibration {
        out.push_str(&format!(
            " The weights are scaled by {:.2} so that the {:.0}% volatility target holds out of sample: \
             in the window the portfolio runs at {:.1}%.",
            c.factor,
            100.0 * c.calibrated_volatility,
            100.0 * c.in_window_volatility
        ));
    }
    if d.implementation.is_none() {
        let gross = ws.weights.iter().map(|f| f.weight.abs()).sum::<f64>() + ws.market_weight.abs();
        out.push_str(&format!(
            " This is the unconstrained model portfolio (gross {gross:.1} × NAV, no limits, no costs); \
             `--config examples/desk.toml` shows it within a desk's limits and trading costs."
        ));
    }
    if let Some(pd) = plain.and_then(|p| p.diagnostics.as_ref()) {
        let what = match pd.effective_settings.map(|s| s.scaling()) {
            Some(proto::Scaling::Covariance) => "plain PCA (scaling covariance)",
            _ => "the Sharpe-scaled leading components (method components)",
        };
        out.push_str(&format!(
            " For comparison, {what} on the same window keeps {} component(s), \
             puts {:.0}% of gross weight in the top-Sharpe factors and has a cross-validated Sharpe \
             ratio of {:.2}. Which method wins out of sample is a question for a backtest, not for \
             one window.",
            pd.num_components,
            100.0 * pd.top_sharpe_gross_share,
            pd.cv_sharpe
        ));
    }
    out.push_str("\n\n");
    out
}

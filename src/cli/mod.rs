//! Command-line presentation: output formats and the demo's narrative.

pub mod output;

use keelson::proto::{ComputeWeightsResponse, Diagnostics};

/// What the demo is, printed before its weights.
pub const DEMO_INTRO: &str = "\
Demo: the Tessaly Exchange, an invented market. 36 long–short factors over
120 months load on four loud sector swings that earn nothing and on two quiet
styles that carry the premium. Keelson removes each factor's market exposure,
scales every factor by its Sharpe ratio before extracting principal components,
and shrinks the mean–variance portfolio of the leading components, choosing
the number of components and the shrinkage by time-series cross-validation.
";

/// The usual cautions for investment analysis.
pub const CAUTION: &str = "\
Caution: these weights are estimates from one window of past returns. They
carry estimation error, past performance does not predict future results, and
the demo data are invented. Validate any configuration out of sample before
live use and run it through your own risk and compliance process.
";

/// A short reading of the demo's result, against plain PCA (covariance
/// scaling) fitted on the same window with the same settings otherwise.
pub fn demo_explanation(ws: &ComputeWeightsResponse, plain: Option<&ComputeWeightsResponse>) -> String {
    let none = Diagnostics::default();
    let d = ws.diagnostics.as_ref().unwrap_or(&none);
    let mut top: Vec<_> = ws.weights.iter().filter(|f| !f.excluded).collect();
    top.sort_by(|a, b| b.weight.abs().total_cmp(&a.weight.abs()));
    let names: Vec<&str> = top.iter().take(3).map(|f| f.factor.as_str()).collect();
    let mut out = format!(
        "Reading: cross-validation kept {} component(s); the largest positions are in {}. \
         The top 30% of factors by Sharpe ratio hold {:.0}% of the gross weight. The held-out \
         Sharpe ratio estimated by cross-validation is {:.2} against {:.2} in the window: the gap \
         is the optimism of fitting and choosing on the same data.",
        d.num_components,
        names.join(", "),
        100.0 * d.top_sharpe_gross_share,
        d.cv_sharpe,
        d.in_sample_sharpe
    );
    if let Some(pd) = plain.and_then(|p| p.diagnostics.as_ref()) {
        out.push_str(&format!(
            " For comparison, plain PCA (scaling covariance) on the same window keeps {} component(s), \
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

//! Inference across the strategies (SPEC §9, §12): Sharpe-ratio
//! comparisons with Holm and Romano–Wolf adjustments, the deflated Sharpe
//! ratio, alphas against the benchmark sets, and the pricing test.

use super::refits::{Held, OutOfSample};
use super::results::{AlphaTest, Comparison, PricingTest, StrategyResult, SweepPoint};
use super::stats;
use super::strategies::{MARKET, MODEL};
use crate::estimator::{Method, ValidSettings};

/// Luck or skill: JKM tests against every other strategy (raw, Holm and
/// Romano–Wolf adjusted), and the probabilistic and deflated Sharpe ratios
/// of the configured method over the distinct candidates tried.
pub(super) struct Inference {
    pub(super) comparisons: Vec<Comparison>,
    pub(super) psr: f64,
    pub(super) dsr: f64,
    pub(super) trials: Vec<String>,
}

/// Bootstrap draws of the Romano–Wolf step-down (fixed seed 0).
pub const ROMANO_WOLF_DRAWS: usize = 1000;

/// Whether a strategy is a benchmark rather than a candidate configuration:
/// the market, equal weight and the configured method's model-portfolio row.
pub(super) fn is_benchmark(s: &StrategyResult) -> bool {
    s.name == MODEL || s.settings.as_ref().is_none_or(|v| v.method == Method::EqualWeight)
}

pub(super) fn inference(results: &[StrategyResult], sweep: &[SweepPoint], p: f64, candidates: usize) -> Inference {
    let configured = &results[0].returns;
    let raw: Vec<stats::SharpeDifference> =
        results[1..].iter().map(|r| stats::jobson_korkie_memmel(configured, &r.returns, p)).collect();
    let holm = stats::holm(&raw.iter().map(|t| t.p_value).collect::<Vec<_>>());
    let others: Vec<&[f64]> = results[1..].iter().map(|r| r.returns.as_slice()).collect();
    let block = (configured.len() as f64).cbrt().ceil();
    let romano_wolf = stats::romano_wolf(configured, &others, ROMANO_WOLF_DRAWS, block, 0);
    let comparisons = results[1..]
        .iter()
        .zip(raw)
        .enumerate()
        .map(|(i, (r, test))| Comparison {
            against: r.name.clone(),
            test,
            p_holm: holm[i],
            p_romano_wolf: romano_wolf[i],
        })
        .collect();
    let sr = stats::sharpe(configured);
    let (skew, kurt) = stats::skew_kurt(configured);
    let psr = stats::probabilistic_sharpe(sr, 0.0, configured.len(), skew, kurt);
    // Trials (SPEC §13): every distinct candidate configuration evaluated, the
    // fitted strategies and the sweep points; benchmarks are not candidates, and
    // configurations whose out-of-sample Sharpe ratios agree to the last bit
    // (the same return series) count once.
    let mut seen: Vec<u64> = Vec::new();
    let mut trials = Vec::new();
    let mut trial_srs = Vec::new();
    let named = results
        .iter()
        .filter(|r| !is_benchmark(r))
        .map(|r| (r.name.clone(), r.metrics.sharpe))
        .chain(sweep.iter().map(|s| (format!("{} components, scaling {}", s.k, s.scaling), s.sharpe)));
    for (name, annual) in named {
        if !annual.is_finite() || seen.contains(&annual.to_bits()) {
            continue;
        }
        seen.push(annual.to_bits());
        trials.push(name);
        trial_srs.push(annual / p.sqrt());
    }
    // The configured method's own candidates (every scaling for `auto` and the
    // ensemble) are trials too (SPEC §11); those not already a row add to the count.
    let rows_of_members = results.iter().filter(|r| r.id.starts_with("scaling-")).count();
    for i in 0..candidates.saturating_sub(1).saturating_sub(rows_of_members) {
        trials.push(format!("member {} of the configured method", i + 2));
    }
    let dsr = if trials.len() >= 2 && trial_srs.len() >= 2 {
        stats::deflated_sharpe(sr, configured.len(), skew, kurt, stats::var(&trial_srs), trials.len())
    } else {
        f64::NAN
    };
    Inference { comparisons, psr, dsr, trials }
}

/// A regression with R² this close to 1 has no residual to test: its α and
/// t-statistics are rounding noise and are not reported.
pub const SPANNED_R2: f64 = 1e-10;

/// Alphas of every strategy against every benchmark set observed throughout.
pub(super) fn alpha_tests(
    oos: &OutOfSample<'_>,
    sets: &[Vec<String>],
    results: &[StrategyResult],
    p: f64,
    lag: usize,
) -> Vec<AlphaTest> {
    let mut alphas = Vec::new();
    for set in sets {
        let Some(xs) = set.iter().map(|n| oos.series_of(n)).collect::<Option<Vec<Vec<f64>>>>() else { continue };
        if xs.iter().any(|x| x.iter().any(|v| !v.is_finite())) {
            continue;
        }
        for r in results {
            if let Some(reg) = stats::ols(&r.returns, &xs, lag) {
                let note = if r.id == MARKET && set.iter().any(|b| b == MARKET) {
                    Some("the strategy is one of its benchmarks".to_owned())
                } else if reg.r2 >= 1.0 - SPANNED_R2 {
                    Some(format!("R² is 1 to within {SPANNED_R2:e}: the benchmarks span the strategy"))
                } else {
                    None
                };
                let nan_if_spanned = |v: f64| if note.is_some() { f64::NAN } else { v };
                alphas.push(AlphaTest {
                    strategy: r.name.clone(),
                    benchmarks: set.clone(),
                    alpha: nan_if_spanned(p * reg.coef[0]),
                    t_nw: nan_if_spanned(reg.coef[0] / reg.se_nw[0]),
                    t_robust: nan_if_spanned(reg.coef[0] / reg.se_robust[0]),
                    r2: reg.r2,
                    note,
                });
            }
        }
    }
    alphas
}

/// The sweep's fixed-K fits per date and scaling, and per date the loadings
/// of the configured scaling's largest fitted K.
pub(super) struct SweepFits<'a> {
    pub(super) fits: &'a [&'a [Vec<Option<Held>>]],
    pub(super) basis: &'a [Option<&'a Held>],
    pub(super) index: Option<usize>,
}

/// Time-series regressions of every factor observed throughout the
/// out-of-sample span on the out-of-sample returns of the configured
/// scaling's first K components (and the market, when there is one); K is
/// the one the configured method chose most often, at most the sweep's
/// largest K when the configured fits do not all have that many.
pub(super) fn pricing_test(
    oos: &OutOfSample<'_>,
    held: &[&[Held]],
    sweep: &SweepFits<'_>,
    lag: usize,
    configured: &ValidSettings,
) -> Option<PricingTest> {
    // A K-component model is a statement only where K is chosen: the ridge on
    // every component spans the factors themselves.
    if configured.method != Method::Components {
        return None;
    }
    let mut counts = std::collections::BTreeMap::new();
    for h in held {
        *counts.entry(h[0].k).or_insert(0usize) += 1;
    }
    let mut k = counts.iter().max_by_key(|(k, c)| (**c, std::cmp::Reverse(**k))).map(|(k, _)| *k)?;
    let fits: Vec<&Held> = if held.iter().all(|h| h[0].components.len() >= k) {
        held.iter().map(|h| &h[0]).collect()
    } else {
        // The sweep holds fixed-K fits up to its largest K; every date must
        // have the K-component fit, whose loadings are the first K of the basis.
        let si = sweep.index?;
        k = k.min(sweep.fits.first().and_then(|d| d.get(si)).map_or(0, Vec::len));
        if k == 0 {
            return None;
        }
        let all_fit = sweep.fits.iter().all(|d| d.get(si).and_then(|ks| ks.get(k - 1)).is_some_and(Option::is_some));
        if !all_fit {
            return None;
        }
        sweep.basis.iter().copied().collect::<Option<_>>()?
    };
    let panel = oos.panel;
    let cols = panel.cols;
    let m = panel.market.as_deref();
    let mut regressors: Vec<Vec<f64>> = vec![Vec::with_capacity(oos.periods.len()); k];
    for &t in &oos.periods {
        let h = fits[oos.date_of(t)];
        for (c, reg) in regressors.iter_mut().enumerate() {
            let load = h.components.get(c)?;
            let mut v = 0.0;
            for j in 0..cols {
                if load[j] != 0.0 {
                    let x = panel.returns[t * cols + j];
                    v += load[j] * (x - h.betas[j] * m.map_or(0.0, |m| m[t]));
                }
            }
            reg.push(v);
        }
    }
    if let Some(m) = m {
        regressors.push(oos.periods.iter().map(|&t| m[t]).collect());
    }
    let assets: Vec<Vec<f64>> = (0..cols)
        .map(|j| oos.periods.iter().map(|&t| panel.returns[t * cols + j]).collect::<Vec<f64>>())
        .filter(|s| s.iter().all(|v| v.is_finite()))
        .collect();
    let significant = assets
        .iter()
        .filter_map(|y| stats::ols(y, &regressors, lag))
        .filter(|r| (r.coef[0] / r.se_nw[0]).abs() > 1.96)
        .count();
    Some(PricingTest { k, assets: assets.len(), significant, grs: stats::grs(&assets, &regressors) })
}

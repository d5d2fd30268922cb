//! The invented demonstration market: the fictional "Tessaly Exchange",
//! whose 36 long–short factors (invented names: plain nature and craft
//! words) load on a few loud sector swings with no premium and on two quiet
//! latent styles that carry a modest premium (true factor Sharpe ratios of
//! roughly 0.3 to 0.8 a year, zero for the others). Every number is
//! generated from a fixed seed: this is not market data.

use crate::estimator::{Cap, ReturnPanel, Settings};

/// Months in the demo's estimation window.
pub const DEMO_PERIODS: usize = 120;
/// Months of invented history behind the demo's backtest.
pub const DEMO_HISTORY: usize = 300;

const NAMES: [&str; 36] = [
    "moss_value",
    "fern_momentum",
    "pebble_quality",
    "tilth_carry",
    "sieve_size",
    "thatch_lowvol",
    "jute_profit",
    "marl_invest",
    "rake_accrual",
    "burlap_reversal",
    "hazel_issuance",
    "cobble_beta",
    "clod_growth",
    "sorrel_yield",
    "sod_leverage",
    "tansy_skew",
    "bracken_liquidity",
    "hedgerow_sentiment",
    "weir_seasonal",
    "spindle_distress",
    "rasp_turnover",
    "trowel_breadth",
    "mulch_crowding",
    "bobbin_drift",
    "silt_dispersion",
    "loam_earnings",
    "wicker_margin",
    "adze_capex",
    "reed_duration",
    "sedge_credit",
    "burdock_volume",
    "thistle_industry",
    "yarrow_insider",
    "nettle_analyst",
    "awl_payout",
    "bramble_tangible",
];

pub use crate::estimator::bootstrap::SplitMix;

/// Monthly mean of each quiet style: with the loadings below it gives the
/// premium factors annualised Sharpe ratios of about 0.3 to 0.8, and the
/// others about zero, the range of published anomaly factors (e.g. the
/// factor Sharpe ratios reported by Kozak, Nagel & Santosh 2020 and by
/// Chen & Zimmermann's open-source anomaly data; recalled, common practice).
const PREMIUM: f64 = 0.002;

/// Builds a seeded panel of `periods` × `factors` returns with the demo's
/// latent structure (`factors` ≤ 36 uses the demo's names; more get numbered names).
pub fn synthetic_panel(seed: u64, periods: usize, factors: usize) -> ReturnPanel {
    let mut rng = SplitMix(seed);
    let loud = 4; // high-variance sector swings, no premium
    let quiet = 2; // low-variance styles that carry the premium
    let mut beta = Vec::with_capacity(factors);
    let mut a = vec![0.0; factors * loud];
    let mut c = vec![0.0; factors * quiet];
    for i in 0..factors {
        beta.push(0.3 * rng.normal());
        // Premium-carrying factors swing less with the sectors: their premium
        // sits in a quiet direction of the covariance matrix.
        let loudness = if i % 3 == 0 { 0.25 } else { 0.8 };
        for j in 0..loud {
            a[i * loud + j] = loudness * rng.normal();
        }
        // Every third factor carries the premium through both quiet styles.
        if i % 3 == 0 {
            for j in 0..quiet {
                c[i * quiet + j] = 0.5 + 0.5 * rng.uniform();
            }
        }
    }
    let mut returns = Vec::with_capacity(periods * factors);
    let mut market = Vec::with_capacity(periods);
    for _ in 0..periods {
        let m = 0.006 + 0.045 * rng.normal();
        let g: Vec<f64> = (0..loud).map(|_| 0.03 * rng.normal()).collect();
        let h: Vec<f64> = (0..quiet).map(|_| PREMIUM + 0.005 * rng.normal()).collect();
        for i in 0..factors {
            let mut r = beta[i] * m + 0.01 * rng.normal();
            for j in 0..loud {
                r += a[i * loud + j] * g[j];
            }
            for j in 0..quiet {
                r += c[i * quiet + j] * h[j];
            }
            returns.push(r);
        }
        market.push(m);
    }
    let factor_names = (0..factors)
        .map(|i| NAMES.get(i).map_or_else(|| format!("factor_{:04}", i + 1), |n| (*n).to_owned()))
        .collect();
    // Monthly labels ending in 2025-12.
    let last = 2025 * 12 + 11;
    let period_labels = (0..periods)
        .map(|t| {
            let m = (last + t) as i64 - (periods as i64 - 1);
            format!("{:04}-{:02}", m.div_euclid(12), m.rem_euclid(12) + 1)
        })
        .collect();
    ReturnPanel {
        factor_names,
        period_labels,
        returns,
        rows: periods,
        cols: factors,
        market: Some(market),
        previous_weights: Vec::new(),
        market_name: Some(MARKET_COLUMN.to_owned()),
    }
}

/// The demo's whole invented history: 300 months of the Tessaly Exchange.
pub fn demo_history() -> ReturnPanel {
    synthetic_panel(0x7E55_A1E5, DEMO_HISTORY, NAMES.len())
}

/// The demo window: the latest 120 months of [`demo_history`], 36 factors.
pub fn demo_panel() -> ReturnPanel {
    let h = demo_history();
    let start = DEMO_HISTORY - DEMO_PERIODS;
    ReturnPanel {
        factor_names: h.factor_names,
        period_labels: h.period_labels[start..].to_vec(),
        returns: h.returns[start * h.cols..].to_vec(),
        rows: DEMO_PERIODS,
        cols: h.cols,
        market: h.market.map(|m| m[start..].to_vec()),
        previous_weights: Vec::new(),
        market_name: h.market_name,
    }
}

/// Name of the demo's market column.
pub const MARKET_COLUMN: &str = "MKT";

/// Writes a panel as CSV in the format `keelson fit` reads (market column `MKT`).
pub fn to_csv(panel: &ReturnPanel) -> String {
    let mut out = String::from("period");
    if panel.market.is_some() {
        out.push_str(",MKT");
    }
    for n in &panel.factor_names {
        out.push(',');
        out.push_str(n);
    }
    out.push('\n');
    for r in 0..panel.rows {
        out.push_str(panel.period_labels.get(r).map_or("", String::as_str));
        if let Some(m) = &panel.market {
            out.push_str(&format!(",{:?}", m[r]));
        }
        for c in 0..panel.cols {
            let v = panel.returns[r * panel.cols + c];
            if v.is_nan() { out.push_str(",NA") } else { out.push_str(&format!(",{v:?}")) }
        }
        out.push('\n');
    }
    out
}

/// The default settings with every limit of the implementation stage on and
/// a cost (max_weight 0.1, max_gross 2, max_market_weight 0.2, max_turnover
/// 1.5, 20 bp): what the size table and the stress tests of the stage run.
pub fn every_limit() -> Settings {
    Settings {
        max_weight: Cap::At(0.1),
        max_gross: Cap::At(2.0),
        max_market_weight: Cap::At(0.2),
        max_turnover: Cap::At(1.5),
        cost_bps: 20.0,
        ..Settings::default()
    }
}

//! Keelson's colours. The configured method is always ember; the others
//! follow in strategy order. Chosen so that the first eight stay apart for
//! readers with protanopia, deuteranopia or tritanopia (tested below with
//! the Machado, Oliveira & Fernandes 2009 simulation), and dark enough for
//! thin lines on white.

use plotters::style::RGBColor;

/// The configured method's colour.
pub const EMBER: RGBColor = RGBColor(188, 61, 22);

/// Series colours in strategy order; index 0 is the configured method.
pub const SERIES: [RGBColor; 10] = [
    EMBER,
    RGBColor(0, 110, 190),   // ocean
    RGBColor(30, 30, 30),    // ink
    RGBColor(220, 120, 160), // heather
    RGBColor(27, 58, 107),   // harbour
    RGBColor(96, 96, 96),    // slate
    RGBColor(104, 168, 222), // sky
    RGBColor(120, 72, 40),   // bark
    RGBColor(176, 160, 40),  // mustard
    RGBColor(122, 79, 150),  // plum
];

/// Muted grey for context lines and grids.
pub const MUTED: RGBColor = RGBColor(150, 150, 150);

/// Long and short bars.
pub const LONG: RGBColor = RGBColor(0, 110, 190);
/// Short bars.
pub const SHORT: RGBColor = EMBER;

/// How a line is stroked: the palette's ten colours with three dash
/// patterns give every strategy a style of its own.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Dash {
    /// A continuous line.
    Solid,
    /// Long dashes.
    Dashed,
    /// Short dots.
    Dotted,
}

/// Every strategy id a backtest can produce, with its fixed style: a
/// strategy looks the same in every chart and every report, and no two
/// share one.
pub const STRATEGY_STYLES: [(&str, usize, Dash); 15] = [
    ("configured", 0, Dash::Solid),
    ("configured-model", 0, Dash::Dashed),
    ("scaling-sharpe", 1, Dash::Solid),
    ("scaling-sharpe-raw", 1, Dash::Dashed),
    ("scaling-standardized", 3, Dash::Solid),
    ("scaling-covariance", 4, Dash::Solid),
    ("scaling-risk-premium", 6, Dash::Solid),
    ("scaling-sharpe-shrunk", 9, Dash::Solid),
    ("plug-in", 7, Dash::Solid),
    ("plug-in-ledoit-wolf", 7, Dash::Dashed),
    ("kns-ridge-pricing-r2", 8, Dash::Solid),
    ("kns-ridge-sharpe", 8, Dash::Dashed),
    ("equal-weight", 5, Dash::Solid),
    ("market", 2, Dash::Solid),
    // A scaling chosen by cross-validation (sweep lines of `auto`).
    ("scaling-auto", 9, Dash::Dashed),
];

/// The fixed colour and dash of a strategy id; an id not in
/// [`STRATEGY_STYLES`] is muted and dotted.
pub fn style(id: &str) -> (RGBColor, Dash) {
    STRATEGY_STYLES.iter().find(|(i, ..)| *i == id).map_or((MUTED, Dash::Dotted), |&(_, c, d)| (SERIES[c], d))
}

/// The heat map's sequential scale at `u` ∈ [0, 1]: pale sand (low) through
/// sea green to deep harbour blue (high), monotone in lightness so that it
/// reads in grey too.
pub fn sequential(u: f64) -> RGBColor {
    const STOPS: [(f64, [f64; 3]); 4] = [
        (0.0, [246.0, 239.0, 220.0]),
        (0.35, [150.0, 200.0, 170.0]),
        (0.7, [40.0, 130.0, 150.0]),
        (1.0, [20.0, 40.0, 90.0]),
    ];
    let u = if u.is_finite() { u.clamp(0.0, 1.0) } else { 0.0 };
    let i = STOPS.iter().rposition(|(s, _)| *s <= u).unwrap_or(0).min(STOPS.len() - 2);
    let (a, b) = (STOPS[i], STOPS[i + 1]);
    let t = (u - a.0) / (b.0 - a.0);
    let c = |k: usize| (a.1[k] + t * (b.1[k] - a.1[k])).round() as u8;
    RGBColor(c(0), c(1), c(2))
}

#[cfg(test)]
mod tests {
    use super::{SERIES, STRATEGY_STYLES, sequential};

    #[test]
    fn every_strategy_has_a_style_of_its_own() {
        // The full strategy list with every option on (limits set, so the model row too).
        let settings = crate::estimator::Settings {
            max_gross: crate::estimator::Cap::At(3.0),
            ..crate::estimator::Settings::default()
        }
        .check()
        .unwrap();
        let ids: Vec<String> = crate::evaluate::strategies(&settings, true, true).into_iter().map(|s| s.id).collect();
        let components =
            crate::estimator::Settings { method: crate::estimator::Method::Components, ..settings.settings().clone() }
                .check()
                .unwrap();
        let mut all = ids.clone();
        all.extend(crate::evaluate::strategies(&components, true, true).into_iter().map(|s| s.id));
        for id in &all {
            assert!(STRATEGY_STYLES.iter().any(|(i, ..)| i == id), "{id} has no fixed style");
        }
        for (a, x) in STRATEGY_STYLES.iter().enumerate() {
            for y in &STRATEGY_STYLES[a + 1..] {
                assert!((x.1, x.2) != (y.1, y.2), "{} and {} share a style", x.0, y.0);
            }
        }
    }

    fn linear(c: u8) -> f64 {
        let c = f64::from(c) / 255.0;
        if c <= 0.04045 { c / 12.92 } else { ((c + 0.055) / 1.055).powf(2.4) }
    }

    /// CIELAB (D65) of linear sRGB, after the sRGB and CIE 1976 definitions.
    fn lab(rgb: [f64; 3]) -> [f64; 3] {
        let rgb = rgb.map(|v| v.clamp(0.0, 1.0));
        let m = [[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]];
        let white = [0.95047, 1.0, 1.08883];
        let f = |t: f64| {
            if t > (6.0f64 / 29.0).powi(3) { t.cbrt() } else { t / (3.0 * (6.0f64 / 29.0).powi(2)) + 4.0 / 29.0 }
        };
        let xyz: Vec<f64> = (0..3).map(|r| (0..3).map(|c| m[r][c] * rgb[c]).sum::<f64>() / white[r]).collect();
        let (fx, fy, fz) = (f(xyz[0]), f(xyz[1]), f(xyz[2]));
        [116.0 * fy - 16.0, 500.0 * (fx - fy), 200.0 * (fy - fz)]
    }

    #[test]
    fn series_colours_stay_apart_under_colour_vision_deficiency() {
        // Machado, Oliveira & Fernandes (2009), "A physiologically-based model for simulation of
        // color vision deficiency", severity 1.0 matrices on linear RGB (values recalled from
        // memory of the paper's table; the identity is normal vision).
        let sims: [(&str, [[f64; 3]; 3]); 4] = [
            ("normal", [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]),
            (
                "protanopia",
                [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216], [-0.003882, -0.048116, 1.051998]],
            ),
            (
                "deuteranopia",
                [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413], [-0.011820, 0.042940, 0.968881]],
            ),
            (
                "tritanopia",
                [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602], [0.004733, 0.691367, 0.303900]],
            ),
        ];
        for (name, m) in sims {
            let seen: Vec<[f64; 3]> = SERIES
                .iter()
                .map(|c| {
                    let v = [linear(c.0), linear(c.1), linear(c.2)];
                    lab([0, 1, 2].map(|r| (0..3).map(|k| m[r][k] * v[k]).sum()))
                })
                .collect();
            for (limit, n) in [(15.0, 8), (12.0, SERIES.len())] {
                for i in 0..n {
                    for j in i + 1..n {
                        let d = (0..3).map(|k| (seen[i][k] - seen[j][k]).powi(2)).sum::<f64>().sqrt();
                        assert!(d >= limit, "{name}: colours {i} and {j} are ΔE {d:.1} apart (< {limit})");
                    }
                }
            }
        }
    }

    #[test]
    fn the_sequential_scale_darkens_monotonically() {
        let light = |u: f64| {
            let c = sequential(u);
            lab([linear(c.0), linear(c.1), linear(c.2)])[0]
        };
        let ls: Vec<f64> = (0..=20).map(|i| light(f64::from(i) / 20.0)).collect();
        assert!(ls.windows(2).all(|w| w[1] < w[0]), "lightness must fall from low to high scores: {ls:?}");
    }
}

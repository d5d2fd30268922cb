//! Numerical robustness: near-singular covariance, eigenvalue ties, and
//! returns in the wrong units. The estimator must stay finite and say what
//! is wrong through its warnings.

use keelson::demo::synthetic_panel;
use keelson::estimator::{self, Choice, Method, ReturnPanel, Scaling, Settings, WeightSet};

fn codes(ws: &WeightSet) -> Vec<&'static str> {
    ws.diagnostics.warnings.iter().map(|w| w.code.word()).collect()
}

fn finite(ws: &WeightSet) -> bool {
    ws.factors.iter().all(|f| f.weight.is_finite()) && ws.market_weight.is_finite()
}

/// `p` with one more column: a copy of column `of` plus `eps` times a fixed wiggle.
fn with_near_copy(p: &ReturnPanel, of: usize, eps: f64) -> ReturnPanel {
    let cols = p.cols + 1;
    let mut returns = Vec::with_capacity(p.rows * cols);
    for t in 0..p.rows {
        returns.extend_from_slice(&p.returns[t * p.cols..(t + 1) * p.cols]);
        returns.push(p.returns[t * p.cols + of] + eps * ((t as f64) * 0.7).sin());
    }
    let mut q = p.clone();
    q.returns = returns;
    q.cols = cols;
    q.factor_names.push("near-copy".into());
    q
}

#[test]
fn near_collinear_factors_stay_finite_and_are_flagged() {
    let base = synthetic_panel(5, 120, 10);
    for eps in [1e-9, 0.0] {
        let p = with_near_copy(&base, 0, eps);
        for method in [Method::Components, Method::PlugIn, Method::PlugInLedoitWolf, Method::KnsRidge] {
            let s = Settings { method, ..Settings::default() }.check().unwrap();
            let ws = estimator::fit(&p, &s).unwrap_or_else(|e| panic!("eps {eps} {method:?}: {e}"));
            assert!(finite(&ws), "eps {eps} {method:?}");
            assert!(ws.diagnostics.covariance_condition_number > 1e10, "eps {eps}");
            assert!(codes(&ws).contains(&"ill-conditioned-covariance"), "eps {eps} {method:?}: {:?}", codes(&ws));
        }
    }
    // The same window without the copy carries no such warning.
    let ws = estimator::fit(&base, &Settings::default().check().unwrap()).unwrap();
    assert!(!codes(&ws).contains(&"ill-conditioned-covariance"), "{:?}", codes(&ws));
}

/// Four factors whose centred returns are orthogonal with equal variance
/// (Walsh functions of a 64-period window), so every eigenvalue of the
/// covariance is the same.
fn tied_panel() -> ReturnPanel {
    let (rows, cols) = (64usize, 4usize);
    let mut returns = Vec::with_capacity(rows * cols);
    for t in 0..rows {
        for i in 0..cols {
            // Sylvester–Hadamard entry (−1)^popcount(t & k) for k = 1, 2, 4, 8: orthogonal and zero-mean.
            let k = 1usize << i;
            let sign = if (t & k).count_ones().is_multiple_of(2) { 1.0 } else { -1.0 };
            returns.push(0.001 * (i + 1) as f64 + 0.02 * sign);
        }
    }
    ReturnPanel {
        factor_names: (0..cols).map(|i| format!("w{i}")).collect(),
        period_labels: Vec::new(),
        returns,
        rows,
        cols,
        market: None,
        previous_weights: Vec::new(),
        market_name: None,
    }
}

#[test]
fn eigenvalue_ties_at_the_cut_are_flagged() {
    let p = tied_panel();
    let s = Settings {
        method: keelson::estimator::Method::Components,
        scaling: Scaling::Covariance,
        components: Choice::Fixed(2),
        kappa: Choice::Fixed(1.0),
        demarket: false,
        ..Settings::default()
    }
    .check()
    .unwrap();
    let ws = estimator::fit(&p, &s).unwrap();
    assert!(finite(&ws));
    assert!(codes(&ws).contains(&"components-not-separated"), "{:?}", codes(&ws));
    // All four components (no cut inside the tie) carry no such warning.
    let all = Settings { components: Choice::Fixed(4), ..s.settings().clone() }.check().unwrap();
    let ws = estimator::fit(&p, &all).unwrap();
    assert!(finite(&ws));
    assert!(!codes(&ws).contains(&"components-not-separated"), "{:?}", codes(&ws));
    // Cross-validated K on the same window also stays finite.
    let cv = Settings { components: Choice::Auto, kappa: Choice::Auto, ..s.settings().clone() }.check().unwrap();
    assert!(finite(&estimator::fit(&p, &cv).unwrap()));
}

fn scaled(p: &ReturnPanel, c: f64) -> ReturnPanel {
    let mut q = p.clone();
    q.returns.iter_mut().for_each(|v| *v *= c);
    if let Some(m) = q.market.as_mut() {
        m.iter_mut().for_each(|v| *v *= c);
    }
    q
}

#[test]
fn percent_and_tiny_units_give_the_same_portfolio_and_a_warning() {
    // Under the Sharpe scaling and a volatility target, multiplying every return by c
    // divides every weight by c (the portfolio return is unchanged).
    let p = synthetic_panel(21, 120, 25);
    let s = Settings::default().check().unwrap();
    let base = estimator::fit(&p, &s).unwrap();
    assert!(!codes(&base).contains(&"return-scale"));
    for c in [100.0, 1e-6] {
        let ws = estimator::fit(&scaled(&p, c), &s).unwrap();
        assert!(finite(&ws), "scale {c}");
        assert!(codes(&ws).contains(&"return-scale"), "scale {c}: {:?}", codes(&ws));
        assert_eq!(ws.diagnostics.num_components, base.diagnostics.num_components, "scale {c}");
        let big = base.factors.iter().fold(0.0f64, |m, f| m.max(f.weight.abs()));
        for (a, b) in ws.factors.iter().zip(&base.factors) {
            assert!(
                (a.weight * c - b.weight).abs() <= 1e-8 * big,
                "scale {c}, {}: {} vs {}",
                a.name,
                a.weight * c,
                b.weight
            );
        }
    }
}

/// Large fits use the threads they are given inside their kernels (faer's
/// rayon parallelism above `PARALLEL_FLOPS`), where a reduction may be split
/// differently: weights, diagnostics and the fingerprint agree with the
/// sequential fit to 1e-12 relative (the documented bound), and small fits
/// stay bitwise identical.
#[test]
fn threads_inside_large_fits_change_only_the_last_bits() {
    let opts = |threads| estimator::FitOptions { threads, ..estimator::FitOptions::default() };
    for (n, t, kns) in [(600usize, 120usize, false), (400, 120, true), (40, 120, false)] {
        let panel = synthetic_panel(21, t, n);
        let s = if kns {
            Settings::default()
        } else {
            Settings {
                method: Method::Components,
                components: Choice::Fixed(6),
                kappa: Choice::Fixed(0.7),
                ..Settings::default()
            }
        }
        .check()
        .unwrap();
        let one = estimator::fit_with(&panel, &s, &opts(1)).unwrap();
        let two = estimator::fit_with(&panel, &s, &opts(2)).unwrap();
        assert_eq!(one.fingerprint, two.fingerprint, "{n} x {t}");
        let scale = one.factors.iter().map(|f| f.weight.abs()).fold(0.0, f64::max);
        for (a, b) in one.factors.iter().zip(&two.factors) {
            let d = (a.weight - b.weight).abs();
            if n < 100 {
                assert_eq!(a.weight.to_bits(), b.weight.to_bits(), "{n} x {t}: small fits stay bitwise equal");
            } else {
                assert!(d <= 1e-12 * scale, "{n} x {t}: {} differs by {d:e} (scale {scale:e})", a.name);
            }
        }
        let (c1, c2) = (one.diagnostics.cv_sharpe, two.diagnostics.cv_sharpe);
        assert!((c1 - c2).abs() <= 1e-12 * c1.abs().max(1.0), "{n} x {t}: held-out Sharpe {c1} vs {c2}");
    }
}

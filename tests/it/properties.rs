//! Invariants of the estimator (SPEC §4, §5, §7) on seeded synthetic panels:
//! leverage, sign flips and reordering of factors; the KNS ridge as a
//! special case; agreement of the Gram and N×N paths; bitwise determinism
//! across runs and thread counts.

use faer::Mat;
use faer::linalg::solvers::Solve as _;
use keelson::convert::weight_set_to_proto;
use keelson::demo::synthetic_panel;
use keelson::estimator::{
    self, Choice, EigenPath, FitOptions, Moments, Normalization, ReturnPanel, RiskCalibration, Scaling, Settings,
    ValidSettings, WeightSet,
};
use prost::Message as _;

/// The components method with `f` applied (the properties concern its scalings).
fn settings(f: impl FnOnce(&mut Settings)) -> ValidSettings {
    let mut s = Settings { method: keelson::estimator::Method::Components, ..Settings::default() };
    f(&mut s);
    s.check().unwrap()
}

fn weights(ws: &WeightSet) -> Vec<f64> {
    ws.factors.iter().map(|f| f.weight).collect()
}

fn assert_close(what: &str, a: &[f64], b: &[f64], rtol: f64) {
    assert_eq!(a.len(), b.len());
    let scale = b.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    for (i, (x, y)) in a.iter().zip(b).enumerate() {
        assert!((x - y).abs() <= rtol * scale, "{what}[{i}]: {x:e} vs {y:e}");
    }
}

fn map_column(p: &ReturnPanel, j: usize, f: impl Fn(f64) -> f64) -> ReturnPanel {
    let mut q = p.clone();
    for r in 0..q.rows {
        let v = &mut q.returns[r * q.cols + j];
        *v = f(*v);
    }
    q
}

/// Portfolio return in every period: w'r_t + w_m m_t.
fn portfolio_returns(p: &ReturnPanel, ws: &WeightSet) -> Vec<f64> {
    (0..p.rows)
        .map(|t| {
            let f: f64 = (0..p.cols).map(|j| ws.factors[j].weight * p.returns[t * p.cols + j]).sum();
            f + ws.market_weight * p.market.as_ref().map_or(0.0, |m| m[t])
        })
        .collect()
}

#[test]
fn levering_a_factor_divides_its_weight_under_sharpe_and_standardized() {
    // SPEC §4: scale-invariant scalings; levering factor j by c > 0 divides w_j by c and leaves returns unchanged.
    for seed in [1u64, 2, 3] {
        let p = synthetic_panel(seed, 120, 24);
        for scaling in [Scaling::Sharpe, Scaling::Standardized] {
            for fixed in [true, false] {
                let s = settings(|s| {
                    s.scaling = scaling;
                    if fixed {
                        s.components = Choice::Fixed(4);
                        s.kappa = Choice::Fixed(0.6);
                    }
                });
                let base = estimator::fit(&p, &s).unwrap();
                let c = 3.7;
                let lev = map_column(&p, 5, |v| v * c);
                let got = estimator::fit(&lev, &s).unwrap();
                assert_eq!(got.diagnostics.num_components, base.diagnostics.num_components);
                let mut want = weights(&base);
                want[5] /= c;
                assert_close(&format!("seed {seed} {scaling:?} weights"), &weights(&got), &want, 1e-9);
                assert_close(
                    &format!("seed {seed} {scaling:?} returns"),
                    &portfolio_returns(&lev, &got),
                    &portfolio_returns(&p, &base),
                    1e-9,
                );
            }
        }
    }
}

#[test]
fn flipping_a_factor_flips_its_weight_under_every_scaling() {
    // SPEC §4: r_j → −r_j flips w_j and nothing else. Not for `sharpe-shrunk`: flipping a
    // factor moves the cross-sectional mean its Sharpe ratios shrink toward (SPEC §11).
    let p = synthetic_panel(7, 120, 18);
    let flipped = map_column(&p, 2, |v| -v);
    for scaling in Scaling::ALL.into_iter().filter(|&s| s != Scaling::SharpeShrunk) {
        let s = settings(|s| {
            s.scaling = scaling;
            s.components = Choice::Fixed(3);
            s.kappa = Choice::Fixed(1.0);
        });
        let base = estimator::fit(&p, &s).unwrap();
        let got = estimator::fit(&flipped, &s).unwrap();
        let mut want = weights(&base);
        want[2] = -want[2];
        assert_close(&format!("{scaling:?}"), &weights(&got), &want, 1e-9);
        assert!((got.market_weight - base.market_weight).abs() <= 1e-9 * base.market_weight.abs().max(1e-3));
    }
}

#[test]
fn reordering_factors_reorders_weights_under_every_scaling() {
    // SPEC §4: the estimator treats factors symmetrically.
    let p = synthetic_panel(9, 96, 15);
    let perm: Vec<usize> = (0..p.cols).map(|j| (j * 7 + 3) % p.cols).collect();
    let mut q = p.clone();
    q.factor_names = perm.iter().map(|&j| p.factor_names[j].clone()).collect();
    for r in 0..p.rows {
        for (new, &old) in perm.iter().enumerate() {
            q.returns[r * p.cols + new] = p.returns[r * p.cols + old];
        }
    }
    for scaling in Scaling::ALL {
        let s = settings(|s| s.scaling = scaling);
        let base = estimator::fit(&p, &s).unwrap();
        let got = estimator::fit(&q, &s).unwrap();
        let want: Vec<f64> = perm.iter().map(|&j| base.factors[j].weight).collect();
        assert_eq!(got.diagnostics.num_components, base.diagnostics.num_components, "{scaling:?}: K");
        assert_close(&format!("{scaling:?}"), &weights(&got), &want, 1e-9);
    }
}

#[test]
fn covariance_scaling_with_all_components_is_the_kns_ridge() {
    // SPEC §5 (Kozak, Nagel & Santosh 2020): with K = N, b = (Σ + γI)⁻¹μ, γ = tr(Σ)/(κ²T).
    for seed in [4u64, 5] {
        let p = synthetic_panel(seed, 120, 20);
        let kappa = 0.8;
        let s = settings(|s| {
            s.scaling = Scaling::Covariance;
            s.components = Choice::Fixed(20);
            s.kappa = Choice::Fixed(kappa);
            s.normalization = Normalization::RiskAversion;
            s.risk_aversion = 1.0;
        });
        let ws = estimator::fit(&p, &s).unwrap();
        let r = Mat::from_fn(p.rows, p.cols, |i, j| p.returns[i * p.cols + j]);
        let mom = Moments::compute(r.as_ref(), p.market.as_deref());
        let t = p.rows as f64;
        let sigma = Mat::from_fn(p.cols, p.cols, |a, b| {
            (0..p.rows).map(|i| mom.centered[(i, a)] * mom.centered[(i, b)]).sum::<f64>() / (t - 1.0)
        });
        let trace: f64 = (0..p.cols).map(|i| sigma[(i, i)]).sum();
        let gamma = trace / ((kappa * kappa / 12.0) * t);
        let a = Mat::from_fn(p.cols, p.cols, |i, j| sigma[(i, j)] + if i == j { gamma } else { 0.0 });
        let mu = Mat::from_fn(p.cols, 1, |i, _| mom.mean[i]);
        let b = a.llt(faer::Side::Lower).unwrap().solve(&mu);
        let want: Vec<f64> = (0..p.cols).map(|i| b[(i, 0)]).collect();
        assert!((ws.diagnostics.gamma - gamma).abs() <= 1e-12 * gamma);
        assert_close(&format!("seed {seed}"), &weights(&ws), &want, 1e-9);
    }
}

#[test]
fn gram_path_agrees_with_the_factor_path() {
    // SPEC §4: the T×T Gram matrix gives the same components as the N×N matrix.
    for (t, n) in [(60usize, 90usize), (48, 40), (120, 30)] {
        let p = synthetic_panel(t as u64 * 1000 + n as u64, t, n);
        for scaling in Scaling::ALL {
            let s = settings(|s| {
                s.scaling = scaling;
                s.max_components = 12;
            });
            let run = |path| {
                let o = FitOptions { eigen_path: path, ..FitOptions::default() };
                estimator::fit_with(&p, &s, &o).unwrap()
            };
            let a = run(EigenPath::Factors);
            let b = run(EigenPath::Gram);
            assert_eq!(a.diagnostics.num_components, b.diagnostics.num_components, "{t}×{n} {scaling:?}: K");
            assert_eq!(a.diagnostics.kappa, b.diagnostics.kappa, "{t}×{n} {scaling:?}: κ");
            assert_close(&format!("{t}×{n} {scaling:?}"), &weights(&b), &weights(&a), 1e-8);
        }
    }
}

#[test]
fn output_is_bitwise_identical_across_runs_and_thread_counts() {
    // SPEC §7: identical input and settings give identical bytes, whatever the thread count.
    let p = synthetic_panel(42, 120, 50);
    for scaling in Scaling::ALL {
        let s = settings(|s| s.scaling = scaling);
        let bytes = |threads| {
            let o = FitOptions { threads, ..FitOptions::default() };
            weight_set_to_proto(&estimator::fit_with(&p, &s, &o).unwrap(), "").encode_to_vec()
        };
        let one = bytes(1);
        assert_eq!(one, bytes(1), "{scaling:?}: repeated run");
        assert_eq!(one, bytes(3), "{scaling:?}: three threads");
        assert_eq!(one, bytes(8), "{scaling:?}: eight threads");
    }
}

#[test]
fn diagnostics_are_internally_consistent() {
    // Definitions of SPEC §8: risk contributions sum to 1; target volatility is met;
    // excluded factors hold no weight.
    let mut p = synthetic_panel(11, 120, 30);
    p.returns[40 * p.cols + 4] = f64::NAN;
    for scaling in Scaling::ALL {
        let ws = estimator::fit(&p, &settings(|s| s.scaling = scaling)).unwrap();
        let rc: f64 = ws.factors.iter().map(|f| f.risk_contribution).sum();
        assert!((rc - 1.0).abs() < 1e-12, "{scaling:?}: risk contributions sum to {rc}");
        // SPEC §13: the in-window volatility is the target times the risk calibration's factor.
        let factor = ws.diagnostics.risk_calibration.map_or(1.0, |c| c.factor);
        assert!((ws.diagnostics.ex_ante_volatility - 0.10 * factor).abs() < 1e-12);
        assert_eq!(ws.factors[4].weight, 0.0);
        assert_eq!(ws.factors[4].excluded.as_ref().map(|e| e.0), Some("missing-values"));
        let surface = ws.diagnostics.cv_surface.as_ref().unwrap();
        assert_eq!(surface.scores.len(), surface.components.len() * surface.kappas.len());
        assert!(ws.diagnostics.warnings.iter().any(|w| w.code == "factors-excluded"));
    }
}

#[test]
fn skipping_the_held_out_check_changes_only_the_held_out_diagnostics() {
    // With K and κ fixed, the folds feed only the held-out Sharpe ratio: switching
    // them off must leave every weight bit-for-bit unchanged, for every scaling.
    let p = synthetic_panel(12, 120, 30);
    for scaling in Scaling::ALL {
        // The held-out risk calibration needs the folds too (SPEC §13): off here.
        let with = settings(|s| {
            s.scaling = scaling;
            s.components = Choice::Fixed(4);
            s.kappa = Choice::Fixed(0.7);
            s.risk_calibration = RiskCalibration::Off;
        });
        let without = settings(|s| {
            s.scaling = scaling;
            s.components = Choice::Fixed(4);
            s.kappa = Choice::Fixed(0.7);
            s.held_out_check = false;
            s.risk_calibration = RiskCalibration::Off;
        });
        let a = estimator::fit(&p, &with).unwrap();
        let b = estimator::fit(&p, &without).unwrap();
        assert_eq!(weights(&a), weights(&b), "{scaling:?}");
        assert_eq!(a.market_weight, b.market_weight, "{scaling:?}");
        assert_eq!(a.diagnostics.covariance_condition_number, b.diagnostics.covariance_condition_number);
        assert!(a.diagnostics.cv_sharpe.is_finite() && a.diagnostics.cv_surface.is_some(), "{scaling:?}");
        assert!(b.diagnostics.cv_sharpe.is_nan() && b.diagnostics.cv_surface.is_none(), "{scaling:?}");
        // The same K limit applies either way (K ≤ T_train − 2 and the numerical rank).
        let too_many = settings(|s| {
            s.scaling = scaling;
            s.components = Choice::Fixed(79);
            s.kappa = Choice::Fixed(0.7);
            s.held_out_check = false;
        });
        assert!(matches!(
            estimator::fit(&p, &too_many),
            Err(estimator::EstimateError::TooManyComponents { allowed: 30, .. })
        ));
    }
    // With κ cross-validated the switch has no effect: the folds are needed.
    let auto = settings(|s| {
        s.components = Choice::Fixed(4);
        s.held_out_check = false;
    });
    assert!(estimator::fit(&p, &auto).unwrap().diagnostics.cv_sharpe.is_finite());
}

/// The stationary bootstrap (SPEC §11): equal seeds give equal draws whatever
/// the thread count; `point` keeps the window's weights bit for bit; `bagged`
/// returns the draws' mean renormalised to the volatility target.
#[test]
fn the_bootstrap_is_deterministic_and_bagging_renormalises() {
    use keelson::estimator::{Aggregate, FitOptions};
    let p = synthetic_panel(12, 120, 10);
    let plain = estimator::fit(&p, &settings(|_| {})).unwrap();
    let s = settings(|s| {
        s.bootstrap_draws = 60;
        s.seed = 11;
    });
    let one = estimator::fit_with(&p, &s, &FitOptions { threads: 1, ..FitOptions::default() }).unwrap();
    let three = estimator::fit_with(&p, &s, &FitOptions { threads: 3, ..FitOptions::default() }).unwrap();
    assert_eq!(one, three, "thread count");
    assert_eq!(weights(&one), weights(&plain), "point aggregation keeps the fitted weights");
    let b = one.diagnostics.bootstrap.as_ref().unwrap();
    assert_eq!(b.draws + b.failed, 60);
    for (iv, f) in b.factors.iter().zip(&one.factors) {
        assert!(iv.q05 <= iv.q50 && iv.q50 <= iv.q95, "{}", f.name);
        assert!((0.0..=1.0).contains(&iv.sign_agreement));
    }
    let other_seed = estimator::fit(
        &p,
        &settings(|s| {
            s.bootstrap_draws = 60;
            s.seed = 12;
        }),
    )
    .unwrap();
    assert_ne!(other_seed.diagnostics.bootstrap, one.diagnostics.bootstrap, "the seed matters");
    let bagged = estimator::fit(
        &p,
        &settings(|s| {
            s.bootstrap_draws = 60;
            s.seed = 11;
            s.aggregate = Aggregate::Bagged;
        }),
    )
    .unwrap();
    // Normalised again, with the point fit's risk calibration (SPEC §13).
    let factor = bagged.diagnostics.risk_calibration.map_or(1.0, |c| c.factor);
    assert_eq!(factor, plain.diagnostics.risk_calibration.map_or(1.0, |c| c.factor));
    assert!((bagged.diagnostics.ex_ante_volatility - 0.10 * factor).abs() < 1e-12, "normalised again");
    assert_ne!(weights(&bagged), weights(&plain));
    // Bagged weights point the way of the draws' mean: a positive multiple of it.
    let b = bagged.diagnostics.bootstrap.as_ref().unwrap();
    assert!(b.bagged && b.draws > 30);
}

/// Coverage of the stationary bootstrap (Politis & Romano 1994) on a series
/// whose mean is known: an AR(1) with φ = 0.5, T = 200; the 90% percentile
/// interval of the sample mean should cover the true mean about 90% of the
/// time. A statistical property with a fixed seed (400 series × 400 draws).
#[test]
fn stationary_bootstrap_intervals_cover_a_known_mean() {
    use keelson::estimator::bootstrap::{SplitMix, quantile, stationary_indices};
    let (t, phi, reps, draws) = (200usize, 0.5, 400usize, 400usize);
    let mut rng = SplitMix(2026);
    let mut covered = 0;
    for _ in 0..reps {
        let mut x = vec![0.0; t];
        let mut prev = rng.normal() / (1.0f64 - phi * phi).sqrt();
        for v in x.iter_mut() {
            prev = phi * prev + rng.normal();
            *v = 1.0 + prev;
        }
        // Mean block ⌈T^(1/3)⌉ = 6 would be the default; a longer block suits φ = 0.5.
        let mut means: Vec<f64> = (0..draws)
            .map(|_| stationary_indices(&mut rng, t, 8.0).iter().map(|&i| x[i]).sum::<f64>() / t as f64)
            .collect();
        means.sort_by(f64::total_cmp);
        let (lo, hi) = (quantile(&means, 0.05), quantile(&means, 0.95));
        if lo <= 1.0 && 1.0 <= hi {
            covered += 1;
        }
    }
    let coverage = covered as f64 / reps as f64;
    // Block bootstraps under-cover somewhat in small samples; 0.80–0.97 brackets the nominal 0.90.
    assert!((0.80..=0.97).contains(&coverage), "coverage {coverage}");
    println!("stationary bootstrap coverage of a 90% interval: {coverage:.3}");
}

//! The evaluation module against outside references: an independent numpy
//! backtest on the monthly U.S. data that the PyPI package `linearmodels`
//! ships (`linearmodels.datasets.french`, exported to
//! `tests/reference/data/french.csv`), statsmodels, linearmodels, scipy and
//! scikit-learn values from `tests/reference/make_reference.py`, and
//! properties of the engine (no look-ahead, parallel = sequential).

use std::path::PathBuf;

use faer::Mat;
use keelson::demo::synthetic_panel;
use keelson::estimator::{self, Moments, ReturnPanel, Settings, Stop};
use keelson::evaluate::{self, BacktestSpec, stats};
use serde_json::Value;

fn reference() -> Value {
    let p = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/expected.json");
    serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap()
}

fn french() -> ReturnPanel {
    let p = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/data/french.csv");
    keelson::panel_csv::parse_returns(&std::fs::read_to_string(p).unwrap(), "french.csv", Some("MKT")).unwrap().panel
}

fn column(p: &ReturnPanel, name: &str) -> Vec<f64> {
    if name == "MKT" {
        return p.market.clone().unwrap();
    }
    let j = p.factor_names.iter().position(|n| n == name).unwrap();
    (0..p.rows).map(|t| p.returns[t * p.cols + j]).collect()
}

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn nums(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(num).collect()
}

fn close(what: &str, a: f64, e: f64, rtol: f64) {
    assert!((a - e).abs() <= rtol * e.abs().max(1e-300), "{what}: {a:e} vs {e:e}");
}

fn no_progress(_: evaluate::Progress) {}

#[test]
fn real_data_backtest_matches_independent_numpy_backtest() {
    // Source: make_reference.py `backtest` (numpy) on linearmodels.datasets.french, 1949-01..2017-03.
    let exp = reference();
    let panel = french();
    assert_eq!((panel.rows, panel.cols), (819, 33));
    let mut worst = 0.0f64;
    for case in exp["real_data"]["backtests"].as_array().unwrap() {
        let mut s = Settings { method: keelson::estimator::Method::Components, ..Settings::default() };
        for (k, v) in case["settings"].as_object().unwrap() {
            s.set(k, &v.to_string()).unwrap();
        }
        let spec = BacktestSpec {
            window: case["window"].as_u64().unwrap() as usize,
            step: case["step"].as_u64().unwrap() as usize,
            baselines: false,
            sweep_max_k: Some(0),
            threads: 2,
            ..BacktestSpec::default()
        };
        let s = s.check().unwrap();
        let spec = spec.check(&panel, &s).unwrap();
        let r = evaluate::run(&panel, &s, &spec, &no_progress, &Stop::never()).unwrap();
        let want = nums(&case["returns"]);
        let got = &r.strategies[0].returns;
        assert_eq!(got.len(), want.len());
        for (i, (a, e)) in got.iter().zip(&want).enumerate() {
            let d = (a - e).abs();
            worst = worst.max(d);
            assert!(d <= 1e-8, "{} period {i}: {a} vs {e}", case["name"]);
        }
    }
    println!("largest absolute deviation of an OOS return: {worst:.3e}");
}

#[test]
fn inference_matches_statsmodels_linearmodels_scipy_and_formulas() {
    let exp = reference();
    let e = &exp["real_data"]["evaluation"];
    let p = french();
    let lag = e["lag"].as_u64().unwrap() as usize;
    assert_eq!(lag, stats::default_nw_lag(p.rows), "⌊4(T/100)^(2/9)⌋");
    let (smb, hml, mkt) = (column(&p, "SMB"), column(&p, "HML"), column(&p, "MKT"));

    // statsmodels OLS(...).fit(cov_type="HAC", cov_kwds={"maxlags": lag}) (no small-sample correction).
    let reg = stats::ols(&smb, &[mkt.clone(), hml.clone()], lag).unwrap();
    for i in 0..3 {
        close("OLS coefficient", reg.coef[i], num(&e["nw_coef"][i]), 1e-9);
        close("Newey-West SE", reg.se_nw[i], num(&e["nw_se"][i]), 1e-9);
        // linearmodels TradedFactorModel(cov_type="robust", debiased=False): HC0.
        close("robust SE", reg.se_robust[i], num(&e["robust_se"][i]), 1e-9);
    }
    let j = (reg.coef[0] / reg.se_robust[0]).powi(2);
    close("linearmodels J statistic = t²", j, num(&e["lm_j"]), 1e-9);

    // Lo (2002) standard errors; scipy.stats skew and kurtosis(fisher=False).
    let sr = stats::sharpe(&hml);
    close("Sharpe", sr, num(&e["sharpe_hml"]), 1e-12);
    close("Lo iid SE", stats::sharpe_se_iid(sr, hml.len()), num(&e["sharpe_se_iid"]), 1e-12);
    close("Lo NW SE", stats::sharpe_se_nw(&hml, lag), num(&e["sharpe_se_nw"]), 1e-9);
    let (sk, ku) = stats::skew_kurt(&hml);
    close("skewness", sk, num(&e["skew_hml"]), 1e-9);
    close("kurtosis", ku, num(&e["kurt_hml"]), 1e-9);
    // Bailey & López de Prado (2012, 2014) formulas with scipy.stats.norm.
    close("PSR(0)", stats::probabilistic_sharpe(sr, 0.0, hml.len(), sk, ku), num(&e["psr_0"]), 1e-9);
    close("PSR(0.1)", stats::probabilistic_sharpe(sr, 0.1, hml.len(), sk, ku), num(&e["psr_01"]), 1e-9);
    let inds =
        ["NoDur", "Durbl", "Manuf", "Enrgy", "Chems", "BusEq", "Telcm", "Utils", "Shops", "Hlth", "Money", "Other"];
    let ind_series: Vec<Vec<f64>> = inds.iter().map(|n| column(&p, n)).collect();
    let ind_srs: Vec<f64> = ind_series.iter().map(|s| stats::sharpe(s)).collect();
    let dsr = stats::deflated_sharpe(sr, hml.len(), sk, ku, stats::var(&ind_srs), ind_srs.len());
    close("DSR", dsr, num(&e["dsr"]), 1e-9);
    // Jobson & Korkie (1981) with Memmel (2003).
    let t = stats::jobson_korkie_memmel(&hml, &smb, 12.0);
    close("JKM z", t.z, num(&e["jkm_z"]), 1e-9);
    close("JKM p", t.p_value, num(&e["jkm_p"]), 1e-9);
    // GRS (1989) with scipy.stats.f.
    let g = stats::grs(&ind_series, &[mkt, smb, hml.clone()]).unwrap();
    close("GRS", g.statistic, num(&e["grs"]), 1e-9);
    close("GRS p", g.p_value, num(&e["grs_p"]), 1e-6);
    // CER by its definition P·(mean − γ/2·var) with γ = 3.
    close("CER", stats::cer(&hml, 3.0, 12.0), num(&e["cer_hml"]), 1e-12);

    // scikit-learn LedoitWolf on the industries.
    let r = Mat::from_fn(p.rows, inds.len(), |i, j| ind_series[j][i]);
    let mom = Moments::compute(r.as_ref(), None);
    let lw = estimator::LedoitWolf::new(&mom);
    let (cov, shrink) = (lw.dense(), lw.shrinkage);
    close("Ledoit-Wolf shrinkage", shrink, num(&e["lw_shrinkage"]), 1e-9);
    let want = e["lw_cov"].as_array().unwrap();
    for a in 0..inds.len() {
        for b in 0..inds.len() {
            close("Ledoit-Wolf covariance", cov[(a, b)], num(&want[a][b]), 1e-9);
        }
    }
}

#[test]
fn parallel_backtest_is_identical_to_sequential() {
    let panel = synthetic_panel(8, 150, 14);
    let s = Settings { method: keelson::estimator::Method::Components, ..Settings::default() }.check().unwrap();
    let spec = BacktestSpec { window: 60, step: 2, sweep_max_k: Some(3), ..BacktestSpec::default() };
    let with_threads = |threads| BacktestSpec { threads, ..spec.clone() }.check(&panel, &s).unwrap();
    let one = evaluate::run(&panel, &s, &with_threads(1), &no_progress, &Stop::never()).unwrap();
    let three = evaluate::run(&panel, &s, &with_threads(3), &no_progress, &Stop::never()).unwrap();
    let json = |r: &evaluate::BacktestResult| {
        serde_json::to_string(&(&r.strategies, &r.sweep, &r.comparisons, &r.alphas, &r.pricing, r.psr, r.dsr)).unwrap()
    };
    assert!(json(&one) == json(&three), "parallel and sequential backtests differ");
    assert!(one.pricing.is_some(), "the pricing test runs");
    assert_eq!(
        one.strategies.len(),
        12,
        "configured, 5 scalings, plug-in, Ledoit-Wolf, 2 KNS ridges, equal weight, market"
    );
    assert_eq!(one.sweep.len(), 18);
}

#[test]
fn no_look_ahead() {
    // Changing returns from period t on cannot change any out-of-sample return before t.
    let panel = synthetic_panel(9, 130, 10);
    let s = Settings::default().check().unwrap();
    let spec = BacktestSpec { window: 60, sweep_max_k: Some(0), ..BacktestSpec::default() };
    let base =
        evaluate::run(&panel, &s, &spec.clone().check(&panel, &s).unwrap(), &no_progress, &Stop::never()).unwrap();
    let cut = 100;
    let mut future = panel.clone();
    for v in &mut future.returns[cut * panel.cols..] {
        *v = -3.0 * *v + 0.01;
    }
    if let Some(m) = future.market.as_mut() {
        for v in &mut m[cut..] {
            *v *= 2.0;
        }
    }
    let changed = evaluate::run(&future, &s, &spec.check(&future, &s).unwrap(), &no_progress, &Stop::never()).unwrap();
    for (a, b) in base.strategies.iter().zip(&changed.strategies) {
        assert_eq!(a.returns[..cut - 60], b.returns[..cut - 60], "{}", a.name);
        assert_ne!(a.returns[cut - 60 + 1..], b.returns[cut - 60 + 1..], "{}: the change must matter later", a.name);
    }
}

#[test]
fn bad_specifications_are_named() {
    let panel = synthetic_panel(10, 80, 6);
    let s = Settings::default().check().unwrap();
    let run = |spec: BacktestSpec| {
        spec.check(&panel, &s).and_then(|spec| evaluate::run(&panel, &s, &spec, &no_progress, &Stop::never()))
    };
    let e = run(BacktestSpec { window: 100, ..BacktestSpec::default() }).unwrap_err();
    assert!(e.to_string().contains("`window`"), "{e}");
    let e = run(BacktestSpec { window: 40, step: 0, ..BacktestSpec::default() }).unwrap_err();
    assert!(e.to_string().contains("`step`"), "{e}");
    let e = run(BacktestSpec { window: 40, benchmark_sets: vec![vec!["nope".into()]], ..BacktestSpec::default() })
        .unwrap_err();
    assert!(e.to_string().contains("nope"), "{e}");
    let e = run(BacktestSpec { window: 10, ..BacktestSpec::default() }).unwrap_err();
    assert!(e.to_string().contains("too few") || e.to_string().contains("periods"), "{e}");
}

/// SPEC §13: Holm's adjustment against statsmodels `multipletests(method="holm")`, and the
/// Romano–Wolf step-down against an independent numpy implementation drawing the same
/// stationary-bootstrap periods (tests/reference/make_reference.py), on the French data.
#[test]
fn multiple_testing_matches_statsmodels_and_numpy() {
    let exp = reference();
    let e = &exp["real_data"]["evaluation"]["multiple_testing"];
    let p = french();
    let base = column(&p, e["base"].as_str().unwrap());
    let others: Vec<Vec<f64>> =
        e["others"].as_array().unwrap().iter().map(|n| column(&p, n.as_str().unwrap())).collect();
    let raw: Vec<f64> = others.iter().map(|o| stats::jobson_korkie_memmel(&base, o, 12.0).p_value).collect();
    let want_raw = nums(&e["p_raw"]);
    let holm = stats::holm(&raw);
    for (i, (h, w)) in holm.iter().zip(nums(&e["p_holm"])).enumerate() {
        // The normal tail of statrs against scipy's: equal to about 1e-12 relative.
        assert!((raw[i] - want_raw[i]).abs() <= 1e-9 * want_raw[i], "raw p {i}");
        assert!((h - w).abs() <= 1e-9 * w, "Holm p {i}: {h} vs statsmodels {w}");
    }
    let refs: Vec<&[f64]> = others.iter().map(Vec::as_slice).collect();
    let draws = e["draws"].as_u64().unwrap() as usize;
    let rw = stats::romano_wolf(&base, &refs, draws, num(&e["block"]), e["seed"].as_u64().unwrap());
    for (i, (g, w)) in rw.iter().zip(nums(&e["p_romano_wolf"])).enumerate() {
        // Shares of the same draws: equal but for a statistic that ties to the last bit.
        assert!((g - w).abs() <= 1.0 / draws as f64 + 1e-12, "Romano–Wolf p {i}: {g} vs numpy {w}");
    }
}

/// Progress counts what the budget counts: every strategy's fit and its
/// bootstrap draws, every sweep point and every run of the implementation
/// stage, so it reaches its total only when the work is done (the stage runs
/// after every model fit; before this, progress sat at 100% through it).
#[test]
fn progress_counts_the_stage_and_the_draws_and_ends_at_its_total() {
    use keelson::estimator::{Aggregate, Cap};
    use std::sync::Mutex;
    let panel = synthetic_panel(41, 84, 8);
    let s = Settings {
        max_weight: Cap::At(0.3),
        max_turnover: Cap::At(1.0),
        aggregate: Aggregate::Bagged,
        bootstrap_draws: 3,
        ..Settings::default()
    }
    .check()
    .unwrap();
    let spec = BacktestSpec { window: 60, step: 6, sweep_max_k: Some(2), threads: 1, ..BacktestSpec::default() };
    let spec = spec.check(&panel, &s).unwrap();
    let budget = spec.budget();
    assert_eq!(budget.refits, 4);
    assert_eq!(budget.draws, 3);
    assert!(budget.stages > 0 && budget.stages.is_multiple_of(budget.refits), "{budget:?}");
    let seen = Mutex::new(Vec::new());
    let record = |p: evaluate::Progress| seen.lock().unwrap().push(p);
    evaluate::run(&panel, &s, &spec, &record, &Stop::never()).unwrap();
    let seen = seen.into_inner().unwrap();
    let total = seen[0].total;
    // The budget's fits, then the latest window's fit (1 + 3 draws) and its stage.
    assert_eq!(total as u64, budget.fits + 4 + 1, "{budget:?}");
    assert!(seen.windows(2).all(|w| w[0].done < w[1].done && w[1].total == total), "one worker: strictly increasing");
    assert_eq!(seen.last().unwrap().done, total, "ends at its total");
    assert_eq!(seen.iter().filter(|p| p.done == total).count(), 1, "at 100% only once, at the end");
    // The stage's steps come after every model fit: the last `stages + 5` reports.
    let before_stage = seen[seen.len() - budget.stages as usize - 2].done;
    assert_eq!(total - before_stage, budget.stages as usize + 5, "stage runs and the latest fit are counted");
}

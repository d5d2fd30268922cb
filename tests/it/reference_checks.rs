//! The estimator against reference values computed outside the project by
//! `tests/reference/make_reference.py` (pinned numpy, scipy, scikit-learn):
//! an independent numpy implementation of the whole fit, and single steps
//! against numpy.linalg.eigh, scikit-learn `Ridge` and `ElasticNet`, and
//! numpy.linalg.solve / lstsq. Inputs are the CSV panels in
//! `tests/reference/data/`, read with the same reader as `keelson fit`.

use std::cell::RefCell;
use std::path::PathBuf;

use faer::Mat;
use keelson::estimator::{
    self, ComponentBasis, EigenPath, Moments, ReturnPanel, Scaling, Settings, ShrinkagePath, ValidSettings, WeightSet,
};
use serde_json::Value;

/// Relative agreement required everywhere (SPEC §12 asks for 1e-9 or better).
const RTOL: f64 = 1e-9;

fn reference_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference")
}

pub(crate) fn expected() -> Value {
    let text = std::fs::read_to_string(reference_dir().join("expected.json")).expect("expected.json is committed");
    serde_json::from_str(&text).expect("expected.json parses")
}

pub(crate) fn panel(name: &str) -> ReturnPanel {
    let path = reference_dir().join("data").join(format!("{name}.csv"));
    let text = std::fs::read_to_string(&path).unwrap();
    let market = text.lines().next().unwrap().split(',').nth(1) == Some("MKT");
    keelson::panel_csv::parse_returns(&text, name, market.then_some("MKT")).unwrap().panel
}

pub(crate) fn num(v: &Value) -> f64 {
    match v {
        Value::Number(n) => n.as_f64().unwrap(),
        Value::String(s) if s == "nan" => f64::NAN,
        Value::String(s) if s == "inf" => f64::INFINITY,
        Value::String(s) if s == "-inf" => f64::NEG_INFINITY,
        other => panic!("not a number: {other}"),
    }
}

pub(crate) fn nums(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(num).collect()
}

thread_local! {
    static WORST: RefCell<(f64, String)> = const { RefCell::new((0.0, String::new())) };
}

/// Asserts |a − e| ≤ RTOL·scale and records the largest relative deviation seen.
fn close(what: &str, actual: f64, expected: f64, scale: f64) {
    if expected.is_nan() || expected.is_infinite() {
        assert!(
            actual.is_nan() && expected.is_nan() || actual == expected,
            "{what}: got {actual}, expected {expected}"
        );
        return;
    }
    let scale = scale.max(expected.abs()).max(f64::MIN_POSITIVE);
    let rel = (actual - expected).abs() / scale;
    WORST.with(|w| {
        let mut w = w.borrow_mut();
        if rel > w.0 {
            *w = (rel, what.to_owned());
        }
    });
    assert!(rel <= RTOL, "{what}: got {actual:e}, expected {expected:e} (relative deviation {rel:e})");
}

fn close_vec(what: &str, actual: &[f64], expected: &[f64]) {
    assert_eq!(actual.len(), expected.len(), "{what}: length");
    let scale = expected.iter().fold(0.0f64, |m, v| if v.is_finite() { m.max(v.abs()) } else { m });
    for (i, (a, e)) in actual.iter().zip(expected).enumerate() {
        close(&format!("{what}[{i}]"), *a, *e, scale);
    }
}

/// The reference cases' base is the components method (make_reference.py `DEFAULTS`); each
/// case names what it changes.
pub(crate) fn settings_with(overrides: &Value) -> ValidSettings {
    let mut s = Settings { method: keelson::estimator::Method::Components, ..Settings::default() };
    for (k, v) in overrides.as_object().unwrap() {
        let text = match v {
            Value::String(s) => s.clone(),
            other => other.to_string(),
        };
        s.set(k, &text).unwrap();
    }
    s.check().unwrap()
}

fn check_case(case: &Value) {
    let name = format!("{}/{}", case["panel"].as_str().unwrap(), case["name"].as_str().unwrap());
    let e = &case["expected"];
    let settings = settings_with(&case["settings"]);
    let p = panel(case["panel"].as_str().unwrap());
    let ws: WeightSet = estimator::fit(&p, &settings).unwrap_or_else(|err| panic!("{name}: {err}"));
    let d = &ws.diagnostics;

    let weights: Vec<f64> = ws.factors.iter().map(|f| f.weight).collect();
    close_vec(&format!("{name} weights"), &weights, &nums(&e["weights"]));
    let wscale = weights.iter().fold(0.0f64, |m, w| m.max(w.abs()));
    close(&format!("{name} market_weight"), ws.market_weight, num(&e["market_weight"]), wscale);
    let rc: Vec<f64> = ws.factors.iter().map(|f| f.risk_contribution).collect();
    close_vec(&format!("{name} risk_contribution"), &rc, &nums(&e["risk_contribution"]));
    close(&format!("{name} in_sample_sharpe"), d.in_sample_sharpe, num(&e["in_sample_sharpe"]), 1.0);
    close(&format!("{name} ex_ante_volatility"), d.ex_ante_volatility, num(&e["ex_ante_volatility"]), 0.0);
    close(&format!("{name} effective_factors"), d.effective_factors, num(&e["effective_factors"]), 0.0);
    close(&format!("{name} top_sharpe_gross_share"), d.top_sharpe_gross_share, num(&e["top_sharpe_gross_share"]), 0.0);
    close(&format!("{name} condition_number"), d.covariance_condition_number, num(&e["condition_number"]), 0.0);
    // SPEC §13: the risk calibration's factor (NaN when no rule applies).
    let factor = d.risk_calibration.map_or(f64::NAN, |c| c.factor);
    close(&format!("{name} risk calibration factor"), factor, num(&e["risk_factor"]), 0.0);

    let excluded: Vec<(usize, String)> = e["excluded"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| (x[0].as_u64().unwrap() as usize, x[1].as_str().unwrap().to_owned()))
        .collect();
    let got: Vec<(usize, String)> = ws
        .factors
        .iter()
        .enumerate()
        .filter_map(|(i, f)| f.excluded.as_ref().map(|(code, _)| (i, (*code).to_owned())))
        .collect();
    assert_eq!(got, excluded, "{name}: excluded factors");

    // scaling = auto and method = ensemble (SPEC §11): every scaling's best score, and the choice.
    if let Some(rows) = e.get("scaling_scores") {
        let rows = rows.as_array().unwrap();
        assert_eq!(d.scaling_scores.len(), rows.len(), "{name}: one score per scaling");
        for (got, row) in d.scaling_scores.iter().zip(rows) {
            assert_eq!(got.scaling.to_string(), row[0].as_str().unwrap(), "{name}: scaling order");
            close(&format!("{name} {} best score", got.scaling), got.best_score, num(&row[1]), 1.0);
            assert_eq!(got.components as u64, row[2].as_u64().unwrap(), "{name} {}: K", got.scaling);
            close(&format!("{name} {} kappa", got.scaling), got.kappa, num(&row[3]), 0.0);
        }
    }
    match e.get("chosen_scaling") {
        Some(c) => assert_eq!(d.chosen_scaling.map(|s| s.to_string()).as_deref(), c.as_str(), "{name}: chosen"),
        None => assert_eq!(d.chosen_scaling, None, "{name}: no choice"),
    }
    // method = blend: the ridge member's choices are the diagnostics'.
    if let Some(k) = e.get("member_K") {
        assert_eq!(d.num_components as u64, k.as_u64().unwrap(), "{name}: the ridge member's K");
        close(&format!("{name} ridge member kappa"), d.kappa, num(&e["member_kappa"]), 0.0);
        close(&format!("{name} ridge member cv_sharpe"), d.cv_sharpe, num(&e["member_cv_sharpe"]), 1.0);
        assert!(ws.components.is_empty(), "{name}: a blend reports no component loadings");
        return;
    }
    if e.get("K").is_none() {
        assert_eq!(d.num_components, 0, "{name}: baselines use no components");
        return;
    }
    assert_eq!(d.num_components as u64, e["K"].as_u64().unwrap(), "{name}: K");
    close(&format!("{name} kappa"), d.kappa, num(&e["kappa"]), 0.0);
    close(&format!("{name} gamma"), d.gamma, num(&e["gamma"]), 0.0);
    let b: Vec<f64> = ws.components.iter().map(|c| c.coefficient).collect();
    close_vec(&format!("{name} b"), &b, &nums(&e["b"]));
    let eig: Vec<f64> = ws.components.iter().map(|c| c.eigenvalue).collect();
    close_vec(&format!("{name} eigenvalues"), &eig, &nums(&e["eigenvalues"]));
    let surface = d.cv_surface.as_ref().unwrap();
    let ks: Vec<u64> = e["ks"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap()).collect();
    assert_eq!(surface.components.iter().map(|&k| k as u64).collect::<Vec<_>>(), ks, "{name}: K grid");
    close_vec(&format!("{name} kappa grid"), &surface.kappas, &nums(&e["kappas"]));
    let expected_scores: Vec<f64> = e["scores"].as_array().unwrap().iter().flat_map(nums).collect();
    // Scores are Sharpe ratios or R² values: compare on the scale of the surface.
    let scale = expected_scores.iter().fold(1.0f64, |m, v| if v.is_finite() { m.max(v.abs()) } else { m });
    for (i, (a, x)) in surface.scores.iter().zip(&expected_scores).enumerate() {
        close(&format!("{name} cv score {i}"), *a, *x, scale);
    }
    close(&format!("{name} best score"), d.cv_best_score, num(&e["best_score"]), scale);
    close(&format!("{name} cv_sharpe"), d.cv_sharpe, num(&e["cv_sharpe"]), 1.0);
}

#[test]
fn whole_fit_matches_independent_numpy_implementation() {
    // Source: tests/reference/make_reference.py `fit`, numpy 2.4.6 (see expected.json "versions").
    let exp = expected();
    let cases = exp["cases"].as_array().unwrap();
    assert!(cases.len() >= 20);
    for case in cases {
        check_case(case);
    }
    WORST.with(|w| {
        let w = w.borrow();
        println!("largest relative deviation over {} cases: {:.3e} at {}", cases.len(), w.0, w.1);
    });
}

fn a_main_moments() -> Moments {
    let p = panel("a_main");
    let r = Mat::from_fn(p.rows, p.cols, |i, j| p.returns[i * p.cols + j]);
    Moments::compute(r.as_ref(), p.market.as_deref())
}

fn scaling_named(s: &str) -> Scaling {
    match s {
        "sharpe" => Scaling::Sharpe,
        "sharpe-raw" => Scaling::SharpeRaw,
        "standardized" => Scaling::Standardized,
        "covariance" => Scaling::Covariance,
        "risk-premium" => Scaling::RiskPremium,
        "sharpe-shrunk" => Scaling::SharpeShrunk,
        other => panic!("unknown scaling {other}"),
    }
}

#[test]
fn eigenvectors_match_numpy_eigh_on_both_paths() {
    // Source: numpy.linalg.eigh of the scaled matrix C (SPEC §4), make_reference.py `step_checks`.
    let exp = expected();
    let mom = a_main_moments();
    for scaling in ["sharpe", "sharpe-raw", "standardized", "covariance", "risk-premium"] {
        let e = &exp["steps"][format!("eigh_{scaling}")];
        for path in [EigenPath::Factors, EigenPath::Gram] {
            let basis = ComponentBasis::compute(&mom, scaling_named(scaling), 10.0, 8, path).unwrap();
            let tag = format!("{scaling} {path:?}");
            let want = nums(&e["eigenvalues"]);
            // The Gram path sees min(M, N) eigenvalues; compare the leading ones.
            let n = want.len().min(basis.eigenvalues.len());
            close_vec(&format!("{tag} eigenvalues"), &basis.eigenvalues[..8], &want[..8]);
            assert!(n >= 8);
            close(&format!("{tag} trace"), basis.trace, num(&e["trace"]), 0.0);
            let vecs = e["vectors"].as_array().unwrap();
            let qs = e["q"].as_array().unwrap();
            for c in 0..8 {
                let v: Vec<f64> = (0..basis.v.nrows()).map(|i| basis.v[(i, c)]).collect();
                close_vec(&format!("{tag} v{c}"), &v, &nums(&vecs[c]));
                let q: Vec<f64> = (0..basis.q.nrows()).map(|i| basis.q[(i, c)]).collect();
                close_vec(&format!("{tag} q{c}"), &q, &nums(&qs[c]));
            }
            close_vec(&format!("{tag} mu_F"), &basis.mu_f, &nums(&e["mu_f"]));
            let sf = e["sigma_f"].as_array().unwrap();
            for (a, sf_row) in sf.iter().enumerate().take(8) {
                let row: Vec<f64> = (0..8).map(|b| basis.sigma_f[(a, b)]).collect();
                let want = nums(sf_row);
                let scale = want.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(basis.sigma_f[(0, 0)].abs());
                for (b, (x, y)) in row.iter().zip(&want).enumerate() {
                    close(&format!("{tag} sigma_f[{a},{b}]"), *x, *y, scale);
                }
            }
        }
    }
}

#[test]
fn ridge_matches_scikit_learn_ridge() {
    // Source: scikit-learn Ridge(alpha=γ, fit_intercept=False) on X = Σ_F^{1/2}, y = Σ_F^{-1/2}μ_F (SPEC §10).
    let exp = expected();
    let e = &exp["steps"]["ridge_sklearn"];
    let mom = a_main_moments();
    let basis = ComponentBasis::compute(&mom, Scaling::RiskPremium, 10.0, 6, EigenPath::Auto).unwrap();
    let gamma = estimator::kns_gamma(basis.trace_f(6), 0.9 / 12f64.sqrt(), mom.periods());
    close("ridge gamma", gamma, num(&e["gamma"]), 0.0);
    let mut b = vec![0.0; 6];
    ShrinkagePath::new(&basis, false, 0.0).solve(6, gamma, &mut b);
    close_vec("ridge coefficients", &b, &nums(&e["coef"]));
}

#[test]
fn elastic_net_matches_scikit_learn_and_satisfies_kkt() {
    // Source: scikit-learn ElasticNet(alpha=γ₁/(2K)+γ₂/K, l1_ratio=γ₁/(γ₁+2γ₂), tol=1e-12) (SPEC §5, §12).
    let exp = expected();
    let e = &exp["steps"]["elastic_net_sklearn"];
    let mom = a_main_moments();
    let basis = ComponentBasis::compute(&mom, Scaling::RiskPremium, 10.0, 6, EigenPath::Auto).unwrap();
    let gamma = num(&e["gamma"]);
    let l1 = num(&e["l1"]);
    let mut b = vec![0.0; 6];
    let info = ShrinkagePath::new(&basis, false, l1).solve(6, gamma, &mut b);
    assert!(info.converged);
    let want = nums(&e["coef"]);
    assert!(want.contains(&0.0), "the reference case should zero at least one coefficient");
    close_vec("elastic net coefficients", &b, &want);
    // KKT conditions of min (μ−Σb)'Σ⁻¹(μ−Σb) + γ₂‖b‖² + γ₁‖b‖₁ (derived by hand from the subgradient):
    // (μ − Σb)_j − γ₂ b_j = (γ₁/2)·sign(b_j) when b_j ≠ 0, and |(μ − Σb)_j| ≤ γ₁/2 when b_j = 0.
    for j in 0..6 {
        let g = basis.mu_f[j] - (0..6).map(|l| basis.sigma_f[(j, l)] * b[l]).sum::<f64>();
        if b[j] != 0.0 {
            let r = g - gamma * b[j] - 0.5 * l1 * b[j].signum();
            assert!(r.abs() <= 1e-12 * basis.mu_f[0].abs(), "KKT stationarity at {j}: {r:e}");
        } else {
            assert!(g.abs() <= 0.5 * l1 * (1.0 + 1e-12), "KKT at zero coefficient {j}: |{g:e}| > γ₁/2");
        }
    }
}

#[test]
fn plug_in_matches_numpy_solve_and_lstsq() {
    // Source: numpy.linalg.solve(Σ, μ); numpy.linalg.lstsq(Σ, μ) when T < N (minimum norm).
    let exp = expected();
    let mom = a_main_moments();
    let plug = estimator::plug_in(&mom).unwrap();
    assert!(!plug.singular);
    close_vec("plug-in solve", &plug.weights, &nums(&exp["steps"]["plug_in_solve"]["weights"]));
    let p = panel("b_wide");
    let r = Mat::from_fn(p.rows, p.cols, |i, j| p.returns[i * p.cols + j]);
    let wide = Moments::compute(r.as_ref(), p.market.as_deref());
    let plug = estimator::plug_in(&wide).unwrap();
    assert!(plug.singular);
    // Centring and removing the market each take one dimension: rank T − 2.
    assert_eq!(plug.rank, p.rows - 2, "a centred, demarketed T×N panel with T < N has rank T−2");
    close_vec("plug-in lstsq", &plug.weights, &nums(&exp["steps"]["plug_in_lstsq_wide"]["weights"]));
}

#[test]
fn wishart_inflation_matches_a_numpy_monte_carlo() {
    // SPEC §13: the plug-in's window-length correction. The closed form was
    // recalled from memory; numpy's 20,000-draw Monte Carlo of Wishart(I, m)
    // moments (tests/reference/make_reference.py) confirms it to sampling error.
    let e = &expected()["steps"]["wishart_inflation_mc"];
    let got = keelson::estimator::calibration::wishart_inflation(num(&e["periods"]), num(&e["parameters"]));
    close("wishart formula", got, num(&e["formula"]), 0.0);
    let mc = num(&e["ratio"]);
    assert!((got / mc - 1.0).abs() < 0.02, "formula {got} against Monte Carlo {mc}");
}

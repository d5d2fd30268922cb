//! The implementation stage (SPEC §10) against cvxpy: `tests/reference/make_reference.py`
//! models each problem from its definition in cvxpy (pinned, with its Clarabel
//! backend, confirmed by OSQP with polishing) on the committed reference
//! panels; here Keelson fits the same panel with the same settings and
//! previous weights. Weights agree within 1e-6 (SPEC §10), the solution is a
//! KKT point of the problem under scikit-learn's Ledoit–Wolf covariance, and
//! the properties SPEC §10 lists hold.

use keelson::estimator::{self, Cap, Choice, EstimateError, FitOptions, ReturnPanel, Settings, WeightSet};
use serde_json::Value;

use crate::reference_checks::{expected, num, nums, panel, settings_with};

/// Agreement with cvxpy required by SPEC §10.
const WEIGHT_TOL: f64 = 1e-6;

fn with_previous(mut p: ReturnPanel, previous: &Value) -> ReturnPanel {
    p.previous_weights = previous.as_object().unwrap().iter().map(|(k, v)| (k.clone(), num(v))).collect();
    p.previous_weights.sort_by(|a, b| a.0.cmp(&b.0));
    p
}

fn cases() -> Vec<Value> {
    expected()["implementation"].as_array().expect("implementation cases").clone()
}

fn fit_case(case: &Value) -> Result<WeightSet, EstimateError> {
    let p = with_previous(panel(case["panel"].as_str().unwrap()), &case["previous"]);
    estimator::fit(&p, &settings_with(&case["settings"]))
}

/// Ω over the window's usable factors, and the model and implemented weights over them.
struct Solved {
    omega: Vec<Vec<f64>>,
    keep: Vec<usize>,
    beta: Vec<f64>,
}

fn reference_problem(case: &Value) -> Solved {
    let omega = case["omega"].as_array().unwrap().iter().map(nums).collect();
    let keep = case["keep"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap() as usize).collect();
    Solved { omega, keep, beta: nums(&case["beta"]) }
}

#[test]
fn weights_agree_with_cvxpy() {
    let mut worst = (0.0f64, String::new());
    let mut solved = 0;
    for case in cases() {
        let name = case["name"].as_str().unwrap().to_owned();
        if case["status"] == "infeasible" {
            continue;
        }
        let ws = fit_case(&case).unwrap_or_else(|e| panic!("{name}: {e}"));
        let imp = ws.diagnostics.implementation.as_ref().unwrap_or_else(|| panic!("{name}: stage ran"));
        assert_eq!(imp.solver_status, "solved", "{name}");
        // The model is the reference estimator's (SPEC §1–8) before any limit.
        let model: Vec<f64> = ws.factors.iter().map(|f| f.model_weight).collect();
        for (a, e) in model.iter().zip(nums(&case["model_weights"])) {
            assert!((a - e).abs() <= 1e-9 * e.abs().max(1.0), "{name}: model weight {a} vs {e}");
        }
        let w: Vec<f64> = ws.factors.iter().map(|f| f.weight).collect();
        for (i, (a, e)) in w.iter().zip(nums(&case["weights"])).enumerate() {
            let d = (a - e).abs();
            if d > worst.0 {
                worst = (d, format!("{name} weight {i}"));
            }
            assert!(d <= WEIGHT_TOL, "{name}: weight {i} is {a}, cvxpy {e}");
        }
        let dm = (ws.market_weight - num(&case["market_weight"])).abs();
        assert!(dm <= WEIGHT_TOL, "{name}: market weight {} vs {}", ws.market_weight, num(&case["market_weight"]));
        for (what, got) in [
            ("gamma", imp.gamma),
            ("model_sharpe", imp.model_sharpe),
            ("tracking_error", imp.tracking_error),
            ("turnover", imp.turnover),
        ] {
            let want = num(&case[what]);
            assert!((got - want).abs() <= 1e-5 * want.abs().max(1e-3), "{name}: {what} {got} vs {want}");
        }
        // Multipliers: cvxpy's largest per constraint, in the order the settings list them.
        let order = ["max_weight", "max_gross", "max_market_weight", "max_turnover"];
        let on: Vec<&str> = order.iter().copied().filter(|k| case["settings"].get(*k).is_some()).collect();
        for (k, want) in on.iter().zip(nums(&case["duals"])) {
            let got = imp.binding.iter().filter(|b| b.constraint == *k).map(|b| b.dual).fold(0.0, f64::max);
            assert!((got - want).abs() <= 1e-8 + 1e-4 * want.abs(), "{name}: dual of {k} {got:e} vs cvxpy {want:e}");
        }
        solved += 1;
    }
    assert!(solved >= 6, "every feasible case ran");
    eprintln!("largest deviation from cvxpy: {:.3e} ({})", worst.0, worst.1);
}

#[test]
fn infeasible_limits_are_an_error_naming_them() {
    let case = cases().into_iter().find(|c| c["status"] == "infeasible").expect("an infeasible case");
    match fit_case(&case) {
        Err(EstimateError::ConstraintsInfeasible { constraints, .. }) => {
            // A held position above max_weight that max_turnover cannot sell down (cvxpy: infeasible).
            assert!(constraints.contains(&"max_weight".to_owned()), "{constraints:?}");
            assert!(constraints.contains(&"max_turnover".to_owned()), "{constraints:?}");
        }
        other => panic!("expected infeasible, got {other:?}"),
    }
}

/// Stationarity: γ*Ω(w − w*) + Σ λ_i sign(w_i) e_i = 0 for caps only (no hedge
/// term enters without a market cap, gross limit, turnover or cost), with Ω
/// from scikit-learn and Keelson's own multipliers; complementary slackness:
/// a factor without a multiplier sits strictly inside its cap.
#[test]
fn caps_only_solution_is_a_kkt_point() {
    let case = cases().into_iter().find(|c| c["name"] == "caps_only").unwrap();
    let ws = fit_case(&case).unwrap();
    let r = reference_problem(&case);
    let imp = ws.diagnostics.implementation.as_ref().unwrap();
    let w: Vec<f64> = r.keep.iter().map(|&j| ws.factors[j].weight).collect();
    let m: Vec<f64> = r.keep.iter().map(|&j| ws.factors[j].model_weight).collect();
    let cap = 0.15;
    let mut worst = 0.0f64;
    for (i, &j) in r.keep.iter().enumerate() {
        let grad: f64 = imp.gamma * (0..w.len()).map(|k| r.omega[i][k] * (w[k] - m[k])).sum::<f64>();
        let name = &ws.factors[j].name;
        let lambda = imp.binding.iter().find(|b| b.factor.as_deref() == Some(name)).map_or(0.0, |b| b.dual);
        assert!(lambda >= 0.0);
        if lambda == 0.0 {
            assert!(w[i].abs() < cap, "{name} at its cap without a multiplier");
        } else {
            assert!((w[i].abs() - cap).abs() < 1e-9, "{name} has a multiplier but is not at its cap");
        }
        worst = worst.max((grad + lambda * w[i].signum()).abs());
    }
    let scale = imp.gamma * m.iter().map(|x| x.abs()).fold(0.0, f64::max) * 1e-3;
    assert!(worst <= 1e-6 * scale.max(1e-6), "stationarity residual {worst:e}");
    // The reference betas are the window's: the implemented hedge is −β'w.
    let hedge: f64 = -r.beta.iter().zip(&w).map(|(b, x)| b * x).sum::<f64>();
    assert!((hedge - ws.market_weight).abs() < 1e-12);
}

fn demo_settings(edit: impl FnOnce(&mut Settings)) -> Settings {
    let mut s = Settings {
        method: keelson::estimator::Method::Components,
        components: Choice::Fixed(4),
        kappa: Choice::Fixed(0.6),
        ..Settings::default()
    };
    edit(&mut s);
    s
}

fn a_main(previous: &[(&str, f64)]) -> ReturnPanel {
    let mut p = panel("a_main");
    p.previous_weights = previous.iter().map(|(n, w)| ((*n).to_owned(), *w)).collect();
    p
}

#[test]
fn without_limits_or_costs_the_weights_are_the_model_bitwise() {
    let p = a_main(&[("f01", 0.2)]);
    let plain = estimator::fit(&p, &demo_settings(|_| {}).check().unwrap()).unwrap();
    assert!(plain.diagnostics.implementation.is_none());
    for f in &plain.factors {
        assert_eq!(f.weight.to_bits(), f.model_weight.to_bits(), "{}", f.name);
    }
    assert_eq!(plain.market_weight.to_bits(), plain.model_market_weight.to_bits());
    // Limits far from binding and no cost: the solver returns the model (to its tolerance).
    let loose = estimator::fit(&p, &demo_settings(|s| s.max_weight = Cap::At(50.0)).check().unwrap()).unwrap();
    for (a, b) in loose.factors.iter().zip(&plain.factors) {
        assert!((a.weight - b.weight).abs() < 1e-8, "{}: {} vs {}", a.name, a.weight, b.weight);
    }
    assert!(loose.diagnostics.implementation.as_ref().unwrap().binding.is_empty());
}

#[test]
fn a_prohibitive_cost_keeps_a_feasible_previous_portfolio() {
    // Held weights inside every limit; with trades priced far above any expected return nothing moves.
    let held = [("f01", 0.10), ("f03", -0.05), ("f06", 0.08), ("MKT", 0.01)];
    let p = a_main(&held);
    let s = demo_settings(|s| {
        s.cost_bps = 10_000.0;
        s.holding_periods = Choice::Fixed(1.0);
        s.max_weight = Cap::At(0.5);
    });
    let ws = estimator::fit(&p, &s.check().unwrap()).unwrap();
    for f in &ws.factors {
        let want = held.iter().find(|(n, _)| *n == f.name).map_or(0.0, |(_, w)| *w);
        assert!((f.weight - want).abs() < 1e-7, "{}: {} vs held {}", f.name, f.weight, want);
    }
    // The hedge follows the factors (w_m = −β'w): its trade is the only one left.
    let imp = ws.diagnostics.implementation.unwrap();
    assert!((imp.turnover - (ws.market_weight - 0.01).abs()).abs() < 1e-6, "{}", imp.turnover);
}

#[test]
fn a_cap_binds_exactly_at_its_value() {
    let p = a_main(&[]);
    for cap in [0.05, 0.1, 0.2] {
        let ws = estimator::fit(&p, &demo_settings(|s| s.max_weight = Cap::At(cap)).check().unwrap()).unwrap();
        let top = ws.factors.iter().map(|f| f.weight.abs()).fold(0.0, f64::max);
        assert!((top - cap).abs() < 1e-9, "cap {cap}: largest |w| {top}");
        let imp = ws.diagnostics.implementation.unwrap();
        assert!(!imp.binding.is_empty() && imp.binding.iter().all(|b| b.constraint == "max_weight" && b.dual > 0.0));
        for b in &imp.binding {
            assert!(
                (b.value.abs() - cap).abs() < 1e-8,
                "{} at {} for cap {cap}",
                b.factor.as_deref().unwrap_or(""),
                b.value
            );
        }
    }
    let gross = |ws: &WeightSet| ws.factors.iter().map(|f| f.weight.abs()).sum::<f64>() + ws.market_weight.abs();
    let model = gross(&estimator::fit(&p, &demo_settings(|_| {}).check().unwrap()).unwrap());
    let limit = 0.5 * model;
    let ws = estimator::fit(&p, &demo_settings(|s| s.max_gross = Cap::At(limit)).check().unwrap()).unwrap();
    assert!((gross(&ws) - limit).abs() < 1e-9, "gross {} for limit {limit}", gross(&ws));
}

#[test]
fn the_result_does_not_depend_on_the_thread_count() {
    let p = a_main(&[("f02", 0.2), ("MKT", -0.02)]);
    let s = Settings {
        max_weight: Cap::At(0.25),
        max_gross: Cap::At(2.0),
        max_turnover: Cap::At(1.5),
        cost_bps: 15.0,
        ..Settings::default()
    }
    .check()
    .unwrap();
    let one = estimator::fit_with(&p, &s, &FitOptions { threads: 1, ..FitOptions::default() }).unwrap();
    let four = estimator::fit_with(&p, &s, &FitOptions { threads: 4, ..FitOptions::default() }).unwrap();
    assert_eq!(one, four);
}

#[test]
fn halflife_scales_to_the_target_on_the_weighted_covariance() {
    // SPEC §10: with volatility_halflife the target holds on the exponentially weighted risk.
    let p = a_main(&[]);
    let ws = estimator::fit(&p, &demo_settings(|s| s.volatility_halflife = 24.0).check().unwrap()).unwrap();
    // The target times the risk calibration's factor (SPEC §13).
    let factor = ws.diagnostics.risk_calibration.map_or(1.0, |c| c.factor);
    let ex_ante = ws.diagnostics.ex_ante_volatility;
    assert!((ex_ante - 0.10 * factor).abs() < 1e-12, "{ex_ante}");
    let plain = estimator::fit(&p, &demo_settings(|_| {}).check().unwrap()).unwrap();
    // Same direction, another scale.
    let ratio = ws.factors[0].weight / plain.factors[0].weight;
    for (a, b) in ws.factors.iter().zip(&plain.factors) {
        assert!((a.weight - ratio * b.weight).abs() < 1e-12 * b.weight.abs().max(1e-9));
    }
    assert!((ratio - 1.0).abs() > 1e-6);
}

fn desk_backtest(threads: usize, s: &Settings) -> keelson::evaluate::BacktestResult {
    use keelson::evaluate::{self, BacktestSpec};
    let panel = keelson::demo::synthetic_panel(21, 150, 8);
    let s = s.clone().check().unwrap();
    let spec = BacktestSpec { window: 60, step: 3, sweep_max_k: Some(0), threads, ..BacktestSpec::default() }
        .check(&panel, &s)
        .unwrap();
    evaluate::run(&panel, &s, &spec, &|_| {}, &keelson::estimator::Stop::never()).unwrap()
}

/// SPEC §10 in a backtest: every fitted strategy holds implemented weights
/// within the limits at every refit, trades from what it held, the model
/// portfolio is its own row equal to the backtest without limits, and the
/// result does not depend on the thread count.
#[test]
fn backtests_hold_implemented_weights_within_the_limits() {
    let limits = Settings {
        max_weight: Cap::At(0.3),
        max_gross: Cap::At(1.5),
        max_turnover: Cap::At(0.4),
        cost_bps: 20.0,
        ..Settings::default()
    };
    let r = desk_backtest(1, &limits);
    // Everything but the specification's own thread count.
    let json = |r: &keelson::evaluate::BacktestResult| {
        let last: Option<Vec<f64>> = r.last_fit.as_ref().map(|w| w.fit.factors.iter().map(|f| f.weight).collect());
        serde_json::to_string(&(&r.strategies, last)).unwrap()
    };
    assert!(json(&r) == json(&desk_backtest(3, &limits)), "the thread count changed the results");
    let plain = desk_backtest(2, &Settings::default());
    assert_eq!(r.strategies[0].name, "configured");
    assert_eq!(r.strategies[1].name, keelson::evaluate::MODEL);
    // The model row is the configured method without limits, bit for bit.
    assert_eq!(r.strategies[1].returns, plain.strategies[0].returns);
    assert!(plain.strategies.iter().all(|s| s.name != keelson::evaluate::MODEL));
    for s in r.strategies.iter().filter(|s| s.name != keelson::evaluate::MODEL && s.name != "market") {
        assert!(s.gross_max <= 1.5 + 1e-8, "{}: gross {}", s.name, s.gross_max);
        // The turnover budget holds at every refit, so its average does too.
        assert!(s.average_turnover <= 0.4 + 1e-8, "{}: turnover {}", s.name, s.average_turnover);
    }
    assert_eq!(r.constraints.limits.max_gross, Some(1.5));
    // The latest fit is the one to trade next: on the data's last window, implemented
    // from the weights held after the last refit.
    let last = r.last_fit.as_ref().unwrap();
    let imp = last.fit.diagnostics.implementation.as_ref().unwrap();
    assert!(imp.gross <= 1.5 + 1e-8 && imp.turnover <= 0.4 + 1e-8);
    assert_eq!(last.last_period, *r.periods.last().unwrap(), "the window ends at the data's last period");
    assert_eq!(last.fit.diagnostics.periods, 60);
}

#[test]
fn a_backtest_without_limits_is_unchanged_by_the_stage() {
    // Without any §10 setting no strategy goes through the stage: the
    // configured returns equal those of fits made one by one.
    let r = desk_backtest(2, &Settings::default());
    assert!(!r.constraints.active());
    assert!(r.strategies[0].gross_median.is_finite() && r.strategies[0].target_volatility == Some(0.10));
}

#[test]
fn the_solver_stops_when_asked() {
    use keelson::estimator::desk::DeskWindow;
    let p = a_main(&[]);
    let s = demo_settings(|s| s.max_weight = Cap::At(0.1)).check().unwrap();
    let model = estimator::fit(&p, &demo_settings(|_| {}).check().unwrap()).unwrap();
    let w: Vec<f64> = model.factors.iter().map(|f| f.weight).collect();
    let desk = DeskWindow::new(&p, &s).unwrap();
    let flag = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(true));
    let stop = keelson::estimator::Stop::never().with_flag(flag);
    let none = vec![0.0; w.len()];
    let held = keelson::estimator::desk::Holdings { weights: &none, market: 0.0 };
    let r = desk.implement(&s, &w, 1.0, held, &stop, &mut Vec::new());
    assert!(matches!(r, Err(EstimateError::Cancelled)), "{:?}", r.err());
    let ok = desk.implement(&s, &w, 1.0, held, &keelson::estimator::Stop::never(), &mut Vec::new()).unwrap();
    assert!(ok.weights.iter().all(|x| x.abs() <= 0.1 + 1e-9));
}

/// Every limit on, from held weights, for the form and phase-1 checks.
fn every_limit(s: &mut Settings) {
    s.max_weight = Cap::At(0.12);
    s.max_gross = Cap::At(1.5);
    s.max_market_weight = Cap::At(0.2);
    s.max_turnover = Cap::At(1.2);
    s.cost_bps = 20.0;
}

/// Ω dense and Ω in factor form (a·I + c·X'X through T auxiliary variables)
/// are two writings of one strictly convex problem: the same weights to
/// 1e-8, on a narrow and on a wide window (Keelson against itself; each form
/// alone is checked against cvxpy above).
#[test]
fn dense_and_factor_forms_give_the_same_weights() {
    use keelson::estimator::desk::{DeskWindow, Holdings, OmegaForm};
    for (seed, periods, factors) in [(5u64, 120usize, 30usize), (6, 60, 90)] {
        let mut p = keelson::demo::synthetic_panel(seed, periods, factors);
        let prev: Vec<f64> = (0..factors).map(|j| if j % 4 == 0 { 0.6 / factors as f64 * 4.0 } else { 0.0 }).collect();
        p.previous_weights = p.factor_names.iter().cloned().zip(prev.iter().copied()).collect();
        let s = demo_settings(every_limit).check().unwrap();
        let model = estimator::fit(&p, &demo_settings(|_| {}).check().unwrap()).unwrap();
        let w: Vec<f64> = model.factors.iter().map(|f| f.weight).collect();
        let desk = DeskWindow::new(&p, &s).unwrap();
        let held = Holdings { weights: &prev, market: 0.0 };
        let stop = keelson::estimator::Stop::never();
        let solve = |form| desk.implement_in(&s, &w, 1.0, held, form, &stop, &mut Vec::new()).unwrap();
        let (dense, factor) = (solve(OmegaForm::Dense), solve(OmegaForm::Factor));
        assert_eq!((dense.report.omega_form, factor.report.omega_form), ("dense", "factor"));
        assert!(!dense.report.binding.is_empty(), "{factors}: some limit binds");
        for (j, (a, b)) in dense.weights.iter().zip(&factor.weights).enumerate() {
            assert!((a - b).abs() <= 1e-8, "{factors} factors, #{j}: dense {a} vs factor {b}");
        }
        assert!((dense.market_weight - factor.market_weight).abs() <= 1e-8);
    }
}

/// Phase 1 (SPEC §10): held weights of gross 2.4 under max_gross = 1 need at
/// least 1.4 of trades; with max_turnover = 0.5 no portfolio exists, found
/// before the solver and named by the two limits that conflict, not by
/// max_weight, which the held weights already meet.
#[test]
fn infeasibility_from_held_weights_names_only_the_conflicting_limits() {
    let held = [
        ("f01", 0.3),
        ("f02", -0.3),
        ("f03", 0.3),
        ("f04", -0.3),
        ("f05", 0.3),
        ("f06", -0.3),
        ("f07", 0.3),
        ("f08", -0.3),
    ];
    let p = a_main(&held);
    let s = demo_settings(|s| {
        s.max_weight = Cap::At(0.4);
        s.max_gross = Cap::At(1.0);
        s.max_turnover = Cap::At(0.5);
    });
    match estimator::fit(&p, &s.check().unwrap()) {
        Err(EstimateError::ConstraintsInfeasible { constraints, detail }) => {
            assert_eq!(constraints, ["max_gross", "max_turnover"], "{detail}");
            assert!(detail.contains("1.4"), "{detail}");
        }
        other => panic!("expected infeasible, got {:?}", other.map(|w| w.diagnostics.implementation)),
    }
}

/// A sale the desk cannot avoid (a held factor absent from the window) is
/// made even when it alone exceeds max_turnover: the budget applies to the
/// other trades, with a warning, instead of failing.
#[test]
fn a_forced_sale_over_the_turnover_budget_is_made_with_a_warning() {
    let p = a_main(&[("gone_factor", 0.8), ("f01", 0.1)]);
    let s = demo_settings(|s| {
        s.max_weight = Cap::At(0.3);
        s.max_turnover = Cap::At(0.5);
    });
    let ws = estimator::fit(&p, &s.check().unwrap()).unwrap();
    let codes: Vec<&str> = ws.diagnostics.warnings.iter().map(|w| w.code.word()).collect();
    assert!(codes.contains(&"forced-sale-over-turnover"), "{codes:?}");
    let imp = ws.diagnostics.implementation.unwrap();
    assert!(imp.turnover > 0.8 && imp.turnover <= 0.8 + 0.5 + 1e-9, "{}", imp.turnover);
}

/// Caps below one millionth of NAV are refused when the settings are checked
/// (the solver's tolerance is absolute), naming the setting.
#[test]
fn limits_below_the_floor_are_refused_by_name() {
    for (name, edit) in [
        ("max_weight", (|s: &mut Settings| s.max_weight = Cap::At(1e-9)) as fn(&mut Settings)),
        ("max_gross", |s| s.max_gross = Cap::At(2e-9)),
        ("max_market_weight", |s| s.max_market_weight = Cap::At(1e-9)),
        ("max_turnover", |s| s.max_turnover = Cap::At(5e-7)),
    ] {
        let err = demo_settings(edit).check().unwrap_err().to_string();
        assert!(err.contains(name), "{name}: {err}");
    }
    assert!(demo_settings(|s| s.max_weight = Cap::At(keelson::estimator::MIN_LIMIT)).check().is_ok());
}

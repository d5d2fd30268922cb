//! One careless or hostile caller costs that caller an error and nothing
//! else: backtest options out of range and over-budget backtests are refused
//! before any work (the hint naming what to change), one fit over its memory
//! estimate or the implementation stage's size limits likewise, a panic
//! stays inside its request, and every setting a request leaves unset takes
//! the server's configured default. The implementation stage holds up: random
//! limit combinations never fail the solver, a cancel at any of its polls
//! stops it there (a fault-injected slow solver included), a backtest stream
//! outlives the connection age, and a missing return in a held factor is sold
//! over the turnover budget instead of failing the backtest.

use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use crate::common::Server;
use keelson::convert::{request_from_panel, settings_to_proto};
use keelson::demo::{synthetic_panel, to_csv};
use keelson::estimator::{
    Aggregate, Cap, Choice, CvCriterion, Method, MissingPolicy, Normalization, RiskCalibration, Scaling, Settings,
};
use keelson::proto::{self, weights_service_client::WeightsServiceClient};
use tonic::Code;
use tonic::transport::Channel;
use tonic_types::StatusExt as _;

fn run<F: std::future::Future<Output = ()>>(f: F) {
    tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap().block_on(f);
}

fn backtest_request(periods: usize, factors: usize) -> proto::RunBacktestRequest {
    let panel = synthetic_panel(21, periods, factors);
    proto::RunBacktestRequest {
        window: 60,
        step: 12,
        skip_baselines: true,
        ..keelson::convert::backtest_request_from_panel(&panel, proto::Settings::default(), "hostile")
    }
}

async fn good_call(c: &mut WeightsServiceClient<Channel>) -> bool {
    let req = request_from_panel(&synthetic_panel(1, 60, 5), proto::Settings::default(), "good");
    c.compute_weights(req).await.is_ok()
}

/// A backtest that is refused; returns the status and how long the refusal took.
async fn refused(c: &mut WeightsServiceClient<Channel>, req: proto::RunBacktestRequest) -> (tonic::Status, Duration) {
    let started = Instant::now();
    let status = match c.run_backtest(req).await {
        Err(s) => s,
        Ok(stream) => {
            let mut stream = stream.into_inner();
            loop {
                match stream.message().await {
                    Ok(Some(_)) => {}
                    Ok(None) => panic!("the backtest was accepted and finished"),
                    Err(s) => break s,
                }
            }
        }
    };
    (status, started.elapsed())
}

#[test]
fn over_budget_backtests_are_refused_and_the_server_keeps_serving() {
    run(async {
        let server = Server::start(|_| {}).await;
        let mut c = server.client().await;
        // Every option out of range is in the bad-input corpus (tests/bad_input_corpus.rs).
        let mut slowest = Duration::ZERO;
        // Within the default budget (250,000 fits) the shape is legal, but 20,000
        // monthly refits × (13 strategies + the blend's covariance sweep, 6 points) is not affordable.
        let mut huge = backtest_request(20_000, 6);
        huge.window = 24;
        huge.step = 1;
        huge.skip_baselines = false;
        let (s, took) = refused(&mut c, huge).await;
        slowest = slowest.max(took);
        assert_eq!(s.code(), Code::ResourceExhausted, "{}", s.message());
        let info = s.get_details_error_info().unwrap();
        assert_eq!(info.reason, "REQUEST_OVER_BUDGET");
        assert_eq!(info.metadata["what"], "fits");
        assert_eq!(info.metadata["estimate"], (19_976u64 * 19).to_string());
        assert!(
            s.message().contains("19976 refit dates") && s.message().contains("a longer `step`"),
            "{}",
            s.message()
        );
        assert!(good_call(&mut c).await, "the server stopped serving after an over-budget backtest");
        println!("slowest refusal: {:.1} ms", slowest.as_secs_f64() * 1e3);
        server.shutdown().await;
    });
}

#[test]
fn memory_budget_refuses_before_any_work() {
    run(async {
        let server = Server::start(|c| c.server.max_request_bytes_estimate = 8 << 20).await;
        let mut c = server.client().await;
        // 480 refits of 40 factors with every baseline and the sweep: about 15 MiB by the estimate.
        let mut req = backtest_request(600, 40);
        req.step = 1;
        req.window = 120;
        req.skip_baselines = false;
        let (s, _) = refused(&mut c, req).await;
        assert_eq!(s.code(), Code::ResourceExhausted, "{}", s.message());
        let info = s.get_details_error_info().unwrap();
        assert_eq!(info.metadata["what"], "bytes");
        assert_eq!(info.metadata["limit_key"], "server.max_request_bytes_estimate");
        assert_eq!(server.api.computing(), 0, "nothing ran");
        let text = server.api.metrics_text();
        assert!(text.contains("keelson_requests_shed_total{reason=\"over_budget\"} 1"), "{text}");
        assert!(text.contains("keelson_problem_cells_count 1\n"), "a refused backtest's size is recorded: {text}");
        let info = c.get_service_info(proto::GetServiceInfoRequest {}).await.unwrap().into_inner();
        let limits = info.limits.unwrap();
        assert_eq!(limits.max_request_bytes_estimate, 8 << 20);
        assert_eq!(limits.max_backtest_fits, 250_000);
        server.shutdown().await;
    });
}

#[cfg(debug_assertions)]
#[test]
fn a_panic_stays_inside_its_request() {
    use keelson::service::PANIC_PROBE_REQUEST_ID;
    run(async {
        let server = Server::start(|_| {}).await;
        let mut c = server.client().await;
        let mut req = request_from_panel(&synthetic_panel(2, 60, 5), proto::Settings::default(), "x");
        req.request_id = PANIC_PROBE_REQUEST_ID.into();
        let s = c.compute_weights(req).await.unwrap_err();
        assert_eq!(s.code(), Code::Internal, "{}", s.message());
        assert_eq!(s.get_details_error_info().unwrap().reason, "INTERNAL");
        let mut bt = backtest_request(200, 6);
        bt.request_id = PANIC_PROBE_REQUEST_ID.into();
        let (s, _) = refused(&mut c, bt).await;
        assert_eq!(s.code(), Code::Internal, "{}", s.message());
        assert!(good_call(&mut c).await, "the server keeps serving after a panic");
        assert!(crate::common::eventually(100, || server.api.computing() == 0).await, "the worker slot was freed");
        assert!(server.api.metrics_text().contains("keelson_request_panics_total 2"));
        server.shutdown().await;
    });
}

/// Every setting changed from its built-in default, to a combination that still fits.
fn server_defaults() -> Settings {
    Settings {
        method: Method::Components,
        scaling: Scaling::Covariance,
        components: Choice::Fixed(3),
        max_components: 12,
        kappa: Choice::Fixed(0.7),
        kappa_grid_min: 0.02,
        kappa_grid_max: 8.0,
        kappa_grid_points: 20,
        l1_penalty: 0.0005,
        folds: 4,
        cv_criterion: CvCriterion::PricingR2,
        normalization: Normalization::GrossExposure,
        target_volatility: 0.12,
        risk_aversion: 4.0,
        periods_per_year: Choice::Fixed(52),
        demarket: false,
        missing_policy: MissingPolicy::Reject,
        rp_gamma: 5.0,
        min_periods: 30,
        held_out_check: false,
        max_weight: Cap::At(5.0),
        max_gross: Cap::At(50.0),
        max_market_weight: Cap::At(10.0),
        max_turnover: Cap::At(100.0),
        cost_bps: 1.0,
        holding_periods: Choice::Fixed(26.0),
        volatility_halflife: 26.0,
        bootstrap_draws: 3,
        bootstrap_block: 2.0,
        bootstrap_cv: true,
        seed: 9,
        aggregate: Aggregate::Bagged,
        risk_calibration: RiskCalibration::LedoitWolf,
        frequency_check: false,
    }
}

#[test]
fn the_server_defaults_really_differ_in_every_field() {
    let d = Settings::default();
    let s = server_defaults();
    let table_d = toml::Table::try_from(&d).unwrap();
    let table_s = toml::Table::try_from(&s).unwrap();
    for &key in Settings::KEYS {
        assert_ne!(table_d.get(key), table_s.get(key), "{key} must differ from its built-in default");
    }
}

#[test]
fn unset_settings_take_the_server_defaults_over_grpc() {
    run(async {
        let defaults = server_defaults();
        let server = Server::start(|c| c.estimator = defaults.clone()).await;
        let mut c = server.client().await;
        let panel = synthetic_panel(4, 80, 8);
        let resp = c
            .compute_weights(request_from_panel(&panel, proto::Settings::default(), "defaults"))
            .await
            .unwrap()
            .into_inner();
        let d = resp.diagnostics.unwrap();
        assert_eq!(d.effective_settings.unwrap(), settings_to_proto(&defaults), "every unset field took the default");
        assert!(!d.components_cross_validated && !d.kappa_cross_validated);
        // Asking for cross-validation explicitly overrides the server's fixed K and κ.
        let auto = proto::Settings {
            components_choice: Some(proto::settings::ComponentsChoice::ComponentsAuto(true)),
            kappa_choice: Some(proto::settings::KappaChoice::KappaAuto(true)),
            method: proto::Method::Components.into(),
            ..Default::default()
        };
        let resp = c.compute_weights(request_from_panel(&panel, auto, "auto")).await.unwrap().into_inner();
        let d = resp.diagnostics.unwrap();
        assert!(d.components_cross_validated && d.kappa_cross_validated);
        let e = d.effective_settings.unwrap();
        assert_eq!(e.components_choice, Some(proto::settings::ComponentsChoice::ComponentsAuto(true)));
        assert_eq!(e.folds, Some(4), "the other fields still take the server's defaults");
        // `false` is not a way to ask for anything.
        let bad = proto::Settings {
            kappa_choice: Some(proto::settings::KappaChoice::KappaAuto(false)),
            ..Default::default()
        };
        let s = c.compute_weights(request_from_panel(&panel, bad, "bad")).await.unwrap_err();
        assert_eq!(s.code(), Code::InvalidArgument);
        assert_eq!(s.get_details_bad_request().unwrap().field_violations[0].field, "settings.kappa_auto");
        let info = c.get_service_info(proto::GetServiceInfoRequest {}).await.unwrap().into_inner();
        assert_eq!(info.default_settings.unwrap(), settings_to_proto(&defaults));
        // The settings table carries this server's defaults beside each range.
        assert_eq!(info.settings.len(), Settings::KEYS.len());
        let row = |name: &str| info.settings.iter().find(|d| d.name == name).unwrap().clone();
        assert_eq!(row("components").default_value, "3");
        assert_eq!(row("method").default_value, "components");
        assert_eq!(row("folds").range, "2..=20");
        server.shutdown().await;
    });
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

#[test]
fn unset_settings_take_the_server_defaults_through_keelson_call() {
    let defaults = server_defaults();
    let table = toml::Table::try_from(&defaults).unwrap();
    let port = free_port();
    let mut serve = Command::new(env!("CARGO_BIN_EXE_keelson"));
    serve.args(["serve", "--addr", &format!("127.0.0.1:{port}")]).env("KEELSON__METRICS__ADDRESS", "");
    for &key in Settings::KEYS {
        let v = match &table[key] {
            toml::Value::String(s) => s.clone(),
            other => other.to_string(),
        };
        serve.env(format!("KEELSON__ESTIMATOR__{}", key.to_uppercase()), v);
    }
    let mut child = serve.stdout(Stdio::null()).stderr(Stdio::piped()).spawn().unwrap();
    let dir = std::env::temp_dir().join(format!("keelson-defaults-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let csv = dir.join("w.csv");
    std::fs::write(&csv, to_csv(&synthetic_panel(4, 80, 8))).unwrap();
    let addr = format!("http://127.0.0.1:{port}");
    let mut out = None;
    for _ in 0..100 {
        let o = Command::new(env!("CARGO_BIN_EXE_keelson"))
            .args(["call", "--addr", &addr, "--returns", csv.to_str().unwrap(), "--market", "MKT", "--format", "json"])
            .output()
            .unwrap();
        if o.status.success() {
            out = Some(o);
            break;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let _ = child.kill();
    let _ = child.wait();
    let out = out.expect("keelson call succeeded against the server");
    let got: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let want = serde_json::to_value(settings_to_proto(&defaults)).unwrap();
    assert_eq!(got["diagnostics"]["effectiveSettings"], want, "every unset field took the server's default");
}

#[test]
fn keelson_call_checks_settings_before_connecting() {
    // Nothing listens on this port: a bad setting must be reported as usage (exit 2) first.
    let port = free_port();
    let dir = std::env::temp_dir().join(format!("keelson-call-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let csv = dir.join("w.csv");
    std::fs::write(&csv, to_csv(&synthetic_panel(4, 60, 5))).unwrap();
    let o = Command::new(env!("CARGO_BIN_EXE_keelson"))
        .args(["call", "--addr", &format!("http://127.0.0.1:{port}"), "--returns", csv.to_str().unwrap()])
        .args(["--set", "folds=1"])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains("folds"), "{err}");
}

mod random_backtests {
    use keelson::convert::{backtest_request_into_parts, settings_from_proto};
    use keelson::estimator::{Settings, Stop};
    use keelson::evaluate;
    use keelson::proto;
    use keelson::service::config::ServerSection;
    use proptest::prelude::*;

    /// Mostly hostile values, often ordinary ones.
    fn count(ordinary: std::ops::Range<u32>) -> impl Strategy<Value = u32> + Clone {
        prop_oneof![1 => Just(0u32), 1 => Just(u32::MAX), 1 => Just(4_000_000_000), 1 => 0u32..100_000, 12 => ordinary]
    }

    fn options() -> impl Strategy<Value = proto::RunBacktestRequest> {
        let real = prop_oneof![
            1 => Just(f64::NAN),
            1 => Just(f64::INFINITY),
            1 => Just(-1.0),
            1 => Just(0.0),
            1 => Just(1e300),
            20 => 0.01f64..50.0
        ];
        let sets = prop_oneof![
            3 => Just(Vec::new()),
            1 => proptest::collection::vec(proptest::collection::vec("f[0-8]|market|nope", 0..3), 0..3)
        ];
        (30usize..140, 1usize..7, any::<bool>()).prop_flat_map(move |(rows, cols, market)| {
            (
                count(12..rows as u32),
                count(1..25),
                proptest::option::of(count(0..8)),
                proptest::option::of(real.clone()),
                proptest::option::of(real.clone()),
                sets.clone(),
                any::<bool>(),
                prop::bool::weighted(0.3),
            )
                .prop_map(move |(window, step, sweep, cost, cer, sets, expanding, baselines)| {
                    let mut panel = keelson::demo::synthetic_panel(rows as u64, rows, cols);
                    if !market {
                        panel.market = None;
                    }
                    let settings = proto::Settings {
                        kappa_grid_points: Some(8),
                        max_components: Some(6),
                        min_periods: Some(12),
                        ..Default::default()
                    };
                    proto::RunBacktestRequest {
                        window,
                        expanding,
                        step,
                        cost_bps: cost,
                        cer_risk_aversion: cer,
                        sweep_max_k: sweep,
                        benchmark_sets: sets.into_iter().map(|names| proto::BenchmarkSet { names }).collect(),
                        skip_baselines: !baselines,
                        ..keelson::convert::backtest_request_from_panel(&panel, settings, "p")
                    }
                })
        })
    }

    /// Checks one request; true when a backtest ran to a result.
    fn check(req: proto::RunBacktestRequest) -> Result<bool, TestCaseError> {
        let limits = ServerSection::default();
        let (panel, ps, spec, _) = backtest_request_into_parts(req);
        let Ok(settings) = settings_from_proto(&ps, &Settings::default()).and_then(|s| s.check()) else {
            return Ok(false);
        };
        let Ok(spec) = spec.check(&panel, &settings) else { return Ok(false) };
        let budget = spec.budget();
        prop_assert!(budget.fits >= budget.refits);
        if budget.fits > limits.max_backtest_fits || budget.bytes > limits.max_request_bytes_estimate {
            return Ok(false); // refused by the server before any work
        }
        prop_assert!(budget.bytes < 64 << 20, "a small history cannot need {} bytes", budget.bytes);
        if budget.fits > 600 {
            return Ok(false); // admissible, but too slow for a debug-build property test
        }
        match evaluate::run(&panel, &settings, &spec, &|_| {}, &Stop::never()) {
            Ok(r) => {
                prop_assert_eq!(r.refits as u64, budget.refits);
                prop_assert!(r.strategies.iter().all(|s| s.returns.iter().all(|v| v.is_finite())));
                Ok(true)
            }
            Err(_) => Ok(false),
        }
    }

    /// Any request gets an error or a result; what passes the checks is
    /// within the server's budget or refused by it, and what runs returns
    /// finite out-of-sample returns for the estimated number of refits.
    #[test]
    fn random_backtest_requests_error_or_finish() {
        let mut runner = proptest::test_runner::TestRunner::new(ProptestConfig { cases: 64, ..Default::default() });
        let ran = std::sync::atomic::AtomicU32::new(0);
        runner
            .run(&options(), |req| {
                if check(req)? {
                    ran.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                }
                Ok(())
            })
            .unwrap();
        let ran = ran.into_inner();
        println!("{ran} of 64 random backtest requests ran to a result");
        assert!(ran >= 5, "only {ran} of 64 random requests ran: the generator is too hostile to test the runs");
    }
}

/// The implementation stage's size limit: a request over
/// `server.max_stage_factors` with a limit set is refused before any work,
/// the same request without limits or costs is not, and `GetServiceInfo`
/// reports the limit.
#[test]
fn the_stage_size_limit_refuses_before_any_work() {
    run(async {
        let server = Server::start(|c| c.server.max_stage_factors = 40).await;
        let mut c = server.client().await;
        let panel = synthetic_panel(22, 60, 41);
        let limited = settings_to_proto(&Settings { max_weight: Cap::At(0.1), ..Settings::default() });
        let s = c.compute_weights(request_from_panel(&panel, limited, "stage-size")).await.unwrap_err();
        assert_eq!(s.code(), Code::InvalidArgument, "a size limit, as max_factors: {}", s.message());
        assert!(s.message().contains("server.max_stage_factors") && s.message().contains("41"), "{}", s.message());
        assert_eq!(server.api.computing(), 0, "nothing ran");
        let plain = request_from_panel(&panel, proto::Settings::default(), "no-stage");
        assert!(c.compute_weights(plain).await.is_ok(), "without limits the stage does not run");
        let info = c.get_service_info(proto::GetServiceInfoRequest {}).await.unwrap().into_inner();
        assert_eq!(info.limits.unwrap().max_stage_factors, 40);
        server.shutdown().await;
    });
}

/// 1,500 random limit combinations (log-uniform caps from the floor 1e-6 to
/// 10, turnover budgets, costs, held weights and hedges) on a small window:
/// every one is solved or refused as infeasible, never a solver failure
/// (`INTERNAL`), and every solved portfolio meets its limits to 1e-7 of each
/// limit (relative, so tiny caps hold too).
#[test]
fn random_limit_combinations_never_fail_the_solver() {
    use keelson::estimator::{EstimateError, fit};
    let mut rng = 0x9E37_79B9_7F4A_7C15u64;
    let mut next = move || {
        rng ^= rng << 13;
        rng ^= rng >> 7;
        rng ^= rng << 17;
        (rng >> 11) as f64 / (1u64 << 53) as f64
    };
    let base = synthetic_panel(31, 60, 10);
    let (mut solved, mut infeasible) = (0, 0);
    for case in 0..1_500 {
        let mut log_cap = |on: f64| (next() < on).then(|| 10f64.powf(-6.0 + 7.0 * next()));
        let (wc, gc, mc, tc) = (log_cap(0.6), log_cap(0.5), log_cap(0.4), log_cap(0.5));
        let cost = if next() < 0.5 { 0.0 } else { 50.0 * next() };
        let held_scale = if next() < 0.3 { 0.0 } else { 10f64.powf(-3.0 + 3.0 * next()) };
        let mut panel = base.clone();
        let mut held: Vec<(String, f64)> = Vec::new();
        for n in &panel.factor_names {
            held.push((n.clone(), held_scale * (2.0 * next() - 1.0)));
        }
        held.push(("MKT".to_owned(), held_scale * (2.0 * next() - 1.0)));
        panel.previous_weights = held;
        let cap = |c: Option<f64>| c.map_or(Cap::Off, Cap::At);
        let settings = Settings {
            method: Method::Components,
            components: Choice::Fixed(3),
            kappa: Choice::Fixed(0.5),
            held_out_check: false,
            risk_calibration: RiskCalibration::Off,
            max_weight: cap(wc),
            max_gross: cap(gc),
            max_market_weight: cap(mc),
            max_turnover: cap(tc),
            cost_bps: cost,
            ..Settings::default()
        };
        let Ok(valid) = settings.check() else { panic!("case {case}: limits at or above the floor are valid") };
        match fit(&panel, &valid) {
            Ok(ws) => {
                solved += 1;
                let imp = ws.diagnostics.implementation.as_ref();
                let within = |value: f64, limit: Option<f64>, what: &str| {
                    if let Some(l) = limit {
                        assert!(value <= l * (1.0 + 1e-7) + 1e-15, "case {case}: {what} {value:e} over {l:e}");
                    }
                };
                for f in &ws.factors {
                    within(f.weight.abs(), wc, "weight");
                }
                within(ws.market_weight.abs(), mc, "hedge");
                if let Some(imp) = imp {
                    within(imp.gross, gc, "gross");
                    if !ws.diagnostics.warnings.iter().any(|w| w.code == "forced-sale-over-turnover") {
                        within(imp.turnover, tc, "turnover");
                    }
                }
            }
            Err(EstimateError::ConstraintsInfeasible { constraints, .. }) => {
                infeasible += 1;
                assert!(
                    constraints.iter().any(|c| c == "max_turnover"),
                    "case {case}: only a turnover budget can conflict: {constraints:?}"
                );
            }
            Err(e) => panic!(
                "case {case}: {e} (weight {wc:?}, gross {gc:?}, market {mc:?}, turnover {tc:?}, cost {cost}, held ×{held_scale})"
            ),
        }
    }
    assert!(solved > 500 && infeasible > 20, "both outcomes are exercised: {solved} solved, {infeasible} infeasible");
}

/// Cancellation reaches every phase of the implementation stage: for every
/// point at which the stage polls its stop flag (before each phase and at
/// every solver iteration), a cancel raised exactly there ends the stage with
/// `Cancelled` at that poll or the next, in both forms of Ω (dense at
/// 40 × 120, the factor form at 250 × 120). Then a fault-injected slow solver
/// (every poll sleeps 2 ms) is cancelled from another thread mid-way: it
/// stops within two polls of the flag. The time from the flag to the return
/// is printed, not asserted (README, Performance, has the measured table).
#[test]
fn a_cancel_at_any_poll_of_the_stage_stops_it_there() {
    use keelson::estimator::desk::{DeskWindow, Holdings};
    use keelson::estimator::{EstimateError, Stop, fit};
    use std::sync::Arc;
    use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
    let settings = keelson::demo::every_limit().check().unwrap();
    for (n, form) in [(40, "dense"), (250, "factor")] {
        let panel = synthetic_panel(23, 120, n);
        let fitted = fit(&panel, &settings).unwrap();
        let model: Vec<f64> = fitted.factors.iter().map(|f| f.model_weight).collect();
        let prev: Vec<f64> = (0..n).map(|j| if j % 3 == 0 { 3.0 / n as f64 } else { 0.0 }).collect();
        let desk = DeskWindow::new(&panel, &settings).unwrap();
        let stage = |stop: &Stop| {
            let held = Holdings { weights: &prev, market: 0.0 };
            desk.implement(&settings, &model, fitted.diagnostics.in_sample_sharpe, held, stop, &mut Vec::new())
        };
        // The polls of one uninterrupted stage.
        let polls = Arc::new(AtomicUsize::new(0));
        let counter = polls.clone();
        let done = stage(&Stop::never().with_probe(Arc::new(move || {
            counter.fetch_add(1, Ordering::Relaxed);
        })))
        .unwrap();
        assert_eq!(done.report.omega_form, form);
        let total = polls.load(Ordering::Relaxed);
        assert!(
            total >= 4 + done.report.iterations as usize / 2,
            "{form}: {total} polls for {} iterations",
            done.report.iterations
        );
        for at in 1..=total {
            let flag = Arc::new(AtomicBool::new(false));
            let count = Arc::new(AtomicUsize::new(0));
            let (f, c) = (flag.clone(), count.clone());
            let stop = Stop::never().with_flag(flag).with_probe(Arc::new(move || {
                if c.fetch_add(1, Ordering::Relaxed) + 1 == at {
                    f.store(true, Ordering::Relaxed);
                }
            }));
            let outcome = stage(&stop);
            assert!(
                matches!(outcome, Err(EstimateError::Cancelled)),
                "{form}: cancel at poll {at} of {total}: {:?}",
                outcome.err()
            );
            let after = count.load(Ordering::Relaxed) - at;
            assert!(after <= 1, "{form}: {after} polls after the cancel at poll {at}");
        }
        // A slow solver (2 ms a poll), cancelled from another thread.
        let flag = Arc::new(AtomicBool::new(false));
        let late = Arc::new(AtomicUsize::new(0));
        let (f, l) = (flag.clone(), late.clone());
        let stop = Stop::never().with_flag(flag.clone()).with_probe(Arc::new(move || {
            if f.load(Ordering::Relaxed) {
                l.fetch_add(1, Ordering::Relaxed);
            }
            std::thread::sleep(Duration::from_millis(2));
        }));
        let (outcome, freed) = std::thread::scope(|s| {
            let h = s.spawn(|| stage(&stop));
            std::thread::sleep(Duration::from_millis(3 * total as u64 / 2));
            let set = Instant::now();
            flag.store(true, Ordering::Relaxed);
            (h.join().unwrap(), set.elapsed())
        });
        assert!(matches!(outcome, Err(EstimateError::Cancelled)), "{form}: {:?}", outcome.err());
        assert!(late.load(Ordering::Relaxed) <= 2, "{form}: {} polls after the flag", late.load(Ordering::Relaxed));
        println!(
            "{form} form, N = {n}: {total} polls; slow solver freed {:.1} ms after the flag",
            freed.as_secs_f64() * 1e3
        );
    }
}

/// `ComputeWeights` has the memory estimate the backtests have, the stage's
/// working set included: a request whose limits make the stage's estimate
/// exceed `server.max_request_bytes_estimate` is refused before any work,
/// the same request without limits is served; a window over
/// `server.max_stage_cells` with a limit set is refused as too large.
#[test]
fn compute_weights_is_refused_over_its_memory_estimate_and_stage_cells() {
    run(async {
        // 250 factors × 120 periods: the model fit's estimate is about 8 MiB, the
        // stage's (factor form, 48 words a cell) 11 MiB more.
        let server = Server::start(|c| c.server.max_request_bytes_estimate = 12 << 20).await;
        let mut c = server.client().await;
        let panel = synthetic_panel(24, 120, 250);
        let limited = settings_to_proto(&Settings { max_weight: Cap::At(0.1), ..Settings::default() });
        let s = c.compute_weights(request_from_panel(&panel, limited, "bytes")).await.unwrap_err();
        assert_eq!(s.code(), Code::ResourceExhausted, "{}", s.message());
        let info = s.get_details_error_info().unwrap();
        assert_eq!(info.metadata["what"], "bytes");
        assert_eq!(info.metadata["limit_key"], "server.max_request_bytes_estimate");
        assert!(s.message().contains("implementation stage"), "{}", s.message());
        assert_eq!(server.api.computing(), 0, "nothing ran");
        let plain = request_from_panel(&panel, proto::Settings::default(), "plain");
        assert!(c.compute_weights(plain).await.is_ok(), "the model fit alone is within the estimate");
        // 60 × 400 = 24,000 cells over the stage's 20,000 (and within its bytes).
        let wide = synthetic_panel(25, 60, 400);
        let small = Server::start(|c| c.server.max_stage_cells = 20_000).await;
        let mut c2 = small.client().await;
        let s = c2.compute_weights(request_from_panel(&wide, limited, "cells")).await.unwrap_err();
        assert_eq!(s.code(), Code::InvalidArgument, "{}", s.message());
        assert!(s.message().contains("server.max_stage_cells") && s.message().contains("24000"), "{}", s.message());
        let limits = c2.get_service_info(proto::GetServiceInfoRequest {}).await.unwrap().into_inner().limits.unwrap();
        assert_eq!(limits.max_stage_cells, 20_000);
        small.shutdown().await;
        server.shutdown().await;
    });
}

/// A backtest over its fit budget because of bagging and the stage says so:
/// the message counts the draws and the stage's runs and names
/// `bootstrap_draws` among the fields to change.
#[test]
fn an_over_budget_hint_names_the_draws_and_the_stage() {
    run(async {
        let server = Server::start(|c| c.server.max_backtest_fits = 2_000).await;
        let mut c = server.client().await;
        let mut req = backtest_request(240, 6);
        req.step = 6;
        let settings = Settings {
            aggregate: Aggregate::Bagged,
            bootstrap_draws: 100,
            max_weight: Cap::At(0.4),
            ..Settings::default()
        };
        req.settings = Some(settings_to_proto(&settings));
        let (s, _) = refused(&mut c, req).await;
        assert_eq!(s.code(), Code::ResourceExhausted, "{}", s.message());
        let m = s.message();
        assert!(m.contains("30 refit dates") && m.contains("100 bootstrap draws"), "{m}");
        assert!(m.contains("runs of the implementation stage") && m.contains("fewer `bootstrap_draws`"), "{m}");
        server.shutdown().await;
    });
}

/// A backtest stream longer than the server's connection age completes: the
/// age sends GOAWAY, and the grace (which the configuration check keeps at
/// or above the backtest time limit) lets the running stream finish instead
/// of cutting it off as `UNAVAILABLE`.
#[test]
fn a_backtest_longer_than_the_connection_age_completes() {
    run(async {
        let age = Duration::from_millis(30);
        let server = Server::start(|c| {
            c.server.max_connection_age_ms = age.as_millis() as u64;
            c.server.backtest_timeout_ms = 120_000;
            c.server.max_connection_age_grace_ms = 120_000;
        })
        .await;
        let mut c = server.client().await;
        let mut req = backtest_request(240, 12);
        req.step = 1;
        let started = Instant::now();
        let mut stream = c.run_backtest(req).await.unwrap().into_inner();
        let mut result = None;
        while let Some(m) = stream.message().await.unwrap() {
            if let Some(proto::run_backtest_response::Event::Result(r)) = m.event {
                result = Some(r);
            }
        }
        let took = started.elapsed();
        assert!(result.is_some(), "the stream ended without a result");
        // The precondition of the test: the stream outlived the connection age.
        assert!(took > 3 * age, "the backtest took {took:?}, not longer than the connection age {age:?}");
        assert!(good_call(&mut c).await, "the client reconnects after the GOAWAY");
        println!(
            "backtest stream of {:.0} ms over a connection age of {} ms",
            took.as_secs_f64() * 1e3,
            age.as_millis()
        );
        server.shutdown().await;
    });
}

/// One missing return must not abort a backtest: the factor drops out of
/// the windows that contain it, its held position is sold at the next refit
/// even though that sale alone exceeds `max_turnover`, and the strategy
/// counts the `forced-sale-over-turnover` warning instead of failing.
#[test]
fn a_missing_return_in_a_held_factor_is_sold_over_the_turnover_budget() {
    use keelson::evaluate::{self, BacktestSpec};
    let mut panel = keelson::demo::synthetic_panel(21, 150, 8);
    for col in 0..panel.cols {
        panel.returns[100 * panel.cols + col] = if col < 4 { f64::NAN } else { panel.returns[100 * panel.cols + col] };
    }
    let s = Settings { max_weight: Cap::At(0.5), max_turnover: Cap::At(0.02), ..Settings::default() }.check().unwrap();
    let spec = BacktestSpec { window: 60, step: 3, sweep_max_k: Some(0), baselines: false, ..BacktestSpec::default() }
        .check(&panel, &s)
        .unwrap();
    let r = evaluate::run(&panel, &s, &spec, &|_| {}, &keelson::estimator::Stop::never())
        .expect("the backtest finishes despite the forced sales");
    let configured = &r.strategies[0];
    let forced = configured.warnings.iter().find(|w| w.code == "forced-sale-over-turnover");
    assert!(forced.is_some_and(|w| w.refits >= 1), "{:?}", configured.warnings);
}

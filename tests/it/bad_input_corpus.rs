//! The bad-input corpus: every case goes through gRPC (an in-process server,
//! which must keep serving afterwards) and, where a CSV file and `--set`
//! flags can express it, through the `keelson fit` command. Each case gets
//! its documented error — status code, `ErrorInfo` reason and field
//! violation, or exit code — or a documented finite answer with a warning.

use std::process::Command;

use keelson::convert::{request_from_panel, request_into_parts, settings_to_proto_only};
use keelson::demo::{synthetic_panel, to_csv};
use keelson::estimator::Settings;
use keelson::proto::{self, weights_service_client::WeightsServiceClient};
use keelson::service::{self, config::ServerConfig};
use tonic::Code;
use tonic_types::StatusExt as _;

/// What a case must produce.
enum Expect {
    /// A status with this code and ErrorInfo reason, and (when given) this field violation.
    Error(Code, &'static str, Option<&'static str>),
    /// Finite weights, with this warning code when given.
    Finite(Option<&'static str>),
}

struct Case {
    name: &'static str,
    periods: usize,
    factors: usize,
    set: &'static [&'static str],
    edit: fn(&mut proto::ComputeWeightsRequest),
    expect: Expect,
}

fn nothing(_: &mut proto::ComputeWeightsRequest) {}

fn values(r: &mut proto::ComputeWeightsRequest) -> &mut Vec<f64> {
    &mut r.returns.as_mut().expect("returns").values
}

fn cols(r: &proto::ComputeWeightsRequest) -> usize {
    r.returns.as_ref().map_or(0, |m| m.cols as usize)
}

fn column(r: &mut proto::ComputeWeightsRequest, c: usize, f: impl Fn(usize, f64) -> f64) {
    let n = cols(r);
    let rows = r.returns.as_ref().map_or(0, |m| m.rows as usize);
    for t in 0..rows {
        let v = &mut values(r)[t * n + c];
        *v = f(t, *v);
    }
}

use Expect::{Error, Finite};

const INVALID: Code = Code::InvalidArgument;

fn corpus() -> Vec<Case> {
    let c = |name, set, edit, expect| Case { name, periods: 60, factors: 6, set, edit, expect };
    vec![
        c(
            "empty request",
            &[],
            |r| *r = proto::ComputeWeightsRequest::default(),
            Error(INVALID, "NO_FACTORS", Some("factor_names")),
        ),
        Case {
            name: "one-row window",
            periods: 1,
            factors: 6,
            set: &[],
            edit: nothing,
            expect: Error(INVALID, "TOO_FEW_PERIODS", Some("returns")),
        },
        c(
            "rows disagree with values",
            &[],
            |r| r.returns.as_mut().unwrap().rows = 61,
            Error(INVALID, "SHAPE_MISMATCH", Some("returns")),
        ),
        c(
            "cols disagree with names",
            &[],
            |r| {
                r.factor_names.pop();
            },
            Error(INVALID, "SHAPE_MISMATCH", Some("factor_names")),
        ),
        c("extra values", &[], |r| values(r).push(0.01), Error(INVALID, "SHAPE_MISMATCH", Some("returns"))),
        c(
            "NaN under reject",
            &["missing_policy=reject"],
            |r| values(r)[13] = f64::NAN,
            Error(INVALID, "MISSING_VALUE", Some("returns.values[13]")),
        ),
        c("NaN under drop-factor", &[], |r| values(r)[13] = f64::NAN, Finite(Some("factors-excluded"))),
        c(
            "+inf",
            &[],
            |r| values(r)[20] = f64::INFINITY,
            Error(INVALID, "NON_FINITE_VALUE", Some("returns.values[20]")),
        ),
        c(
            "-inf",
            &[],
            |r| values(r)[21] = f64::NEG_INFINITY,
            Error(INVALID, "NON_FINITE_VALUE", Some("returns.values[21]")),
        ),
        c("1e308", &[], |r| values(r)[22] = 1e308, Error(INVALID, "VALUE_OUT_OF_RANGE", Some("returns.values[22]"))),
        c("subnormal value", &[], |r| values(r)[22] = 1e-320, Finite(None)),
        c(
            "market NaN",
            &[],
            |r| r.market_returns[3] = f64::NAN,
            Error(INVALID, "MISSING_VALUE", Some("market_returns[3]")),
        ),
        c(
            "market inf",
            &[],
            |r| r.market_returns[4] = f64::INFINITY,
            Error(INVALID, "NON_FINITE_VALUE", Some("market_returns[4]")),
        ),
        c(
            "market 1e308",
            &[],
            |r| r.market_returns[5] = -1e308,
            Error(INVALID, "VALUE_OUT_OF_RANGE", Some("market_returns[5]")),
        ),
        c(
            "market too short",
            &[],
            |r| {
                r.market_returns.pop();
            },
            Error(INVALID, "SHAPE_MISMATCH", Some("market_returns")),
        ),
        c("constant factor", &[], |r| column(r, 2, |_, _| 0.004), Finite(Some("factors-excluded"))),
        c(
            "near-constant factor",
            &[],
            |r| column(r, 2, |t, _| 0.004 + 1e-14 * (t as f64).sin()),
            Finite(Some("factors-excluded")),
        ),
        c(
            "collinear factors",
            &[],
            |r| {
                let n = cols(r);
                let rows = r.returns.as_ref().unwrap().rows as usize;
                for t in 0..rows {
                    values(r)[t * n + 1] = 2.0 * values(r)[t * n];
                }
            },
            Finite(None),
        ),
        c(
            "factor is the market",
            &[],
            |r| {
                let m = r.market_returns.clone();
                column(r, 3, |t, _| 0.7 * m[t]);
            },
            Finite(Some("factors-excluded")),
        ),
        c(
            "every factor constant",
            &[],
            |r| {
                for v in values(r) {
                    *v = 0.01;
                }
            },
            Error(INVALID, "NO_USABLE_FACTORS", Some("returns")),
        ),
        c(
            "constant market",
            &[],
            |r| {
                for v in &mut r.market_returns {
                    *v = 0.005;
                }
            },
            Error(INVALID, "MARKET_ZERO_VARIANCE", Some("market_returns")),
        ),
        c(
            "duplicate names",
            &[],
            |r| r.factor_names[4] = r.factor_names[2].clone(),
            Error(INVALID, "DUPLICATE_FACTOR_NAME", Some("factor_names[4]")),
        ),
        c(
            "empty name",
            &[],
            |r| r.factor_names[1] = String::new(),
            Error(INVALID, "EMPTY_FACTOR_NAME", Some("factor_names[1]")),
        ),
        c(
            "blank name",
            &[],
            |r| r.factor_names[1] = "   ".into(),
            Error(INVALID, "EMPTY_FACTOR_NAME", Some("factor_names[1]")),
        ),
        c(
            "10 MB name",
            &[],
            |r| r.factor_names[0] = "n".repeat(10 << 20),
            Error(INVALID, "FACTOR_NAME_TOO_LONG", Some("factor_names[0]")),
        ),
        c(
            "unsorted periods",
            &[],
            |r| r.period_labels.swap(8, 9),
            Error(INVALID, "UNSORTED_PERIODS", Some("period_labels[9]")),
        ),
        c(
            "duplicate periods",
            &[],
            |r| r.period_labels[12] = r.period_labels[11].clone(),
            Error(INVALID, "UNSORTED_PERIODS", Some("period_labels[12]")),
        ),
        c(
            "bad period label",
            &[],
            |r| r.period_labels[7] = "July".into(),
            Error(INVALID, "BAD_PERIOD_LABEL", Some("period_labels[7]")),
        ),
        c(
            "labels disagree with rows",
            &[],
            |r| {
                r.period_labels.pop();
            },
            Error(INVALID, "SHAPE_MISMATCH", Some("period_labels")),
        ),
        Case {
            name: "fewer periods than factors",
            periods: 48,
            factors: 70,
            set: &[],
            edit: nothing,
            expect: Finite(Some("short-window")),
        },
        c(
            "components above the window",
            &["method=components", "components=500"],
            nothing,
            Error(INVALID, "TOO_MANY_COMPONENTS", Some("settings.components")),
        ),
        c(
            "components 0",
            &["components=0"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.components")),
        ),
        c("kappa 0", &["kappa=0"], nothing, Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.kappa"))),
        c("kappa negative", &["kappa=-1"], nothing, Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.kappa"))),
        c("kappa NaN", &["kappa=nan"], nothing, Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.kappa"))),
        c(
            "unknown scaling",
            &[],
            |r| r.settings.as_mut().unwrap().scaling = 42,
            Error(INVALID, "INVALID_SETTING", Some("settings.scaling")),
        ),
        c(
            "unknown criterion",
            &[],
            |r| r.settings.as_mut().unwrap().cv_criterion = -3,
            Error(INVALID, "INVALID_SETTING", Some("settings.cv_criterion")),
        ),
        c(
            "unknown normalization",
            &[],
            |r| r.settings.as_mut().unwrap().normalization = 9,
            Error(INVALID, "INVALID_SETTING", Some("settings.normalization")),
        ),
        c(
            "unknown missing policy",
            &[],
            |r| r.settings.as_mut().unwrap().missing_policy = 7,
            Error(INVALID, "INVALID_SETTING", Some("settings.missing_policy")),
        ),
        c(
            "unknown method",
            &[],
            |r| r.settings.as_mut().unwrap().method = 99,
            Error(INVALID, "INVALID_SETTING", Some("settings.method")),
        ),
        c("folds 100", &["folds=100"], nothing, Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.folds"))),
        c("folds beyond the window", &["folds=10"], nothing, Error(INVALID, "TOO_FEW_PERIODS", Some("returns"))),
        c(
            "negative volatility target",
            &["target_volatility=-0.1"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.target_volatility")),
        ),
        c(
            "zero periods per year",
            &["periods_per_year=0"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.periods_per_year")),
        ),
        c(
            "kappa grid reversed",
            &["kappa_grid_min=5", "kappa_grid_max=1"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.kappa_grid_max")),
        ),
        c(
            "previous weight inf",
            &[],
            |r| {
                r.previous_weights =
                    vec![proto::FactorWeight { factor: "x".into(), weight: f64::INFINITY, ..Default::default() }]
            },
            Error(INVALID, "NON_FINITE_VALUE", Some("previous_weights[0]")),
        ),
        c(
            "previous weights duplicated",
            &[],
            |r| {
                let w = proto::FactorWeight { factor: r.factor_names[0].clone(), weight: 0.1, ..Default::default() };
                r.previous_weights = vec![w.clone(), w];
            },
            Error(INVALID, "DUPLICATE_FACTOR_NAME", Some("previous_weights[1]")),
        ),
        c(
            "returns in percent",
            &[],
            |r| {
                for v in values(r) {
                    *v *= 100.0;
                }
                for v in &mut r.market_returns {
                    *v *= 100.0;
                }
            },
            Finite(Some("return-scale")),
        ),
        c(
            "1e-8 volatilities",
            &[],
            |r| {
                for v in values(r) {
                    *v *= 1e-7;
                }
                for v in &mut r.market_returns {
                    *v *= 1e-7;
                }
            },
            Finite(Some("return-scale")),
        ),
        c(
            "GLS criterion without enough periods",
            &["cv_criterion=pricing-r2-gls"],
            |r| {
                // Widen to 30 factors so that a 20-period held-out block cannot invert its covariance.
                let p = synthetic_panel(5, 60, 30);
                *r = request_from_panel(&p, r.settings.unwrap_or_default(), "");
            },
            Error(INVALID, "CV_CRITERION_UNAVAILABLE", Some("settings.cv_criterion")),
        ),
        c(
            "L1 penalty removes everything",
            &["l1_penalty=1e6"],
            nothing,
            Error(Code::FailedPrecondition, "NO_FINITE_CV_SCORE", None),
        ),
        c(
            "every factor partly missing",
            &[],
            |r| {
                let n = cols(r);
                for c in 0..n {
                    values(r)[c * n + c] = f64::NAN;
                }
            },
            Error(INVALID, "NO_USABLE_FACTORS", Some("returns")),
        ),
        c(
            "a factor entirely missing",
            &[],
            |r| column(r, 5, |_, _| f64::NAN),
            Error(INVALID, "ALL_MISSING", Some("returns.cols[5]")),
        ),
        c(
            "max_weight 0",
            &["max_weight=0"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.max_weight")),
        ),
        c(
            "max_weight negative",
            &["max_weight=-0.1"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.max_weight")),
        ),
        c(
            "max_gross NaN",
            &["max_gross=nan"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.max_gross")),
        ),
        c(
            "max_turnover infinite",
            &["max_turnover=inf"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.max_turnover")),
        ),
        c(
            "max_market_weight 0",
            &["max_market_weight=0"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.max_market_weight")),
        ),
        c("cost NaN", &["cost_bps=nan"], nothing, Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.cost_bps"))),
        c(
            "cost negative",
            &["cost_bps=-5"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.cost_bps")),
        ),
        c(
            "holding below one period",
            &["holding_periods=0.5"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.holding_periods")),
        ),
        c(
            "half-life below one period",
            &["volatility_halflife=0.5"],
            nothing,
            Error(INVALID, "SETTING_OUT_OF_RANGE", Some("settings.volatility_halflife")),
        ),
        c(
            "a limit switched off with false",
            &[],
            |r| {
                r.settings.as_mut().unwrap().max_weight_choice =
                    Some(proto::settings::MaxWeightChoice::MaxWeightOff(false));
            },
            Error(INVALID, "INVALID_SETTING", Some("settings.max_weight_off")),
        ),
        c(
            "limits no portfolio meets",
            &["max_weight=0.1", "max_turnover=0.05"],
            |r| {
                // Held far above the cap, with a turnover budget too small to sell down to it.
                let w = proto::FactorWeight { factor: r.factor_names[0].clone(), weight: 0.5, ..Default::default() };
                r.previous_weights = vec![w];
            },
            Error(Code::FailedPrecondition, "CONSTRAINTS_INFEASIBLE", None),
        ),
        c(
            "previous weight 1e7",
            &[],
            |r| {
                r.previous_weights =
                    vec![proto::FactorWeight { factor: r.factor_names[1].clone(), weight: 1e7, ..Default::default() }]
            },
            Error(INVALID, "WEIGHT_OUT_OF_RANGE", Some("previous_weights[0]")),
        ),
        c(
            "market named like a factor",
            &[],
            |r| r.market_name = r.factor_names[2].clone(),
            Error(INVALID, "DUPLICATE_FACTOR_NAME", Some("market_name")),
        ),
        c(
            "huge but valid scale",
            &[],
            |r| {
                for v in values(r) {
                    *v *= 1000.0;
                }
            },
            Finite(Some("return-scale")),
        ),
    ]
}

fn build(case: &Case) -> (proto::ComputeWeightsRequest, Settings) {
    let mut s = Settings::default();
    let mut keys = Vec::new();
    for kv in case.set {
        let (k, v) = kv.split_once('=').expect("KEY=VALUE");
        s.set(k, v).expect("the corpus sets known keys");
        keys.push(*Settings::KEYS.iter().find(|x| **x == k).expect("a key"));
    }
    let panel = synthetic_panel(3, case.periods, case.factors);
    let mut req = request_from_panel(&panel, settings_to_proto_only(&s, &keys), case.name);
    (case.edit)(&mut req);
    (req, s)
}

#[test]
fn corpus_over_grpc() {
    let cases = corpus();
    assert!(cases.len() >= 40, "the corpus has {} cases", cases.len());
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
    rt.block_on(async {
        let mut c = ServerConfig::default();
        c.server.address = "127.0.0.1:0".into();
        c.metrics.address = String::new();
        let config = c.check().unwrap();
        let listener = tokio::net::TcpListener::bind(config.address).await.unwrap();
        let addr = listener.local_addr().unwrap();
        let (tx, rx) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(service::serve(config, listener, async {
            let _ = rx.await;
        }));
        let mut client =
            WeightsServiceClient::connect(format!("http://{addr}")).await.unwrap().max_encoding_message_size(64 << 20);
        let good = request_from_panel(&synthetic_panel(1, 60, 5), proto::Settings::default(), "good");
        for case in &cases {
            let (req, _) = build(case);
            let got = client.compute_weights(req).await;
            match (&case.expect, got) {
                (Error(code, reason, field), Err(s)) => {
                    assert_eq!(s.code(), *code, "{}: {}", case.name, s.message());
                    let info = s.get_details_error_info().unwrap_or_else(|| panic!("{}: no ErrorInfo", case.name));
                    assert_eq!(info.reason, *reason, "{}: {}", case.name, s.message());
                    if let Some(f) = field {
                        let br = s.get_details_bad_request().unwrap_or_else(|| panic!("{}: no BadRequest", case.name));
                        assert_eq!(br.field_violations[0].field, *f, "{}: {}", case.name, s.message());
                    }
                }
                (Finite(warning), Ok(resp)) => {
                    let r = resp.into_inner();
                    assert!(
                        r.weights.iter().all(|w| w.weight.is_finite()) && r.market_weight.is_finite(),
                        "{}",
                        case.name
                    );
                    let d = r.diagnostics.unwrap();
                    let rc: f64 = r.weights.iter().map(|w| w.risk_contribution).sum();
                    assert!((rc - 1.0).abs() < 1e-9, "{}: risk contributions sum to {rc}", case.name);
                    if let Some(w) = warning {
                        assert!(
                            d.warnings.iter().any(|x| x.code == *w),
                            "{}: no {w} warning in {:?}",
                            case.name,
                            d.warnings
                        );
                    }
                }
                (Error(..), Ok(_)) => panic!("{}: expected an error, got weights", case.name),
                (Finite(_), Err(s)) => panic!("{}: expected weights, got {:?}: {}", case.name, s.code(), s.message()),
            }
            assert!(client.compute_weights(good.clone()).await.is_ok(), "server stopped serving after {}", case.name);
        }
        let _ = tx.send(());
        server.await.unwrap().unwrap();
    });
}

#[test]
fn corpus_through_the_command_line() {
    let dir = std::env::temp_dir().join(format!("keelson-corpus-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let mut ran = 0;
    for case in corpus() {
        let (req, _) = build(&case);
        if req.settings.as_ref().is_some_and(|s| {
            s.scaling > 5
                || s.scaling < 0
                || s.cv_criterion < 0
                || s.normalization > 3
                || s.missing_policy > 2
                || s.method > 5
                || matches!(s.max_weight_choice, Some(proto::settings::MaxWeightChoice::MaxWeightOff(false)))
        }) {
            continue; // enum numbers exist only on the wire
        }
        let (panel, _, _) = request_into_parts(req);
        let representable = panel.rows > 0
            && panel.returns.len() == panel.rows * panel.cols
            && panel.period_labels.len() == panel.rows
            && panel.factor_names.len() == panel.cols
            && panel.market.as_ref().is_some_and(|m| m.len() == panel.rows)
            && panel.factor_names.iter().all(|n| !n.trim().is_empty() && n.len() < 1000 && !n.contains(','))
            && panel.market_name.as_deref().is_none_or(|m| m == keelson::demo::MARKET_COLUMN);
        if !representable {
            continue;
        }
        let csv = dir.join(format!("{ran}.csv"));
        std::fs::write(&csv, to_csv(&panel)).unwrap();
        let mut args =
            vec!["fit".to_owned(), "--returns".into(), csv.display().to_string(), "--market".into(), "MKT".into()];
        if !panel.previous_weights.is_empty() {
            let held = dir.join(format!("{ran}-held.csv"));
            let rows: String = panel.previous_weights.iter().map(|(n, w)| format!("{n},{w:e}\n")).collect();
            std::fs::write(&held, format!("factor,weight\n{rows}")).unwrap();
            args.extend(["--previous-weights".to_owned(), held.display().to_string()]);
        }
        for kv in case.set {
            args.push("--set".into());
            args.push((*kv).into());
        }
        let o = Command::new(env!("CARGO_BIN_EXE_keelson")).args(&args).output().unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(!err.contains("panicked"), "{}: {err}", case.name);
        let want = match case.expect {
            Finite(_) => 0,
            Error(_, "SETTING_OUT_OF_RANGE" | "INVALID_SETTING", _) => 2,
            Error(..) => 1,
        };
        assert_eq!(o.status.code(), Some(want), "{}: {err}", case.name);
        if let Error(_, "CONSTRAINTS_INFEASIBLE", _) = case.expect {
            assert!(err.contains("infeasible") && err.contains("max_turnover"), "{}: {err}", case.name);
        }
        if want == 1 && err.contains(", row ") {
            assert!(err.contains("line "), "{}: the file position is named: {err}", case.name);
        }
        ran += 1;
    }
    assert!(ran >= 30, "only {ran} cases were representable as CSV");
}

/// A backtest option out of range: the wire edit, the command-line flags that
/// say the same (when the command line can), and the field violation.
struct BacktestCase {
    name: &'static str,
    edit: fn(&mut proto::RunBacktestRequest),
    flags: &'static [&'static str],
    field: &'static str,
    reason: &'static str,
}

fn backtest_corpus() -> Vec<BacktestCase> {
    let c = |name, edit, flags, field| BacktestCase { name, edit, flags, field, reason: "INVALID_BACKTEST" };
    vec![
        c("window 4e9", |r| r.window = 4_000_000_000, &["--window", "4000000000"], "window"),
        c("window = the history", |r| r.window = 200, &["--window", "200"], "window"),
        c("window below min_periods", |r| r.window = 10, &["--window", "10"], "window"),
        c("step 4e9", |r| r.step = 4_000_000_000, &["--step", "4000000000"], "step"),
        c("step past the out-of-sample span", |r| r.step = 141, &["--step", "141"], "step"),
        c("sweep_max_k 4e9", |r| r.sweep_max_k = Some(4_000_000_000), &["--sweep-max-k", "4000000000"], "sweep_max_k"),
        c("sweep_max_k above the factors", |r| r.sweep_max_k = Some(7), &["--sweep-max-k", "7"], "sweep_max_k"),
        c(
            "sweep_max_k above max_components",
            |r| {
                r.sweep_max_k = Some(5);
                r.settings.get_or_insert_default().max_components = Some(4);
            },
            &["--sweep-max-k", "5", "--set", "max_components=4"],
            "sweep_max_k",
        ),
        c("cost_bps NaN", |r| r.cost_bps = Some(f64::NAN), &["--cost-bps", "NaN"], "cost_bps"),
        c("cost_bps inf", |r| r.cost_bps = Some(f64::INFINITY), &["--cost-bps", "inf"], "cost_bps"),
        c("cost_bps negative", |r| r.cost_bps = Some(-1.0), &["--cost-bps=-1"], "cost_bps"),
        c("cost_bps above 100%", |r| r.cost_bps = Some(10_001.0), &["--cost-bps", "10001"], "cost_bps"),
        c(
            "cer_risk_aversion negative",
            |r| r.cer_risk_aversion = Some(-1.0),
            &["--cer-risk-aversion=-1"],
            "cer_risk_aversion",
        ),
        c(
            "cer_risk_aversion zero",
            |r| r.cer_risk_aversion = Some(0.0),
            &["--cer-risk-aversion", "0"],
            "cer_risk_aversion",
        ),
        c(
            "cer_risk_aversion NaN",
            |r| r.cer_risk_aversion = Some(f64::NAN),
            &["--cer-risk-aversion", "NaN"],
            "cer_risk_aversion",
        ),
        c(
            "cer_risk_aversion 1e300",
            |r| r.cer_risk_aversion = Some(1e300),
            &["--cer-risk-aversion", "1e300"],
            "cer_risk_aversion",
        ),
        c(
            "an unknown benchmark",
            |r| r.benchmark_sets = vec![proto::BenchmarkSet { names: vec!["nope".into()] }],
            &["--benchmarks", "nope"],
            "benchmark_sets[0].names[0]",
        ),
        c(
            "a factor twice in a set",
            |r| r.benchmark_sets = vec![proto::BenchmarkSet { names: vec!["moss_value".into(), "moss_value".into()] }],
            &["--benchmarks", "moss_value,moss_value"],
            "benchmark_sets[0].names[1]",
        ),
        c(
            "the market twice in a set",
            |r| r.benchmark_sets = vec![proto::BenchmarkSet { names: vec!["market".into(), "market".into()] }],
            &["--benchmarks", "MKT,market"],
            "benchmark_sets[0].names[1]",
        ),
        c(
            "an empty benchmark set",
            |r| r.benchmark_sets = vec![proto::BenchmarkSet { names: vec![] }],
            &["--benchmarks", ","],
            "benchmark_sets[0].names",
        ),
        c(
            "65 benchmark sets",
            |r| r.benchmark_sets = vec![proto::BenchmarkSet { names: vec!["moss_value".into()] }; 65],
            &[],
            "benchmark_sets",
        ),
        // Found by fuzzing: the last period is only ever held, never in a window.
        BacktestCase {
            name: "a missing market return in a holding period",
            edit: |r| *r.market_returns.last_mut().unwrap() = f64::NAN,
            flags: &[],
            field: "market_returns[199]",
            reason: "MISSING_VALUE",
        },
        BacktestCase {
            name: "an infinite return in the last period",
            edit: |r| *r.returns.as_mut().unwrap().values.last_mut().unwrap() = f64::INFINITY,
            flags: &[],
            field: "returns.values[1199]",
            reason: "NON_FINITE_VALUE",
        },
        BacktestCase {
            name: "a return of 1e7 in the last period",
            edit: |r| r.returns.as_mut().unwrap().values[1194] = 1e7,
            flags: &[],
            field: "returns.values[1194]",
            reason: "VALUE_OUT_OF_RANGE",
        },
        BacktestCase {
            name: "a backtest setting out of range",
            edit: |r| r.settings.get_or_insert_default().folds = Some(1),
            flags: &["--set", "folds=1"],
            field: "settings.folds",
            reason: "SETTING_OUT_OF_RANGE",
        },
        BacktestCase {
            name: "components_auto = false",
            edit: |r| {
                r.settings.get_or_insert_default().components_choice =
                    Some(proto::settings::ComponentsChoice::ComponentsAuto(false));
            },
            flags: &[],
            field: "settings.components_auto",
            reason: "INVALID_SETTING",
        },
    ]
}

/// A valid 200-period, 6-factor backtest request: 120-period window, yearly refits, no baselines.
fn backtest_base() -> (keelson::estimator::ReturnPanel, proto::RunBacktestRequest) {
    let panel = synthetic_panel(5, 200, 6);
    let req = proto::RunBacktestRequest {
        window: 60,
        step: 12,
        skip_baselines: true,
        ..keelson::convert::backtest_request_from_panel(&panel, proto::Settings::default(), "bt")
    };
    (panel, req)
}

#[test]
fn backtest_corpus_over_grpc() {
    let cases = backtest_corpus();
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
    rt.block_on(async {
        let server = keelson::service::loopback::LoopbackServer::start(|_| {}).await.unwrap();
        let mut client = WeightsServiceClient::connect(server.url()).await.unwrap();
        let (_, base) = backtest_base();
        assert!(client.run_backtest(base.clone()).await.is_ok(), "the base request is valid");
        let good = request_from_panel(&synthetic_panel(1, 60, 5), proto::Settings::default(), "good");
        let mut slowest = std::time::Duration::ZERO;
        for case in &cases {
            let mut req = base.clone();
            (case.edit)(&mut req);
            let started = std::time::Instant::now();
            // Every option is checked before the response stream starts.
            let s = client.run_backtest(req).await.err().unwrap_or_else(|| panic!("{}: accepted", case.name));
            slowest = slowest.max(started.elapsed());
            assert_eq!(s.code(), INVALID, "{}: {}", case.name, s.message());
            assert_eq!(s.get_details_error_info().unwrap().reason, case.reason, "{}: {}", case.name, s.message());
            let br = s.get_details_bad_request().unwrap_or_else(|| panic!("{}: no BadRequest", case.name));
            assert_eq!(br.field_violations[0].field, case.field, "{}: {}", case.name, s.message());
            assert!(client.compute_weights(good.clone()).await.is_ok(), "server stopped serving after {}", case.name);
        }
        println!("{} backtest cases; slowest refusal {:.1} ms", cases.len(), slowest.as_secs_f64() * 1e3);
        server.shutdown().await.unwrap();
    });
}

#[test]
fn backtest_corpus_through_the_command_line() {
    let dir = std::env::temp_dir().join(format!("keelson-bt-corpus-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let (panel, _) = backtest_base();
    let csv = dir.join("history.csv");
    std::fs::write(&csv, to_csv(&panel)).unwrap();
    let out = dir.join("out");
    let mut ran = 0;
    for case in backtest_corpus().iter().filter(|c| !c.flags.is_empty()) {
        let o = Command::new(env!("CARGO_BIN_EXE_keelson"))
            .args(["backtest", "--returns", csv.to_str().unwrap(), "--market", "MKT", "--no-baselines"])
            .args(["--window", "60", "--step", "12", "--out", out.to_str().unwrap()])
            .args(case.flags)
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(!err.contains("panicked"), "{}: {err}", case.name);
        assert_eq!(o.status.code(), Some(2), "{}: {err}", case.name);
        let flag = case.flags[0].split('=').next().unwrap();
        let named = if case.field.starts_with("settings.") { case.field.trim_start_matches("settings.") } else { flag };
        assert!(err.contains(named), "{}: the error names {named}: {err}", case.name);
        assert!(!out.join("report.html").exists(), "{}: nothing was written", case.name);
        ran += 1;
    }
    assert!(ran >= 20, "only {ran} backtest cases through the command line");
}

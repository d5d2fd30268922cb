//! The gRPC service in-process on 127.0.0.1:0 with tonic clients: results
//! equal to the library bit for bit, health, reflection, typed errors with
//! field violations, size limits, deadlines, load shedding and drain.

use std::future::Future;
use std::time::Duration;

use keelson::convert::{request_from_panel, weight_set_to_proto};
use keelson::demo::synthetic_panel;
use keelson::estimator::{self, ReturnPanel, Settings};
use keelson::proto::{self, weights_service_client::WeightsServiceClient};
use prost::Message as _;
use tonic::Code;
use tonic::transport::Channel;
use tonic_types::StatusExt as _;

use crate::common::{Server, eventually};

fn request(panel: &ReturnPanel, settings: proto::Settings, id: &str) -> proto::ComputeWeightsRequest {
    request_from_panel(panel, settings, id)
}

/// A request that takes seconds of CPU: 2000 factors × 1000 periods with cross-validation.
/// A request that computes for a while (four 1000 × 1000 Gram eigensolves) but
/// answers briefly (five components): the drain test must not depend on how
/// fast a multi-megabyte body flushes while connections close.
fn slow_request() -> proto::ComputeWeightsRequest {
    let settings = proto::Settings {
        method: proto::Method::Components.into(),
        components_choice: Some(proto::settings::ComponentsChoice::Components(5)),
        kappa_choice: Some(proto::settings::KappaChoice::Kappa(1.0)),
        ..proto::Settings::default()
    };
    request(&synthetic_panel(77, 1000, 2000), settings, "slow")
}

fn run<F: Future>(f: F) -> F::Output {
    tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap().block_on(f)
}

#[test]
fn weights_over_grpc_equal_the_library_bit_for_bit() {
    run(async {
        let server = Server::start(|_| {}).await;
        let mut c = server.client().await;
        let panel = synthetic_panel(5, 120, 50);
        for scaling in [proto::Scaling::Unspecified, proto::Scaling::RiskPremium, proto::Scaling::Covariance] {
            let s = proto::Settings { scaling: scaling.into(), ..Default::default() };
            let resp = c.compute_weights(request(&panel, s, "req-7")).await.unwrap().into_inner();
            let settings = keelson::convert::settings_from_proto(&s, &Settings::default()).unwrap().check().unwrap();
            let local = weight_set_to_proto(&estimator::fit(&panel, &settings).unwrap(), "req-7");
            assert_eq!(resp.encode_to_vec(), local.encode_to_vec(), "{scaling:?}");
            assert_eq!(resp.request_id, "req-7");
        }
        // SPEC §11 over the wire: the scaling chosen by cross-validation, the ensemble, and the
        // bootstrap with bagging, each byte-identical to the library.
        let choosing = [
            proto::Settings {
                method: proto::Method::Components.into(),
                scaling: proto::Scaling::Auto.into(),
                ..Default::default()
            },
            proto::Settings { method: proto::Method::Ensemble.into(), ..Default::default() },
            proto::Settings {
                bootstrap_draws: Some(20),
                seed: Some(5),
                aggregate: proto::Aggregate::Bagged.into(),
                ..Default::default()
            },
        ];
        for s in choosing {
            let resp = c.compute_weights(request(&panel, s, "req-8")).await.unwrap().into_inner();
            let settings = keelson::convert::settings_from_proto(&s, &Settings::default()).unwrap().check().unwrap();
            let local = weight_set_to_proto(&estimator::fit(&panel, &settings).unwrap(), "req-8");
            assert_eq!(resp.encode_to_vec(), local.encode_to_vec(), "{s:?}");
            let d = resp.diagnostics.unwrap();
            assert!(d.chosen_scaling != 0 || !d.scaling_scores.is_empty() || d.bootstrap.is_some());
        }
        let info = c.get_service_info(proto::GetServiceInfoRequest {}).await.unwrap().into_inner();
        assert_eq!(info.estimator_version, estimator::ESTIMATOR_VERSION);
        assert_eq!(info.limits.unwrap().max_message_bytes, 64 << 20);
        assert_eq!(info.default_settings.unwrap().folds, Some(3));
        server.shutdown().await;
    });
}

#[test]
fn server_default_settings_apply_to_unset_fields() {
    run(async {
        let server = Server::start(|c| c.estimator.scaling = estimator::Scaling::Covariance).await;
        let mut c = server.client().await;
        let panel = synthetic_panel(6, 96, 12);
        let resp = c.compute_weights(request(&panel, proto::Settings::default(), "")).await.unwrap().into_inner();
        let eff = resp.diagnostics.unwrap().effective_settings.unwrap();
        assert_eq!(eff.scaling(), proto::Scaling::Covariance);
        server.shutdown().await;
    });
}

#[test]
fn health_and_reflection_answer() {
    use tonic_health::pb::{HealthCheckRequest, health_check_response::ServingStatus, health_client::HealthClient};
    run(async {
        let server = Server::start(|_| {}).await;
        let mut h = HealthClient::new(server.channel().await);
        for name in ["", "liveness", "readiness", "keelson.v1.WeightsService"] {
            let r = h.check(HealthCheckRequest { service: name.into() }).await.unwrap().into_inner();
            assert_eq!(r.status(), ServingStatus::Serving, "{name:?}");
        }
        let e = h.check(HealthCheckRequest { service: "nope".into() }).await.unwrap_err();
        assert_eq!(e.code(), Code::NotFound);

        {
            use tonic_reflection::pb::v1::{
                ServerReflectionRequest, server_reflection_client::ServerReflectionClient,
                server_reflection_request::MessageRequest, server_reflection_response::MessageResponse,
            };
            let mut r = ServerReflectionClient::new(server.channel().await);
            let req = ServerReflectionRequest {
                host: String::new(),
                message_request: Some(MessageRequest::ListServices(String::new())),
            };
            let mut stream = r.server_reflection_info(tokio_stream_once(req)).await.unwrap().into_inner();
            let msg = stream.message().await.unwrap().unwrap();
            let Some(MessageResponse::ListServicesResponse(list)) = msg.message_response else { panic!("v1: {msg:?}") };
            let names: Vec<String> = list.service.into_iter().map(|s| s.name).collect();
            assert!(names.contains(&"keelson.v1.WeightsService".to_owned()), "{names:?}");
            assert!(names.contains(&"grpc.health.v1.Health".to_owned()), "{names:?}");
        }
        {
            use tonic_reflection::pb::v1alpha::{
                ServerReflectionRequest, server_reflection_client::ServerReflectionClient,
                server_reflection_request::MessageRequest, server_reflection_response::MessageResponse,
            };
            let mut r = ServerReflectionClient::new(server.channel().await);
            let req = ServerReflectionRequest {
                host: String::new(),
                message_request: Some(MessageRequest::FileContainingSymbol("keelson.v1.WeightsService".into())),
            };
            let mut stream = r.server_reflection_info(tokio_stream_once(req)).await.unwrap().into_inner();
            let msg = stream.message().await.unwrap().unwrap();
            let Some(MessageResponse::FileDescriptorResponse(fd)) = msg.message_response else {
                panic!("v1alpha: {msg:?}")
            };
            assert!(!fd.file_descriptor_proto.is_empty());
        }
        server.shutdown().await;

        let off = Server::start(|c| c.server.reflection = false).await;
        use tonic_reflection::pb::v1::{ServerReflectionRequest, server_reflection_client::ServerReflectionClient};
        let mut r = ServerReflectionClient::new(off.channel().await);
        let e = r.server_reflection_info(tokio_stream_once(ServerReflectionRequest::default())).await.unwrap_err();
        assert_eq!(e.code(), Code::Unimplemented);
        off.shutdown().await;
    });
}

/// A one-message request stream.
fn tokio_stream_once<T: Send + 'static>(item: T) -> impl tonic::codegen::tokio_stream::Stream<Item = T> + Send {
    tonic::codegen::tokio_stream::iter(vec![item])
}

/// Sends `req` and checks INVALID_ARGUMENT with a field violation on `field`
/// and an ErrorInfo with `reason`; then checks the server still serves.
async fn expect_invalid(
    c: &mut WeightsServiceClient<Channel>,
    req: proto::ComputeWeightsRequest,
    field: &str,
    reason: &str,
) {
    let e = c.compute_weights(req).await.expect_err(field);
    assert_eq!(e.code(), Code::InvalidArgument, "{field}: {}", e.message());
    let br = e.get_details_bad_request().unwrap_or_else(|| panic!("{field}: no BadRequest detail"));
    assert_eq!(br.field_violations[0].field, field, "{}", e.message());
    let info = e.get_details_error_info().expect("ErrorInfo detail");
    assert_eq!(info.reason, reason, "{field}");
    assert_eq!(info.domain, "keelson.v1");
    let ok = c.compute_weights(request(&synthetic_panel(1, 60, 5), proto::Settings::default(), "")).await;
    assert!(ok.is_ok(), "server stopped serving after {field}");
}

#[test]
fn bad_input_returns_invalid_argument_with_field_violations() {
    run(async {
        let server = Server::start(|c| c.server.max_cells = 100_000).await;
        let mut c = server.client().await;
        let good = synthetic_panel(2, 60, 5);
        let base = || request(&good, proto::Settings::default(), "");

        let mut r = base();
        r.returns.as_mut().unwrap().values.pop();
        expect_invalid(&mut c, r, "returns", "SHAPE_MISMATCH").await;

        let mut r = base();
        r.returns.as_mut().unwrap().values[3 * 5 + 2] = f64::INFINITY;
        let e = c.compute_weights(r.clone()).await.unwrap_err();
        let meta = e.get_details_error_info().unwrap().metadata;
        assert_eq!((meta["row"].as_str(), meta["column"].as_str()), ("3", "2"));
        assert!(e.message().contains("row 3") && e.message().contains("column 2"), "{}", e.message());
        expect_invalid(&mut c, r, "returns.values[17]", "NON_FINITE_VALUE").await;

        let mut r = base();
        r.factor_names[3] = r.factor_names[1].clone();
        expect_invalid(&mut c, r, "factor_names[3]", "DUPLICATE_FACTOR_NAME").await;

        let mut r = base();
        r.factor_names[0] = String::new();
        expect_invalid(&mut c, r, "factor_names[0]", "EMPTY_FACTOR_NAME").await;

        let mut r = base();
        r.factor_names[0] = "x".repeat(10 << 20);
        expect_invalid(&mut c, r, "factor_names[0]", "FACTOR_NAME_TOO_LONG").await;

        let mut r = base();
        r.period_labels.swap(5, 6);
        expect_invalid(&mut c, r, "period_labels[6]", "UNSORTED_PERIODS").await;

        let mut r = base();
        r.market_returns[4] = f64::NAN;
        expect_invalid(&mut c, r, "market_returns[4]", "MISSING_VALUE").await;

        let mut r = base();
        r.returns.as_mut().unwrap().values[7] = f64::NAN;
        r.settings =
            Some(proto::Settings { missing_policy: proto::MissingPolicy::Reject.into(), ..Default::default() });
        expect_invalid(&mut c, r, "returns.values[7]", "MISSING_VALUE").await;

        let mut r = base();
        for t in 0..60 {
            r.returns.as_mut().unwrap().values[t * 5 + 4] = f64::NAN;
        }
        expect_invalid(&mut c, r, "returns.cols[4]", "ALL_MISSING").await;

        let short = synthetic_panel(2, 20, 5);
        expect_invalid(&mut c, request(&short, proto::Settings::default(), ""), "returns", "TOO_FEW_PERIODS").await;

        let mut r = base();
        r.settings = Some(proto::Settings { scaling: 99, ..Default::default() });
        expect_invalid(&mut c, r, "settings.scaling", "INVALID_SETTING").await;

        let mut r = base();
        r.settings = Some(proto::Settings { folds: Some(1), ..Default::default() });
        expect_invalid(&mut c, r, "settings.folds", "SETTING_OUT_OF_RANGE").await;

        let mut r = base();
        r.settings = Some(proto::Settings {
            kappa_choice: Some(proto::settings::KappaChoice::Kappa(f64::NAN)),
            ..Default::default()
        });
        expect_invalid(&mut c, r, "settings.kappa", "SETTING_OUT_OF_RANGE").await;

        let mut r = base();
        r.settings = Some(proto::Settings {
            method: proto::Method::Components.into(),
            components_choice: Some(proto::settings::ComponentsChoice::Components(9)),
            ..Default::default()
        });
        expect_invalid(&mut c, r, "settings.components", "TOO_MANY_COMPONENTS").await;

        // A fixed K means nothing to the ridge on every component: said, not ignored.
        let mut r = base();
        r.settings = Some(proto::Settings {
            method: proto::Method::KnsRidge.into(),
            components_choice: Some(proto::settings::ComponentsChoice::Components(3)),
            ..Default::default()
        });
        expect_invalid(&mut c, r, "settings.components", "INVALID_SETTING").await;

        let big = synthetic_panel(2, 600, 200);
        expect_invalid(&mut c, request(&big, proto::Settings::default(), ""), "returns", "REQUEST_TOO_LARGE").await;

        expect_invalid(&mut c, proto::ComputeWeightsRequest::default(), "factor_names", "NO_FACTORS").await;
        server.shutdown().await;
    });
}

#[test]
fn oversize_message_is_rejected() {
    run(async {
        let server = Server::start(|c| c.server.max_message_bytes = 64 * 1024).await;
        let mut c = server.client().await;
        // 120 × 50 doubles ≈ 48 KiB of values fits; 240 × 50 ≈ 96 KiB does not.
        assert!(c.compute_weights(request(&synthetic_panel(3, 120, 50), proto::Settings::default(), "")).await.is_ok());
        let e =
            c.compute_weights(request(&synthetic_panel(3, 240, 50), proto::Settings::default(), "")).await.unwrap_err();
        // tonic reports a decoded message above the limit as OUT_OF_RANGE.
        assert_eq!(e.code(), Code::OutOfRange, "{}", e.message());
        assert!(e.message().contains("too large"), "{}", e.message());
        server.shutdown().await;
    });
}

#[test]
fn deadline_stops_the_computation() {
    run(async {
        let server = Server::start(|c| c.server.workers = 1).await;
        let mut c = server.client().await;
        let mut req = tonic::Request::new(slow_request());
        req.set_timeout(Duration::from_millis(200));
        let e = c.compute_weights(req).await.unwrap_err();
        assert!(matches!(e.code(), Code::DeadlineExceeded | Code::Cancelled), "{e:?}");
        // The blocking computation must notice and end, freeing its worker, rather than run to completion.
        assert!(eventually(1000, || server.api.computing() == 0).await, "computation still running");
        assert_eq!(server.api.stopped_early(), 1, "the computation did not stop early");
        assert!(c.compute_weights(request(&synthetic_panel(4, 60, 5), proto::Settings::default(), "")).await.is_ok());
        server.shutdown().await;
    });
}

#[test]
fn client_cancellation_stops_the_computation() {
    run(async {
        let server = Server::start(|c| c.server.workers = 1).await;
        let mut c = server.client().await;
        let call = tokio::spawn(async move { c.compute_weights(slow_request()).await });
        assert!(eventually(2000, || server.api.computing() == 1).await, "slow request never started");
        call.abort();
        assert!(eventually(1000, || server.api.computing() == 0).await, "computation still running after cancel");
        assert_eq!(server.api.stopped_early(), 1);
        server.shutdown().await;
    });
}

#[test]
fn excess_concurrent_requests_are_shed() {
    run(async {
        let server = Server::start(|c| {
            c.server.max_in_flight = 1;
            c.server.workers = 1;
        })
        .await;
        let mut slow_client = server.client().await;
        let slow = tokio::spawn(async move { slow_client.compute_weights(slow_request()).await });
        assert!(eventually(2000, || server.api.in_flight() == 1).await);
        let mut c = server.client().await;
        let e =
            c.compute_weights(request(&synthetic_panel(4, 60, 5), proto::Settings::default(), "")).await.unwrap_err();
        assert_eq!(e.code(), Code::ResourceExhausted);
        assert_eq!(e.get_details_error_info().unwrap().reason, "OVERLOADED");
        assert!(slow.await.unwrap().is_ok(), "the admitted request must succeed");
        server.shutdown().await;
    });
}

#[test]
fn shutdown_drains_an_in_flight_request() {
    use tonic_health::pb::{HealthCheckRequest, health_check_response::ServingStatus, health_client::HealthClient};
    run(async {
        let server = Server::start(|c| c.server.workers = 1).await;
        let mut c = server.client().await;
        let mut h = HealthClient::new(server.channel().await);
        let slow = tokio::spawn(async move { c.compute_weights(slow_request()).await });
        assert!(eventually(2000, || server.api.computing() == 1).await);
        let mut server = server;
        let (addr, api) = (server.addr, server.api.clone());
        server.begin_shutdown();
        // Readiness flips while the in-flight request still runs (or the health call is refused).
        let mut flipped = false;
        for _ in 0..200 {
            match h.check(HealthCheckRequest { service: "readiness".into() }).await {
                Ok(r) if r.get_ref().status() == ServingStatus::Serving => {
                    tokio::time::sleep(Duration::from_millis(10)).await;
                }
                _ => {
                    flipped = true;
                    break;
                }
            }
        }
        assert!(flipped, "readiness still SERVING during the drain");
        let resp = slow.await.unwrap().expect("the in-flight request completes during the drain");
        assert_eq!(resp.into_inner().request_id, "slow");
        server.finished().await;
        assert_eq!(api.in_flight(), 0);
        assert!(Channel::from_shared(format!("http://{addr}")).unwrap().connect().await.is_err(), "still accepting");
    });
}

fn backtest_request(panel: &ReturnPanel) -> proto::RunBacktestRequest {
    proto::RunBacktestRequest {
        window: 60,
        step: 3,
        sweep_max_k: Some(3),
        ..keelson::convert::backtest_request_from_panel(panel, proto::Settings::default(), "bt-1")
    }
}

#[test]
fn run_backtest_streams_progress_then_the_library_result() {
    use proto::run_backtest_response::Event;
    run(async {
        let server = Server::start(|_| {}).await;
        let mut c = server.client().await;
        let panel = synthetic_panel(12, 120, 10);
        let mut stream = c.run_backtest(backtest_request(&panel)).await.unwrap().into_inner();
        let mut progress = Vec::new();
        let mut result = None;
        while let Some(msg) = stream.message().await.unwrap() {
            assert_eq!(msg.request_id, "bt-1");
            match msg.event.unwrap() {
                Event::Progress(p) => progress.push((p.fits_done, p.fits_total)),
                Event::Result(r) => result = Some(r),
            }
        }
        assert!(!progress.is_empty(), "progress messages");
        assert!(progress.windows(2).all(|w| w[0].0 <= w[1].0));
        let mut result = result.expect("a result message");
        // Provenance names the request and fingerprints the history it sent.
        let p = result.provenance.take().expect("provenance");
        assert_eq!(p.invocation, "RunBacktest request \"bt-1\"");
        assert_eq!(p.input_sha256, keelson::evaluate::provenance::history_sha256(&panel));
        assert!(p.configured.contains("the request's settings over the server's defaults"), "{}", p.configured);
        assert_eq!((p.periods, p.factors, p.keelson_version.as_str()), (120, 10, env!("CARGO_PKG_VERSION")));
        let settings = Settings::default().check().unwrap();
        let spec = keelson::evaluate::BacktestSpec { window: 60, step: 3, sweep_max_k: Some(3), ..Default::default() }
            .check(&panel, &settings)
            .unwrap();
        let local = keelson::evaluate::run(&panel, &settings, &spec, &|_| {}, &estimator::Stop::never()).unwrap();
        let mut want = keelson::convert::backtest_result_to_proto(&local, "bt-1");
        // Everything but the provenance (its run time and invocation differ) is byte-identical.
        want.provenance = None;
        assert_eq!(result.encode_to_vec(), want.encode_to_vec(), "gRPC backtest equals the library's");
        assert_eq!(result.strategies[0].name, "configured");
        server.shutdown().await;
    });
}

#[test]
fn run_backtest_rejects_bad_specifications_and_stops_when_cancelled() {
    run(async {
        let server = Server::start(|c| c.server.workers = 1).await;
        let mut c = server.client().await;
        let mut bad = backtest_request(&synthetic_panel(13, 50, 5));
        bad.window = 60;
        // The specification is checked before the stream starts.
        let e = c.run_backtest(bad).await.unwrap_err();
        assert_eq!(e.code(), Code::InvalidArgument, "{}", e.message());
        assert_eq!(e.get_details_bad_request().unwrap().field_violations[0].field, "window");

        let mut long = backtest_request(&synthetic_panel(14, 700, 60));
        long.step = 1;
        let stream = c.run_backtest(long).await.unwrap().into_inner();
        assert!(eventually(2000, || server.api.computing() == 1).await, "backtest never started");
        drop(stream);
        assert!(eventually(1000, || server.api.computing() == 0).await, "backtest still running after cancel");
        assert_eq!(server.api.stopped_early(), 1);
        server.shutdown().await;
    });
}

#[test]
fn run_backtest_honours_the_server_time_limit() {
    run(async {
        let server = Server::start(|c| {
            c.server.workers = 1;
            c.server.backtest_timeout_ms = 200;
        })
        .await;
        let mut c = server.client().await;
        let mut long = backtest_request(&synthetic_panel(15, 700, 60));
        long.step = 1;
        let mut stream = c.run_backtest(long).await.unwrap().into_inner();
        let e = loop {
            match stream.message().await {
                Ok(Some(_)) => continue,
                Ok(None) => panic!("the backtest finished within 200 ms"),
                Err(e) => break e,
            }
        };
        assert_eq!(e.code(), Code::DeadlineExceeded, "{}", e.message());
        assert!(eventually(1000, || server.api.computing() == 0).await);
        assert_eq!(server.api.stopped_early(), 1);
        server.shutdown().await;
    });
}

//! Operations: TLS, mutual TLS, bearer tokens and the Prometheus endpoint of
//! a real server on loopback. Certificates are generated here with rcgen,
//! one throw-away CA for servers and one for clients.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::time::Duration;

use keelson::convert::request_from_panel;
use keelson::demo::synthetic_panel;
use keelson::proto::weights_service_client::WeightsServiceClient;
use keelson::proto::{self, ComputeWeightsRequest};
use keelson::service::config::ServerConfig;
use rcgen::{BasicConstraints, CertificateParams, CertifiedIssuer, ExtendedKeyUsagePurpose, IsCa, KeyPair};
use tokio::io::{AsyncReadExt as _, AsyncWriteExt as _};
use tonic::Code;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint, Identity};
use tonic_health::pb::{HealthCheckRequest, health_client::HealthClient};

const TOKEN: &str = "ops-test-token-0123456789abcdef";

struct Pki {
    dir: PathBuf,
    server_ca: String,
    client_ca: String,
    client_cert: String,
    client_key: String,
    stranger_cert: String,
    stranger_key: String,
}

fn ca(name: &str) -> CertifiedIssuer<'static, KeyPair> {
    let mut p = CertificateParams::new(Vec::<String>::new()).unwrap();
    p.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    p.distinguished_name.push(rcgen::DnType::CommonName, name);
    CertifiedIssuer::self_signed(p, KeyPair::generate().unwrap()).unwrap()
}

fn leaf(
    issuer: &CertifiedIssuer<'static, KeyPair>,
    names: &[&str],
    usage: ExtendedKeyUsagePurpose,
) -> (String, String) {
    let key = KeyPair::generate().unwrap();
    let mut p = CertificateParams::new(names.iter().map(|s| (*s).to_owned()).collect::<Vec<_>>()).unwrap();
    p.extended_key_usages = vec![usage];
    let cert = p.signed_by(&key, issuer).unwrap();
    (cert.pem(), key.serialize_pem())
}

fn pki(tag: &str) -> Pki {
    let dir = std::env::temp_dir().join(format!("keelson-ops-{tag}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let server_ca = ca("keelson test server CA");
    let client_ca = ca("keelson test client CA");
    let other_ca = ca("an unrelated CA");
    let (server_cert, server_key) = leaf(&server_ca, &["localhost", "127.0.0.1"], ExtendedKeyUsagePurpose::ServerAuth);
    let (client_cert, client_key) = leaf(&client_ca, &["rebalancer"], ExtendedKeyUsagePurpose::ClientAuth);
    let (stranger_cert, stranger_key) = leaf(&other_ca, &["stranger"], ExtendedKeyUsagePurpose::ClientAuth);
    std::fs::write(dir.join("server.pem"), server_cert).unwrap();
    std::fs::write(dir.join("server.key"), server_key).unwrap();
    std::fs::write(dir.join("client-ca.pem"), client_ca.pem()).unwrap();
    std::fs::write(dir.join("tokens"), format!("# accepted tokens\n\n{TOKEN}\n")).unwrap();
    Pki {
        dir,
        server_ca: server_ca.pem(),
        client_ca: client_ca.pem(),
        client_cert,
        client_key,
        stranger_cert,
        stranger_key,
    }
}

fn path(dir: &Path, f: &str) -> String {
    dir.join(f).to_string_lossy().into_owned()
}

use crate::common::Server;

fn request() -> ComputeWeightsRequest {
    let panel = synthetic_panel(3, 96, 12);
    let settings = proto::Settings {
        method: proto::Method::Components.into(),
        components_choice: Some(proto::settings::ComponentsChoice::Components(3)),
        kappa_choice: Some(proto::settings::KappaChoice::Kappa(1.0)),
        ..Default::default()
    };
    request_from_panel(&panel, settings, "ops")
}

async fn channel(url: String, tls: Option<ClientTlsConfig>) -> Result<Channel, tonic::transport::Error> {
    let mut ep = Endpoint::from_shared(url).unwrap().connect_timeout(Duration::from_secs(5));
    if let Some(t) = tls {
        ep = ep.tls_config(t)?;
    }
    ep.connect().await
}

async fn compute(ch: Channel, token: Option<&str>) -> Result<proto::ComputeWeightsResponse, tonic::Status> {
    let mut req = tonic::Request::new(request());
    req.set_timeout(Duration::from_secs(30));
    if let Some(t) = token {
        req.metadata_mut().insert("authorization", format!("Bearer {t}").parse().unwrap());
    }
    WeightsServiceClient::new(ch).compute_weights(req).await.map(tonic::Response::into_inner)
}

fn tls_to(p: &Pki) -> ClientTlsConfig {
    ClientTlsConfig::new().ca_certificate(Certificate::from_pem(&p.server_ca)).domain_name("localhost")
}

/// Points the server at the generated certificate and key.
fn serve_tls(c: &mut ServerConfig, p: &Pki) {
    c.tls.cert_file = path(&p.dir, "server.pem");
    c.tls.key_file = path(&p.dir, "server.key");
}

/// The failure of one call made on a new connection, whether the connection
/// or the call fails (UNAVAILABLE standing for a refused connection); None when it succeeds.
async fn call_failure(url: String, tls: Option<ClientTlsConfig>) -> Option<tonic::Status> {
    match channel(url, tls).await {
        Ok(ch) => compute(ch, None).await.err(),
        Err(e) => Some(tonic::Status::unavailable(e.to_string())),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tls_serves_encrypted_and_refuses_plaintext() {
    let p = pki("tls");
    let s = Server::start(|c| serve_tls(c, &p)).await;
    let ch = channel(format!("https://{}", s.addr), Some(tls_to(&p))).await.unwrap();
    let resp = compute(ch.clone(), None).await.unwrap();
    assert_eq!(resp.weights.len(), 12);
    let health = HealthClient::new(ch).check(HealthCheckRequest { service: "readiness".into() }).await.unwrap();
    assert_eq!(health.into_inner().status, 1, "SERVING over TLS");

    // A plaintext HTTP/2 client gets no gRPC answer from a TLS port.
    let plain = call_failure(format!("http://{}", s.addr), None).await.map(|st| st.code());
    // The exact code depends on where the HTTP/2 exchange breaks (UNAVAILABLE, UNKNOWN, INTERNAL, CANCELLED).
    assert!(plain.is_some_and(|c| c != Code::Ok), "a plaintext call must fail: {plain:?}");
    // A client that does not trust the server's CA refuses the handshake.
    let untrusting =
        ClientTlsConfig::new().ca_certificate(Certificate::from_pem(&p.client_ca)).domain_name("localhost");
    let r = call_failure(format!("https://{}", s.addr), Some(untrusting)).await;
    assert!(r.is_some(), "an untrusted server certificate must not be accepted");
    s.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn mutual_tls_admits_only_clients_of_the_configured_ca() {
    let p = pki("mtls");
    let s = Server::start(|c| {
        serve_tls(c, &p);
        c.tls.client_ca_file = path(&p.dir, "client-ca.pem");
        c.server.health_address = "127.0.0.1:0".into();
    })
    .await;
    // Probes that cannot present a certificate use the plaintext health-only port.
    let probe = channel(format!("http://{}", s.health.unwrap()), None).await.unwrap();
    for name in ["liveness", "readiness"] {
        let h = HealthClient::new(probe.clone()).check(HealthCheckRequest { service: name.into() }).await.unwrap();
        assert_eq!(h.into_inner().status, 1, "{name} over the plaintext health port");
    }
    let api_on_probe_port = compute(probe, None).await.unwrap_err();
    assert_eq!(api_on_probe_port.code(), Code::Unimplemented, "the health port serves nothing else");
    let url = format!("https://{}", s.addr);
    let good = tls_to(&p).identity(Identity::from_pem(&p.client_cert, &p.client_key));
    let resp = compute(channel(url.clone(), Some(good)).await.unwrap(), None).await.unwrap();
    assert_eq!(resp.weights.len(), 12);

    for (what, cfg) in [
        ("no client certificate", tls_to(&p)),
        ("a certificate from another CA", tls_to(&p).identity(Identity::from_pem(&p.stranger_cert, &p.stranger_key))),
    ] {
        let refused = call_failure(url.clone(), Some(cfg)).await;
        assert!(refused.is_some(), "{what}: the server must refuse the connection");
    }
    s.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bearer_tokens_guard_the_api_but_not_health() {
    let p = pki("token");
    let s = Server::start(|c| c.auth.tokens_file = path(&p.dir, "tokens")).await;
    let url = format!("http://{}", s.addr);
    let ch = channel(url, None).await.unwrap();

    let missing = compute(ch.clone(), None).await.unwrap_err();
    assert_eq!(missing.code(), Code::Unauthenticated, "{missing:?}");
    assert!(!missing.message().contains(TOKEN));
    let wrong = compute(ch.clone(), Some("ops-test-token-0123456789abcdeX")).await.unwrap_err();
    assert_eq!(wrong.code(), Code::Unauthenticated);
    assert!(!wrong.message().contains("0123456789abcdeX"), "the presented token is never echoed");
    let info = WeightsServiceClient::new(ch.clone()).get_service_info(proto::GetServiceInfoRequest {}).await;
    assert_eq!(info.unwrap_err().code(), Code::Unauthenticated, "every API method is guarded");

    let ok = compute(ch.clone(), Some(TOKEN)).await.unwrap();
    assert_eq!(ok.weights.len(), 12);
    for name in ["", "liveness", "readiness"] {
        let h = HealthClient::new(ch.clone()).check(HealthCheckRequest { service: name.into() }).await;
        assert_eq!(h.unwrap().into_inner().status, 1, "health `{name}` answers without a token");
    }
    s.shutdown().await;
}

async fn http_get(addr: SocketAddr, path: &str) -> String {
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream
        .write_all(format!("GET {path} HTTP/1.1\r\nHost: metrics\r\nConnection: close\r\n\r\n").as_bytes())
        .await
        .unwrap();
    let mut out = String::new();
    tokio::time::timeout(Duration::from_secs(10), stream.read_to_string(&mut out)).await.unwrap().unwrap();
    out
}

fn value(text: &str, series: &str) -> Option<f64> {
    text.lines().find_map(|l| l.strip_prefix(series).and_then(|rest| rest.trim().parse().ok()))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn metrics_endpoint_counts_calls_by_code() {
    let s = Server::start(|c| {
        c.auth.tokens = vec![TOKEN.to_owned()];
        c.metrics.address = "127.0.0.1:0".into();
    })
    .await;
    let ch = channel(format!("http://{}", s.addr), None).await.unwrap();
    for _ in 0..3 {
        compute(ch.clone(), Some(TOKEN)).await.unwrap();
    }
    let mut bad = request();
    bad.returns.as_mut().unwrap().values[7] = f64::NAN;
    bad.settings = Some(proto::Settings { missing_policy: proto::MissingPolicy::Reject.into(), ..Default::default() });
    let mut req = tonic::Request::new(bad);
    req.metadata_mut().insert("authorization", format!("Bearer {TOKEN}").parse().unwrap());
    let e = WeightsServiceClient::new(ch.clone()).compute_weights(req).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    compute(ch.clone(), None).await.unwrap_err();

    let resp = http_get(s.metrics.unwrap(), "/metrics").await;
    assert!(resp.starts_with("HTTP/1.1 200"), "{resp}");
    // prometheus-client encodes OpenMetrics text (bucket bounds as floats, `# EOF` last).
    assert!(resp.contains("application/openmetrics-text; version=1.0.0"), "{resp}");
    assert!(resp.trim_end().ends_with("# EOF"), "{resp}");
    let cw = r#"grpc_service="keelson.v1.WeightsService",grpc_method="ComputeWeights",grpc_type="unary""#;
    assert_eq!(value(&resp, &format!("grpc_server_started_total{{{cw}}}")), Some(5.0), "{resp}");
    assert_eq!(value(&resp, &format!("grpc_server_handled_total{{{cw},grpc_code=\"OK\"}}")), Some(3.0), "{resp}");
    assert_eq!(value(&resp, &format!("grpc_server_handled_total{{{cw},grpc_code=\"InvalidArgument\"}}")), Some(1.0));
    assert_eq!(value(&resp, &format!("grpc_server_handled_total{{{cw},grpc_code=\"Unauthenticated\"}}")), Some(1.0));
    assert_eq!(value(&resp, &format!("grpc_server_handling_seconds_count{{{cw}}}")), Some(5.0));
    assert_eq!(value(&resp, &format!("grpc_server_handling_seconds_bucket{{le=\"+Inf\",{cw}}}")), Some(5.0));
    // Admitted problems: the three good ones and the one rejected during validation, 96 × 12 cells each.
    assert_eq!(value(&resp, "keelson_problem_cells_count"), Some(4.0), "{resp}");
    assert_eq!(value(&resp, "keelson_problem_cells_bucket{le=\"3000.0\"}"), Some(4.0), "{resp}");
    assert_eq!(value(&resp, "keelson_estimator_phase_seconds_count{phase=\"components\"}"), Some(3.0), "{resp}");
    assert_eq!(value(&resp, "keelson_requests_in_flight"), Some(0.0));
    assert_eq!(value(&resp, "keelson_requests_shed_total{reason=\"overloaded\"}"), Some(0.0));
    assert!(value(&resp, "process_resident_memory_bytes").is_some_and(|v| v > 1e6), "{resp}");

    let missing = http_get(s.metrics.unwrap(), "/other").await;
    assert!(missing.starts_with("HTTP/1.1 404"), "{missing}");
    s.shutdown().await;
}

#[test]
fn security_settings_are_validated_and_never_logged() {
    let mut c = ServerConfig::default();
    c.tls.key_file = "/nonexistent/server.key".into();
    let e = c.clone().check().unwrap_err().to_string();
    assert!(e.contains("tls.cert_file"), "{e}");
    c.tls.cert_file = "/nonexistent/server.pem".into();
    let e = c.check().unwrap_err().to_string();
    assert!(e.contains("tls.cert_file") && e.contains("/nonexistent/server.pem"), "{e}");

    let mut c = ServerConfig::default();
    c.auth.tokens = vec!["short-secret".into()];
    let e = c.check().unwrap_err().to_string();
    assert!(e.contains("auth.tokens") && !e.contains("short-secret"), "{e}");

    let mut c = ServerConfig::default();
    c.auth.tokens = vec![TOKEN.to_owned()];
    let valid = c.clone().check().unwrap();
    assert!(!valid.redacted_json().contains(TOKEN), "{}", valid.redacted_json());
    assert!(!format!("{:?}", c.auth).contains(TOKEN));

    // Tokens from the environment: comma-separated.
    let env =
        vec![("KEELSON__AUTH__TOKENS".to_owned(), "first-token-aaaaaaaaaaaa,second-token-bbbbbbbbbbb".to_owned())];
    let c = ServerConfig::load(None, env).unwrap();
    assert_eq!(c.auth.tokens.len(), 2);
    assert_eq!(c.check().unwrap().tokens.len(), 2);

    let mut c = ServerConfig::default();
    c.metrics.address = c.server.address.clone();
    assert!(c.check().unwrap_err().to_string().contains("metrics.address"));
}

/// A stand-in OpenTelemetry collector: an OTLP/gRPC trace service that keeps
/// every span it receives.
#[derive(Clone, Default)]
struct Collector(std::sync::Arc<std::sync::Mutex<Vec<opentelemetry_proto::tonic::trace::v1::ResourceSpans>>>);

#[tonic::async_trait]
impl opentelemetry_proto::tonic::collector::trace::v1::trace_service_server::TraceService for Collector {
    async fn export(
        &self,
        request: tonic::Request<opentelemetry_proto::tonic::collector::trace::v1::ExportTraceServiceRequest>,
    ) -> Result<
        tonic::Response<opentelemetry_proto::tonic::collector::trace::v1::ExportTraceServiceResponse>,
        tonic::Status,
    > {
        self.0.lock().unwrap().extend(request.into_inner().resource_spans);
        Ok(tonic::Response::new(Default::default()))
    }
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

fn attribute(attrs: &[opentelemetry_proto::tonic::common::v1::KeyValue], key: &str) -> Option<String> {
    use opentelemetry_proto::tonic::common::v1::any_value::Value;
    attrs.iter().find(|kv| kv.key == key).and_then(|kv| kv.value.as_ref()?.value.as_ref()).map(|v| match v {
        Value::StringValue(s) => s.clone(),
        Value::IntValue(i) => i.to_string(),
        Value::DoubleValue(d) => d.to_string(),
        Value::BoolValue(b) => b.to_string(),
        other => format!("{other:?}"),
    })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn traces_reach_an_otlp_collector_under_the_callers_trace() {
    use opentelemetry_proto::tonic::collector::trace::v1::trace_service_server::TraceServiceServer;
    let collector = Collector::default();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let collector_addr = listener.local_addr().unwrap();
    let collector_task = tokio::spawn(
        tonic::transport::Server::builder()
            .add_service(TraceServiceServer::new(collector.clone()))
            .serve_with_incoming(tonic::transport::server::TcpIncoming::from(listener)),
    );
    let s = Server::start(|c| {
        c.tracing.otlp_endpoint = format!("http://{collector_addr}");
        c.tracing.export_interval_ms = 100;
    })
    .await;
    let mut client = WeightsServiceClient::new(channel(format!("http://{}", s.addr), None).await.unwrap());

    // The `traceparent` example of the W3C Trace Context recommendation (recalled from memory;
    // any well-formed value would do).
    let trace_id = "4bf92f3577b34da6a3ce929d0e0e4736";
    let parent_id = "00f067aa0ba902b7";
    let mut good = tonic::Request::new(request());
    good.metadata_mut().insert("traceparent", format!("00-{trace_id}-{parent_id}-01").parse().unwrap());
    let ok = client.compute_weights(good).await.unwrap().into_inner();
    let mut bad = request();
    bad.returns.as_mut().unwrap().values[7] = f64::INFINITY;
    assert_eq!(client.compute_weights(bad).await.unwrap_err().code(), Code::InvalidArgument);
    // Shutdown flushes what is queued.
    s.shutdown().await;

    let resource_spans = collector.0.lock().unwrap().clone();
    collector_task.abort();
    let resource = resource_spans.first().and_then(|r| r.resource.as_ref()).expect("spans arrived");
    assert_eq!(attribute(&resource.attributes, "service.name").as_deref(), Some("keelson"));
    let spans: Vec<_> = resource_spans.iter().flat_map(|r| &r.scope_spans).flat_map(|s| &s.spans).collect();
    let calls: Vec<_> = spans.iter().filter(|s| s.name == "keelson.v1.WeightsService/ComputeWeights").collect();
    assert_eq!(calls.len(), 2, "{:?}", spans.iter().map(|s| &s.name).collect::<Vec<_>>());

    let traced = calls.iter().find(|s| hex(&s.trace_id) == trace_id).expect("the caller's trace id is kept");
    assert_eq!(hex(&traced.parent_span_id), parent_id, "parented on the caller's span");
    assert_eq!(traced.kind, 2, "SPAN_KIND_SERVER");
    let a = &traced.attributes;
    assert_eq!(attribute(a, "rpc.system").as_deref(), Some("grpc"));
    assert_eq!(attribute(a, "rpc.method").as_deref(), Some("ComputeWeights"));
    assert_eq!(attribute(a, "rpc.grpc.status_code").as_deref(), Some("0"));
    assert_eq!(attribute(a, "keelson.periods").as_deref(), Some("96"));
    assert_eq!(attribute(a, "keelson.factors").as_deref(), Some("12"));
    assert_eq!(attribute(a, "keelson.fingerprint"), Some(ok.fingerprint.clone()));
    let phases: Vec<_> = spans.iter().filter(|s| s.parent_span_id == traced.span_id).collect();
    let names: Vec<&str> = phases.iter().map(|s| s.name.as_str()).collect();
    for phase in ["estimator.validate", "estimator.moments", "estimator.components", "estimator.solve"] {
        assert!(names.contains(&phase), "{names:?}");
    }
    for p in &phases {
        assert_eq!(p.trace_id, traced.trace_id);
        assert!(
            p.start_time_unix_nano >= traced.start_time_unix_nano && p.end_time_unix_nano <= traced.end_time_unix_nano
        );
    }

    let failed = calls.iter().find(|s| hex(&s.trace_id) != trace_id).unwrap();
    assert!(failed.parent_span_id.is_empty(), "no caller context: a new trace");
    assert_eq!(attribute(&failed.attributes, "rpc.grpc.status_code").as_deref(), Some("3"));
    assert_eq!(failed.status.as_ref().map_or(0, |s| s.code), 0, "a caller's bad input is not a server error");
}

#[test]
fn tracing_settings_are_validated() {
    for (edit, key) in [
        ((|c: &mut ServerConfig| c.tracing.sample_ratio = 1.5) as fn(&mut ServerConfig), "tracing.sample_ratio"),
        (|c| c.tracing.otlp_endpoint = "collector:4317".into(), "tracing.otlp_endpoint"),
        (|c| c.tracing.otlp_endpoint = "https://collector:4317".into(), "tracing.otlp_endpoint"),
        (
            |c| {
                c.tracing.otlp_endpoint = "http://127.0.0.1:4317".into();
                c.tracing.export_interval_ms = 0;
            },
            "tracing.export_interval_ms",
        ),
    ] {
        let mut c = ServerConfig::default();
        edit(&mut c);
        let e = c.check().unwrap_err().to_string();
        assert!(e.contains(key), "{e}");
    }
    let env = vec![("KEELSON__TRACING__OTLP_ENDPOINT".to_owned(), "http://127.0.0.1:4317".to_owned())];
    let c = ServerConfig::load(None, env).unwrap();
    assert_eq!(c.tracing.otlp_endpoint, "http://127.0.0.1:4317");
    assert!(c.check().is_ok());
}

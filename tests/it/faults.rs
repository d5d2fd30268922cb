//! Faults a production server meets: SIGTERM while loaded (the real binary),
//! clients that stall mid-request or never finish the HTTP/2 handshake, and
//! byte-identical answers across repeated calls, server restarts and worker
//! counts.

use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use crate::common::{Server, eventually};
use bytes::Bytes;
use keelson::convert::request_from_panel;
use keelson::demo::synthetic_panel;
use keelson::proto::{self, weights_service_client::WeightsServiceClient};
use prost::Message as _;
use tokio::io::AsyncWriteExt as _;
use tonic::Code;
use tonic::transport::Channel;
use tonic_health::pb::{HealthCheckRequest, health_client::HealthClient};

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

/// Kills the child if the test fails before it exits.
struct Reaper(Option<Child>);

impl Drop for Reaper {
    fn drop(&mut self) {
        if let Some(c) = self.0.as_mut() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

async fn connect(port: u16) -> Option<Channel> {
    Channel::from_shared(format!("http://127.0.0.1:{port}")).unwrap().connect().await.ok()
}

async fn metric(port: u16, name: &str) -> Option<f64> {
    use tokio::io::AsyncReadExt as _;
    let mut s = tokio::net::TcpStream::connect(("127.0.0.1", port)).await.ok()?;
    s.write_all(b"GET /metrics HTTP/1.1\r\nHost: m\r\nConnection: close\r\n\r\n").await.ok()?;
    let mut text = String::new();
    s.read_to_string(&mut text).await.ok()?;
    text.lines().find_map(|l| l.strip_prefix(name).and_then(|v| v.trim().parse().ok()))
}

/// A window that keeps one worker busy for a while even in an optimised build:
/// 150 factors × 240 periods with the full cross-validation grid.
fn slow_request(i: usize) -> proto::ComputeWeightsRequest {
    request_from_panel(&synthetic_panel(100 + i as u64, 240, 150), proto::Settings::default(), &format!("load-{i}"))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn sigterm_under_load_finishes_admitted_calls_and_refuses_new_ones() {
    let (port, mport) = (free_port(), free_port());
    let drain_ms = 60_000u64;
    let child = Command::new(env!("CARGO_BIN_EXE_keelson"))
        .args(["serve", "--addr", &format!("127.0.0.1:{port}")])
        .env("KEELSON__METRICS__ADDRESS", format!("127.0.0.1:{mport}"))
        .env("KEELSON__SERVER__WORKERS", "1")
        .env("KEELSON__SERVER__DRAIN_TIMEOUT_MS", drain_ms.to_string())
        .env("KEELSON__LOG__LEVEL", "warn")
        .stdout(Stdio::null())
        .spawn()
        .unwrap();
    let pid = child.id();
    let mut reaper = Reaper(Some(child));

    let mut channel = None;
    for _ in 0..300 {
        if let Some(ch) = connect(port).await {
            let ok = HealthClient::new(ch.clone()).check(HealthCheckRequest { service: "readiness".into() }).await;
            if ok.is_ok_and(|r| r.into_inner().status == 1) {
                channel = Some(ch);
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let channel = channel.expect("the server became ready");

    // Eight calls on one worker: one computes, seven wait in the admission queue.
    let calls = 8;
    let mut handles = Vec::new();
    for i in 0..calls {
        let mut client = WeightsServiceClient::new(channel.clone());
        handles.push(tokio::spawn(async move {
            let mut req = tonic::Request::new(slow_request(i));
            req.set_timeout(Duration::from_secs(120));
            client.compute_weights(req).await.map(|r| r.into_inner().request_id)
        }));
    }
    let mut admitted = 0.0;
    for _ in 0..600 {
        admitted = metric(mport, "keelson_requests_in_flight").await.unwrap_or(0.0);
        if admitted == calls as f64 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert_eq!(admitted, calls as f64, "every call admitted before the signal");

    let signalled = Instant::now();
    let kill = Command::new("kill").args(["-TERM", &pid.to_string()]).status().unwrap();
    assert!(kill.success());

    // Once the server knows it is draining, new calls are refused: on the open connection
    // (UNAVAILABLE from the service, or CANCELLED when the HTTP/2 layer resets a stream that
    // raced the GOAWAY; nothing is computed either way) and on a new connection.
    let late = || request_from_panel(&synthetic_panel(1, 60, 5), proto::Settings::default(), "late");
    let mut draining = false;
    for _ in 0..500 {
        if metric(mport, "keelson_draining").await == Some(1.0) {
            draining = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    assert!(draining, "the server reported draining");
    let mut req = tonic::Request::new(late());
    req.set_timeout(Duration::from_secs(30));
    let same_conn = WeightsServiceClient::new(channel.clone()).compute_weights(req).await;
    let code = same_conn.expect_err("a call after SIGTERM must be refused").code();
    assert!(matches!(code, Code::Unavailable | Code::Cancelled), "refused on the open connection with {code:?}");
    if let Some(fresh) = connect(port).await {
        let code = WeightsServiceClient::new(fresh).compute_weights(late()).await.expect_err("refused").code();
        assert!(matches!(code, Code::Unavailable | Code::Cancelled), "refused on a new connection with {code:?}");
    }

    for (i, h) in handles.into_iter().enumerate() {
        let id = h.await.unwrap().unwrap_or_else(|s| panic!("admitted call {i} failed during the drain: {s:?}"));
        assert_eq!(id, format!("load-{i}"));
    }
    let mut child = reaper.0.take().unwrap();
    let status = loop {
        if let Some(st) = child.try_wait().unwrap() {
            break st;
        }
        assert!(
            signalled.elapsed() < Duration::from_millis(drain_ms + 10_000),
            "the process outlived its drain budget"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    assert!(status.success(), "exit status after the drain: {status:?}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn stalled_clients_do_not_block_others() {
    let s = Server::start(|c| {
        c.server.workers = 1;
        c.server.max_in_flight = 2;
    })
    .await;

    // Connections that never finish the HTTP/2 preface, or never send a byte.
    let mut idle = Vec::new();
    for i in 0..20 {
        let mut t = tokio::net::TcpStream::connect(s.addr).await.unwrap();
        if i % 2 == 0 {
            t.write_all(b"PRI * HTTP/2.0\r\n").await.unwrap();
        }
        idle.push(t);
    }

    // Calls whose request body stops half-way: a gRPC frame announcing 1000 bytes, then 5 bytes, then nothing.
    let mut stalled = Vec::new();
    for _ in 0..10 {
        let tcp = tokio::net::TcpStream::connect(s.addr).await.unwrap();
        let (client, conn) = h2::client::handshake(tcp).await.unwrap();
        tokio::spawn(async move {
            let _ = conn.await;
        });
        let mut client = client.ready().await.unwrap();
        let req = http::Request::builder()
            .method("POST")
            .uri(format!("http://{}/keelson.v1.WeightsService/ComputeWeights", s.addr))
            .header("content-type", "application/grpc")
            .header("te", "trailers")
            .body(())
            .unwrap();
        let (response, mut body) = client.send_request(req, false).unwrap();
        body.send_data(Bytes::from_static(&[0, 0, 0, 3, 0xE8, 1, 2, 3, 4, 5]), false).unwrap();
        stalled.push((client, response, body));
    }

    // Everyone else is served, and the stalled calls hold no admission slot (the limit is 2).
    let mut client = s.client().await;
    for i in 0..5 {
        let req = request_from_panel(&synthetic_panel(i, 96, 10), proto::Settings::default(), "live");
        let resp =
            client.compute_weights(req).await.unwrap_or_else(|e| panic!("call {i} behind stalled clients: {e:?}"));
        assert_eq!(resp.into_inner().weights.len(), 10);
    }
    assert_eq!(s.api.in_flight(), 0, "stalled uploads are not admitted work");
    drop(stalled);
    drop(idle);
    s.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn responses_are_byte_identical_across_calls_restarts_and_worker_counts() {
    let panel = synthetic_panel(77, 120, 40);
    let req = request_from_panel(&panel, proto::Settings::default(), "same");
    let mut seen: Vec<Vec<u8>> = Vec::new();
    for workers in [1usize, 4, 2] {
        // A fresh server each time: a restart.
        let s = Server::start(|c| c.server.workers = workers).await;
        let mut handles = Vec::new();
        for _ in 0..4 {
            let mut client = s.client().await;
            let r = req.clone();
            handles.push(tokio::spawn(async move { client.compute_weights(r).await.unwrap().into_inner() }));
        }
        for h in handles {
            seen.push(h.await.unwrap().encode_to_vec());
        }
        assert!(eventually(100, || s.api.in_flight() == 0).await);
        s.shutdown().await;
    }
    assert_eq!(seen.len(), 12);
    assert!(seen.iter().all(|b| b == &seen[0]), "12 responses over 3 server runs with 1, 4 and 2 workers differ");
}

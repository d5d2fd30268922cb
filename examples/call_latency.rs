//! Latency of sequential `ComputeWeights` calls over loopback, beside the
//! library's own fit time on the same window in the same run.
//!
//! ```sh
//! cargo run --release --example call_latency -- [CALLS] [FACTORS] [PERIODS]
//! ```
//! Starts an in-process server on 127.0.0.1:0, warms up, then sends CALLS
//! requests one after another and prints percentiles.

use std::time::{Duration, Instant};

use keelson::client::Target;
use keelson::convert::request_from_panel;
use keelson::demo::synthetic_panel;
use keelson::estimator::{self, Settings};
use keelson::proto;
use keelson::service::loopback::LoopbackServer;

fn percentile(sorted: &[Duration], p: f64) -> f64 {
    let i = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[i].as_secs_f64() * 1e3
}

fn summary(name: &str, mut v: Vec<Duration>) {
    v.sort();
    println!(
        "{name}: n={} min={:.3} ms p50={:.3} ms p90={:.3} ms p99={:.3} ms max={:.3} ms",
        v.len(),
        v[0].as_secs_f64() * 1e3,
        percentile(&v, 0.5),
        percentile(&v, 0.9),
        percentile(&v, 0.99),
        v[v.len() - 1].as_secs_f64() * 1e3
    );
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let args: Vec<usize> = std::env::args().skip(1).map(|a| a.parse()).collect::<Result<_, _>>()?;
    let calls = args.first().copied().unwrap_or(300);
    let n = args.get(1).copied().unwrap_or(50);
    let t = args.get(2).copied().unwrap_or(120);
    let panel = synthetic_panel(2024, t, n);

    let settings = Settings { method: keelson::estimator::Method::Components, ..Settings::default() }.check()?;
    let mut local = Vec::with_capacity(calls);
    for _ in 0..calls {
        let s = Instant::now();
        std::hint::black_box(estimator::fit(&panel, &settings)?);
        local.push(s.elapsed());
    }

    let server = LoopbackServer::start(|_| {}).await?;
    let mut client = Target::plaintext(server.url()).weights_client().await?;
    let request = request_from_panel(
        &panel,
        proto::Settings { method: proto::Method::Components.into(), ..proto::Settings::default() },
        "latency",
    );
    for _ in 0..20 {
        client.compute_weights(request.clone()).await?;
    }
    let mut remote = Vec::with_capacity(calls);
    for _ in 0..calls {
        let s = Instant::now();
        client.compute_weights(request.clone()).await?;
        remote.push(s.elapsed());
    }
    // The transport's floor: a call that does no estimation (GetServiceInfo).
    let mut floor = Vec::with_capacity(calls);
    for _ in 0..calls {
        let s = Instant::now();
        client.get_service_info(proto::GetServiceInfoRequest::default()).await?;
        floor.push(s.elapsed());
    }
    // Encoding the request and decoding a response, on the client alone.
    let response = client.compute_weights(request.clone()).await?.into_inner();
    let mut codec = Vec::with_capacity(calls);
    for _ in 0..calls {
        let s = Instant::now();
        let bytes = prost::Message::encode_to_vec(&request);
        let back = <proto::ComputeWeightsResponse as prost::Message>::decode(
            prost::Message::encode_to_vec(&response).as_slice(),
        )?;
        std::hint::black_box((bytes, back));
        codec.push(s.elapsed());
    }
    println!(
        "window: {n} factors × {t} periods, method components (cross-validated K ≤ 30, 40 κ, 3 folds); \
         request {} bytes, response {} bytes",
        prost::Message::encoded_len(&request),
        prost::Message::encoded_len(&response)
    );
    summary("library fit (same process)", local);
    summary("ComputeWeights over loopback gRPC", remote);
    summary("GetServiceInfo over loopback gRPC (transport floor)", floor);
    summary("encode request + encode and decode response (client CPU)", codec);
    server.shutdown().await?;
    Ok(())
}

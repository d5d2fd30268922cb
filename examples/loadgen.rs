//! A bounded gRPC load generator for `ComputeWeights`, loopback only.
//!
//! ```sh
//! # start its own `keelson serve`, find the sustainable rate closed-loop, then run
//! # open-loop at half of it, reporting latency percentiles and the server's memory:
//! cargo run --release --example loadgen -- --serve target/release/keelson --duration 20
//! # or against a running server at a fixed arrival rate:
//! cargo run --release --example loadgen -- --addr http://127.0.0.1:50051 --rate 200 --duration 10
//! # soak: a fixed rate for up to an hour against its own server, sampling the
//! # server's resident memory every second; fails on any error or on memory
//! # growth of 10% or more between the end of warm-up (10% of the run) and the end:
//! cargo run --release --example loadgen -- --serve target/release/keelson --soak --rate 100 --duration 600
//! ```
//!
//! Open loop: request i is due at start + i/rate whatever the server does, and
//! its latency is measured from that intended send time (no coordinated
//! omission), recorded in an HDR histogram. Bounded in count (≤ 1,000,000) and
//! time (≤ 600 s); refuses any address that is not loopback.

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::{Context as _, bail};
use hdrhistogram::Histogram;
use keelson::client::Target;
use keelson::convert::request_from_panel;
use keelson::demo::synthetic_panel;
use keelson::proto::{self, weights_service_client::WeightsServiceClient};
use tonic::transport::Channel;

struct Args {
    addr: Option<String>,
    serve: Option<String>,
    rate: Option<f64>,
    duration: f64,
    factors: usize,
    periods: usize,
    closed: usize,
    soak: bool,
}

fn parse() -> anyhow::Result<Args> {
    let mut a =
        Args { addr: None, serve: None, rate: None, duration: 10.0, factors: 50, periods: 120, closed: 0, soak: false };
    let mut it = std::env::args().skip(1);
    while let Some(flag) = it.next() {
        let mut val = || it.next().with_context(|| format!("{flag} needs a value"));
        match flag.as_str() {
            "--addr" => a.addr = Some(val()?),
            "--serve" => a.serve = Some(val()?),
            "--rate" => a.rate = Some(val()?.parse()?),
            "--duration" => a.duration = val()?.parse()?,
            "--factors" => a.factors = val()?.parse()?,
            "--periods" => a.periods = val()?.parse()?,
            "--closed" => a.closed = val()?.parse()?,
            "--soak" => a.soak = true,
            other => bail!("unknown flag {other}"),
        }
    }
    let limit = if a.soak { 3600.0 } else { 600.0 };
    if !(a.duration > 0.0 && a.duration <= limit) {
        bail!("--duration must be in (0, {limit}] seconds");
    }
    if a.soak && (a.serve.is_none() || a.rate.is_none()) {
        bail!("--soak needs --serve (to read the server's memory) and --rate");
    }
    Ok(a)
}

fn check_loopback(addr: &str) -> anyhow::Result<()> {
    let host = addr.split("://").nth(1).unwrap_or(addr);
    let host = host.rsplit_once(':').map_or(host, |(h, _)| h).trim_matches(['[', ']']);
    let ok = host == "localhost" || host.parse::<std::net::IpAddr>().is_ok_and(|ip| ip.is_loopback());
    if !ok {
        bail!("{addr} is not a loopback address; this load generator only targets this machine");
    }
    Ok(())
}

/// CPU seconds (user + system, all threads) a process has used, from
/// /proc/PID/stat (fields 14 and 15, in USER_HZ = 100 ticks a second on Linux).
fn cpu_seconds(pid: &str) -> Option<f64> {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    // The command name may hold spaces: the fields start after its closing parenthesis.
    let rest = &stat[stat.rfind(')')? + 2..];
    let f: Vec<&str> = rest.split_whitespace().collect();
    let ticks: f64 = f.get(11)?.parse::<f64>().ok()? + f.get(12)?.parse::<f64>().ok()?;
    Some(ticks / 100.0)
}

/// Peak and current resident memory of a process, from /proc (KiB).
fn memory_kib(pid: u32) -> Option<(u64, u64)> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let field = |name: &str| {
        status
            .lines()
            .find(|l| l.starts_with(name))
            .and_then(|l| l.split_whitespace().nth(1))
            .and_then(|v| v.parse().ok())
    };
    Some((field("VmHWM:")?, field("VmRSS:")?))
}

struct Outcome {
    hist: Histogram<u64>,
    codes: BTreeMap<String, u64>,
    sent: u64,
    elapsed: f64,
}

async fn open_loop(
    channel: Channel,
    req: proto::ComputeWeightsRequest,
    rate: f64,
    duration: f64,
) -> anyhow::Result<Outcome> {
    let total = ((rate * duration).round() as u64).min(1_000_000);
    let hist = Arc::new(Mutex::new(Histogram::<u64>::new_with_bounds(1, 60_000_000, 3)?));
    let codes = Arc::new(Mutex::new(BTreeMap::<String, u64>::new()));
    let start = tokio::time::Instant::now() + Duration::from_millis(50);
    let mut tasks = Vec::with_capacity(total as usize);
    for i in 0..total {
        let due = start + Duration::from_secs_f64(i as f64 / rate);
        tokio::time::sleep_until(due).await;
        let mut client = WeightsServiceClient::new(channel.clone()).max_encoding_message_size(256 << 20);
        let (req, hist, codes) = (req.clone(), hist.clone(), codes.clone());
        tasks.push(tokio::spawn(async move {
            let mut r = tonic::Request::new(req);
            r.set_timeout(Duration::from_secs(30));
            let code = match client.compute_weights(r).await {
                Ok(_) => "OK".to_owned(),
                Err(s) => {
                    eprintln!("error at {:.1} s: {:?}: {}", start.elapsed().as_secs_f64(), s.code(), s.message());
                    format!("{:?}", s.code())
                }
            };
            // Latency from the intended send time, not the actual one.
            let us = due.elapsed().as_micros().max(1) as u64;
            hist.lock().expect("histogram lock").saturating_record(us);
            *codes.lock().expect("codes lock").entry(code).or_insert(0) += 1;
        }));
    }
    for t in tasks {
        t.await?;
    }
    let elapsed = start.elapsed().as_secs_f64();
    let hist = Arc::try_unwrap(hist).map_err(|_| anyhow::anyhow!("histogram still shared"))?.into_inner()?;
    let codes = Arc::try_unwrap(codes).map_err(|_| anyhow::anyhow!("codes still shared"))?.into_inner()?;
    Ok(Outcome { hist, codes, sent: total, elapsed })
}

/// Closed loop with `clients` concurrent callers: the sustainable rate.
async fn closed_loop(
    channel: Channel,
    req: proto::ComputeWeightsRequest,
    clients: usize,
    duration: f64,
) -> anyhow::Result<f64> {
    let stop = Instant::now() + Duration::from_secs_f64(duration);
    let mut tasks = Vec::new();
    for _ in 0..clients {
        let mut client = WeightsServiceClient::new(channel.clone()).max_encoding_message_size(256 << 20);
        let req = req.clone();
        tasks.push(tokio::spawn(async move {
            let mut ok = 0u64;
            while Instant::now() < stop {
                if client.compute_weights(req.clone()).await.is_ok() {
                    ok += 1;
                }
            }
            ok
        }));
    }
    let started = Instant::now();
    let mut ok = 0;
    for t in tasks {
        ok += t.await?;
    }
    Ok(ok as f64 / started.elapsed().as_secs_f64())
}

fn report(name: &str, o: &Outcome, offered: f64) {
    let ok = o.codes.get("OK").copied().unwrap_or(0);
    let q = |p: f64| o.hist.value_at_quantile(p) as f64 / 1e3;
    println!(
        "{name}: offered {offered:.1}/s, achieved {:.1}/s ({} sent, {} ok) | latency ms p50 {:.2} p90 {:.2} p99 {:.2} p99.9 {:.2} max {:.2} | codes {:?}",
        ok as f64 / o.elapsed,
        o.sent,
        ok,
        q(0.5),
        q(0.9),
        q(0.99),
        q(0.999),
        o.hist.max() as f64 / 1e3,
        o.codes
    );
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let a = parse()?;
    let mut child = None;
    let addr = match (&a.addr, &a.serve) {
        (Some(addr), _) => addr.clone(),
        (None, Some(bin)) => {
            let port = std::net::TcpListener::bind("127.0.0.1:0")?.local_addr()?.port();
            let c = std::process::Command::new(bin)
                .args(["serve", "--addr", &format!("127.0.0.1:{port}")])
                .env("KEELSON__LOG__LEVEL", "warn")
                .env("KEELSON__METRICS__ADDRESS", "127.0.0.1:0")
                .spawn()
                .with_context(|| format!("cannot start {bin}"))?;
            child = Some(c);
            format!("http://127.0.0.1:{port}")
        }
        (None, None) => bail!("give --addr URL or --serve PATH-TO-KEELSON"),
    };
    check_loopback(&addr)?;
    let mut channel = None;
    for _ in 0..100 {
        if let Ok(c) = Target::plaintext(addr.clone()).channel(Duration::from_secs(1), None).await {
            channel = Some(c);
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    let channel = channel.context("server did not come up within 10 s")?;
    let panel = synthetic_panel(2024, a.periods, a.factors);
    let req = request_from_panel(
        &panel,
        proto::Settings { method: proto::Method::Components.into(), ..proto::Settings::default() },
        "load",
    );
    let pid = child.as_ref().map(std::process::Child::id);
    let mem0 = pid.and_then(memory_kib);
    println!("request: {} factors × {} periods, method components (cross-validated)", a.factors, a.periods);
    for _ in 0..20 {
        WeightsServiceClient::new(channel.clone()).compute_weights(req.clone()).await?;
    }
    let rate = match a.rate {
        Some(r) => r,
        None => {
            let clients =
                if a.closed > 0 { a.closed } else { 2 * std::thread::available_parallelism().map_or(1, |n| n.get()) };
            // The library's own fit of the same request, for the throughput target.
            let settings =
                keelson::estimator::Settings { method: keelson::estimator::Method::Components, ..Default::default() }
                    .check()?;
            let mut fits: Vec<f64> = (0..200)
                .map(|_| {
                    let s = Instant::now();
                    std::hint::black_box(keelson::estimator::fit(&panel, &settings).is_ok());
                    s.elapsed().as_secs_f64()
                })
                .collect();
            fits.sort_by(f64::total_cmp);
            let fit = fits[fits.len() / 2];
            let cores = std::thread::available_parallelism().map_or(1, |n| n.get()) as f64;
            let (gen0, srv0) = (cpu_seconds("self"), pid.and_then(|p| cpu_seconds(&p.to_string())));
            let started = Instant::now();
            let sustainable = closed_loop(channel.clone(), req.clone(), clients, (a.duration / 2.0).min(10.0)).await?;
            let wall = started.elapsed().as_secs_f64();
            println!("closed loop, {clients} clients: sustainable throughput {sustainable:.1} requests/s");
            println!(
                "library fit p50 {:.3} ms: 80% of {cores} cores ÷ fit = {:.0} requests/s; achieved {:.0}% of that",
                fit * 1e3,
                0.8 * cores / fit,
                100.0 * sustainable / (0.8 * cores / fit)
            );
            if let (Some(g0), Some(g1)) = (gen0, cpu_seconds("self")) {
                let srv = srv0.zip(pid.and_then(|p| cpu_seconds(&p.to_string()))).map(|(a, b)| b - a);
                println!(
                    "CPU over the closed loop ({wall:.1} s wall, {cores} cores): load generator {:.2} s ({:.0}% of the machine), \
                     server {}",
                    g1 - g0,
                    100.0 * (g1 - g0) / (wall * cores),
                    srv.map_or_else(
                        || "not measured".to_owned(),
                        |c| format!("{c:.2} s, {:.3} ms per request", 1e3 * c / (sustainable * wall).max(1.0))
                    )
                );
            }
            let half = sustainable / 2.0;
            println!("open loop at half the sustainable rate: {half:.1}/s");
            half
        }
    };
    if !(rate > 0.0 && rate <= 100_000.0) {
        bail!("--rate must be in (0, 100000]");
    }
    // Resident memory of the spawned server, once a second, for the soak verdict.
    let samples: Arc<Mutex<Vec<(f64, u64)>>> = Arc::default();
    let sampler = pid.map(|pid| {
        let samples = samples.clone();
        tokio::spawn(async move {
            let start = Instant::now();
            loop {
                if let Some((_, rss)) = memory_kib(pid) {
                    samples
                        .lock()
                        .unwrap_or_else(std::sync::PoisonError::into_inner)
                        .push((start.elapsed().as_secs_f64(), rss));
                }
                tokio::time::sleep(Duration::from_secs(1)).await;
            }
        })
    });
    let out = open_loop(channel, req, rate, a.duration).await?;
    report("open loop", &out, rate);
    if let Some(t) = sampler {
        t.abort();
    }
    let mut soak_failed = false;
    if a.soak {
        let samples = samples.lock().unwrap_or_else(std::sync::PoisonError::into_inner).clone();
        let warm = samples.iter().find(|(t, _)| *t >= 0.1 * a.duration).copied();
        let end = samples.last().copied();
        let errors: u64 = out.codes.iter().filter(|(c, _)| c.as_str() != "OK").map(|(_, n)| n).sum();
        if let (Some((tw, rw)), Some((te, re))) = (warm, end) {
            let growth = (re as f64 - rw as f64) / rw as f64;
            let peak = samples.iter().map(|s| s.1).max().unwrap_or(re);
            println!(
                "soak: resident {:.1} MiB after warm-up (t = {tw:.0} s), {:.1} MiB at the end (t = {te:.0} s), growth {:+.1}%, peak {:.1} MiB; {errors} errors",
                rw as f64 / 1024.0,
                re as f64 / 1024.0,
                100.0 * growth,
                peak as f64 / 1024.0
            );
            let trace: Vec<String> = (0..=10)
                .filter_map(|i| samples.iter().find(|(t, _)| *t >= a.duration * f64::from(i) / 10.0))
                .map(|(t, r)| format!("{t:.0}s {:.1}", *r as f64 / 1024.0))
                .collect();
            println!("soak: resident MiB over the run: {}", trace.join(", "));
            soak_failed = growth >= 0.10 || errors > 0;
        } else {
            println!("soak: too few memory samples");
            soak_failed = true;
        }
    }
    if let (Some(pid), Some(mut c)) = (pid, child) {
        if let (Some((_, rss0)), Some((hwm, rss1))) = (mem0, memory_kib(pid)) {
            println!(
                "keelson serve memory: resident {:.1} MiB before load, {:.1} MiB after, peak {:.1} MiB",
                rss0 as f64 / 1024.0,
                rss1 as f64 / 1024.0,
                hwm as f64 / 1024.0
            );
        }
        let _ = std::process::Command::new("kill").args(["-TERM", &pid.to_string()]).status();
        let _ = c.wait();
    }
    if soak_failed {
        bail!("soak failed: errors, or memory growth of 10% or more");
    }
    Ok(())
}

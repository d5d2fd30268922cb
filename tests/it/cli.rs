//! The `keelson` command end to end: outputs, exit codes, and every kind of
//! bad input giving a clear error that names the line and column.

use std::path::PathBuf;
use std::process::{Command, Output};

use serde_json::Value;

fn keelson(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_keelson")).args(args).output().expect("keelson runs")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

/// Writes `text` to a fresh file in the test's temporary folder.
fn file(name: &str, text: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("keelson-cli-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

/// A valid window: `t` months, `n` factors, with market column MKT.
fn window(t: usize, n: usize) -> String {
    let panel = keelson::demo::synthetic_panel(3, t, n);
    keelson::demo::to_csv(&panel)
}

/// SHA-256 of a file, lower-case hex (the sha2 crate).
fn hex_of(p: &std::path::Path) -> String {
    use sha2::Digest as _;
    sha2::Sha256::digest(std::fs::read(p).unwrap()).iter().map(|b| format!("{b:02x}")).collect()
}

/// Applies `edit` to cell (line, column) of CSV text, both one-based.
fn edit_cell(csv: &str, line: usize, column: usize, value: &str) -> String {
    csv.lines()
        .enumerate()
        .map(|(i, l)| {
            if i + 1 == line {
                let mut cells: Vec<&str> = l.split(',').collect();
                cells[column - 1] = value;
                cells.join(",")
            } else {
                l.to_owned()
            }
        })
        .collect::<Vec<_>>()
        .join("\n")
        + "\n"
}

/// Runs `fit` on `csv` and asserts a data error (exit 1, no panic) whose message contains every needle.
fn assert_data_error(name: &str, csv: &str, extra: &[&str], needles: &[&str]) {
    let p = file(name, csv);
    let mut args = vec!["fit", "--returns", p.to_str().unwrap(), "--market", "MKT"];
    args.extend_from_slice(extra);
    let o = keelson(&args);
    let err = stderr(&o);
    assert_eq!(o.status.code(), Some(1), "{name}: exit code, stderr: {err}");
    assert!(!err.contains("panicked"), "{name}: panic: {err}");
    for n in needles {
        assert!(err.contains(n), "{name}: stderr lacks {n:?}: {err}");
    }
}

#[test]
fn fit_prints_a_table_and_proto_json() {
    let p = file("ok.csv", &window(120, 12));
    let o = keelson(&["fit", "--returns", p.to_str().unwrap(), "--market", "MKT"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let out = stdout(&o);
    assert!(out.contains("moss_value") && out.contains("market hedge") && out.contains("fingerprint sha256:"));

    let o = keelson(&["fit", "--returns", p.to_str().unwrap(), "--market", "MKT", "--format", "json"]);
    assert_eq!(o.status.code(), Some(0));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    // Proto3 JSON mapping: lowerCamelCase names.
    let weights = v["weights"].as_array().unwrap();
    assert_eq!(weights.len(), 12);
    assert!(weights.iter().all(|w| w["factor"].is_string() && w["weight"].is_number()));
    assert!(v["marketWeight"].is_number());
    assert!(v["diagnostics"]["numComponents"].as_u64().unwrap() >= 1);
    assert!(v["diagnostics"]["kappa"].as_f64().unwrap() > 0.0);
    assert!(v["diagnostics"]["excluded"].as_array().unwrap().is_empty());
    assert!(v["fingerprint"].as_str().unwrap().starts_with("sha256:"));
    assert_eq!(v["diagnostics"]["effectiveSettings"]["scaling"], "SCALING_SHARPE");
}

#[test]
fn settings_from_flags_and_files_apply() {
    let p = file("set.csv", &window(120, 10));
    let cfg = file("cfg.toml", "method = \"components\"\nscaling = \"covariance\"\ncomponents = 3\n");
    let o = keelson(&[
        "fit",
        "--returns",
        p.to_str().unwrap(),
        "--market",
        "MKT",
        "--config",
        cfg.to_str().unwrap(),
        "--set",
        "kappa=0.5",
        "--format",
        "json",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["diagnostics"]["numComponents"], 3);
    assert_eq!(v["diagnostics"]["kappa"], 0.5);
    assert_eq!(v["diagnostics"]["effectiveSettings"]["scaling"], "SCALING_COVARIANCE");
}

#[test]
fn previous_weights_give_turnover() {
    let p = file("tw.csv", &window(120, 6));
    let prev = file("prev.csv", "factor,weight\nmoss_value,0.5\nretired_factor,0.25\nMKT,-0.1\n");
    let o = keelson(&[
        "fit",
        "--returns",
        p.to_str().unwrap(),
        "--market",
        "MKT",
        "--previous-weights",
        prev.to_str().unwrap(),
        "--format",
        "json",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    let w: Vec<f64> = v["weights"].as_array().unwrap().iter().map(|w| w["weight"].as_f64().unwrap()).collect();
    // Turnover Σ|w − w_prev| + |w_m − w_m,prev| by its definition (SPEC §8, §10); the
    // unknown factor counts as sold and the row named after the market column is the hedge held.
    let hedge = v["marketWeight"].as_f64().unwrap();
    let want = (w[0] - 0.5).abs() + w[1..].iter().map(|x| x.abs()).sum::<f64>() + 0.25 + (hedge + 0.1).abs();
    let got = v["diagnostics"]["turnover"].as_f64().unwrap();
    assert!((got - want).abs() < 1e-12, "{got} vs {want}");
    let warnings = v["diagnostics"]["warnings"].as_array().unwrap();
    assert!(warnings.iter().any(|w| w["code"] == "previous-weights-unknown-factor"));
}

#[test]
fn bad_data_gives_clear_errors_with_exit_code_1() {
    let good = window(60, 5);
    // Header: period,MKT,f1..f5 → factor columns 3..7; data rows start at line 2.
    let ragged = edit_cell(&good, 4, 1, &format!("{},0.1", good.lines().nth(3).unwrap().split(',').next().unwrap()));
    assert_data_error("ragged.csv", &ragged, &[], &["line 4", "fields"]);
    assert_data_error("text.csv", &edit_cell(&good, 5, 4, "abc"), &[], &["line 5, column 4", "not a number"]);
    assert_data_error("pinf.csv", &edit_cell(&good, 6, 3, "inf"), &[], &["line 6, column 3", "not a finite number"]);
    assert_data_error("ninf.csv", &edit_cell(&good, 7, 5, "-inf"), &[], &["line 7, column 5", "not a finite number"]);
    let dup = good.replacen("fern_momentum", "moss_value", 1);
    assert_data_error("dup.csv", &dup, &[], &["line 1, column 4", "duplicate factor name"]);
    let unsorted = edit_cell(&good, 10, 1, "2015-01");
    assert_data_error("unsorted.csv", &unsorted, &[], &["line 10, column 1", "strictly increasing"]);
    let baddate = edit_cell(&good, 10, 1, "March");
    assert_data_error("baddate.csv", &baddate, &[], &["line 10, column 1", "YYYY-MM"]);
    assert_data_error("short.csv", &window(20, 5), &[], &["20 periods is too few", "at least 24"]);
    assert_data_error(
        "nomkt.csv",
        &edit_cell(&good, 8, 2, "NA"),
        &[],
        &["line 8, column 2", "market return is missing"],
    );
    let all_missing: String = good
        .lines()
        .enumerate()
        .map(|(i, l)| if i == 0 { l.to_owned() } else { edit_cell(l, 1, 6, "NA").trim_end().to_owned() })
        .collect::<Vec<_>>()
        .join("\n");
    assert_data_error("allna.csv", &all_missing, &[], &["column 6", "no values in the window"]);
    let one_na = edit_cell(&good, 9, 7, "NA");
    assert_data_error("reject.csv", &one_na, &["--set", "missing_policy=reject"], &["line 9, column 7", "missing"]);
    assert_data_error("empty.csv", "", &[], &["empty"]);
    assert_data_error(
        "toomanyk.csv",
        &good,
        &["--set", "method=components", "--set", "components=40"],
        &["components", "40 components requested"],
    );
    let nofile = keelson(&["fit", "--returns", "/nonexistent/keelson.csv"]);
    assert_eq!(nofile.status.code(), Some(1));
    assert!(stderr(&nofile).contains("cannot read /nonexistent/keelson.csv"));
}

#[test]
fn drop_factor_policy_excludes_and_reports() {
    let good = window(60, 5);
    let p = file("drop.csv", &edit_cell(&good, 9, 7, "NA"));
    let o = keelson(&["fit", "--returns", p.to_str().unwrap(), "--market", "MKT", "--format", "json"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    let ex = v["diagnostics"]["excluded"].as_array().unwrap();
    assert_eq!(ex.len(), 1);
    assert_eq!(ex[0]["factor"], "sieve_size");
    assert_eq!(ex[0]["code"], "missing-values");
    assert_eq!(v["weights"][4]["weight"], 0.0);
    assert_eq!(v["weights"][4]["excluded"], true);
}

#[test]
fn bad_usage_exits_2() {
    let p = file("usage.csv", &window(60, 4));
    let f = p.to_str().unwrap();
    for args in [
        vec!["fit"],
        vec!["fit", "--returns", f, "--set", "kapa=1"],
        vec!["fit", "--returns", f, "--set", "scaling=sharp"],
        vec!["fit", "--returns", f, "--set", "target_volatility=-0.1"],
        vec!["fit", "--returns", f, "--set", "folds"],
        vec!["fit", "--returns", f, "--format", "xml"],
        vec!["frobnicate"],
    ] {
        let o = keelson(&args);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {}", stderr(&o));
        assert!(!stderr(&o).contains("panicked"));
    }
    let o = keelson(&["fit", "--returns", f, "--set", "target_volatility=-0.1"]);
    assert!(stderr(&o).contains("setting `target_volatility`: value -0.1 is out of range"));
}

#[test]
fn demo_runs_and_matches_fit_on_its_own_csv() {
    let csv = std::env::temp_dir().join(format!("keelson-demo-{}.csv", std::process::id()));
    let report = std::env::temp_dir().join(format!("keelson-demo-report-{}", std::process::id()));
    let o = keelson(&["demo", "--write-csv", csv.to_str().unwrap(), "--report-dir", report.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let out = stdout(&o);
    assert!(out.contains("Tessaly Exchange") && out.contains("Caution:") && out.contains("past performance"));
    assert!(out.contains("deflated Sharpe ratio") && out.contains("KNS ridge, all factors"), "{out}");
    let html = std::fs::read_to_string(report.join("report.html")).unwrap();
    assert!(html.contains("<svg") && html.contains("Growth of one unit"));
    // JSON on standard output, and the report still written.
    let json_report = std::env::temp_dir().join(format!("keelson-demo-json-report-{}", std::process::id()));
    let o = keelson(&["demo", "--format", "json", "--report-dir", json_report.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(json_report.join("report.html").is_file() && json_report.join("summary.json").is_file());
    let demo: Value = serde_json::from_slice(&o.stdout).unwrap();
    let fit: Value = serde_json::from_slice(
        &keelson(&["fit", "--returns", csv.to_str().unwrap(), "--market", "MKT", "--format", "json"]).stdout,
    )
    .unwrap();
    assert_eq!(demo["weights"], fit["weights"]);
    assert_eq!(demo["fingerprint"], fit["fingerprint"]);
}

#[test]
fn backtest_writes_report_summary_and_returns() {
    let csv = file("bt.csv", &window(100, 8));
    let out = std::env::temp_dir().join(format!("keelson-bt-{}", std::process::id()));
    let o = keelson(&[
        "backtest",
        "--returns",
        csv.to_str().unwrap(),
        "--market",
        "MKT",
        "--window",
        "60",
        "--step",
        "2",
        "--benchmarks",
        "MKT,moss_value",
        "--sweep-max-k",
        "3",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(stdout(&o).contains("deflated Sharpe ratio"));
    let returns = std::fs::read_to_string(out.join("returns.csv")).unwrap();
    let mut lines = returns.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(&header[..2], &["period", "configured"]);
    // Stable strategy ids: no spaces, commas or capitals to mangle.
    assert!(header.contains(&"market") && header.contains(&"equal-weight") && header.contains(&"kns-ridge-pricing-r2"));
    assert!(header.iter().all(|h| h.chars().all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-')));
    assert_eq!(lines.count(), 40, "one row per out-of-sample period");
    // summary.json is the BacktestResult message in the proto3 JSON mapping.
    let text = std::fs::read_to_string(out.join("summary.json")).unwrap();
    let summary: Value = serde_json::from_str(&text).unwrap();
    assert_eq!(summary["refits"], 20);
    assert!(summary["strategies"][0].get("sharpeSeNeweyWest").is_some(), "proto names");
    // The ridge on every component always uses the covariance basis: its sweep is that basis alone.
    let sweep = summary["sweep"].as_array().unwrap();
    assert_eq!(sweep.len(), 3, "K = 1..3, once");
    assert!(sweep.iter().all(|p| p["scaling"] == "SCALING_COVARIANCE"), "{sweep:?}");
    // Trials: distinct candidates only, named; benchmarks are not among them.
    let trials: Vec<&str> = summary["trialNames"].as_array().unwrap().iter().map(|t| t.as_str().unwrap()).collect();
    assert_eq!(summary["trials"], trials.len());
    assert!(!trials.iter().any(|t| *t == "market" || *t == "equal weight"), "{trials:?}");
    let mut unique = trials.clone();
    unique.dedup();
    assert_eq!(unique.len(), trials.len());
    assert!(out.join("weights.csv").exists(), "the portfolio to hold beside the report");
    assert!(summary["verdict"].as_array().unwrap().len() >= 3);
    let sets: Vec<&Value> = summary["alphas"].as_array().unwrap().iter().map(|a| &a["benchmarks"]).collect();
    assert!(sets.iter().any(|b| b.as_array().unwrap().len() == 2), "the user's benchmark set is tested");
    // Provenance: versions, UTC run time, invocation, the input's SHA-256, span, options, settings.
    let p = &summary["provenance"];
    assert_eq!(p["keelsonVersion"], env!("CARGO_PKG_VERSION"));
    assert!(p["estimatorVersion"].as_str().unwrap().starts_with("keelson-estimator/"));
    let t = p["runTime"].as_str().unwrap();
    assert!(t.len() == 20 && t.ends_with('Z') && &t[10..11] == "T", "{t}");
    assert!(p["invocation"].as_str().unwrap().contains("backtest --returns"), "{p}");
    assert_eq!(p["input"], csv.to_str().unwrap());
    {
        // Independent of Keelson's code path: the sha2 crate over the file as written.
        use sha2::Digest as _;
        let digest = sha2::Sha256::digest(std::fs::read(&csv).unwrap());
        let hex: String = digest.iter().map(|b| format!("{b:02x}")).collect();
        assert_eq!(p["inputSha256"], hex);
        assert_eq!(hex, hex_of(&csv));
    }
    assert_eq!((p["periods"].as_u64(), p["factors"].as_u64(), p["market"].as_str()), (Some(100), Some(8), Some("MKT")));
    assert!(p["configured"].as_str().unwrap().contains("--set"), "{p}");
    assert_eq!(summary["options"]["window"], 60);
    assert_eq!(summary["options"]["step"], 2);
    let strategies = summary["strategies"].as_array().unwrap();
    for s in strategies {
        let fitted = s["id"] != "market";
        assert_eq!(s.get("settings").is_some(), fitted, "{}", s["id"]);
    }
    assert_eq!(strategies[0]["settings"]["method"], "METHOD_BLEND");
    // Warnings counted across refits: κ at the grid edge somewhere, with counts at most the refits.
    let counts: Vec<u64> = strategies
        .iter()
        .flat_map(|s| s["warnings"].as_array().cloned().unwrap_or_default())
        .map(|w| w["refits"].as_u64().unwrap())
        .collect();
    assert!(!counts.is_empty() && counts.iter().all(|&c| (1..=20).contains(&c)), "{counts:?}");
    assert!(stdout(&o).contains("warnings, "), "{}", stdout(&o));
    // The market regressed on a set holding the market: n/a with its reason, not t = 10.
    let own = summary["alphas"]
        .as_array()
        .unwrap()
        .iter()
        .find(|a| a["strategy"] == "market" && a["benchmarks"] == serde_json::json!(["market"]))
        .expect("the market against the market");
    assert!(own["alpha"].is_null() && own["tNeweyWest"].is_null(), "not computable: null, as in every JSON output");
    assert!(own["note"].as_str().unwrap().contains("one of its benchmarks"), "{own}");
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("n/a: the strategy is one of its benchmarks"));
    assert!(html.contains("What was run") && html.contains(&hex_of(&csv)) && html.contains("Warnings across refits"));
    assert_eq!(html.matches("<svg").count(), 9, "nine charts");
    assert_eq!(std::fs::read_dir(out.join("charts")).unwrap().count(), 9, "each chart also as a file");
    assert!(html.contains("Caution"));

    let bad = keelson(&[
        "backtest",
        "--returns",
        csv.to_str().unwrap(),
        "--market",
        "MKT",
        "--window",
        "200",
        "--out",
        out.to_str().unwrap(),
    ]);
    // A backtest option out of range is a usage error (exit 2) naming the flag.
    assert_eq!(bad.status.code(), Some(2));
    assert!(stderr(&bad).contains("--window"), "{}", stderr(&bad));
    let bad = keelson(&[
        "backtest",
        "--returns",
        csv.to_str().unwrap(),
        "--window",
        "60",
        "--benchmarks",
        "nope",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(bad.status.code(), Some(2));
    assert!(stderr(&bad).contains("--benchmarks") && stderr(&bad).contains("nope"), "{}", stderr(&bad));
}

/// SPEC §10 from the command line: model and implemented weights side by
/// side, and `ComputeWeights` answering the same request with the same
/// bytes as `fit --format json` (after the proto3 JSON mapping).
#[test]
fn limits_and_costs_from_the_command_line_match_the_service() {
    let csv = window(120, 12);
    let p = file("desk.csv", &csv);
    let names: Vec<String> = csv.lines().next().unwrap().split(',').skip(2).map(str::to_owned).collect();
    let held = file("held.csv", &format!("factor,weight\n{},0.15\n{},-0.1\nMKT,-0.02\n", names[0], names[3]));
    let args = |format: &str| -> Vec<String> {
        [
            "fit",
            "--returns",
            p.to_str().unwrap(),
            "--market",
            "MKT",
            "--set",
            "max_weight=0.2",
            "--set",
            "max_gross=2",
            "--set",
            "cost_bps=25",
            "--previous-weights",
            held.to_str().unwrap(),
            "--format",
            format,
        ]
        .map(str::to_owned)
        .to_vec()
    };
    let run = |a: Vec<String>| keelson(&a.iter().map(String::as_str).collect::<Vec<_>>());
    let o = run(args("table"));
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let out = stdout(&o);
    for needle in
        ["model", "weight", "gross exposure", "risk calibration", "implementation: tracking error", "solver solved"]
    {
        assert!(out.contains(needle), "table lacks {needle:?}:\n{out}");
    }
    let o = run(args("json"));
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: Value = serde_json::from_slice(&o.stdout).unwrap();
    for w in v["weights"].as_array().unwrap() {
        assert!(w["weight"].as_f64().unwrap().abs() <= 0.2 + 1e-9, "{w}");
        assert!(w["modelWeight"].is_number());
    }
    assert!(v["diagnostics"]["implementation"]["solverStatus"] == "solved");

    // The same request over gRPC: the proto response in the same JSON mapping, byte for byte.
    let mut panel = keelson::panel_csv::parse_returns(&csv, "desk.csv", Some("MKT")).unwrap().panel;
    panel.previous_weights = vec![(names[0].clone(), 0.15), (names[3].clone(), -0.1), ("MKT".into(), -0.02)];
    let mut s = keelson::estimator::Settings::default();
    for (k, val) in [("max_weight", "0.2"), ("max_gross", "2"), ("cost_bps", "25")] {
        s.set(k, val).unwrap();
    }
    let proto_settings = keelson::convert::settings_to_proto_only(&s, &["max_weight", "max_gross", "cost_bps"]);
    let req = keelson::convert::request_from_panel(&panel, proto_settings, "");
    let rt = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap();
    let resp = rt.block_on(async {
        let server = crate::common::Server::start(|_| {}).await;
        let mut c = server.client().await;
        let r = c.compute_weights(req).await.unwrap().into_inner();
        server.shutdown().await;
        r
    });
    let served = serde_json::to_string_pretty(&resp).unwrap() + "\n";
    assert_eq!(served, String::from_utf8_lossy(&o.stdout), "ComputeWeights and fit --format json differ");
}

/// Mistakes a scheduler must hear about at once: an unwritable report folder before any work,
/// a misspelt setting with the nearest key and the list, a market column that does not exist
/// with the columns that do.
#[test]
fn mistakes_are_named_before_any_work() {
    let p = file("mistakes.csv", &window(200, 6));
    let o = keelson(&["backtest", "--returns", p.to_str().unwrap(), "--market", "MKT", "--out", "/proc/keelson-nope"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("--out /proc/keelson-nope"), "{}", stderr(&o));
    // Refused before the backtest: no progress or summary was printed.
    assert!(stdout(&o).is_empty(), "{}", stdout(&o));
    let o = keelson(&["fit", "--returns", p.to_str().unwrap(), "--market", "MKT", "--set", "scalng=sharpe"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("did you mean `scaling`?") && stderr(&o).contains("kappa_grid_max"), "{}", stderr(&o));
    let o = keelson(&["fit", "--returns", p.to_str().unwrap(), "--market", "Mkt"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(stderr(&o).contains("the columns are: MKT, "), "{}", stderr(&o));
}

/// Strict mode: a warning named by `--fail-on` exits 3 after the output is
/// written; an unknown code is a usage error naming the closest one; a flag
/// of another command is a usage error; a semicolon file gets a hint.
#[test]
fn strict_mode_and_misplaced_flags() {
    // 30 periods of 20 factors: T < 2N raises short-window.
    let short = file("short.csv", &window(30, 20));
    let f = short.to_str().unwrap();
    let base = ["fit", "--returns", f, "--market", "MKT", "--set", "method=components", "--format", "json"];
    let o = keelson(&base);
    assert_eq!(o.status.code(), Some(0), "a warning alone does not fail: {}", stderr(&o));
    let plain: Value = serde_json::from_slice(&o.stdout).unwrap();
    let codes: Vec<&str> =
        plain["diagnostics"]["warnings"].as_array().unwrap().iter().map(|w| w["code"].as_str().unwrap()).collect();
    assert!(codes.contains(&"short-window"), "{codes:?}");
    for fail_on in ["short-window", "any", "return-scale,short-window"] {
        let o = keelson(&[&base[..], &["--fail-on", fail_on]].concat());
        assert_eq!(o.status.code(), Some(3), "--fail-on {fail_on}: {}", stderr(&o));
        let strict: Value = serde_json::from_slice(&o.stdout).expect("the output is still written");
        assert_eq!(strict["weights"], plain["weights"]);
        assert!(stderr(&o).contains("short-window"), "{}", stderr(&o));
    }
    let o = keelson(&[&base[..], &["--fail-on", "return-scale"]].concat());
    assert_eq!(o.status.code(), Some(0), "a code not raised does not fail: {}", stderr(&o));
    let o = keelson(&[&base[..], &["--fail-on", "short-windw"]].concat());
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("did you mean short-window?") && stderr(&o).contains("kappa-at-grid-edge"),
        "{}",
        stderr(&o)
    );

    // A backtest in strict mode: the report is written, then exit 3.
    let out = std::env::temp_dir().join(format!("keelson-strict-{}", std::process::id()));
    let hist = file("strict-history.csv", &window(80, 20));
    let o = keelson(&[
        "backtest",
        "--returns",
        hist.to_str().unwrap(),
        "--market",
        "MKT",
        "--window",
        "36",
        "--step",
        "22",
        "--no-baselines",
        "--sweep-max-k",
        "0",
        "--set",
        "method=components",
        "--fail-on",
        "short-window",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(3), "{}", stderr(&o));
    assert!(out.join("report.html").is_file() && out.join("summary.json").is_file());
    // Off a terminal, progress comes as plain lines on standard error.
    assert!(stderr(&o).contains("progress: "), "{}", stderr(&o));

    // A flag of another command: `--previous-weights` does not apply to a backtest.
    let prev = file("strict-prev.csv", "factor,weight\nmoss_value,0.5\n");
    let o = keelson(&[
        "backtest",
        "--returns",
        hist.to_str().unwrap(),
        "--previous-weights",
        prev.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(stderr(&o).contains("--previous-weights"), "{}", stderr(&o));

    // A semicolon-separated file reads as one column: say so.
    let semi = file("semi.csv", &window(30, 3).replace(',', ";"));
    let o = keelson(&["fit", "--returns", semi.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(1));
    assert!(stderr(&o).contains("semicolons"), "{}", stderr(&o));
}

/// Dates `step` calendar days apart from 2019-01-07 (a Monday), business days
/// only when `business` (weekends skipped), as YYYY-MM-DD.
fn dates(n: usize, step: u32, business: bool) -> Vec<String> {
    let month_days = |y: u32, m: u32| match m {
        2 if y.is_multiple_of(4) && (!y.is_multiple_of(100) || y.is_multiple_of(400)) => 29,
        2 => 28,
        4 | 6 | 9 | 11 => 30,
        _ => 31,
    };
    let (mut y, mut m, mut d, mut weekday) = (2019u32, 1u32, 7u32, 0u32);
    let mut out = Vec::new();
    while out.len() < n {
        if !(business && weekday >= 5) {
            out.push(format!("{y:04}-{m:02}-{d:02}"));
        }
        for _ in 0..step {
            weekday = (weekday + 1) % 7;
            d += 1;
            if d > month_days(y, m) {
                d = 1;
                m += 1;
                if m > 12 {
                    m = 1;
                    y += 1;
                }
            }
        }
    }
    out
}

/// The CSV of `window(t, n)` with its period labels replaced.
fn relabelled(t: usize, n: usize, labels: &[String]) -> String {
    let csv = window(t, n);
    let mut lines = csv.lines();
    let mut out = format!("{}\n", lines.next().unwrap());
    for (line, label) in lines.zip(labels) {
        let rest = line.split_once(',').unwrap().1;
        out.push_str(&format!("{label},{rest}\n"));
    }
    out
}

/// SPEC §13: the frequency is read from the labels (daily, weekly, monthly,
/// quarterly), reported, and a contradicting `periods_per_year` is a usage
/// error (exit 2) unless `frequency_check = false`; irregular labels are refused.
#[test]
fn the_frequency_comes_from_the_labels() {
    let quarters: Vec<String> =
        (0..80).map(|i| format!("{:04}-{:02}-{}", 1990 + i / 4, 3 * (i % 4) + 3, [31, 30, 30, 31][i % 4])).collect();
    for (name, labels, ppy) in [
        ("daily", dates(300, 1, true), 252),
        ("weekly", dates(150, 7, false), 52),
        ("monthly", (0..120).map(|i| format!("{:04}-{:02}", 2001 + i / 12, i % 12 + 1)).collect(), 12),
        ("quarterly", quarters, 4),
    ] {
        let p = file(&format!("freq-{name}.csv"), &relabelled(labels.len(), 5, &labels));
        let f = p.to_str().unwrap();
        let o = keelson(&["fit", "--returns", f, "--market", "MKT", "--format", "json"]);
        assert_eq!(o.status.code(), Some(0), "{name}: {}", stderr(&o));
        let v: Value = serde_json::from_slice(&o.stdout).unwrap();
        assert_eq!(v["diagnostics"]["periodsPerYear"], ppy, "{name}");
        assert_eq!(v["diagnostics"]["periodsPerYearInferred"], true, "{name}");
        let wrong = if ppy == 12 { "52" } else { "12" };
        let o = keelson(&["fit", "--returns", f, "--market", "MKT", "--set", &format!("periods_per_year={wrong}")]);
        assert_eq!(o.status.code(), Some(2), "{name}: {}", stderr(&o));
        assert!(stderr(&o).contains(&format!("period labels are {ppy} a year")), "{name}: {}", stderr(&o));
        let o = keelson(&[
            "fit",
            "--returns",
            f,
            "--market",
            "MKT",
            "--set",
            &format!("periods_per_year={wrong}"),
            "--set",
            "frequency_check=false",
        ]);
        assert_eq!(o.status.code(), Some(0), "{name}: {}", stderr(&o));
    }
    // Daily labels, then monthly ones: no one frequency, named at the first odd gap.
    let mut mixed = dates(60, 1, true);
    mixed.extend((0..20).map(|i| format!("{:04}-{:02}-01", 2020 + i / 12, i % 12 + 1)));
    let p = file("freq-mixed.csv", &relabelled(80, 5, &mixed));
    let o = keelson(&["fit", "--returns", p.to_str().unwrap(), "--market", "MKT"]);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    assert!(stderr(&o).contains("not evenly spaced") && stderr(&o).contains("row 60"), "{}", stderr(&o));
}

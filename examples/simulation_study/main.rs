//! Simulated markets whose true means and covariances are known: every
//! method's weights scored by their true Sharpe ratio as a share of the
//! market's maximum, so that no sampling noise of an evaluation enters
//! (SPEC §11). The evidence behind the default.
//!
//! ```sh
//! cargo run --release --example simulation_study                       # every family
//! cargo run --release --example simulation_study -- --families broad --markets 100
//! cargo run --release --example simulation_study -- --risk-calibration held-out,off
//! ```
//!
//! Markets are drawn from distributions of structures, not fixed designs
//! (`markets.rs`): N log-uniform on 25–300, the maximum Sharpe ratio uniform
//! on 0.5–1.5 a year, each market simulated once at every T of `--periods`.
//! Four sets of markets:
//! - `broad` and `probe`, the tuning families: the default is chosen on
//!   them, by the rule in [`choose`], and on nothing else (`probe` was
//!   written as a held-out family and consulted once, so it counts as tuning);
//! - `fresh`: the `broad` distribution with another seed (markets drawn afresh);
//! - `holdout`: the held-out family, other spectra (Toeplitz, hierarchical),
//!   other premia (many small own alphas, mid-spectrum, a sparse discount
//!   factor) and other tails (Student-t GARCH, compensated crashes), which no
//!   choice here looks at.
//!
//! Efficiency is (μ'w/√(w'Σw))/√(μ'Σ⁻¹μ); "vol / target" is the true
//! annualised volatility √(12·w'Σw) over the target; "gross" is Σ|wᵢ|.
//! Comparisons are paired (the same panel for every method) with the
//! standard error of the mean difference across markets.

mod markets;

use std::fmt::Write as _;
use std::sync::atomic::{AtomicUsize, Ordering};

use keelson::demo::SplitMix as Rng;
use keelson::estimator::{self, CvCriterion, Method, ReturnPanel, RiskCalibration, Scaling, Settings, WeightSet};
use markets::{Family, Market, OpenSpectrum};

/// A method run by the library, or a mix of such methods' normalised
/// portfolios (the ensemble's arithmetic: members at the target in the
/// window, averaged, normalised again, scaled by the members' mean risk
/// calibration factor).
enum Candidate {
    Fit(Settings),
    Mix(Vec<(usize, f64)>),
    /// The member with the best held-out score (its own weights).
    BestScore(Vec<usize>),
}

struct Named {
    name: String,
    candidate: Candidate,
}

/// The candidates; the first is the library's default, the single methods
/// end at [`SINGLES`], the mixes follow.
fn candidates(rule: RiskCalibration) -> Vec<Named> {
    let base = Settings { demarket: false, risk_calibration: rule, ..Settings::default() };
    let fit = |name: &str, s: Settings| Named { name: name.into(), candidate: Candidate::Fit(s) };
    let mut out = vec![
        fit(&format!("default ({})", base.method), base.clone()),
        fit("kns-ridge, κ by held-out Sharpe", Settings { method: Method::KnsRidge, ..base.clone() }),
    ];
    for sc in Scaling::ALL {
        out.push(fit(
            &format!("components, scaling {sc}"),
            Settings { method: Method::Components, scaling: sc, ..base.clone() },
        ));
    }
    out.push(fit(
        "components, scaling auto",
        Settings { method: Method::Components, scaling: Scaling::Auto, ..base.clone() },
    ));
    out.push(fit("ensemble", Settings { method: Method::Ensemble, ..base.clone() }));
    out.push(fit(
        "kns-ridge, κ by pricing R² (as published)",
        Settings { method: Method::KnsRidge, cv_criterion: CvCriterion::PricingR2, ..base.clone() },
    ));
    out.push(fit("plug-in, Ledoit–Wolf", Settings { method: Method::PlugInLedoitWolf, ..base.clone() }));
    out.push(fit("plug-in", Settings { method: Method::PlugIn, ..base.clone() }));
    out.push(fit("equal weight", Settings { method: Method::EqualWeight, ..base }));
    assert_eq!(out.len(), SINGLES);
    let (ridge, risk_premium, lw) = (1, 6, 11);
    let scalings: Vec<usize> = (2..=7).collect();
    let mix = |name: &str, parts: Vec<(usize, f64)>| Named { name: name.into(), candidate: Candidate::Mix(parts) };
    let mut every = vec![(ridge, 1.0 / 7.0)];
    every.extend(scalings.iter().map(|&i| (i, 1.0 / 7.0)));
    out.push(mix("mix: ridge and every scaling, equal", every));
    let mut half = vec![(ridge, 0.5)];
    half.extend(scalings.iter().map(|&i| (i, 1.0 / 12.0)));
    out.push(mix("mix: ½ ridge, ½ ensemble", half));
    out.push(mix("mix: ridge and risk-premium", vec![(ridge, 0.5), (risk_premium, 0.5)]));
    out.push(mix(
        "mix: ridge, risk-premium, Ledoit–Wolf",
        vec![(ridge, 1.0 / 3.0), (risk_premium, 1.0 / 3.0), (lw, 1.0 / 3.0)],
    ));
    out.push(mix("mix: ridge and Ledoit–Wolf (the blend's arithmetic)", vec![(ridge, 0.5), (lw, 0.5)]));
    let mut thirds = vec![(ridge, 1.0 / 3.0), (lw, 1.0 / 3.0)];
    thirds.extend(scalings.iter().map(|&i| (i, 1.0 / 18.0)));
    out.push(mix("mix: ridge, ensemble, Ledoit–Wolf", thirds));
    let mut best = vec![ridge];
    best.extend(scalings);
    out.push(Named {
        name: "best held-out score among ridge and scalings".into(),
        candidate: Candidate::BestScore(best),
    });
    out
}

/// How many candidates are single methods (the default among them).
const SINGLES: usize = 14;

/// One candidate's result on one panel.
#[derive(Clone, Copy, Default)]
struct Score {
    efficiency: f64,
    vol_ratio: f64,
    gross: f64,
}

const FAILED: Score = Score { efficiency: f64::NAN, vol_ratio: f64::NAN, gross: f64::NAN };

/// Annualised in-window volatility of F·w (divisor T − 1, twelve periods a year).
fn in_window_vol(panel: &ReturnPanel, w: &[f64]) -> f64 {
    let r: Vec<f64> =
        (0..panel.rows).map(|s| (0..panel.cols).map(|i| panel.returns[s * panel.cols + i] * w[i]).sum()).collect();
    let m = r.iter().sum::<f64>() / r.len() as f64;
    (12.0 * r.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (r.len() as f64 - 1.0)).sqrt()
}

fn run_cell(market: &Market, panel: &ReturnPanel, cands: &[Named]) -> Vec<Score> {
    let target = Settings::default().target_volatility;
    let mut fits: Vec<Option<WeightSet>> = Vec::new();
    let mut out = Vec::with_capacity(cands.len());
    let score = |w: &[f64]| {
        let (efficiency, vol, gross) = market.score(w);
        Score { efficiency, vol_ratio: vol / target, gross }
    };
    for c in cands {
        let s = match &c.candidate {
            Candidate::Fit(settings) => {
                let ws = estimator::fit(panel, &settings.clone().check().expect("valid settings"))
                    .map_err(|e| eprintln!("fit failed: {e}"))
                    .ok();
                let s =
                    ws.as_ref().map_or(FAILED, |ws| score(&ws.factors.iter().map(|f| f.weight).collect::<Vec<_>>()));
                fits.push(ws);
                s
            }
            Candidate::Mix(parts) => {
                let n = panel.cols;
                let mut w = vec![0.0; n];
                let mut factor = 0.0;
                let mut ok = true;
                for &(i, share) in parts {
                    let Some(ws) = &fits[i] else {
                        ok = false;
                        break;
                    };
                    let c = ws.diagnostics.risk_calibration.map_or(1.0, |c| c.factor);
                    for (a, f) in w.iter_mut().zip(&ws.factors) {
                        *a += share * f.weight / c;
                    }
                    factor += share * c;
                }
                if ok {
                    let k = target / in_window_vol(panel, &w) * factor.clamp(0.25, 4.0);
                    w.iter_mut().for_each(|x| *x *= k);
                    score(&w)
                } else {
                    FAILED
                }
            }
            Candidate::BestScore(members) => members
                .iter()
                .filter_map(|&i| fits[i].as_ref().map(|ws| (i, ws.diagnostics.cv_best_score)))
                .filter(|(_, s)| s.is_finite())
                .max_by(|a, b| a.1.total_cmp(&b.1))
                .map_or(FAILED, |(i, _)| out[i]),
        };
        out.push(s);
    }
    out
}

/// One market simulated at one T, and every candidate's score on it.
struct Cell {
    family: &'static str,
    design: &'static str,
    spectrum: &'static str,
    tails: &'static str,
    n: usize,
    t: usize,
    scores: Vec<Score>,
}

fn list<T: std::str::FromStr>(args: &[String], flag: &str, default: &str) -> Vec<T> {
    let v = args.iter().position(|a| a == flag).and_then(|i| args.get(i + 1)).map_or(default, String::as_str);
    v.split(',').map(|x| x.parse().ok().unwrap_or_else(|| panic!("{flag}: cannot read {x:?}"))).collect()
}

/// Runs `markets` markets of a family at every T, on every core.
#[allow(clippy::too_many_arguments)]
fn study(
    family: Family,
    label: &'static str,
    seed: u64,
    markets: usize,
    periods: &[usize],
    sizes: (usize, usize),
    open: OpenSpectrum,
    cands: &[Named],
) -> Vec<Cell> {
    let jobs: Vec<(usize, usize)> = (0..markets).flat_map(|m| periods.iter().map(move |&t| (m, t))).collect();
    let next = AtomicUsize::new(0);
    let threads = std::thread::available_parallelism().map_or(1, |p| p.get());
    let mut cells: Vec<(usize, Cell)> = std::thread::scope(|scope| {
        let handles: Vec<_> = (0..threads)
            .map(|_| {
                scope.spawn(|| {
                    let mut done = Vec::new();
                    loop {
                        let j = next.fetch_add(1, Ordering::Relaxed);
                        let Some(&(m, t)) = jobs.get(j) else { break done };
                        let designs = family.designs();
                        let design = designs[m % designs.len()];
                        // The market depends on (seed, m) only; the panel on T too.
                        let mut rng = Rng(seed ^ (m as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15));
                        let market = markets::draw(family, design, sizes.0, sizes.1, open, &mut rng);
                        let mut panel_rng = Rng(rng.next_u64() ^ (t as u64) << 40);
                        let panel = market.simulate(t, &mut panel_rng);
                        let scores = run_cell(&market, &panel, cands);
                        done.push((
                            j,
                            Cell {
                                family: label,
                                design,
                                spectrum: market.spectrum,
                                tails: market.tails_name,
                                n: market.factors(),
                                t,
                                scores,
                            },
                        ));
                    }
                })
            })
            .collect();
        handles.into_iter().flat_map(|h| h.join().expect("a worker")).collect()
    });
    cells.sort_by_key(|(j, _)| *j);
    cells.into_iter().map(|(_, c)| c).collect()
}

/// Mean and standard error of the finite values.
fn mean_se(v: impl Iterator<Item = f64>) -> (f64, f64) {
    let v: Vec<f64> = v.filter(|x| x.is_finite()).collect();
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0).max(1.0);
    (m, (var / n).sqrt())
}

fn mean_of(cells: &[&Cell], k: usize, f: fn(&Score) -> f64) -> f64 {
    mean_se(cells.iter().map(|c| f(&c.scores[k]))).0
}

/// Paired difference of candidate `a` over `b`: mean and standard error across panels.
fn paired(cells: &[&Cell], a: usize, b: usize) -> (f64, f64) {
    mean_se(cells.iter().map(|c| c.scores[a].efficiency - c.scores[b].efficiency))
}

const CHOICE_T: [usize; 2] = [120, 240];

/// The sets of markets: label, generator family, seed salt.
const SETS: [(&str, Family, u64); 4] = [
    ("broad", Family::Broad, 0),
    ("probe", Family::Probe, 0x0DD5_EED0_0000_0000),
    ("fresh", Family::Broad, 0xF7E5_4000_0000_0000),
    ("holdout", Family::Holdout, 0x4E1D_0000_0000_0000),
];

/// The families the default may be chosen on.
const TUNING: [&str; 2] = ["broad", "probe"];

/// Largest shortfall of each candidate from the best candidate's mean
/// efficiency over the groups of cells that `key` forms (T ∈ {120, 240} only).
fn worst_regret(cells: &[&Cell], k: usize, key: impl Fn(&Cell) -> String) -> Vec<f64> {
    let mut keys: Vec<String> = cells.iter().filter(|c| CHOICE_T.contains(&c.t)).map(|c| key(c)).collect();
    keys.sort();
    keys.dedup();
    let mut worst = vec![0.0f64; k];
    for g in keys {
        let group: Vec<&Cell> = cells.iter().copied().filter(|c| CHOICE_T.contains(&c.t) && key(c) == g).collect();
        let means: Vec<f64> = (0..k).map(|i| mean_of(&group, i, |s| s.efficiency)).collect();
        let best = means.iter().copied().filter(|x| x.is_finite()).fold(f64::NEG_INFINITY, f64::max);
        for i in 0..k {
            worst[i] = worst[i].max(best - means[i]);
        }
    }
    worst
}

/// One candidate under the rule.
struct Standing {
    mean: f64,
    family_regret: f64,
    design_regret: f64,
    eligible: bool,
}

/// The rule that picks the default, applied to the tuning families only:
/// among candidates whose mean true volatility ÷ target is within 0.90–1.10
/// in every tuning family at T = 120 and 240, the smallest worst-case regret
/// over family × T ∈ {120, 240} (the largest shortfall of the candidate's
/// mean efficiency from the best candidate's); candidates within 0.01 of
/// that smallest regret are level, and the highest mean efficiency over the
/// tuning cells at those T wins among them. The worst regret over design ×
/// T is reported beside it, not used.
fn choose(cells: &[&Cell], cands: &[Named]) -> (Vec<Standing>, usize) {
    let k = cands.len();
    let family_regret = worst_regret(cells, k, |c| format!("{} {}", c.family, c.t));
    let design_regret = worst_regret(cells, k, |c| format!("{} {} {}", c.family, c.design, c.t));
    let chosen_t: Vec<&Cell> = cells.iter().copied().filter(|c| CHOICE_T.contains(&c.t)).collect();
    let rows: Vec<Standing> = (0..k)
        .map(|i| {
            let eligible = TUNING.iter().all(|f| {
                CHOICE_T.iter().all(|&t| {
                    let g: Vec<&Cell> = cells.iter().copied().filter(|c| c.t == t && c.family == *f).collect();
                    g.is_empty() || (0.90..=1.10).contains(&mean_of(&g, i, |s| s.vol_ratio))
                })
            });
            Standing {
                mean: mean_of(&chosen_t, i, |s| s.efficiency),
                family_regret: family_regret[i],
                design_regret: design_regret[i],
                eligible,
            }
        })
        .collect();
    let floor = rows.iter().filter(|r| r.eligible).map(|r| r.family_regret).fold(f64::INFINITY, f64::min);
    let winner = (0..k)
        .filter(|&i| rows[i].eligible && rows[i].family_regret <= floor + 0.01)
        .max_by(|&a, &b| rows[a].mean.total_cmp(&rows[b].mean))
        .unwrap_or(0);
    (rows, winner)
}

fn family_table(out: &mut String, label: &str, cells: &[&Cell], designs: &[&str], cands: &[Named]) {
    let _ = writeln!(out, "\n### {label}: mean efficiency ({} markets × T)\n", cells.len());
    let mut header = "| method |".to_owned();
    for d in designs {
        let _ = write!(header, " {d} |");
    }
    header.push_str(" T=120 | T=240 | all T | vol / target T=120 | T=240 | gross |");
    let line = format!("|---|{}", "---|".repeat(designs.len() + 6));
    let _ = writeln!(out, "{header}\n{line}");
    let by_t = |t: usize| cells.iter().copied().filter(|c| c.t == t).collect::<Vec<_>>();
    let (t120, t240) = (by_t(120), by_t(240));
    for (k, c) in cands.iter().enumerate() {
        let mut row = format!("| {} |", c.name);
        for d in designs {
            let g: Vec<&Cell> = cells.iter().copied().filter(|c| c.design == *d).collect();
            let _ = write!(row, " {:.3} |", mean_of(&g, k, |s| s.efficiency));
        }
        let _ = writeln!(
            out,
            "{row} {:.3} | {:.3} | {:.3} | {:.2} | {:.2} | {:.2} |",
            mean_of(&t120, k, |s| s.efficiency),
            mean_of(&t240, k, |s| s.efficiency),
            mean_of(cells, k, |s| s.efficiency),
            mean_of(&t120, k, |s| s.vol_ratio),
            mean_of(&t240, k, |s| s.vol_ratio),
            mean_of(cells, k, |s| s.gross),
        );
    }
}

fn comparison_table(out: &mut String, label: &str, cells: &[&Cell], cands: &[Named], against: usize) {
    let _ = writeln!(
        out,
        "\n### {label}: {} minus each alternative, paired mean difference in efficiency (SE)\n\n| alternative | T=120 | T=240 | all T |\n|---|---|---|---|",
        cands[against].name
    );
    let by_t = |t: usize| cells.iter().copied().filter(|c| c.t == t).collect::<Vec<_>>();
    for (k, c) in cands.iter().enumerate() {
        if k == against {
            continue;
        }
        let f = |g: &[&Cell]| {
            let (m, se) = paired(g, against, k);
            format!("{m:+.3} ({se:.3})")
        };
        let _ = writeln!(out, "| {} | {} | {} | {} |", c.name, f(&by_t(120)), f(&by_t(240)), f(cells));
    }
}

/// The issue's yardstick: the default's mean efficiency against the best
/// single alternative (no mix) at T = 120 and 240, and its volatility ratio.
fn target_line(out: &mut String, label: &str, cells: &[&Cell], cands: &[Named]) {
    let _ = write!(out, "\n{label}: default − best single alternative:");
    for t in CHOICE_T {
        let g: Vec<&Cell> = cells.iter().copied().filter(|c| c.t == t).collect();
        let (best, _) = (1..SINGLES)
            .map(|k| (k, mean_of(&g, k, |s| s.efficiency)))
            .fold((0, f64::NEG_INFINITY), |a, b| if b.1 > a.1 { b } else { a });
        let (diff, se) = paired(&g, 0, best);
        let _ = write!(
            out,
            " T={t}: {diff:+.3} (SE {se:.3}) against {}, vol / target {:.2};",
            cands[best].name,
            mean_of(&g, 0, |s| s.vol_ratio)
        );
    }
    let _ = writeln!(out);
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let periods: Vec<usize> = list(&args, "--periods", "60,120,240,600");
    let sizes: Vec<usize> = list(&args, "--sizes", "25,300");
    let markets: usize = list(&args, "--markets", "40")[0];
    let seed: u64 = list(&args, "--seed", "20261204")[0];
    let families: Vec<String> = list(&args, "--families", "broad,probe,fresh,holdout");
    let rules: Vec<String> = list(&args, "--risk-calibration", "held-out");
    let json = args.iter().position(|a| a == "--json").and_then(|i| args.get(i + 1));
    let open_text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/reference/data/french.csv"))
        .expect("the open dataset");
    let open_panel =
        keelson::panel_csv::parse_returns(&open_text, "french.csv", Some("MKT")).expect("the open dataset").panel;
    let open = markets::fit_open_spectrum(&open_panel);
    let mut out = String::new();
    let _ = writeln!(
        out,
        "Simulation study: {markets} markets per family, each at T ∈ {periods:?}, N log-uniform on {sizes:?}, seed {seed}.\n\
         Open dataset's spectrum (demarketed, {} factors): λ_j ≈ {:.2e}·j^(−{:.2}); its factors' annualised \
         Sharpe ratios: mean {:.2}, standard deviation {:.2}.",
        open_panel.cols,
        open.log_level.exp(),
        open.alpha,
        open.sharpe_mean,
        open.sharpe_sd
    );
    let mut raw = Vec::new();
    for rule in &rules {
        let rule: RiskCalibration =
            serde_json::from_value(serde_json::Value::String(rule.clone())).expect("a risk_calibration rule");
        let cands = candidates(rule);
        let mut all: Vec<Cell> = Vec::new();
        for f in &families {
            let (label, family, salt) =
                *SETS.iter().find(|(l, ..)| l == f).unwrap_or_else(|| panic!("--families: unknown family {f:?}"));
            let s = seed ^ salt;
            let started = std::time::Instant::now();
            all.extend(study(family, label, s, markets, &periods, (sizes[0], sizes[1]), open, &cands));
            eprintln!("{label}: {:.1} s", started.elapsed().as_secs_f64());
        }
        let _ = writeln!(out, "\n## risk_calibration = {rule}");
        let of = |label: &str| all.iter().filter(|c| c.family == label).collect::<Vec<_>>();
        let tuning: Vec<&Cell> = all.iter().filter(|c| TUNING.contains(&c.family)).collect();
        let winner = if tuning.is_empty() {
            0
        } else {
            let (rows, winner) = choose(&tuning, &cands);
            let _ = writeln!(
                out,
                "\n### The rule on the tuning families ({}): mean efficiency at T ∈ {{120, 240}}, worst-case regret\n\n| method | mean | worst regret, family × T (the rule) | worst regret, design × T | vol within 0.90–1.10 |\n|---|---|---|---|---|",
                TUNING.join(", ")
            );
            for (c, r) in cands.iter().zip(&rows) {
                let _ = writeln!(
                    out,
                    "| {} | {:.3} | {:.3} | {:.3} | {} |",
                    c.name,
                    r.mean,
                    r.family_regret,
                    r.design_regret,
                    if r.eligible { "yes" } else { "no" }
                );
            }
            let _ = writeln!(out, "\nChosen by the rule: **{}**", cands[winner].name);
            winner
        };
        for f in &families {
            let cells = of(f);
            let designs = SETS.iter().find(|(l, ..)| l == f).map_or(&[][..], |(_, family, _)| family.designs());
            family_table(&mut out, f, &cells, designs, &cands);
            target_line(&mut out, f, &cells, &cands);
            comparison_table(&mut out, f, &cells, &cands, 0);
            if winner != 0 {
                comparison_table(&mut out, f, &cells, &cands, winner);
            }
        }
        for c in &all {
            let scores: Vec<serde_json::Value> = c
                .scores
                .iter()
                .zip(&cands)
                .map(|(s, k)| serde_json::json!({"method": k.name, "efficiency": s.efficiency, "vol_ratio": s.vol_ratio, "gross": s.gross}))
                .collect();
            raw.push(serde_json::json!({
                "risk_calibration": rule, "family": c.family, "design": c.design, "spectrum": c.spectrum,
                "tails": c.tails, "n": c.n, "t": c.t, "scores": scores,
            }));
        }
    }
    if let Some(path) = json {
        std::fs::write(path, serde_json::to_string(&raw).expect("json")).expect("write --json");
    }
    print!("{out}");
}

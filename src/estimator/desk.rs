//! The implementation stage (SPEC §10): from the model portfolio w* to the
//! portfolio the risk system lets the desk hold, within caps on single
//! weights, gross exposure, the market hedge and turnover, with trading costs
//! against what is already held.
//!
//! The problem, per period and strictly convex,
//!
//! ```text
//! minimise  (γ*/2)(w − w*)'Ω(w − w*) + c·(Σ|wᵢ − pᵢ| + |w_m − p_m|)
//! subject to |wᵢ| ≤ max_weight, Σ|wᵢ| + |w_m| ≤ max_gross, |w_m| ≤ max_market_weight,
//!            Σ|wᵢ − pᵢ| + |w_m − p_m| ≤ max_turnover,   w_m = −β'w,
//! ```
//!
//! is written in the standard conic form of the `clarabel` interior-point
//! solver with auxiliary variables for the absolute values. Ω is the
//! Ledoit–Wolf covariance of the window's demarketed factors and
//! γ* = SR_model/σ*, so that w* is the mean–variance optimum of the implied
//! expected returns γ*Ωw*: costs and limits are priced in the model's own
//! expected return. Nothing is renormalised afterwards.

use std::panic::{AssertUnwindSafe, catch_unwind};

use clarabel::algebra::CscMatrix;
use clarabel::solver::{
    DefaultInfo, DefaultSettings, DefaultSolver, IPSolver, NonnegativeConeT, SolverStatus, SupportedConeT,
};
use faer::Mat;

use super::error::EstimateError;
use super::moments::Moments;
use super::settings::ValidSettings;
use super::stop::Stop;
use super::weights::Warning;
use super::window::{ReturnPanel, ReturnWindow};

/// Floor of the model's Sharpe ratio in γ*, annualised (SPEC §10).
pub const MODEL_SHARPE_FLOOR: f64 = 0.1;

/// Interior-point tolerance on the duality gap and feasibility (SPEC §10: ≤ 1e-9).
pub const SOLVER_TOLERANCE: f64 = 1e-12;

/// Iterations the solver may take.
pub const SOLVER_MAX_ITERATIONS: u32 = 200;

/// A constraint is reported as binding when its slack is below this, relative to 1 + its limit.
pub const BINDING_TOLERANCE: f64 = 1e-8;

/// The limits and cost of the stage, from the settings.
#[derive(Clone, Copy, Debug, PartialEq, serde::Serialize)]
pub struct Limits {
    /// |wᵢ| ≤ this.
    pub max_weight: Option<f64>,
    /// Σ|wᵢ| + |w_m| ≤ this.
    pub max_gross: Option<f64>,
    /// |w_m| ≤ this.
    pub max_market_weight: Option<f64>,
    /// Σ|wᵢ − pᵢ| + |w_m − p_m| ≤ this.
    pub max_turnover: Option<f64>,
    /// c = c_b·1e-4/h, per unit of weight traded, in the objective.
    #[serde(skip)]
    pub cost_per_unit: f64,
    /// c_b, the cost of a trade in basis points of the weight traded.
    pub cost_bps: f64,
}

impl Limits {
    /// The limits the settings ask for.
    pub fn of(settings: &ValidSettings) -> Limits {
        Limits {
            max_weight: settings.max_weight.limit(),
            max_gross: settings.max_gross.limit(),
            max_market_weight: settings.max_market_weight.limit(),
            max_turnover: settings.max_turnover.limit(),
            cost_per_unit: settings.cost_per_unit(),
            cost_bps: settings.cost_bps,
        }
    }

    fn trades_matter(&self) -> bool {
        self.cost_per_unit > 0.0 || self.max_turnover.is_some()
    }
}

/// What the stage needs to know about the window and the model, over the
/// usable factors of the window.
pub struct Problem<'a> {
    /// The model weights w*.
    pub model: &'a [f64],
    /// Market betas β (the hedge is w_m = −β'w), or `None` without a hedge.
    pub beta: Option<&'a [f64]>,
    /// Ω, per period, positive definite.
    pub omega: &'a Mat<f64>,
    /// Previous weights p of the usable factors.
    pub previous: &'a [f64],
    /// Previous hedge p_m.
    pub previous_market: f64,
    /// Turnover no decision can avoid: previous positions in factors that
    /// are not in the window, or not usable, are sold (and, without a hedge,
    /// a previous hedge is closed).
    pub forced_turnover: f64,
    /// The model's Sharpe ratio per period (held-out when cross-validated,
    /// else in-window), before the floor.
    pub model_sharpe: f64,
    /// Periods per year, for the annualised diagnostics.
    pub periods_per_year: f64,
    /// Factor names, for the diagnostics and errors.
    pub names: &'a [&'a str],
}

/// One constraint that holds with equality at the solution.
#[derive(Clone, Debug, PartialEq)]
pub struct BindingConstraint {
    /// Setting that imposes it: `max_weight`, `max_gross`, `max_market_weight`, `max_turnover`.
    pub constraint: &'static str,
    /// The factor, for `max_weight`.
    pub factor: Option<String>,
    /// The constrained quantity at the solution (signed for single weights).
    pub value: f64,
    /// The limit.
    pub limit: f64,
    /// Lagrange multiplier: the fall in the per-period objective per unit
    /// the limit is relaxed (≥ 0).
    pub dual: f64,
}

/// Diagnostics of the implementation stage (SPEC §10).
#[derive(Clone, Debug, PartialEq)]
pub struct Implementation {
    /// √(P·(w − w*)'Ω(w − w*)).
    pub tracking_error: f64,
    /// Σ|wᵢ − pᵢ| + |w_m − p_m| over every factor named, held or traded.
    pub turnover: f64,
    /// c_b·1e-4·turnover, as a fraction of NAV.
    pub cost: f64,
    /// Gross exposure Σ|wᵢ| + |w_m| of the implemented portfolio.
    pub gross: f64,
    /// Gross exposure of the model portfolio.
    pub model_gross: f64,
    /// γ* = SR_model/σ*, per period.
    pub gamma: f64,
    /// SR_model used in γ*, annualised, after the floor.
    pub model_sharpe: f64,
    /// Constraints that hold with equality, with their multipliers.
    pub binding: Vec<BindingConstraint>,
    /// Solver status: `solved`, `almost-solved`, or the reason it stopped.
    pub solver_status: &'static str,
    /// Interior-point iterations.
    pub iterations: u32,
}

/// The stage's answer.
pub struct Implemented {
    /// w over the usable factors.
    pub weights: Vec<f64>,
    /// w_m = −β'w (0 without a hedge).
    pub market_weight: f64,
    /// Diagnostics.
    pub report: Implementation,
}

/// What a row of the constraint matrix belongs to, to name constraints in
/// infeasibility certificates and binding lists.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Row {
    WeightUpper(usize),
    WeightLower(usize),
    MarketUpper,
    MarketLower,
    GrossAbs,
    Gross,
    TradeAbs,
    Turnover,
}

impl Row {
    fn setting(self) -> &'static str {
        match self {
            Row::WeightUpper(_) | Row::WeightLower(_) => "max_weight",
            Row::MarketUpper | Row::MarketLower => "max_market_weight",
            Row::GrossAbs | Row::Gross => "max_gross",
            Row::TradeAbs | Row::Turnover => "max_turnover",
        }
    }
}

/// The conic program: ½x'Px + q'x subject to Ax ≤ b (one nonnegative cone).
struct Program {
    /// Upper triangle of P, column by column: (row, value).
    p_cols: Vec<Vec<(usize, f64)>>,
    q: Vec<f64>,
    /// Rows of A as sparse (column, value) lists.
    rows: Vec<Vec<(usize, f64)>>,
    b: Vec<f64>,
    kinds: Vec<Row>,
}

impl Program {
    fn push(&mut self, kind: Row, entries: Vec<(usize, f64)>, rhs: f64) {
        self.rows.push(entries);
        self.b.push(rhs);
        self.kinds.push(kind);
    }

    fn a_matrix(&self, vars: usize) -> CscMatrix<f64> {
        let mut cols: Vec<Vec<(usize, f64)>> = vec![Vec::new(); vars];
        for (r, entries) in self.rows.iter().enumerate() {
            for &(c, v) in entries {
                if v != 0.0 {
                    cols[c].push((r, v));
                }
            }
        }
        csc(self.rows.len(), &cols)
    }
}

fn csc(m: usize, cols: &[Vec<(usize, f64)>]) -> CscMatrix<f64> {
    let mut colptr = Vec::with_capacity(cols.len() + 1);
    let mut rowval = Vec::new();
    let mut nzval = Vec::new();
    colptr.push(0);
    for col in cols {
        for &(r, v) in col {
            rowval.push(r);
            nzval.push(v);
        }
        colptr.push(rowval.len());
    }
    CscMatrix::new(m, cols.len(), colptr, rowval, nzval)
}

/// Variable layout: w, then |w − p| bounds s and s_m, then |w| bounds g and g_m.
struct Layout {
    n: usize,
    trade: Option<usize>,
    gross: Option<usize>,
    hedged: bool,
    total: usize,
}

impl Layout {
    fn new(n: usize, limits: &Limits, hedged: bool) -> Layout {
        let extra = n + usize::from(hedged);
        let mut next = n;
        let mut take = |on: bool| {
            on.then(|| {
                let at = next;
                next += extra;
                at
            })
        };
        let trade = take(limits.trades_matter());
        let gross = take(limits.max_gross.is_some());
        Layout { n, trade, gross, hedged, total: next }
    }
}

/// γ* and the model's floored, annualised Sharpe ratio, with the
/// `model-no-edge` warning when the unfloored value is not positive.
pub fn gamma_star(problem: &Problem<'_>, sigma_model: f64, warnings: &mut Vec<Warning>) -> (f64, f64) {
    let root_p = problem.periods_per_year.sqrt();
    let floor = MODEL_SHARPE_FLOOR / root_p;
    if !(problem.model_sharpe > 0.0) {
        warnings.push(Warning {
            code: "model-no-edge",
            message: format!(
                "the model's Sharpe ratio is {:.3} (annualised), not positive: costs and limits are priced as if it were {MODEL_SHARPE_FLOOR}",
                problem.model_sharpe * root_p
            ),
        });
    }
    let sr = problem.model_sharpe.max(floor);
    (sr / sigma_model, sr * root_p)
}

/// a'Ωb.
pub(crate) fn quad(omega: &Mat<f64>, a: &[f64], b: &[f64]) -> f64 {
    let n = a.len();
    let mut total = 0.0;
    for j in 0..n {
        let mut col = 0.0;
        for i in 0..n {
            col += omega[(i, j)] * a[i];
        }
        total += col * b[j];
    }
    total
}

/// Solves the stage.
///
/// # Errors
/// [`EstimateError::ConstraintsInfeasible`] naming the constraints no
/// portfolio can satisfy together, [`EstimateError::SolverFailed`] when the
/// solver stops without a feasible iterate, and
/// [`EstimateError::Numerical`] for a model without risk under Ω, and
/// [`EstimateError::Cancelled`] / [`EstimateError::DeadlineExceeded`] when
/// `stop` fires (polled at every solver iteration).
pub fn implement(
    problem: &Problem<'_>,
    limits: &Limits,
    stop: &Stop,
    warnings: &mut Vec<Warning>,
) -> Result<Implemented, EstimateError> {
    let n = problem.model.len();
    let hedged = problem.beta.is_some();
    let beta = problem.beta.unwrap_or(&[]);
    let sigma2 = quad(problem.omega, problem.model, problem.model);
    if !(sigma2 > 0.0 && sigma2.is_finite()) {
        return Err(EstimateError::Numerical {
            stage: "implementation",
            detail: format!("the model portfolio has variance {sigma2:e} under the Ledoit–Wolf covariance"),
        });
    }
    let (gamma, model_sharpe) = gamma_star(problem, sigma2.sqrt(), warnings);
    // A turnover budget smaller than what must be sold anyway.
    if let Some(budget) = limits.max_turnover
        && problem.forced_turnover > budget
    {
        return Err(EstimateError::ConstraintsInfeasible {
            constraints: vec!["max_turnover".into()],
            detail: format!(
                "selling the previous positions outside the window alone trades {:.6}, above max_turnover = {budget}",
                problem.forced_turnover
            ),
        });
    }
    let layout = Layout::new(n, limits, hedged);
    let program = build(problem, limits, &layout, gamma, sigma2);
    let x = run(&program, &layout, problem, stop, warnings)?;
    let (w, iterations, status, duals) = x;
    let market_weight = if hedged { -dot(beta, &w) } else { 0.0 };
    let diff: Vec<f64> = w.iter().zip(problem.model).map(|(a, b)| a - b).collect();
    let traded = trades(problem, &w, market_weight);
    let gross = w.iter().map(|v| v.abs()).sum::<f64>() + market_weight.abs();
    let model_market = if hedged { -dot(beta, problem.model) } else { 0.0 };
    let model_gross = problem.model.iter().map(|v| v.abs()).sum::<f64>() + model_market.abs();
    // The program's objective is scaled by 1/(γ*σ*²): its multipliers back in objective units.
    let scale = gamma * sigma2;
    let binding = binding(problem, limits, &w, market_weight, gross, traded, &program, &duals, scale);
    Ok(Implemented {
        report: Implementation {
            tracking_error: (problem.periods_per_year * quad(problem.omega, &diff, &diff)).max(0.0).sqrt(),
            turnover: traded,
            cost: limits.cost_bps * 1e-4 * traded,
            gross,
            model_gross,
            gamma,
            model_sharpe,
            binding,
            solver_status: status,
            iterations,
        },
        weights: w,
        market_weight,
    })
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Σ|wᵢ − pᵢ| + |w_m − p_m| + the forced sales.
fn trades(problem: &Problem<'_>, w: &[f64], market_weight: f64) -> f64 {
    let factors: f64 = w.iter().zip(problem.previous).map(|(a, b)| (a - b).abs()).sum();
    let hedge = if problem.beta.is_some() { (market_weight - problem.previous_market).abs() } else { 0.0 };
    factors + hedge + problem.forced_turnover
}

/// The scaled program: P = Ω/σ*², q = −Ωw*/σ*², costs c/(γ*σ*²).
fn build(problem: &Problem<'_>, limits: &Limits, layout: &Layout, gamma: f64, sigma2: f64) -> Program {
    let n = layout.n;
    let beta = problem.beta.unwrap_or(&[]);
    let mut p_cols = vec![Vec::new(); layout.total];
    for (j, col) in p_cols.iter_mut().enumerate().take(n) {
        for i in 0..=j {
            col.push((i, problem.omega[(i, j)] / sigma2));
        }
    }
    let mut q = vec![0.0; layout.total];
    for (i, qi) in q.iter_mut().enumerate().take(n) {
        *qi = -(0..n).map(|j| problem.omega[(i, j)] * problem.model[j]).sum::<f64>() / sigma2;
    }
    let mut prog = Program { p_cols, q, rows: Vec::new(), b: Vec::new(), kinds: Vec::new() };
    // β'w as (column, value) entries; the hedge is its negative.
    let beta_w = |sign: f64| -> Vec<(usize, f64)> { (0..n).map(|j| (j, sign * beta[j])).collect() };
    if let Some(c) = limits.max_weight {
        for i in 0..n {
            prog.push(Row::WeightUpper(i), vec![(i, 1.0)], c);
            prog.push(Row::WeightLower(i), vec![(i, -1.0)], c);
        }
    }
    if let (Some(h), true) = (limits.max_market_weight, layout.hedged) {
        // w_m = −β'w ≤ H and −w_m = β'w ≤ H.
        prog.push(Row::MarketUpper, beta_w(-1.0), h);
        prog.push(Row::MarketLower, beta_w(1.0), h);
    }
    if let Some(g0) = layout.gross {
        for i in 0..n {
            prog.push(Row::GrossAbs, vec![(i, 1.0), (g0 + i, -1.0)], 0.0);
            prog.push(Row::GrossAbs, vec![(i, -1.0), (g0 + i, -1.0)], 0.0);
        }
        if layout.hedged {
            let gm = g0 + n;
            let mut up = beta_w(-1.0);
            up.push((gm, -1.0));
            let mut down = beta_w(1.0);
            down.push((gm, -1.0));
            prog.push(Row::GrossAbs, up, 0.0);
            prog.push(Row::GrossAbs, down, 0.0);
        }
        let extra = n + usize::from(layout.hedged);
        let sum: Vec<(usize, f64)> = (0..extra).map(|k| (g0 + k, 1.0)).collect();
        prog.push(Row::Gross, sum, limits.max_gross.unwrap_or(f64::INFINITY));
    }
    if let Some(s0) = layout.trade {
        let cost = limits.cost_per_unit / (gamma * sigma2);
        let extra = n + usize::from(layout.hedged);
        for k in 0..extra {
            prog.q[s0 + k] = cost;
        }
        for i in 0..n {
            let p = problem.previous[i];
            prog.push(Row::TradeAbs, vec![(i, 1.0), (s0 + i, -1.0)], p);
            prog.push(Row::TradeAbs, vec![(i, -1.0), (s0 + i, -1.0)], -p);
        }
        if layout.hedged {
            let sm = s0 + n;
            let pm = problem.previous_market;
            // w_m − p_m ≤ s_m: −β'w − s_m ≤ p_m; p_m − w_m ≤ s_m: β'w − s_m ≤ −p_m.
            let mut up = beta_w(-1.0);
            up.push((sm, -1.0));
            let mut down = beta_w(1.0);
            down.push((sm, -1.0));
            prog.push(Row::TradeAbs, up, pm);
            prog.push(Row::TradeAbs, down, -pm);
        }
        if let Some(budget) = limits.max_turnover {
            let sum: Vec<(usize, f64)> = (0..extra).map(|k| (s0 + k, 1.0)).collect();
            prog.push(Row::Turnover, sum, budget - problem.forced_turnover);
        }
    }
    prog
}

type Solved = (Vec<f64>, u32, &'static str, Vec<f64>);

fn status_word(s: SolverStatus) -> &'static str {
    match s {
        SolverStatus::Solved => "solved",
        SolverStatus::AlmostSolved => "almost-solved",
        SolverStatus::PrimalInfeasible | SolverStatus::AlmostPrimalInfeasible => "infeasible",
        SolverStatus::DualInfeasible | SolverStatus::AlmostDualInfeasible => "unbounded",
        SolverStatus::MaxIterations => "iteration-limit",
        SolverStatus::MaxTime => "time-limit",
        SolverStatus::NumericalError => "numerical-error",
        SolverStatus::InsufficientProgress => "insufficient-progress",
        SolverStatus::Unsolved | SolverStatus::CallbackTerminated => "unsolved",
    }
}

/// Runs clarabel and interprets its status.
fn run(
    prog: &Program,
    layout: &Layout,
    problem: &Problem<'_>,
    stop: &Stop,
    warnings: &mut Vec<Warning>,
) -> Result<Solved, EstimateError> {
    let p = csc(layout.total, &prog.p_cols);
    let a = prog.a_matrix(layout.total);
    let settings = DefaultSettings {
        verbose: false,
        max_iter: SOLVER_MAX_ITERATIONS,
        tol_gap_abs: SOLVER_TOLERANCE,
        tol_gap_rel: SOLVER_TOLERANCE,
        tol_feas: SOLVER_TOLERANCE,
        tol_ktratio: 1e-10,
        ..DefaultSettings::default()
    };
    let m = prog.b.len();
    let cones: Vec<SupportedConeT<f64>> = if m > 0 { vec![NonnegativeConeT(m)] } else { Vec::new() };
    let outcome = catch_unwind(AssertUnwindSafe(|| -> Result<_, String> {
        let mut solver = DefaultSolver::new(&p, &prog.q, &a, &prog.b, &cones, settings).map_err(|e| e.to_string())?;
        let poll = stop.clone();
        solver.set_termination_callback(move |_: &DefaultInfo<f64>| poll.check().is_err());
        solver.solve();
        let s = &solver.solution;
        Ok((s.x.clone(), s.z.clone(), s.status, s.iterations))
    }));
    let (x, z, status, iterations) = match outcome {
        Ok(Ok(v)) => v,
        Ok(Err(e)) => return Err(EstimateError::SolverFailed { status: "setup".into(), detail: e }),
        Err(_) => {
            return Err(EstimateError::SolverFailed { status: "panic".into(), detail: "the solver panicked".into() });
        }
    };
    let word = status_word(status);
    let w: Vec<f64> = x[..layout.n].to_vec();
    match status {
        SolverStatus::Solved => Ok((w, iterations, word, z)),
        SolverStatus::CallbackTerminated => Err(stop.check().err().unwrap_or(EstimateError::Cancelled)),
        SolverStatus::PrimalInfeasible | SolverStatus::AlmostPrimalInfeasible => Err(infeasible(prog, &z, problem)),
        _ => {
            // Reduced accuracy or a stop before convergence: keep the iterate
            // if it satisfies every constraint, else refuse.
            let worst = violation(prog, &x);
            if worst <= BINDING_TOLERANCE && w.iter().all(|v| v.is_finite()) {
                warnings.push(Warning {
                    code: if status == SolverStatus::AlmostSolved { "solver-reduced-accuracy" } else { "solver-not-converged" },
                    message: format!(
                        "the implementation solver stopped with status {word} after {iterations} iterations; its last iterate satisfies every limit (largest violation {worst:.1e}) and is used"
                    ),
                });
                Ok((w, iterations, word, z))
            } else {
                Err(EstimateError::SolverFailed {
                    status: word.into(),
                    detail: format!(
                        "after {iterations} iterations the last iterate violates a limit by {worst:.3e}; no portfolio is returned"
                    ),
                })
            }
        }
    }
}

/// Largest violation of Ax ≤ b, relative to 1 + |b|.
fn violation(prog: &Program, x: &[f64]) -> f64 {
    prog.rows
        .iter()
        .zip(&prog.b)
        .map(|(row, &b)| {
            let ax: f64 = row.iter().map(|&(c, v)| v * x[c]).sum();
            if ax.is_finite() { ((ax - b) / (1.0 + b.abs())).max(0.0) } else { f64::INFINITY }
        })
        .fold(0.0, f64::max)
}

/// The constraints named by the solver's certificate of infeasibility: the
/// rows whose multipliers carry the certificate.
fn infeasible(prog: &Program, z: &[f64], problem: &Problem<'_>) -> EstimateError {
    let top = z.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let mut names: Vec<String> = Vec::new();
    let mut factors: Vec<String> = Vec::new();
    for (kind, &zi) in prog.kinds.iter().zip(z) {
        if top > 0.0 && zi.abs() > 1e-6 * top {
            let name = kind.setting().to_owned();
            if !names.contains(&name) {
                names.push(name);
            }
            if let Row::WeightUpper(i) | Row::WeightLower(i) = kind {
                let f = problem.names.get(*i).map_or_else(|| format!("#{i}"), |s| (*s).to_owned());
                if !factors.contains(&f) {
                    factors.push(f);
                }
            }
        }
    }
    if names.is_empty() {
        names = prog.kinds.iter().map(|k| k.setting().to_owned()).collect();
        names.dedup();
    }
    names.sort();
    names.dedup();
    let detail = if factors.is_empty() {
        "no portfolio satisfies these limits together".to_owned()
    } else {
        format!(
            "no portfolio satisfies these limits together (max_weight binds on {}{})",
            factors.iter().take(5).cloned().collect::<Vec<_>>().join(", "),
            if factors.len() > 5 { format!(" and {} more", factors.len() - 5) } else { String::new() }
        )
    };
    EstimateError::ConstraintsInfeasible { constraints: names, detail }
}

/// The constraints that hold with equality, with multipliers in objective units.
#[allow(clippy::too_many_arguments)]
fn binding(
    problem: &Problem<'_>,
    limits: &Limits,
    w: &[f64],
    market_weight: f64,
    gross: f64,
    traded: f64,
    prog: &Program,
    z: &[f64],
    scale: f64,
) -> Vec<BindingConstraint> {
    let tight = |value: f64, limit: f64| limit - value <= BINDING_TOLERANCE * (1.0 + limit);
    let dual_of = |kind: Row| prog.kinds.iter().position(|k| *k == kind).map_or(0.0, |r| z[r] * scale);
    let mut out = Vec::new();
    if let Some(c) = limits.max_weight {
        for (i, &wi) in w.iter().enumerate() {
            if tight(wi.abs(), c) {
                let kind = if wi >= 0.0 { Row::WeightUpper(i) } else { Row::WeightLower(i) };
                out.push(BindingConstraint {
                    constraint: "max_weight",
                    factor: problem.names.get(i).map(|s| (*s).to_owned()),
                    value: wi,
                    limit: c,
                    dual: dual_of(kind),
                });
            }
        }
    }
    if let (Some(h), true) = (limits.max_market_weight, problem.beta.is_some())
        && tight(market_weight.abs(), h)
    {
        let kind = if market_weight >= 0.0 { Row::MarketUpper } else { Row::MarketLower };
        out.push(BindingConstraint {
            constraint: "max_market_weight",
            factor: None,
            value: market_weight,
            limit: h,
            dual: dual_of(kind),
        });
    }
    if let Some(g) = limits.max_gross
        && tight(gross, g)
    {
        out.push(BindingConstraint {
            constraint: "max_gross",
            factor: None,
            value: gross,
            limit: g,
            dual: dual_of(Row::Gross),
        });
    }
    if let Some(b) = limits.max_turnover
        && tight(traded, b)
    {
        out.push(BindingConstraint {
            constraint: "max_turnover",
            factor: None,
            value: traded,
            limit: b,
            dual: dual_of(Row::Turnover),
        });
    }
    out
}

/// One window prepared for the stage alone: what a backtest needs to turn
/// the model weights it fitted in parallel into the weights held, date after
/// date, each starting from the previous date's holdings (SPEC §10).
pub struct DeskWindow {
    window: ReturnWindow,
    mom: Moments,
    omega: Mat<f64>,
    hedged: bool,
}

/// Positions held: a weight per panel factor and the hedge.
#[derive(Clone, Copy, Debug)]
pub struct Holdings<'a> {
    /// Weight per panel factor.
    pub weights: &'a [f64],
    /// Market hedge.
    pub market: f64,
}

/// The stage's answer over the panel's factors.
pub struct DeskAnswer {
    /// Implemented weight per panel factor (0 for excluded ones).
    pub weights: Vec<f64>,
    /// Implemented hedge.
    pub market_weight: f64,
    /// Share of gross weight in the ⌈0.3N⌉ highest-Sharpe factors (SPEC §8).
    pub top_sharpe_gross_share: f64,
    /// Diagnostics.
    pub report: Implementation,
}

impl DeskWindow {
    /// Validates the window and computes its Ledoit–Wolf covariance once.
    ///
    /// # Errors
    /// As [`ReturnWindow::new`].
    pub fn new(panel: &ReturnPanel, settings: &ValidSettings) -> Result<DeskWindow, EstimateError> {
        let window = ReturnWindow::new(panel, settings)?;
        let hedged = settings.demarket && window.market.is_some();
        let mom = Moments::compute(window.returns.as_ref(), if hedged { window.market.as_deref() } else { None });
        let omega = super::shrinkage::ledoit_wolf(&mom).0;
        Ok(DeskWindow { window, mom, omega, hedged })
    }

    /// The implemented portfolio for model weights `model` (per panel
    /// factor) whose annualised Sharpe ratio is `model_sharpe`, starting
    /// from `previous`.
    ///
    /// # Errors
    /// As [`implement`].
    pub fn implement(
        &self,
        settings: &ValidSettings,
        model: &[f64],
        model_sharpe: f64,
        previous: Holdings<'_>,
        stop: &Stop,
        warnings: &mut Vec<Warning>,
    ) -> Result<DeskAnswer, EstimateError> {
        let Holdings { weights: previous, market: previous_market } = previous;
        let used = &self.window.used;
        let model_used: Vec<f64> = used.iter().map(|&c| model[c]).collect();
        let previous_used: Vec<f64> = used.iter().map(|&c| previous[c]).collect();
        let outside: f64 =
            (0..previous.len()).filter(|c| used.binary_search(c).is_err()).map(|c| previous[c].abs()).sum();
        let names: Vec<&str> = used.iter().map(|&c| self.window.names[c].as_str()).collect();
        let p = f64::from(settings.periods_per_year());
        let problem = Problem {
            model: &model_used,
            beta: self.hedged.then_some(&self.mom.beta[..]),
            omega: &self.omega,
            previous: &previous_used,
            previous_market,
            forced_turnover: outside + if self.hedged { 0.0 } else { previous_market.abs() },
            model_sharpe: model_sharpe / p.sqrt(),
            periods_per_year: p,
            names: &names,
        };
        let done = implement(&problem, &Limits::of(settings), stop, warnings)?;
        let mut weights = vec![0.0; previous.len()];
        for (j, &c) in used.iter().enumerate() {
            weights[c] = done.weights[j];
        }
        let sharpe: Vec<f64> = (0..used.len()).map(|j| self.mom.sharpe(j)).collect();
        let top_sharpe_gross_share = super::weights::top_sharpe_share(&done.weights, &sharpe);
        Ok(DeskAnswer { weights, market_weight: done.market_weight, top_sharpe_gross_share, report: done.report })
    }
}

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

use super::error::{EstimateError, display_number};
use super::moments::Moments;
use super::settings::ValidSettings;
use super::shrinkage::LedoitWolf;
use super::stop::Stop;
use super::warning::{Warning, WarningCode};
use super::window::{ReturnPanel, ReturnWindow};
use clarabel::algebra::CscMatrix;
use clarabel::solver::{
    DefaultInfo, DefaultSettings, DefaultSolver, IPSolver, NonnegativeConeT, SolverStatus, SupportedConeT, ZeroConeT,
};

/// Floor of the model's Sharpe ratio in γ*, annualised (SPEC §10).
pub const MODEL_SHARPE_FLOOR: f64 = 0.1;

/// Interior-point tolerance on the duality gap and feasibility (SPEC §10: ≤ 1e-9).
pub const SOLVER_TOLERANCE: f64 = 1e-12;

/// Tolerances (and whether to equilibrate) of the retries after a numerical breakdown.
const RETRY_TOLERANCES: [(f64, bool); 3] = [(1e-9, true), (1e-9, false), (1e-7, false)];

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
    /// Ω, per period, positive definite, in factor form.
    pub omega: &'a LedoitWolf,
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
    pub names: Vec<&'a str>,
    /// How Ω enters the conic program ([`OmegaForm::for_shape`] unless a
    /// test or a bench compares the forms; both give the same answer).
    pub form: OmegaForm,
}

/// Positions held before a fit, over the usable factors of its window.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Positions {
    /// Previous weight of each usable factor.
    pub used: Vec<f64>,
    /// Previous hedge p_m (0 when none was held).
    pub market: f64,
    /// Σ|pᵢ| over positions in factors excluded from the window or not in
    /// it: sold whatever the fit.
    pub outside: f64,
}

impl Positions {
    /// The positions `held` (a weight per panel factor and the hedge) over
    /// the usable factors `used` (sorted panel columns) of a window.
    pub fn over(used: &[usize], held: Holdings<'_>) -> Positions {
        let outside =
            (0..held.weights.len()).filter(|c| used.binary_search(c).is_err()).map(|c| held.weights[c].abs()).sum();
        Positions { used: used.iter().map(|&c| held.weights[c]).collect(), market: held.market, outside }
    }

    /// Turnover no decision can avoid: the positions outside the window and,
    /// without a hedge, the hedge held.
    pub fn forced(&self, hedged: bool) -> f64 {
        self.outside + if hedged { 0.0 } else { self.market.abs() }
    }

    /// Σ|wᵢ − pᵢ| + |w_m − p_m| + the forced sales: the one turnover formula
    /// of the fit's diagnostics and the stage (SPEC §10).
    pub fn turnover(&self, w: &[f64], market_weight: f64, hedged: bool) -> f64 {
        traded(w, &self.used, hedged.then_some((market_weight, self.market)), self.forced(hedged))
    }
}

impl<'a> Problem<'a> {
    /// The stage's problem for the model weights `model` (over the window's
    /// usable factors, annualised Sharpe ratio `model_sharpe`) from the
    /// positions `held`, on a window, its moments and its Ledoit–Wolf Ω: the
    /// one place the hedge, the forced sales and the per-period Sharpe ratio
    /// are derived, for a fit and for each date of a backtest alike.
    pub fn from_window(
        window: &'a ReturnWindow,
        mom: &'a Moments,
        omega: &'a LedoitWolf,
        settings: &ValidSettings,
        model: &'a [f64],
        model_sharpe: f64,
        held: &'a Positions,
    ) -> Problem<'a> {
        let hedged = settings.demarket && window.market.is_some();
        let p = f64::from(settings.periods_per_year());
        Problem {
            model,
            beta: hedged.then_some(&mom.beta[..]),
            omega,
            previous: &held.used,
            previous_market: held.market,
            forced_turnover: held.forced(hedged),
            model_sharpe: model_sharpe / p.sqrt(),
            periods_per_year: p,
            names: window.used.iter().map(|&c| window.names[c].as_str()).collect(),
            form: OmegaForm::for_shape(model.len(), omega.periods()),
        }
    }
}

/// How Ω enters the conic program.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum OmegaForm {
    /// Ω's upper triangle as the quadratic term: N(N + 1)/2 nonzeros.
    Dense,
    /// Ω = a·I + c·X'X through T auxiliary variables y = √c·X(w − w*)/σ*
    /// tied to w by T equality rows: N·T nonzeros, never an N × N block.
    Factor,
}

/// The dense form is used below this many factors (per 120 periods, scaled
/// with T): the crossover measured by `benches/implementation.rs` (DEVELOPERS.md).
pub const DENSE_FORM_FACTORS_PER_120_PERIODS: usize = 200;

impl OmegaForm {
    /// The faster form for N factors over T periods.
    pub fn for_shape(n: usize, t: usize) -> OmegaForm {
        if n * 120 < DENSE_FORM_FACTORS_PER_120_PERIODS * t.max(1) { OmegaForm::Dense } else { OmegaForm::Factor }
    }

    /// The name the diagnostics carry.
    pub fn word(self) -> &'static str {
        match self {
            OmegaForm::Dense => "dense",
            OmegaForm::Factor => "factor",
        }
    }
}

/// Weights and trades smaller than this fraction of the portfolio's gross
/// exposure are solver residue, not decisions: a trade that small is not
/// made (the weight stays at the held one) and a weight that small on a
/// factor not held is zero (SPEC §10).
pub const DUST_FRACTION: f64 = 1e-9;

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
    /// Solver status: `solved`, `almost-solved`, `held` (no trade was
    /// possible or needed: the previous weights), or the reason it stopped.
    pub solver_status: &'static str,
    /// Interior-point iterations.
    pub iterations: u32,
    /// How Ω entered the solver: `dense` or `factor` (empty when no solver ran).
    pub omega_form: &'static str,
    /// Weights and trades below [`DUST_FRACTION`] of gross that were cleared.
    pub dust_cleared: u32,
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
    /// y = √c·X(w − w*)/σ*: an equality of the factor form, no setting.
    Factor,
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
    fn setting(self) -> Option<&'static str> {
        match self {
            Row::Factor => None,
            Row::WeightUpper(_) | Row::WeightLower(_) => Some("max_weight"),
            Row::MarketUpper | Row::MarketLower => Some("max_market_weight"),
            Row::GrossAbs | Row::Gross => Some("max_gross"),
            Row::TradeAbs | Row::Turnover => Some("max_turnover"),
        }
    }
}

/// The conic program: ½x'Px + q'x subject to A_e x = b_e (the first
/// `equalities` rows) and A x ≤ b (the rest).
struct Program {
    p: CscMatrix<f64>,
    q: Vec<f64>,
    /// Rows of A as sparse (column, value) lists.
    rows: Vec<Vec<(usize, f64)>>,
    b: Vec<f64>,
    kinds: Vec<Row>,
    equalities: usize,
}

impl Program {
    fn push(&mut self, kind: Row, entries: Vec<(usize, f64)>, rhs: f64) {
        self.rows.push(entries);
        self.b.push(rhs);
        self.kinds.push(kind);
    }

    fn a_matrix(&self, vars: usize) -> CscMatrix<f64> {
        let mut counts = vec![0usize; vars];
        for entries in &self.rows {
            for &(c, v) in entries {
                if v != 0.0 {
                    counts[c] += 1;
                }
            }
        }
        let mut cols: Vec<Vec<(usize, f64)>> = counts.into_iter().map(Vec::with_capacity).collect();
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
    let nnz = cols.iter().map(Vec::len).sum();
    let mut colptr = Vec::with_capacity(cols.len() + 1);
    let mut rowval = Vec::with_capacity(nnz);
    let mut nzval = Vec::with_capacity(nnz);
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

/// Variable layout: w, then |w − p| bounds s and s_m, then |w| bounds g and
/// g_m, then (factor form) the T auxiliary variables y.
struct Layout {
    n: usize,
    trade: Option<usize>,
    gross: Option<usize>,
    factor: Option<usize>,
    hedged: bool,
    total: usize,
}

impl Layout {
    fn new(n: usize, limits: &Limits, hedged: bool, form: OmegaForm, periods: usize) -> Layout {
        let extra = n + usize::from(hedged);
        let mut next = n;
        let mut take = |on: bool, size: usize| {
            on.then(|| {
                let at = next;
                next += size;
                at
            })
        };
        let trade = take(limits.trades_matter(), extra);
        let gross = take(limits.max_gross.is_some(), extra);
        let factor = take(form == OmegaForm::Factor, periods);
        Layout { n, trade, gross, factor, hedged, total: next }
    }
}

/// γ* and the model's floored, annualised Sharpe ratio, with the
/// `model-no-edge` warning when the unfloored value is not positive.
pub fn gamma_star(problem: &Problem<'_>, sigma_model: f64, warnings: &mut Vec<Warning>) -> (f64, f64) {
    let root_p = problem.periods_per_year.sqrt();
    let floor = MODEL_SHARPE_FLOOR / root_p;
    if !(problem.model_sharpe > 0.0) {
        warnings.push(Warning {
            code: WarningCode::ModelNoEdge,
            message: format!(
                "the model's Sharpe ratio is {:.3} (annualised), not positive: costs and limits are priced as if it were {MODEL_SHARPE_FLOOR}",
                problem.model_sharpe * root_p
            ),
        });
    }
    let sr = problem.model_sharpe.max(floor);
    (sr / sigma_model, sr * root_p)
}

/// Solves the stage, in phases with the stop flag checked before each:
/// the model's risk, the feasibility checks that need no solver (phase 1),
/// building the conic program, and the interior-point solve (polled at
/// every iteration).
///
/// # Errors
/// [`EstimateError::ConstraintsInfeasible`] naming the constraints no
/// portfolio can satisfy together, [`EstimateError::SolverFailed`] when the
/// solver stops without a feasible iterate, and
/// [`EstimateError::Numerical`] for a model without risk under Ω, and
/// [`EstimateError::Cancelled`] / [`EstimateError::DeadlineExceeded`] when
/// `stop` fires.
pub fn implement(
    problem: &Problem<'_>,
    limits: &Limits,
    stop: &Stop,
    warnings: &mut Vec<Warning>,
) -> Result<Implemented, EstimateError> {
    let form = problem.form;
    stop.check()?;
    let n = problem.model.len();
    let hedged = problem.beta.is_some();
    let sigma2 = problem.omega.quad(problem.model, problem.model);
    if !(sigma2 > 0.0 && sigma2.is_finite()) {
        return Err(EstimateError::Numerical {
            stage: "implementation",
            detail: format!("the model portfolio has variance {sigma2:e} under the Ledoit–Wolf covariance"),
        });
    }
    let (gamma, model_sharpe) = gamma_star(problem, sigma2.sqrt(), warnings);
    let budget = discretionary_budget(problem, limits, warnings);
    stop.check()?;
    let (mut w, iterations, status, duals, form) = match phase_one(problem, limits, budget)? {
        Start::Held => (problem.previous.to_vec(), 0, "held", None, ""),
        Start::Solve => {
            let layout = Layout::new(n, limits, hedged, form, problem.omega.periods());
            let program = build(problem, limits, budget, &layout, gamma, sigma2);
            stop.check()?;
            let (w, iterations, status, z) = run(&program, &layout, problem, stop, warnings)?;
            (w, iterations, status, Some((program, z)), form.word())
        }
    };
    if duals.is_some() {
        hold_limits_exactly(&mut w, problem, limits, budget);
    }
    let dust_cleared = clear_dust(&mut w, problem.previous);
    let beta = problem.beta.unwrap_or(&[]);
    let market_weight = if hedged { -dot(beta, &w) } else { 0.0 };
    let diff: Vec<f64> = w.iter().zip(problem.model).map(|(a, b)| a - b).collect();
    let traded = trades(problem, &w, market_weight);
    let gross = w.iter().map(|v| v.abs()).sum::<f64>() + market_weight.abs();
    let model_market = if hedged { -dot(beta, problem.model) } else { 0.0 };
    let model_gross = problem.model.iter().map(|v| v.abs()).sum::<f64>() + model_market.abs();
    // The program's objective is scaled by 1/(γ*σ*²): its multipliers back in objective units.
    let scale = gamma * sigma2;
    let state = State { w: &w, market_weight, gross, traded };
    let binding = binding(problem, limits, &state, duals.as_ref().map(|(p, z)| (p, &z[..])), scale);
    Ok(Implemented {
        report: Implementation {
            tracking_error: (problem.periods_per_year * problem.omega.quad(&diff, &diff)).max(0.0).sqrt(),
            turnover: traded,
            cost: limits.cost_bps * 1e-4 * traded,
            gross,
            model_gross,
            gamma,
            model_sharpe,
            binding,
            solver_status: status,
            iterations,
            omega_form: form,
            dust_cleared,
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
    let hedge = problem.beta.map(|_| (market_weight, problem.previous_market));
    traded(w, problem.previous, hedge, problem.forced_turnover)
}

/// Σ|wᵢ − pᵢ| + |w_m − p_m| (when hedged: `hedge` is (w_m, p_m)) + `forced`.
fn traded(w: &[f64], previous: &[f64], hedge: Option<(f64, f64)>, forced: f64) -> f64 {
    let factors: f64 = w.iter().zip(previous).map(|(a, b)| (a - b).abs()).sum();
    factors + hedge.map_or(0.0, |(w_m, p_m)| (w_m - p_m).abs()) + forced
}

/// The turnover left for the stage's own trades: `max_turnover` less the
/// forced sales. Sales no decision can avoid (positions in factors without
/// returns in the window) always happen; when they alone exceed the budget
/// it applies to the other trades instead of the total, with the
/// `forced-sale-over-turnover` warning (SPEC §10).
fn discretionary_budget(problem: &Problem<'_>, limits: &Limits, warnings: &mut Vec<Warning>) -> Option<f64> {
    let budget = limits.max_turnover?;
    if problem.forced_turnover <= budget {
        return Some(budget - problem.forced_turnover);
    }
    warnings.push(Warning {
        code: WarningCode::ForcedSaleOverTurnover,
        message: format!(
            "selling positions without returns in the window trades {} alone, above max_turnover = {}: \
             the sale is made and the limit applies to the other trades",
            display_number(problem.forced_turnover),
            display_number(budget)
        ),
    });
    Some(budget)
}

/// What phase 1 found.
enum Start {
    /// The only portfolio within the turnover budget is the one held, and it
    /// satisfies every limit.
    Held,
    /// The solver is needed.
    Solve,
}

/// Phase 1 (SPEC §10): infeasibility and trivial answers found without the
/// solver. Without a turnover limit w = 0 satisfies every cap, so only the
/// turnover budget B can conflict. The factors' trades are at least
/// L = Σ|pᵢ| − min(Σ min(|pᵢ|, max_weight), max_gross) (each weight must
/// come under its cap and their sum under the gross cap), and the hedge's at
/// least |p_m| − max_market_weight; a budget below their sum is infeasible,
/// and the error names only the limits whose removal lowers the bound.
fn phase_one(problem: &Problem<'_>, limits: &Limits, budget: Option<f64>) -> Result<Start, EstimateError> {
    let Some(budget) = budget else { return Ok(Start::Solve) };
    let p = problem.previous;
    let held: f64 = p.iter().map(|v| v.abs()).sum();
    let factor_bound = |cap: Option<f64>, gross: Option<f64>| {
        let capped: f64 = p.iter().map(|v| cap.map_or(v.abs(), |c| v.abs().min(c))).sum();
        (held - gross.map_or(capped, |g| capped.min(g))).max(0.0)
    };
    let hedged = problem.beta.is_some();
    let hedge_bound = |cap: Option<f64>| match (hedged, cap) {
        (true, Some(h)) => (problem.previous_market.abs() - h).max(0.0),
        _ => 0.0,
    };
    let (cap, gross, market) = (limits.max_weight, limits.max_gross, limits.max_market_weight);
    let bound = factor_bound(cap, gross) + hedge_bound(market);
    let slack = 1e-9 * (1.0 + budget);
    if bound > budget + slack {
        let mut names = vec!["max_turnover".to_owned()];
        let mut detail = Vec::new();
        let drops = [
            ("max_weight", factor_bound(None, gross) + hedge_bound(market)),
            ("max_gross", factor_bound(cap, None) + hedge_bound(market)),
            ("max_market_weight", factor_bound(cap, gross)),
        ];
        for (name, without) in drops {
            if without < bound - slack {
                names.push(name.to_owned());
                detail.push(name);
            }
        }
        names.sort();
        return Err(EstimateError::ConstraintsInfeasible {
            constraints: names,
            detail: format!(
                "bringing the previous weights within {} trades at least {}, above the turnover left ({})",
                detail.join(" and "),
                display_number(bound),
                display_number(budget)
            ),
        });
    }
    // A budget too small to trade at all (relative to what is held): the
    // held portfolio, if its hedge needs no trade and it meets every cap.
    if budget <= 1e-12 * (1.0 + held) {
        let hedge_trade = problem.beta.map_or(0.0, |beta| (dot(beta, p) + problem.previous_market).abs());
        let market = problem.beta.map_or(0.0, |beta| dot(beta, p).abs());
        let within = limits.max_weight.is_none_or(|c| p.iter().all(|v| v.abs() <= c))
            && limits.max_gross.is_none_or(|g| held + market <= g)
            && limits.max_market_weight.is_none_or(|h| !hedged || market <= h);
        if within && hedge_trade <= budget {
            return Ok(Start::Held);
        }
        return Err(EstimateError::ConstraintsInfeasible {
            constraints: vec!["max_turnover".into()],
            detail: format!(
                "the turnover left ({}) allows no trade, and the held portfolio {}",
                display_number(budget),
                if within { "needs its hedge rebalanced" } else { "breaks a cap" }
            ),
        });
    }
    Ok(Start::Solve)
}

/// Makes the solver's answer meet every limit exactly, not only to its
/// absolute tolerance (which is large against a cap near [`MIN_LIMIT`]):
/// weights over `max_weight` are clipped, then w is scaled down until the
/// hedge and the gross exposure are within their caps (scaling keeps the
/// clipped weights within theirs), then, when the held portfolio meets the
/// caps, w moves toward it until the trades fit the turnover left (the caps
/// are convex, so the move keeps them). Each correction is of the order of
/// the solver's tolerance.
///
/// [`MIN_LIMIT`]: super::settings::MIN_LIMIT
fn hold_limits_exactly(w: &mut [f64], problem: &Problem<'_>, limits: &Limits, budget: Option<f64>) {
    let hedge = |w: &[f64]| problem.beta.map_or(0.0, |beta| dot(beta, w).abs());
    if let Some(c) = limits.max_weight {
        for wi in w.iter_mut() {
            *wi = wi.clamp(-c, c);
        }
    }
    if let (Some(h), true) = (limits.max_market_weight, problem.beta.is_some()) {
        let m = hedge(w);
        if m > h {
            let f = h / m;
            w.iter_mut().for_each(|wi| *wi *= f);
        }
    }
    if let Some(g) = limits.max_gross {
        let gross = w.iter().map(|v| v.abs()).sum::<f64>() + hedge(w);
        if gross > g {
            let f = g / gross;
            w.iter_mut().for_each(|wi| *wi *= f);
        }
    }
    let Some(budget) = budget else { return };
    let p = problem.previous;
    let trade = |w: &[f64]| {
        let m = problem.beta.map_or(0.0, |beta| (-dot(beta, w) - problem.previous_market).abs());
        w.iter().zip(p).map(|(a, b)| (a - b).abs()).sum::<f64>() + m
    };
    if trade(w) <= budget || trade(p) > budget {
        return;
    }
    let held_within = limits.max_weight.is_none_or(|c| p.iter().all(|v| v.abs() <= c))
        && limits.max_market_weight.is_none_or(|h| hedge(p) <= h)
        && limits.max_gross.is_none_or(|g| p.iter().map(|v| v.abs()).sum::<f64>() + hedge(p) <= g);
    if !held_within {
        return;
    }
    let toward = |theta: f64| -> Vec<f64> { w.iter().zip(p).map(|(a, b)| b + theta * (a - b)).collect() };
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        if trade(&toward(mid)) <= budget { lo = mid } else { hi = mid }
    }
    let moved = toward(lo);
    w.copy_from_slice(&moved);
}

/// Sets trades and weights below [`DUST_FRACTION`] of gross to the held
/// weight or zero, never raising a weight's size: a trade |wᵢ − pᵢ| that
/// small with |pᵢ| ≤ |wᵢ| is not made, and a weight that small whose zeroing
/// does not enlarge its trade is zero. Returns how many were cleared.
fn clear_dust(w: &mut [f64], previous: &[f64]) -> u32 {
    let gross: f64 = w.iter().map(|v| v.abs()).sum();
    let eps = DUST_FRACTION * gross;
    let mut cleared = 0;
    for (wi, &pi) in w.iter_mut().zip(previous) {
        if *wi == pi {
            continue;
        }
        if (*wi - pi).abs() <= eps && pi.abs() <= wi.abs() {
            *wi = pi;
            cleared += 1;
        } else if wi.abs() <= eps && pi.abs() <= (*wi - pi).abs() {
            *wi = 0.0;
            cleared += 1;
        }
    }
    cleared
}

/// The tracking term ½(w − w*)'Ω(w − w*)/σ*² (up to a constant): Ω's
/// upper triangle as P (dense form), or (factor form) ½(a/σ*²)‖w‖² −
/// (a/σ*²)w*'w + ½‖y‖² with the T equality rows y − (√c/σ*)Xw = −(√c/σ*)Xw*.
fn tracking_term(problem: &Problem<'_>, layout: &Layout, sigma2: f64) -> Program {
    let n = layout.n;
    let omega = problem.omega;
    let mut p_cols: Vec<Vec<(usize, f64)>> = vec![Vec::new(); layout.total];
    let mut q = vec![0.0; layout.total];
    let (mut rows, mut b, mut kinds) = (Vec::new(), Vec::new(), Vec::new());
    match layout.factor {
        None => {
            let dense = omega.dense();
            for (j, col) in p_cols.iter_mut().enumerate().take(n) {
                *col = (0..=j).map(|i| (i, dense[(i, j)] / sigma2)).collect();
            }
            for (qi, v) in q.iter_mut().zip(omega.times(problem.model)) {
                *qi = -v / sigma2;
            }
        }
        Some(y0) => {
            let a = omega.ridge / sigma2;
            for j in 0..n {
                p_cols[j].push((j, a));
                q[j] = -a * problem.model[j];
            }
            let root = (omega.scale / sigma2).sqrt();
            let x = omega.panel();
            let xw = omega.project(problem.model);
            for k in 0..omega.periods() {
                p_cols[y0 + k].push((y0 + k, 1.0));
                let mut row = Vec::with_capacity(n + 1);
                row.extend((0..n).map(|j| (j, -root * x[(k, j)])));
                row.push((y0 + k, 1.0));
                rows.push(row);
                b.push(-root * xw[k]);
                kinds.push(Row::Factor);
            }
        }
    }
    let equalities = rows.len();
    Program { p: csc(layout.total, &p_cols), q, rows, b, kinds, equalities }
}

/// The scaled program: ½(w − w*)'Ω(w − w*)/σ*² plus costs c/(γ*σ*²), with
/// Ω dense or in factor form (see [`OmegaForm`]).
fn build(
    problem: &Problem<'_>,
    limits: &Limits,
    budget: Option<f64>,
    layout: &Layout,
    gamma: f64,
    sigma2: f64,
) -> Program {
    let n = layout.n;
    let beta = problem.beta.unwrap_or(&[]);
    let mut prog = tracking_term(problem, layout, sigma2);
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
        if let Some(budget) = budget {
            let sum: Vec<(usize, f64)> = (0..extra).map(|k| (s0 + k, 1.0)).collect();
            prog.push(Row::Turnover, sum, budget);
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
    let a = prog.a_matrix(layout.total);
    let m = prog.b.len();
    let mut cones: Vec<SupportedConeT<f64>> = Vec::new();
    if prog.equalities > 0 {
        cones.push(ZeroConeT(prog.equalities));
    }
    if m > prog.equalities {
        cones.push(NonnegativeConeT(m - prog.equalities));
    }
    let attempt = |(tolerance, equilibrate): (f64, bool)| {
        let settings = DefaultSettings {
            verbose: false,
            max_iter: SOLVER_MAX_ITERATIONS,
            tol_gap_abs: tolerance,
            tol_gap_rel: tolerance,
            tol_feas: tolerance,
            tol_ktratio: 1e-10_f64.max(tolerance),
            equilibrate_enable: equilibrate,
            ..DefaultSettings::default()
        };
        catch_unwind(AssertUnwindSafe(|| -> Result<_, String> {
            let mut solver =
                DefaultSolver::new(&prog.p, &prog.q, &a, &prog.b, &cones, settings).map_err(|e| e.to_string())?;
            let poll = stop.clone();
            solver.set_termination_callback(move |_: &DefaultInfo<f64>| poll.check().is_err());
            solver.solve();
            let s = &solver.solution;
            Ok((s.x.clone(), s.z.clone(), s.status, s.iterations))
        }))
    };
    // A numerical breakdown at the tightest tolerance (a tiny feasible set
    // far from the model) is retried at looser ones, each still within
    // SPEC §10's 1e-9 or reported as reduced accuracy.
    let mut outcome = attempt((SOLVER_TOLERANCE, true));
    let mut used = SOLVER_TOLERANCE;
    for looser in RETRY_TOLERANCES {
        let retry = matches!(&outcome, Ok(Ok((_, _, st, _))) if matches!(st,
            SolverStatus::NumericalError | SolverStatus::InsufficientProgress | SolverStatus::MaxIterations));
        if !retry {
            break;
        }
        stop.check()?;
        outcome = attempt(looser);
        used = looser.0;
    }
    if used > 1e-9 && matches!(&outcome, Ok(Ok((_, _, SolverStatus::Solved, _)))) {
        warnings.push(Warning {
            code: WarningCode::SolverReducedAccuracy,
            message: format!(
                "the implementation solver broke down at tolerance {SOLVER_TOLERANCE:e} and 1e-9 and solved at {used:e}; the limits hold exactly, the objective to that tolerance"
            ),
        });
    }
    drop(a);
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
                    code: if status == SolverStatus::AlmostSolved {
                        WarningCode::SolverReducedAccuracy
                    } else {
                        WarningCode::SolverNotConverged
                    },
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

/// Largest violation of A_e x = b_e and A x ≤ b, relative to 1 + |b|.
fn violation(prog: &Program, x: &[f64]) -> f64 {
    prog.rows
        .iter()
        .zip(&prog.b)
        .enumerate()
        .map(|(r, (row, &b))| {
            let ax: f64 = row.iter().map(|&(c, v)| v * x[c]).sum();
            let gap = if r < prog.equalities { (ax - b).abs() } else { ax - b };
            if ax.is_finite() { (gap / (1.0 + b.abs())).max(0.0) } else { f64::INFINITY }
        })
        .fold(0.0, f64::max)
}

/// The constraints named by the solver's certificate of infeasibility: the
/// rows whose multipliers carry the certificate.
fn infeasible(prog: &Program, z: &[f64], problem: &Problem<'_>) -> EstimateError {
    let settings = &z[prog.equalities..];
    let kinds = &prog.kinds[prog.equalities..];
    let top = settings.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let mut names: Vec<String> = Vec::new();
    let mut factors: Vec<String> = Vec::new();
    for (kind, &zi) in kinds.iter().zip(settings) {
        if top > 0.0 && zi.abs() > 1e-6 * top {
            let Some(name) = kind.setting() else { continue };
            if !names.iter().any(|n| n == name) {
                names.push(name.to_owned());
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
        names = kinds.iter().filter_map(|k| k.setting()).map(str::to_owned).collect();
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

/// The implemented portfolio's constrained quantities.
struct State<'a> {
    w: &'a [f64],
    market_weight: f64,
    gross: f64,
    traded: f64,
}

/// The constraints that hold with equality, with multipliers in objective
/// units (0 when no solver ran).
fn binding(
    problem: &Problem<'_>,
    limits: &Limits,
    state: &State<'_>,
    duals: Option<(&Program, &[f64])>,
    scale: f64,
) -> Vec<BindingConstraint> {
    let tight = |value: f64, limit: f64| limit - value <= BINDING_TOLERANCE * (1.0 + limit);
    let dual_of = |kind: Row| {
        duals.and_then(|(prog, z)| prog.kinds.iter().position(|k| *k == kind).map(|r| z[r] * scale)).unwrap_or(0.0)
    };
    let State { w, market_weight, gross, traded } = *state;
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
    omega: LedoitWolf,
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
        let omega = LedoitWolf::new(&mom);
        Ok(DeskWindow { window, mom, omega })
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
        let form = OmegaForm::for_shape(self.window.used.len(), self.omega.periods());
        self.implement_in(settings, model, model_sharpe, previous, form, stop, warnings)
    }

    /// [`DeskWindow::implement`] with Ω in the given form.
    ///
    /// # Errors
    /// As [`implement`].
    #[allow(clippy::too_many_arguments)]
    pub fn implement_in(
        &self,
        settings: &ValidSettings,
        model: &[f64],
        model_sharpe: f64,
        previous: Holdings<'_>,
        form: OmegaForm,
        stop: &Stop,
        warnings: &mut Vec<Warning>,
    ) -> Result<DeskAnswer, EstimateError> {
        let used = &self.window.used;
        let model_used: Vec<f64> = used.iter().map(|&c| model[c]).collect();
        let held = Positions::over(used, previous);
        let problem = Problem {
            form,
            ..Problem::from_window(&self.window, &self.mom, &self.omega, settings, &model_used, model_sharpe, &held)
        };
        let done = implement(&problem, &Limits::of(settings), stop, warnings)?;
        let mut weights = vec![0.0; previous.weights.len()];
        for (j, &c) in used.iter().enumerate() {
            weights[c] = done.weights[j];
        }
        let sharpe: Vec<f64> = (0..used.len()).map(|j| self.mom.sharpe(j)).collect();
        let top_sharpe_gross_share = top_sharpe_share(&done.weights, &sharpe);
        Ok(DeskAnswer { weights, market_weight: done.market_weight, top_sharpe_gross_share, report: done.report })
    }
}
/// Share of gross weight in the ⌈0.3N⌉ factors of highest Sharpe ratio (SPEC §8).
pub(crate) fn top_sharpe_share(w: &[f64], sharpe: &[f64]) -> f64 {
    let n = w.len();
    let gross: f64 = w.iter().map(|x| x.abs()).sum();
    let top = (0.3 * n as f64).ceil() as usize;
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| sharpe[b].total_cmp(&sharpe[a]));
    order[..top].iter().map(|&j| w[j].abs()).sum::<f64>() / gross
}

#[cfg(test)]
mod tests {
    use super::{DeskWindow, Holdings, Positions};
    use crate::demo::{every_limit, synthetic_panel};
    use crate::estimator::{Stop, fit};

    /// The turnover of SPEC §10, Σ|wᵢ − pᵢ| + |w_m − p_m| + the forced
    /// sales, worked by hand on three factors of which the middle one is
    /// outside the window.
    #[test]
    fn positions_over_a_window_split_forced_sales_from_trades() {
        let held = Positions::over(&[0, 2], Holdings { weights: &[0.1, -0.3, 0.2], market: 0.05 });
        assert_eq!(held, Positions { used: vec![0.1, 0.2], market: 0.05, outside: 0.3 });
        // Hedged: the hedge is traded, only the outside position is forced.
        assert_eq!(held.forced(true), 0.3);
        let hedged = held.turnover(&[0.0, 0.5], -0.1, true);
        assert!((hedged - (0.1 + 0.3 + 0.15 + 0.3)).abs() < 1e-15, "{hedged}");
        // Unhedged: the hedge held is closed, whatever the weights.
        assert!((held.forced(false) - 0.35).abs() < 1e-15);
        let unhedged = held.turnover(&[0.1, 0.2], 0.0, false);
        assert!((unhedged - 0.35).abs() < 1e-15, "{unhedged}");
    }

    /// A fit with previous weights and a backtest date that prepares the same
    /// window alone build one problem (`Problem::from_window`): given the
    /// fit's model weights and model Sharpe ratio, the per-date stage
    /// implements the same portfolio, hedge and turnover.
    #[test]
    fn the_fit_and_a_backtest_date_implement_the_same_portfolio() {
        let mut panel = synthetic_panel(5, 120, 24);
        let held: Vec<f64> = (0..24).map(|j| if j % 4 == 0 { 0.02 } else { 0.0 }).collect();
        panel.previous_weights = panel.factor_names.iter().cloned().zip(held.iter().copied()).collect();
        panel.previous_weights.push(("MKT".into(), 0.05));
        let settings = every_limit().check().unwrap();
        let fitted = fit(&panel, &settings).unwrap();
        let stage = fitted.diagnostics.implementation.as_ref().expect("limits set: the stage runs");
        let model: Vec<f64> = fitted.factors.iter().map(|f| f.model_weight).collect();
        let desk = DeskWindow::new(&panel, &settings).unwrap();
        let answer = desk
            .implement(
                &settings,
                &model,
                stage.model_sharpe,
                Holdings { weights: &held, market: 0.05 },
                &Stop::never(),
                &mut Vec::new(),
            )
            .unwrap();
        for (f, w) in fitted.factors.iter().zip(&answer.weights) {
            assert!((f.weight - w).abs() < 1e-9, "{}: fit {} desk {w}", f.name, f.weight);
        }
        assert!((fitted.market_weight - answer.market_weight).abs() < 1e-9);
        assert!((stage.turnover - answer.report.turnover).abs() < 1e-9);
        assert_eq!(fitted.diagnostics.turnover, Some(stage.turnover));
        assert!((fitted.diagnostics.top_sharpe_gross_share - answer.top_sharpe_gross_share).abs() < 1e-9);
    }
}

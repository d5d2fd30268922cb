//! The strategies a backtest runs beside each other: the configured method,
//! its model portfolio and the baselines (SPEC §9), with the names and
//! settings of each, and what the schedule fits of them per date.

use serde::Serialize;

use crate::estimator::desk::Limits;
use crate::estimator::{self, Choice, CvCriterion, Method, Normalization, Scaling, Settings, ValidSettings};

/// Name of the market as a benchmark and as a strategy.
pub const MARKET: &str = "market";

/// The ridge on all factors as published: κ chosen by the held-out pricing R².
pub const KNS_PUBLISHED: &str = "KNS ridge, all factors (pricing R²)";

/// The ridge on all factors with κ chosen by the held-out Sharpe ratio.
pub const KNS_SHARPE: &str = "KNS ridge, all factors (held-out Sharpe)";

/// Name and id of the strategy run with the settings as given (the command's
/// `--config` and `--set`, or the request's settings over the server's
/// defaults): the row every other strategy is compared with.
pub const CONFIGURED: &str = "configured";

/// Name of the configured method's unconstrained model portfolio, a row of
/// its own when limits or costs are set (SPEC §10).
pub const MODEL: &str = "configured, model portfolio";

/// The implementation limits of a backtest, as run (SPEC §10): the same for
/// every fitted strategy.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ConstraintSet {
    /// Limits and the cost priced in the objective.
    #[serde(flatten)]
    pub limits: Limits,
    /// Amortisation horizon of that cost, periods.
    pub holding_periods: f64,
    /// Half-life of the volatility target's covariance (0 = sample).
    pub volatility_halflife: f64,
    /// Annualised volatility target, when the normalisation has one.
    pub target_volatility: Option<f64>,
}

impl ConstraintSet {
    pub(super) fn of(s: &ValidSettings) -> ConstraintSet {
        ConstraintSet {
            limits: Limits::of(s),
            holding_periods: s.holding_periods.fixed().unwrap_or(f64::from(s.periods_per_year())),
            volatility_halflife: s.volatility_halflife,
            target_volatility: (s.normalization == Normalization::TargetVolatility).then_some(s.target_volatility),
        }
    }

    /// Whether any limit or cost is set.
    pub fn active(&self) -> bool {
        let l = &self.limits;
        [l.max_weight, l.max_gross, l.max_market_weight, l.max_turnover].iter().any(Option::is_some) || l.cost_bps > 0.0
    }
}

/// One strategy of the comparison.
#[derive(Clone, Debug)]
pub struct Strategy {
    /// Stable identifier: lower case, digits and hyphens (column names of `returns.csv`).
    pub id: String,
    /// Display name.
    pub name: String,
    /// Settings of its fits; `None` for the market itself.
    pub settings: Option<ValidSettings>,
}

pub(super) fn with(base: &Settings, f: impl FnOnce(&mut Settings)) -> Option<ValidSettings> {
    let mut s = base.clone();
    f(&mut s);
    s.check().ok()
}

/// The configured method first, then (when `baselines`) the same with every
/// other scaling, plug-in, plug-in with Ledoit–Wolf, KNS ridge on all
/// factors, equal weight, and the market.
pub fn strategies(configured: &ValidSettings, has_market: bool, baselines: bool) -> Vec<Strategy> {
    let base = configured.settings();
    let mut out = vec![Strategy { id: CONFIGURED.into(), name: CONFIGURED.into(), settings: Some(configured.clone()) }];
    if configured.implementation_active() {
        // The configured method's model portfolio, before limits and costs (SPEC §10).
        out.push(Strategy {
            id: "configured-model".into(),
            name: MODEL.into(),
            settings: Some(configured.model_only()),
        });
    }
    if !baselines {
        return out;
    }
    if matches!(base.method, Method::Components | Method::Ensemble | Method::KnsRidge | Method::Blend) {
        // Each scaling's components method (for an ensemble or `auto`, each of its members).
        for sc in Scaling::ALL {
            if sc != base.scaling || base.method != Method::Components {
                let settings = with(base, |s| {
                    s.method = Method::Components;
                    s.scaling = sc;
                });
                out.push(Strategy { id: format!("scaling-{sc}"), name: format!("components, scaling {sc}"), settings });
            }
        }
    }
    let baseline = |m: Method| {
        with(base, |s| {
            s.method = m;
            s.components = Choice::Auto;
        })
    };
    out.push(Strategy { id: "plug-in".into(), name: "plug-in".into(), settings: baseline(Method::PlugIn) });
    out.push(Strategy {
        id: "plug-in-ledoit-wolf".into(),
        name: "plug-in Ledoit-Wolf".into(),
        settings: baseline(Method::PlugInLedoitWolf),
    });
    // KNS ridge on all factors as published: κ by the held-out pricing R² (Kozak, Nagel &
    // Santosh 2020); beside it the same with the held-out Sharpe ratio as the criterion.
    let kns = |criterion: CvCriterion| {
        with(base, |s| {
            s.method = Method::KnsRidge;
            s.components = Choice::Auto;
            s.cv_criterion = criterion;
        })
    };
    for (id, name, criterion) in [
        ("kns-ridge-pricing-r2", KNS_PUBLISHED, CvCriterion::PricingR2),
        ("kns-ridge-sharpe", KNS_SHARPE, CvCriterion::Sharpe),
    ] {
        let settings = kns(criterion);
        // Not twice: the configured method may be one of them.
        if settings.as_ref() != Some(configured) {
            out.push(Strategy { id: id.into(), name: name.into(), settings });
        }
    }
    out.push(Strategy {
        id: "equal-weight".into(),
        name: "equal weight".into(),
        settings: baseline(Method::EqualWeight),
    });
    if has_market {
        out.push(Strategy { id: MARKET.into(), name: MARKET.into(), settings: None });
    }
    out.retain(|s| s.name == MARKET || s.settings.is_some());
    out
}

/// The scalings the component sweep fits at every date. The ridge on every
/// component always uses the covariance basis: its sweep is that basis alone
/// (every other scaling would repeat it).
pub(crate) fn sweep_scalings(configured: &ValidSettings, sweep_max_k: usize) -> Vec<Scaling> {
    match configured.method {
        _ if sweep_max_k == 0 || !has_sweep(configured) => Vec::new(),
        Method::KnsRidge | Method::Blend => vec![Scaling::Covariance],
        _ => Scaling::ALL.to_vec(),
    }
}

/// Progress steps of one fit: one, and one per bootstrap draw when bagged.
pub(crate) fn fit_steps(settings: Option<&ValidSettings>) -> usize {
    match settings {
        Some(s) if s.aggregate == estimator::Aggregate::Bagged => 1 + s.bootstrap_draws as usize,
        _ => 1,
    }
}

/// Whether the backtest sweeps the out-of-sample Sharpe ratio against K:
/// for every method built on principal components.
pub(crate) fn has_sweep(configured: &ValidSettings) -> bool {
    matches!(configured.method, Method::Components | Method::KnsRidge | Method::Ensemble | Method::Blend)
}

/// Configurations the configured method chooses among or combines in every
/// fit: each scaling for `auto` and the ensemble, else itself.
pub(super) fn candidates(configured: &ValidSettings) -> usize {
    match (configured.method, configured.scaling) {
        (Method::Ensemble, _) | (Method::Components, Scaling::Auto) => Scaling::ALL.len(),
        _ => 1,
    }
}

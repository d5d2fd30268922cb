//! The backtest's verdict in a few sentences (SPEC §13): what led net of
//! costs, by how much, with what adjusted confidence, the deflated Sharpe
//! ratio over the distinct trials, and the portfolio to hold.

use super::results::{BacktestResult, Comparison, StrategyResult};
use super::strategies::CONFIGURED;

/// The verdict's figures and its text.
#[derive(Clone, Debug, PartialEq)]
pub struct Verdict {
    /// The strategy with the highest Sharpe ratio net of costs.
    pub leader: String,
    /// Whether the leader is the configured method.
    pub configured_leads: bool,
    /// The strategy the configured method is compared with: the leader, or
    /// the runner-up when the configured method leads.
    pub rival: Option<String>,
    /// The comparison of the configured method with the rival (gross of costs).
    pub comparison: Option<Comparison>,
    /// The verdict, one sentence each.
    pub sentences: Vec<String>,
}

/// Net Sharpe ratio order, NaN last.
fn net(s: &StrategyResult) -> f64 {
    if s.net_metrics.sharpe.is_finite() { s.net_metrics.sharpe } else { f64::NEG_INFINITY }
}

/// The verdict of a backtest result.
pub fn verdict(r: &BacktestResult) -> Verdict {
    let Some(conf) = r.strategies.first() else {
        return Verdict {
            leader: String::new(),
            configured_leads: false,
            rival: None,
            comparison: None,
            sentences: vec!["No strategy was run.".into()],
        };
    };
    let leader = r.strategies.iter().max_by(|a, b| net(a).total_cmp(&net(b))).unwrap_or(conf);
    let configured_leads = leader.id == CONFIGURED;
    let rival = if configured_leads {
        r.strategies.iter().skip(1).max_by(|a, b| net(a).total_cmp(&net(b)))
    } else {
        Some(leader)
    };
    let comparison = rival.and_then(|ru| r.comparisons.iter().find(|c| c.against == ru.name)).cloned();
    let mut sentences = vec![format!(
        "{} refits over {} out-of-sample periods ({} to {}), {} strategies side by side.",
        r.refits,
        r.periods.len(),
        r.periods.first().map_or("–", String::as_str),
        r.periods.last().map_or("–", String::as_str),
        r.strategies.len()
    )];
    let confidence = |c: &Comparison| {
        format!(
            "the gross difference in Sharpe ratio of {:.2} has p = {:.3} alone, {:.3} after Holm's adjustment \
             and {:.3} by the Romano–Wolf step-down over all {} comparisons",
            c.test.difference.abs(),
            c.test.p_value,
            c.p_holm,
            c.p_romano_wolf,
            r.comparisons.len()
        )
    };
    match (configured_leads, rival, &comparison) {
        (true, Some(ru), Some(c)) => sentences.push(format!(
            "The configured method led net of costs (Sharpe {:.2}) ahead of {} ({:.2}); {}.",
            conf.net_metrics.sharpe,
            ru.name,
            ru.net_metrics.sharpe,
            confidence(c)
        )),
        (false, Some(ru), Some(c)) => sentences.push(format!(
            "{} led net of costs (Sharpe {:.2}) ahead of the configured method ({:.2}); {}.",
            ru.name,
            ru.net_metrics.sharpe,
            conf.net_metrics.sharpe,
            confidence(c)
        )),
        _ => sentences.push(format!("The configured method's net Sharpe ratio was {:.2}.", conf.net_metrics.sharpe)),
    }
    sentences.push(format!(
        "The configured method's deflated Sharpe ratio over the {} distinct candidate configurations tried is {:.2} \
         (the probability that its Sharpe ratio beats the best of as many unskilled trials).",
        r.trials.len(),
        r.dsr
    ));
    if let Some(l) = &r.last_fit {
        sentences.push(format!(
            "The portfolio to hold is the configured method's fit on {} to {} (gross {:.2}, hedge {:+.3}); its weights are in weights.csv.",
            l.first_period,
            l.last_period,
            l.fit.factors.iter().map(|f| f.weight.abs()).sum::<f64>() + l.fit.market_weight.abs(),
            l.fit.market_weight
        ));
    }
    Verdict {
        leader: leader.name.clone(),
        configured_leads,
        rival: rival.map(|s| s.name.clone()),
        comparison,
        sentences,
    }
}

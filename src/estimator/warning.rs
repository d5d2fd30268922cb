//! The warnings a fit can raise: one enum, so that the compiler keeps the
//! list complete (`--fail-on` accepts exactly [`WarningCode::ALL`]), with the
//! stable word each one is written as and its one-line meaning.

use std::cmp::Ordering;

macro_rules! warning_codes {
    ($($variant:ident => $word:literal, $meaning:literal;)*) => {
        /// Every condition a fit can warn about, in the README's order.
        #[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
        pub enum WarningCode {
            $(#[doc = $meaning] $variant,)*
        }

        impl WarningCode {
            /// Every code, in the README's order.
            pub const ALL: [WarningCode; [$(WarningCode::$variant),*].len()] = [$(WarningCode::$variant),*];

            /// The stable word the code is written as (`kappa-at-grid-edge`).
            pub fn word(self) -> &'static str {
                match self {
                    $(WarningCode::$variant => $word,)*
                }
            }

            /// What the code means, in one line (the report's warning table).
            pub fn meaning(self) -> &'static str {
                match self {
                    $(WarningCode::$variant => $meaning,)*
                }
            }

            /// The code written as `word`.
            pub fn from_word(word: &str) -> Option<WarningCode> {
                match word {
                    $($word => Some(WarningCode::$variant),)*
                    _ => None,
                }
            }
        }
    };
}

warning_codes! {
    FactorsExcluded => "factors-excluded",
        "some factors were left out (missing values, no variance, or spanned by the market)";
    ShortWindow => "short-window", "fewer than twice as many periods as factors: estimates are noisy";
    ReturnScale => "return-scale", "returns look like percentages, not decimals (0.01 means 1%)";
    ComponentsAtGridEdge => "components-at-grid-edge",
        "cross-validation chose the largest K it may: raise max_components";
    KappaAtGridEdge => "kappa-at-grid-edge",
        "cross-validation chose an end of the κ grid: the grid, not the data, decided";
    ComponentsCappedByRank => "components-capped-by-rank", "the window's rank allowed fewer components than asked";
    SingularCovariance => "singular-covariance",
        "the covariance is singular: the plug-in used the minimum-norm solution";
    SolverNotConverged => "solver-not-converged",
        "a solver stopped at its iteration limit; its answer meets the limits";
    PreviousWeightsUnknownFactor => "previous-weights-unknown-factor",
        "a previous weight names a factor not in the window: it is sold";
    ForcedSaleOverTurnover => "forced-sale-over-turnover",
        "held positions without returns in the window were sold above max_turnover; the limit applied to the other trades";
    ModelNoEdge => "model-no-edge",
        "the model's own Sharpe ratio was not positive: trades are priced at a floor";
    SolverReducedAccuracy => "solver-reduced-accuracy", "the implementation solver reached only reduced accuracy";
    IllConditionedCovariance => "ill-conditioned-covariance",
        "the covariance is nearly singular (condition number above 1e10)";
    ComponentsNotSeparated => "components-not-separated",
        "two eigenvalues tie: the K-component subspace is arbitrary";
    RiskCalibrationUnavailable => "risk-calibration-unavailable",
        "no fold measured out-of-sample risk: the in-window volatility is the target";
    RiskCalibrationLimited => "risk-calibration-limited", "the risk calibration was held at its limit of 1/4 or 4";
    FrequencyAssumed => "frequency-assumed", "no period labels and no periods_per_year: monthly was assumed";
}

/// Codes order by their words (the order of every sorted list of codes).
impl PartialOrd for WarningCode {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for WarningCode {
    fn cmp(&self, other: &Self) -> Ordering {
        self.word().cmp(other.word())
    }
}

impl std::fmt::Display for WarningCode {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.word())
    }
}

impl PartialEq<&str> for WarningCode {
    fn eq(&self, other: &&str) -> bool {
        self.word() == *other
    }
}

/// Every warning code's word, in the README's order (what `--fail-on` accepts).
pub fn warning_words() -> impl Iterator<Item = &'static str> {
    WarningCode::ALL.into_iter().map(WarningCode::word)
}

/// What the code written as `word` means (a generic line for an unknown word).
pub fn warning_meaning(word: &str) -> &'static str {
    WarningCode::from_word(word).map_or("a condition the fit reported", WarningCode::meaning)
}

/// A condition worth knowing; the weights are still valid.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Warning {
    /// Stable code.
    pub code: WarningCode,
    /// Explanation.
    pub message: String,
}

/// Each code once, at its first place: a repeated code (bagging refits the
/// stage once per draw) keeps its first message and says how many more.
pub(crate) fn merge_repeated_warnings(warnings: &mut Vec<Warning>) {
    let mut merged: Vec<(Warning, usize)> = Vec::with_capacity(warnings.len());
    for w in warnings.drain(..) {
        match merged.iter_mut().find(|(m, _)| m.code == w.code) {
            Some((_, more)) => *more += 1,
            None => merged.push((w, 0)),
        }
    }
    warnings.extend(merged.into_iter().map(|(mut w, more)| {
        if more > 0 {
            w.message.push_str(&format!(" (and {more} more like it)"));
        }
        w
    }));
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn words_are_unique_and_read_back() {
        let mut words: Vec<&str> = warning_words().collect();
        assert_eq!(words.len(), 17);
        for code in WarningCode::ALL {
            assert_eq!(WarningCode::from_word(code.word()), Some(code));
            assert_ne!(code.meaning(), warning_meaning("no-such-code"), "{code} has no meaning");
        }
        words.sort_unstable();
        words.dedup();
        assert_eq!(words.len(), 17, "no word twice");
        assert!(WarningCode::KappaAtGridEdge < WarningCode::FactorsExcluded.max(WarningCode::ModelNoEdge));
    }
}

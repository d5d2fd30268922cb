//! Typed errors of the estimator. Every input error carries a [`Location`]
//! naming the field and, where it applies, the row (period) and column (factor).

use std::fmt;

use thiserror::Error;

/// Where in the input a problem sits. Rows and columns are zero-based indices
/// into the request (`returns` row = period, column = factor); the period
/// label and factor name are added when they are known.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Location {
    /// Request field: `returns`, `market_returns`, `factor_names`, `period_labels`, ...
    pub field: &'static str,
    /// Zero-based period index.
    pub row: Option<usize>,
    /// Zero-based factor index.
    pub column: Option<usize>,
    /// Label of the period, when labels were given.
    pub period: Option<String>,
    /// Name of the factor, when known.
    pub factor: Option<String>,
}

impl Location {
    /// A location that names only a field.
    pub fn field(field: &'static str) -> Self {
        Location { field, ..Location::default() }
    }

    /// Adds a row.
    pub fn row(mut self, row: usize, period: Option<&str>) -> Self {
        self.row = Some(row);
        self.period = period.map(str::to_owned);
        self
    }

    /// Adds a column.
    pub fn column(mut self, column: usize, factor: Option<&str>) -> Self {
        self.column = Some(column);
        self.factor = factor.map(|f| truncate_for_display(f).into_owned());
        self
    }
}

/// Shortens absurdly long names so that error messages stay readable.
pub(crate) fn truncate_for_display(s: &str) -> std::borrow::Cow<'_, str> {
    const MAX: usize = 64;
    if s.len() <= MAX {
        return s.into();
    }
    let mut end = MAX;
    while !s.is_char_boundary(end) {
        end -= 1;
    }
    format!("{}… ({} bytes)", &s[..end], s.len()).into()
}

/// A number for a message in its shortest round-trip form: plain between
/// 1e-4 and 1e15, scientific outside (so 1e300 is five characters, not 301).
pub(crate) fn display_number(v: f64) -> String {
    let a = v.abs();
    if a == 0.0 || !a.is_finite() || (1e-4..1e15).contains(&a) { format!("{v}") } else { format!("{v:e}") }
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "field `{}`", self.field)?;
        if let Some(r) = self.row {
            write!(f, ", row {r}")?;
            if let Some(p) = &self.period {
                write!(f, " (period {p})")?;
            }
        }
        if let Some(c) = self.column {
            write!(f, ", column {c}")?;
            if let Some(n) = &self.factor {
                write!(f, " (factor \"{n}\")")?;
            }
        }
        Ok(())
    }
}

/// A problem with the window itself: shapes, values, names or labels.
#[derive(Clone, Debug, Error, PartialEq)]
#[non_exhaustive]
#[allow(missing_docs)] // variant fields are named in the variant docs and messages
pub enum InputError {
    /// A field has the wrong number of values.
    #[error("{at}: expected {expected} values, found {found}")]
    Shape { at: Location, expected: usize, found: usize },
    /// ±inf, or NaN where NaN is not a missing-value marker.
    #[error("{at}: value {value} is not a finite number")]
    NonFinite { at: Location, value: f64 },
    /// A value too large to be a decimal return.
    #[error(
        "{at}: value {value:e} is not a plausible decimal return (|value| must be at most {limit:e}; 0.01 means 1%)"
    )]
    OutOfRange { at: Location, value: f64, limit: f64 },
    /// A weight too large to be a position in multiples of NAV.
    #[error("{at}: weight {value:e} is not a plausible position (|weight| must be at most {limit:e} times NAV)")]
    WeightOutOfRange { at: Location, value: f64, limit: f64 },
    /// A missing value where the policy (or the field) does not allow one.
    #[error("{at}: value is missing ({rule})")]
    Missing { at: Location, rule: &'static str },
    /// A factor has no value at all in the window.
    #[error("{at}: the factor has no values in the window (every one of its {periods} periods is missing)")]
    AllMissing { at: Location, periods: usize },
    /// Two factors share a name.
    #[error("{at}: duplicate factor name \"{name}\" (first used by column {first_column})")]
    DuplicateName { at: Location, name: String, first_column: usize },
    /// A factor has an empty name.
    #[error("{at}: factor name is empty")]
    EmptyName { at: Location },
    /// A factor name is longer than the limit.
    #[error("{at}: factor name is {length} bytes long, more than the limit of {max}")]
    NameTooLong { at: Location, length: usize, max: usize },
    /// A period label is not `YYYY-MM` or `YYYY-MM-DD`.
    #[error("{at}: period label \"{label}\" is not a date of the form YYYY-MM or YYYY-MM-DD")]
    BadPeriodLabel { at: Location, label: String },
    /// Period labels are not strictly increasing.
    #[error(
        "{at}: period \"{label}\" does not come after the previous period \"{previous}\" (periods must be strictly increasing, oldest first)"
    )]
    UnsortedPeriods { at: Location, label: String, previous: String },
    /// The period labels have no one frequency (SPEC §13).
    #[error("{at}: the period labels are not evenly spaced: {detail}")]
    IrregularPeriods { at: Location, detail: String },
    /// The window is shorter than the estimator needs.
    #[error("field `returns`: {periods} periods is too few; at least {required} are needed ({reason})")]
    TooFewPeriods { periods: usize, required: usize, reason: &'static str },
    /// The window has no factor columns.
    #[error("field `factor_names`: the window has no factors")]
    NoFactors,
    /// Every factor was excluded.
    #[error("field `returns`: no usable factors remain ({excluded} excluded: {summary})")]
    NoUsableFactors { excluded: usize, summary: String },
    /// The market return does not vary, so betas are undefined.
    #[error("field `market_returns`: the market return has zero variance in the window")]
    MarketZeroVariance,
}

impl InputError {
    /// The location the error names, if it names one.
    pub fn location(&self) -> Option<&Location> {
        match self {
            InputError::Shape { at, .. }
            | InputError::NonFinite { at, .. }
            | InputError::OutOfRange { at, .. }
            | InputError::WeightOutOfRange { at, .. }
            | InputError::Missing { at, .. }
            | InputError::AllMissing { at, .. }
            | InputError::DuplicateName { at, .. }
            | InputError::EmptyName { at }
            | InputError::NameTooLong { at, .. }
            | InputError::BadPeriodLabel { at, .. }
            | InputError::UnsortedPeriods { at, .. }
            | InputError::IrregularPeriods { at, .. } => Some(at),
            InputError::TooFewPeriods { .. }
            | InputError::NoFactors
            | InputError::NoUsableFactors { .. }
            | InputError::MarketZeroVariance => None,
        }
    }
}

/// A setting that is unknown, of the wrong type or out of range.
#[derive(Clone, Debug, Error, PartialEq)]
#[non_exhaustive]
#[allow(missing_docs)] // variant fields are named in the variant docs and messages
pub enum SettingsError {
    /// The key is not a setting.
    #[error(
        "unknown setting `{field}`{}; the settings are: {}",
        closest.map(|c| format!(" (did you mean `{c}`?)")).unwrap_or_default(),
        known.join(", ")
    )]
    UnknownField { field: String, closest: Option<&'static str>, known: &'static [&'static str] },
    /// The value has the wrong type or is not an accepted word.
    #[error("setting `{field}`: invalid value \"{value}\": {reason}")]
    InvalidValue { field: &'static str, value: String, reason: String },
    /// The value is outside the documented range.
    #[error("setting `{field}`: value {value} is out of range (allowed: {range})")]
    OutOfRange { field: &'static str, value: String, range: &'static str },
    /// A settings file could not be read.
    #[error("settings file: {message}")]
    File { message: String },
}

/// Any failure of an estimation.
#[derive(Clone, Debug, Error, PartialEq)]
#[non_exhaustive]
#[allow(missing_docs)] // variant fields are named in the variant docs and messages
pub enum EstimateError {
    /// The window is malformed (boxed: locations carry names and labels).
    #[error(transparent)]
    Input(Box<InputError>),
    /// The settings are invalid.
    #[error(transparent)]
    Settings(#[from] SettingsError),
    /// A fixed number of components exceeds what the window supports.
    #[error("setting `components`: {requested} components requested but at most {allowed} fit this window ({reason})")]
    TooManyComponents { requested: usize, allowed: usize, reason: String },
    /// `pricing-r2-gls` needs an invertible held-out covariance.
    #[error(
        "setting `cv_criterion`: pricing-r2-gls needs a well-conditioned held-out covariance, but fold {fold} has {periods} periods for {factors} factors (condition number {condition:.3e}); use pricing-r2 or sharpe, or fewer factors"
    )]
    CriterionUnavailable { fold: usize, periods: usize, factors: usize, condition: f64 },
    /// Every cross-validation score was undefined.
    #[error("cross-validation produced no finite score ({reason})")]
    NoFiniteScore { reason: String },
    /// The resulting portfolio cannot be scaled (for example all weights are zero).
    #[error("the portfolio is degenerate: {reason}")]
    DegeneratePortfolio { reason: String },
    /// A decomposition failed to converge.
    #[error("numerical failure in {stage}: {detail}")]
    Numerical { stage: &'static str, detail: String },
    /// No portfolio satisfies the implementation limits together (SPEC §10).
    #[error("the limits are infeasible: {detail} (settings involved: {})", constraints.join(", "))]
    ConstraintsInfeasible { constraints: Vec<String>, detail: String },
    /// The implementation solver stopped without a usable portfolio.
    #[error("the implementation solver stopped ({status}): {detail}")]
    SolverFailed { status: String, detail: String },
    /// The caller cancelled the computation.
    /// A set `periods_per_year` that the period labels contradict (SPEC §13).
    #[error(
        "setting `periods_per_year`: {given} was set but the period labels are {inferred} a year (median gap \
         {median_gap_days:.1} days); leave periods_per_year unset to use the labels' frequency, or set \
         frequency_check = false"
    )]
    FrequencyMismatch { given: u32, inferred: u32, median_gap_days: f64 },
    #[error("the computation was cancelled")]
    Cancelled,
    /// The computation ran past its deadline.
    #[error("the computation ran past its deadline")]
    DeadlineExceeded,
}

impl From<InputError> for EstimateError {
    fn from(e: InputError) -> Self {
        EstimateError::Input(Box::new(e))
    }
}

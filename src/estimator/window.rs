//! The return window: the raw panel a caller sends ([`ReturnPanel`]) and its
//! validated form ([`ReturnWindow`]) with missing-value and zero-variance
//! exclusions applied (SPEC §1).

use super::dense::Kernels;
use faer::Mat;

use super::moments::{centred, column, dot, sum};

use super::error::{InputError, Location, truncate_for_display};
use super::settings::{Method, MissingPolicy, ValidSettings};

/// Longest factor name accepted, in bytes.
pub const MAX_NAME_BYTES: usize = 256;
/// Largest absolute return accepted: returns are decimals (0.01 = 1%), so a
/// larger value is a unit or data error, and its square would overflow the
/// moments long before 1e308.
pub const MAX_ABS_RETURN: f64 = 1e6;
/// Periods per CV fold below which a window is too short (SPEC §1).
pub const MIN_PERIODS_PER_FOLD: usize = 8;

/// A window of returns as a caller gives it, before any validation.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ReturnPanel {
    /// Factor names, one per column.
    pub factor_names: Vec<String>,
    /// Period labels, one per row, or empty.
    pub period_labels: Vec<String>,
    /// Returns, row-major, `rows × cols`; NaN marks a missing value.
    pub returns: Vec<f64>,
    /// Number of periods.
    pub rows: usize,
    /// Number of factors.
    pub cols: usize,
    /// Market excess return per period, if any.
    pub market: Option<Vec<f64>>,
    /// Weights currently held, by factor name; an entry named
    /// `market_name` is the hedge currently held.
    pub previous_weights: Vec<(String, f64)>,
    /// Name of the market series, when it has one (a CSV column, or the
    /// request's `market_name`).
    pub market_name: Option<String>,
}

/// Why a factor was left out of the estimation.
#[derive(Clone, Debug, PartialEq)]
pub enum ExclusionReason {
    /// The factor has missing values in the window (policy `drop-factor`).
    MissingValues {
        /// Number of missing values.
        count: usize,
        /// First row with a missing value.
        first_row: usize,
    },
    /// The factor's variance in the window is zero or negligible.
    ZeroVariance,
    /// After removing the market exposure nothing is left: the factor is the market.
    SpannedByMarket,
}

impl ExclusionReason {
    /// Stable code for programs.
    pub fn code(&self) -> &'static str {
        match self {
            ExclusionReason::MissingValues { .. } => "missing-values",
            ExclusionReason::ZeroVariance => "zero-variance",
            ExclusionReason::SpannedByMarket => "spanned-by-market",
        }
    }

    /// Text for people.
    pub fn describe(&self, labels: &[String]) -> String {
        match self {
            ExclusionReason::MissingValues { count, first_row } => {
                let at = labels
                    .get(*first_row)
                    .map_or_else(|| format!("row {first_row}"), |l| format!("row {first_row} ({l})"));
                format!("{count} missing value(s) in the window, first at {at}")
            }
            ExclusionReason::ZeroVariance => "zero or negligible variance in the window".to_owned(),
            ExclusionReason::SpannedByMarket => {
                "no variance left after removing the market exposure (the factor is the market)".to_owned()
            }
        }
    }
}

/// A factor left out, by its column in the panel.
#[derive(Clone, Debug, PartialEq)]
pub struct Exclusion {
    /// Zero-based column in the panel.
    pub column: usize,
    /// Why.
    pub reason: ExclusionReason,
}

/// A validated window: finite returns of the usable factors only.
#[derive(Clone, Debug)]
pub struct ReturnWindow {
    pub(crate) names: Vec<String>,
    pub(crate) labels: Vec<String>,
    /// Panel columns of the usable factors, ascending.
    pub(crate) used: Vec<usize>,
    pub(crate) excluded: Vec<Exclusion>,
    /// T × used.len(), column-major.
    pub(crate) returns: Mat<f64>,
    pub(crate) market: Option<Vec<f64>>,
}

/// A factor whose demarketed volatility is below this fraction of its raw
/// root-mean-square return is treated as having no variance. Relative, so
/// that returns in percent and in decimals behave the same.
const ZERO_VARIANCE_RELATIVE: f64 = 1e-10;

/// Largest |previous weight| accepted, in multiples of NAV.
pub const MAX_PREVIOUS_WEIGHT: f64 = 1e6;

impl ReturnWindow {
    /// Validates a panel against the settings.
    ///
    /// # Errors
    /// An [`InputError`] naming the field, row and column of the first problem.
    pub fn new(panel: &ReturnPanel, settings: &ValidSettings) -> Result<ReturnWindow, InputError> {
        ReturnWindow::new_with(panel, settings, Kernels::SEQUENTIAL)
    }

    /// [`ReturnWindow::new`] with the fit's kernels for the usable-column
    /// checks (split by columns: the same result for any thread count).
    pub(crate) fn new_with(
        panel: &ReturnPanel,
        settings: &ValidSettings,
        kernels: Kernels,
    ) -> Result<ReturnWindow, InputError> {
        let rows = panel.rows;
        check_structure(panel)?;
        for (i, &(ref n, w)) in panel.previous_weights.iter().enumerate() {
            if !w.is_finite() {
                return Err(InputError::NonFinite {
                    at: Location::field("previous_weights").column(i, Some(n)),
                    value: w,
                });
            }
            if w.abs() > MAX_PREVIOUS_WEIGHT {
                return Err(InputError::WeightOutOfRange {
                    at: Location::field("previous_weights").column(i, Some(n)),
                    value: w,
                    limit: MAX_PREVIOUS_WEIGHT,
                });
            }
        }
        if let Some(m) = &panel.market_name
            && let Some(c) = panel.factor_names.iter().position(|f| f == m)
        {
            return Err(InputError::DuplicateName {
                at: Location::field("market_name"),
                name: m.clone(),
                first_column: c,
            });
        }
        check_length(rows, settings)?;
        let missing = check_values(panel, settings.missing_policy)?;
        let (mut excluded, candidates) = missing_exclusions(panel, &missing)?;
        let market = panel.market.clone();
        let demarket_with = if settings.demarket { market.as_deref() } else { None };
        if let Some(m) = demarket_with {
            check_market_variance(m)?;
        }
        let gathered = gather_columns(panel, &candidates);
        let keep = usable_columns(kernels, &gathered, &candidates, demarket_with, &mut excluded);
        excluded.sort_by_key(|e| e.column);
        if keep.is_empty() {
            let summary = excluded
                .iter()
                .take(5)
                .map(|e| format!("\"{}\": {}", truncate_for_display(&panel.factor_names[e.column]), e.reason.code()))
                .collect::<Vec<_>>()
                .join(", ");
            return Err(InputError::NoUsableFactors { excluded: excluded.len(), summary });
        }
        let used: Vec<usize> = keep.iter().map(|&j| candidates[j]).collect();
        let returns = if keep.len() == candidates.len() {
            gathered
        } else {
            let mut m = Mat::<f64>::zeros(rows, keep.len());
            for (to, &from) in keep.iter().enumerate() {
                m.col_mut(to).copy_from(gathered.col(from));
            }
            m
        };
        Ok(ReturnWindow {
            names: panel.factor_names.clone(),
            labels: panel.period_labels.clone(),
            used,
            excluded,
            returns,
            market,
        })
    }

    /// Number of periods.
    pub fn periods(&self) -> usize {
        self.returns.nrows()
    }

    /// Number of usable factors.
    pub fn factors_used(&self) -> usize {
        self.used.len()
    }

    /// All factor names, in panel order.
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// Factors left out, in panel order.
    pub fn excluded(&self) -> &[Exclusion] {
        &self.excluded
    }
}

fn check_names(names: &[String]) -> Result<(), InputError> {
    let mut seen = std::collections::HashMap::with_capacity(names.len());
    for (c, n) in names.iter().enumerate() {
        let at = || Location::field("factor_names").column(c, Some(n));
        if n.len() > MAX_NAME_BYTES {
            return Err(InputError::NameTooLong { at: at(), length: n.len(), max: MAX_NAME_BYTES });
        }
        if n.trim().is_empty() {
            return Err(InputError::EmptyName { at: Location::field("factor_names").column(c, None) });
        }
        if let Some(&first) = seen.get(n.as_str()) {
            return Err(InputError::DuplicateName { at: at(), name: n.clone(), first_column: first });
        }
        seen.insert(n.as_str(), c);
    }
    Ok(())
}

/// Parses `YYYY-MM` or `YYYY-MM-DD` into a sortable key (day 0 for months).
pub fn parse_period(label: &str) -> Option<(u32, u32, u32)> {
    let b = label.as_bytes();
    let digits = |s: &[u8]| s.iter().all(u8::is_ascii_digit);
    let num = |s: &str| s.parse::<u32>().ok();
    let (y, m, d) = match b.len() {
        7 if b[4] == b'-' && digits(&b[..4]) && digits(&b[5..7]) => (num(&label[..4])?, num(&label[5..7])?, 0),
        10 if b[4] == b'-' && b[7] == b'-' && digits(&b[..4]) && digits(&b[5..7]) && digits(&b[8..10]) => {
            (num(&label[..4])?, num(&label[5..7])?, num(&label[8..10])?)
        }
        _ => return None,
    };
    let day_ok = d == 0 && b.len() == 7 || (1..=31).contains(&d);
    ((1..=12).contains(&m) && day_ok).then_some((y, m, d))
}

/// Names, shape, labels and market values: everything about a panel that
/// does not depend on the settings.
///
/// # Errors
/// An [`InputError`] naming the field, row and column of the first problem.
pub fn check_structure(panel: &ReturnPanel) -> Result<(), InputError> {
    let (rows, cols) = (panel.rows, panel.cols);
    check_names(&panel.factor_names)?;
    if cols == 0 {
        return Err(InputError::NoFactors);
    }
    if panel.factor_names.len() != cols {
        return Err(InputError::Shape {
            at: Location::field("factor_names"),
            expected: cols,
            found: panel.factor_names.len(),
        });
    }
    let expected = rows.saturating_mul(cols);
    if panel.returns.len() != expected {
        return Err(InputError::Shape { at: Location::field("returns"), expected, found: panel.returns.len() });
    }
    if !panel.period_labels.is_empty() {
        check_labels(&panel.period_labels, rows)?;
    }
    if let Some(m) = &panel.market {
        check_market_values(panel, m)?;
    }
    Ok(())
}

fn check_market_values(panel: &ReturnPanel, m: &[f64]) -> Result<(), InputError> {
    let label = |r: usize| panel.period_labels.get(r).map(String::as_str);
    if m.len() != panel.rows {
        return Err(InputError::Shape { at: Location::field("market_returns"), expected: panel.rows, found: m.len() });
    }
    for (r, &v) in m.iter().enumerate() {
        let at = || Location::field("market_returns").row(r, label(r));
        if v.is_nan() {
            return Err(InputError::Missing { at: at(), rule: "the market return may not be missing" });
        }
        if !v.is_finite() {
            return Err(InputError::NonFinite { at: at(), value: v });
        }
        if v.abs() > MAX_ABS_RETURN {
            return Err(InputError::OutOfRange { at: at(), value: v, limit: MAX_ABS_RETURN });
        }
    }
    Ok(())
}

/// The fewest periods a window may have under `settings`: `min_periods`, and
/// 8 per cross-validation fold for the component methods.
pub fn min_periods_required(settings: &ValidSettings) -> usize {
    let per_fold = if matches!(settings.method, Method::Components | Method::KnsRidge | Method::Blend) {
        settings.folds as usize * MIN_PERIODS_PER_FOLD
    } else {
        0
    };
    (settings.min_periods as usize).max(per_fold)
}

fn check_length(rows: usize, settings: &ValidSettings) -> Result<(), InputError> {
    let min_required = min_periods_required(settings);
    if rows < min_required {
        let reason = if rows < settings.min_periods as usize {
            "setting min_periods"
        } else {
            "8 periods per cross-validation fold"
        };
        return Err(InputError::TooFewPeriods { periods: rows, required: min_required, reason });
    }
    Ok(())
}

/// Every return value: ±inf and values beyond [`MAX_ABS_RETURN`] are errors;
/// NaN follows the missing-value policy. Returns, per column, the count of
/// missing values and the first row with one.
///
/// # Errors
/// An [`InputError`] naming the row and column of the first bad value.
pub fn check_values(panel: &ReturnPanel, policy: MissingPolicy) -> Result<Vec<(usize, usize)>, InputError> {
    let (rows, cols) = (panel.rows, panel.cols);
    let name = |c: usize| panel.factor_names.get(c).map(String::as_str);
    let label = |r: usize| panel.period_labels.get(r).map(String::as_str);
    let mut missing = vec![(0usize, usize::MAX); cols];
    for r in 0..rows {
        for c in 0..cols {
            let v = panel.returns[r * cols + c];
            let at = || Location::field("returns").row(r, label(r)).column(c, name(c));
            if v.is_nan() {
                if policy == MissingPolicy::Reject {
                    return Err(InputError::Missing { at: at(), rule: "missing_policy is reject" });
                }
                let e = &mut missing[c];
                e.0 += 1;
                e.1 = e.1.min(r);
            } else if !v.is_finite() {
                return Err(InputError::NonFinite { at: at(), value: v });
            } else if v.abs() > MAX_ABS_RETURN {
                return Err(InputError::OutOfRange { at: at(), value: v, limit: MAX_ABS_RETURN });
            }
        }
    }
    Ok(missing)
}

/// Columns with missing values become exclusions; the rest are candidates.
fn missing_exclusions(
    panel: &ReturnPanel,
    missing: &[(usize, usize)],
) -> Result<(Vec<Exclusion>, Vec<usize>), InputError> {
    let mut excluded = Vec::new();
    let mut candidates = Vec::new();
    for (c, &(count, first_row)) in missing.iter().enumerate() {
        if count == panel.rows {
            let name = panel.factor_names.get(c).map(String::as_str);
            return Err(InputError::AllMissing { at: Location::field("returns").column(c, name), periods: panel.rows });
        }
        if count > 0 {
            excluded.push(Exclusion { column: c, reason: ExclusionReason::MissingValues { count, first_row } });
        } else {
            candidates.push(c);
        }
    }
    Ok((excluded, candidates))
}

fn check_market_variance(m: &[f64]) -> Result<(), InputError> {
    let rows = m.len();
    let mean = m.iter().sum::<f64>() / rows as f64;
    let var = m.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>();
    let rms = (m.iter().map(|x| x * x).sum::<f64>() / rows as f64).sqrt();
    if !(var > 0.0) || var.sqrt() <= ZERO_VARIANCE_RELATIVE * rms * (rows as f64).sqrt() {
        return Err(InputError::MarketZeroVariance);
    }
    Ok(())
}

/// The `columns` of the row-major panel as a T × n column-major matrix.
fn gather_columns(panel: &ReturnPanel, columns: &[usize]) -> Mat<f64> {
    let cols = panel.cols;
    // Column by column; neighbouring columns share the panel's cache lines.
    Mat::from_fn(panel.rows, columns.len(), |r, j| panel.returns[r * cols + columns[j]])
}

/// The positions (into `candidates`, whose columns `gathered` holds) of the
/// candidates that vary, judged on the demarketed series over the whole
/// window; the others are added to `excluded`.
fn usable_columns(
    kernels: Kernels,
    gathered: &Mat<f64>,
    candidates: &[usize],
    demarket_with: Option<&[f64]>,
    excluded: &mut Vec<Exclusion>,
) -> Vec<usize> {
    let rows = gathered.nrows();
    let n = rows as f64;
    let market = demarket_with.map(centred);
    // Each column on its own (so a large window splits over the fit's threads
    // with the same outcome): None to keep it, else why it is left out.
    let judge = |range: std::ops::Range<usize>| -> Vec<Option<ExclusionReason>> {
        let mut dev = vec![0.0; rows];
        range
            .map(|j| {
                let col = column(gathered, j);
                let mean = sum(col) / n;
                let rms = (dot(col, col) / n).sqrt();
                for (d, x) in dev.iter_mut().zip(col) {
                    *d = x - mean;
                }
                let floor = ZERO_VARIANCE_RELATIVE * rms;
                if !((dot(&dev, &dev) / (n - 1.0)).sqrt() > floor) {
                    return Some(ExclusionReason::ZeroVariance);
                }
                if let Some((mc, m_ss)) = &market {
                    let beta = dot(&dev, mc) / m_ss;
                    // The residual of the OLS fit has mean zero: its sum of squares directly.
                    for (d, v) in dev.iter_mut().zip(mc) {
                        *d -= beta * v;
                    }
                    if !((dot(&dev, &dev) / (n - 1.0)).sqrt() > floor) {
                        return Some(ExclusionReason::SpannedByMarket);
                    }
                }
                None
            })
            .collect()
    };
    let k = candidates.len();
    let parts = kernels.threads().clamp(1, k.max(1));
    let per = k.div_ceil(parts).max(1);
    let ranges: Vec<std::ops::Range<usize>> = (0..k).step_by(per).map(|a| a..(a + per).min(k)).collect();
    let verdicts = kernels.for_parts(ranges, 8.0 * (rows * k) as f64, judge);
    let mut keep = Vec::with_capacity(k);
    for (j, verdict) in verdicts.into_iter().flatten().enumerate() {
        match verdict {
            None => keep.push(j),
            Some(reason) => excluded.push(Exclusion { column: candidates[j], reason }),
        }
    }
    keep
}

fn check_labels(labels: &[String], rows: usize) -> Result<(), InputError> {
    if labels.len() != rows {
        return Err(InputError::Shape { at: Location::field("period_labels"), expected: rows, found: labels.len() });
    }
    let mut prev: Option<((u32, u32, u32), &str)> = None;
    for (r, l) in labels.iter().enumerate() {
        let at = || Location::field("period_labels").row(r, Some(&truncate_for_display(l)));
        let key = parse_period(l)
            .ok_or_else(|| InputError::BadPeriodLabel { at: at(), label: truncate_for_display(l).into_owned() })?;
        if let Some((pk, pl)) = prev
            && key <= pk
        {
            return Err(InputError::UnsortedPeriods { at: at(), label: l.clone(), previous: pl.to_owned() });
        }
        prev = Some((key, l));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn period_labels_parse() {
        assert_eq!(parse_period("2001-02"), Some((2001, 2, 0)));
        assert_eq!(parse_period("2001-02-28"), Some((2001, 2, 28)));
        assert_eq!(parse_period("2001-13"), None);
        assert_eq!(parse_period("2001-02-00"), None);
        assert_eq!(parse_period("01-02"), None);
        assert_eq!(parse_period("2001/02"), None);
    }
}

//! The sampling frequency read from the period labels (SPEC §13): every
//! annualisation (volatility target, κ, Sharpe ratios) depends on it, so it
//! is inferred rather than assumed, and a stated frequency that the labels
//! contradict is refused.

use super::error::{EstimateError, InputError, Location};
use super::settings::{ASSUMED_PERIODS_PER_YEAR, Choice, Settings, ValidSettings};
use super::window::{ReturnPanel, parse_period};

/// Share of the gaps between consecutive labels that must fall in the band
/// of the median gap for the spacing to count as regular.
pub const REGULAR_SHARE: f64 = 0.9;

/// Where the frequency in force came from.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum FrequencySource {
    /// `periods_per_year` was set (and, with labels, agreed with them or
    /// `frequency_check` was off).
    #[default]
    Given,
    /// Read from the period labels.
    Inferred,
    /// No labels and no setting: monthly assumed (warning `frequency-assumed`).
    Assumed,
}

/// A frequency read from labels.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct InferredFrequency {
    /// Periods per year: 252, 52, 12, 4 or 1.
    pub periods_per_year: u32,
    /// Median gap between consecutive labels, in days (monthly labels
    /// count a month as 365.25/12 days).
    pub median_gap_days: f64,
}

/// Gap bands in days and the frequency each means: business or calendar
/// days, weeks, months, quarters, years.
const BANDS: [(f64, f64, u32, &str); 5] = [
    (1.0, 4.0, 252, "daily"),
    (5.0, 10.0, 52, "weekly"),
    (26.0, 35.0, 12, "monthly"),
    (85.0, 95.0, 4, "quarterly"),
    (360.0, 370.0, 1, "annual"),
];

/// The proleptic Gregorian date (year, month, day) of a day count since
/// 1970-01-01 (Hinnant's `civil_from_days`).
pub fn civil_from_days(days: i64) -> (i64, i64, i64) {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    (yoe + era * 400 + i64::from(m <= 2), m, d)
}

/// Days since 1970-01-01 of a proleptic Gregorian date (Hinnant's
/// `days_from_civil`).
pub fn days_from_civil(y: i64, m: i64, d: i64) -> i64 {
    let y = if m <= 2 { y - 1 } else { y };
    let era = y.div_euclid(400);
    let yoe = y - era * 400;
    let mp = (m + 9) % 12;
    let doy = (153 * mp + 2) / 5 + d - 1;
    let doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
    era * 146_097 + doe - 719_468
}

/// The frequency the labels show, or `None` with fewer than two labels.
///
/// # Errors
/// [`InputError::IrregularPeriods`] when the labels mix monthly and daily
/// forms, or fewer than [`REGULAR_SHARE`] of the gaps fall in one band.
/// Labels are assumed already checked (dates, strictly increasing).
pub fn infer(labels: &[String]) -> Result<Option<InferredFrequency>, InputError> {
    let parsed: Vec<(u32, u32, u32)> = labels.iter().filter_map(|l| parse_period(l)).collect();
    if parsed.len() < 2 || parsed.len() != labels.len() {
        return Ok(None);
    }
    let monthly_form = parsed[0].2 == 0;
    if let Some(r) = parsed.iter().position(|p| (p.2 == 0) != monthly_form) {
        return Err(InputError::IrregularPeriods {
            at: Location::field("period_labels").row(r, Some(&labels[r])),
            detail: format!(
                "labels mix the month form YYYY-MM (row 0: \"{}\") with the day form YYYY-MM-DD",
                labels[if monthly_form { 0 } else { r }]
            ),
        });
    }
    let position = |&(y, m, d): &(u32, u32, u32)| -> f64 {
        if monthly_form {
            (f64::from(y) * 12.0 + f64::from(m)) * 365.25 / 12.0
        } else {
            days_from_civil(i64::from(y), i64::from(m), i64::from(d)) as f64
        }
    };
    let gaps: Vec<f64> = parsed.windows(2).map(|w| position(&w[1]) - position(&w[0])).collect();
    let mut sorted = gaps.clone();
    sorted.sort_by(f64::total_cmp);
    let median = super::moments::quantile(&sorted, 0.5);
    let Some(&(lo, hi, ppy, name)) = BANDS.iter().find(|(lo, hi, ..)| (*lo..=*hi).contains(&median.round())) else {
        return Err(InputError::IrregularPeriods {
            at: Location::field("period_labels"),
            detail: format!(
                "the median gap between labels is {median:.1} days, which is not daily, weekly, monthly, quarterly \
                 or annual; set periods_per_year and frequency_check = false to use these labels anyway"
            ),
        });
    };
    let outside: Vec<usize> = (0..gaps.len()).filter(|&i| !(lo..=hi).contains(&gaps[i].round())).collect();
    let regular = 1.0 - outside.len() as f64 / gaps.len() as f64;
    if regular < REGULAR_SHARE {
        let r = outside[0] + 1;
        return Err(InputError::IrregularPeriods {
            at: Location::field("period_labels").row(r, Some(&labels[r])),
            detail: format!(
                "the labels look {name} (median gap {median:.1} days) but {} of {} gaps fall outside {lo}–{hi} days, \
                 the first before this row; send one frequency, or set periods_per_year and frequency_check = false",
                outside.len(),
                gaps.len()
            ),
        });
    }
    Ok(Some(InferredFrequency { periods_per_year: ppy, median_gap_days: median }))
}

impl ValidSettings {
    /// These settings with `periods_per_year` fixed for `panel`: the value
    /// set, checked against the labels unless `frequency_check` is off; or,
    /// when `auto`, the labels' frequency (monthly when there are none).
    ///
    /// # Errors
    /// [`EstimateError::FrequencyMismatch`] when a set value contradicts the
    /// labels, and [`InputError::IrregularPeriods`] (inside
    /// [`EstimateError::Input`]) when the labels have no one frequency.
    pub fn for_panel(&self, panel: &ReturnPanel) -> Result<(ValidSettings, FrequencySource), EstimateError> {
        let given = self.periods_per_year.fixed();
        if given.is_some() && !self.frequency_check {
            return Ok((self.clone(), FrequencySource::Given));
        }
        if !panel.period_labels.is_empty() {
            // A malformed panel or labels get their own, more precise errors first.
            super::window::check_structure(panel)?;
        }
        let inferred = infer(&panel.period_labels)?;
        let (value, source) = match (given, inferred) {
            (Some(g), Some(i)) if g != i.periods_per_year => {
                return Err(EstimateError::FrequencyMismatch {
                    given: g,
                    inferred: i.periods_per_year,
                    median_gap_days: i.median_gap_days,
                });
            }
            (Some(g), _) => (g, FrequencySource::Given),
            (None, Some(i)) => (i.periods_per_year, FrequencySource::Inferred),
            (None, None) => (ASSUMED_PERIODS_PER_YEAR, FrequencySource::Assumed),
        };
        let fixed = Settings { periods_per_year: Choice::Fixed(value), ..self.settings().clone() };
        Ok((ValidSettings::trusted(fixed), source))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn labels(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| (*s).to_owned()).collect()
    }

    fn days(start: (i64, i64, i64), n: usize, step: i64, skip_weekends: bool) -> Vec<String> {
        // Walk calendar days from `start`, keeping every `step`-th (or business days).
        let mut out = Vec::new();
        let mut day = days_from_civil(start.0, start.1, start.2);
        while out.len() < n {
            // 1970-01-01 was a Thursday: weekday 0 = Monday.
            let weekday = (day + 3).rem_euclid(7);
            if !(skip_weekends && weekday >= 5) {
                out.push(civil(day));
            }
            day += step;
        }
        out
    }

    fn civil(z: i64) -> String {
        let (y, m, d) = civil_from_days(z);
        format!("{y:04}-{m:02}-{d:02}")
    }

    #[test]
    fn days_from_civil_matches_known_dates() {
        // 2000-03-01 is day 11017 since the epoch (datetime.date(2000,3,1) - date(1970,1,1), Python).
        assert_eq!(days_from_civil(2000, 3, 1), 11_017);
        assert_eq!(days_from_civil(1970, 1, 1), 0);
        assert_eq!(civil(11_017), "2000-03-01");
    }

    #[test]
    fn each_frequency_is_read_from_its_labels() {
        let ppy = |l: &[String]| infer(l).unwrap().unwrap().periods_per_year;
        assert_eq!(ppy(&days((2020, 1, 2), 500, 1, true)), 252, "business days");
        assert_eq!(ppy(&days((2020, 1, 1), 400, 1, false)), 252, "calendar days");
        assert_eq!(ppy(&days((2020, 1, 3), 200, 7, false)), 52, "weekly");
        assert_eq!(ppy(&labels(&["2001-01", "2001-02", "2001-03", "2001-04"])), 12, "YYYY-MM");
        assert_eq!(ppy(&labels(&["2001-01-31", "2001-02-28", "2001-03-31", "2001-04-30"])), 12, "month ends");
        assert_eq!(ppy(&labels(&["2001-03-31", "2001-06-30", "2001-09-30", "2001-12-31", "2002-03-31"])), 4);
        assert_eq!(ppy(&labels(&["2001-03", "2001-06", "2001-09", "2001-12", "2002-03"])), 4, "YYYY-MM quarters");
        assert_eq!(ppy(&labels(&["2001-12-31", "2002-12-31", "2003-12-31"])), 1, "annual");
    }

    #[test]
    fn mixed_and_irregular_labels_are_refused_with_a_row() {
        let mut mixed = days((2020, 1, 2), 40, 1, true);
        mixed.extend(labels(&["2020-05-01", "2020-06-01", "2020-07-01", "2020-08-01", "2020-09-01", "2020-10-01"]));
        match infer(&mixed) {
            Err(InputError::IrregularPeriods { at, .. }) => assert_eq!(at.row, Some(40)),
            other => panic!("{other:?}"),
        }
        let forms = labels(&["2001-01", "2001-02-01"]);
        assert!(matches!(infer(&forms), Err(InputError::IrregularPeriods { .. })));
        let odd = labels(&["2001-01-01", "2001-01-20", "2001-02-08", "2001-02-27"]);
        assert!(matches!(infer(&odd), Err(InputError::IrregularPeriods { .. })));
        assert_eq!(infer(&labels(&["2001-01"])).unwrap(), None);
    }
}

//! What a backtest ran: the build, the time, the invocation, the input and
//! its fingerprint, the span of the history, and what "configured" means.
//! The evaluation fills what it knows; the command line or the service
//! names the invocation and the input.

use serde::Serialize;
use sha2::{Digest as _, Sha256};

use crate::estimator::fingerprint;
pub use crate::estimator::fingerprint::sha256_hex;
use crate::estimator::{self, ReturnPanel, ValidSettings};

/// Provenance of one backtest.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct Provenance {
    /// Version of the Keelson build.
    pub keelson_version: String,
    /// Version of the estimator.
    pub estimator_version: String,
    /// UTC start time, RFC 3339.
    pub run_time: String,
    /// The command line, or the request that asked for the run.
    pub invocation: String,
    /// The input: a file path or a request.
    pub input: String,
    /// SHA-256 of the input, lower-case hex (of the file's bytes when there
    /// is a file, else of [`history_sha256`]'s canonical encoding).
    pub input_sha256: String,
    /// First period label of the whole history.
    pub first_period: String,
    /// Last period label of the whole history.
    pub last_period: String,
    /// Periods in the history.
    pub periods: usize,
    /// Factors in the history.
    pub factors: usize,
    /// The market column, if any.
    pub market: Option<String>,
    /// What the strategy "configured" is.
    pub configured: String,
}

impl Provenance {
    /// What the evaluation itself knows: build, time, the history's span and
    /// canonical fingerprint; `source` says where the configured settings
    /// came from ("the request's settings over the server's defaults").
    pub fn of(panel: &ReturnPanel, configured: &ValidSettings, source: &str) -> Provenance {
        let label = |t: usize| panel.period_labels.get(t).cloned().unwrap_or_else(|| format!("row {}", t + 1));
        Provenance {
            keelson_version: env!("CARGO_PKG_VERSION").to_owned(),
            estimator_version: estimator::ESTIMATOR_VERSION.to_owned(),
            run_time: rfc3339_utc(std::time::SystemTime::now()),
            invocation: String::new(),
            input: "history".to_owned(),
            input_sha256: history_sha256(panel),
            first_period: if panel.rows > 0 { label(0) } else { String::new() },
            last_period: if panel.rows > 0 { label(panel.rows - 1) } else { String::new() },
            periods: panel.rows,
            factors: panel.cols,
            market: panel
                .market
                .as_ref()
                .map(|_| panel.market_name.clone().unwrap_or_else(|| super::strategies::MARKET.to_owned())),
            configured: configured_meaning(configured, source),
        }
    }
}

/// Who ran a backtest, on what: the part of the provenance that the command
/// line or the service knows and the evaluation does not.
#[derive(Clone, Copy, Debug)]
pub struct Origin<'a> {
    /// The command line, or the request that asked for the run.
    pub invocation: &'a str,
    /// The input: a file path or a request.
    pub input: &'a str,
    /// The input's bytes when there is a file (hashed instead of the
    /// history's canonical encoding).
    pub input_bytes: Option<&'a [u8]>,
    /// Where the configured settings came from, for [`configured_meaning`].
    pub settings_source: &'a str,
}

impl Provenance {
    /// Completes the provenance with the run's origin: the one builder the
    /// command line and the service share.
    pub fn with_origin(&mut self, configured: &ValidSettings, origin: Origin<'_>) {
        self.invocation = origin.invocation.to_owned();
        self.input = origin.input.to_owned();
        if let Some(bytes) = origin.input_bytes {
            self.input_sha256 = sha256_hex(bytes);
        }
        self.configured = configured_meaning(configured, origin.settings_source);
    }
}

/// One sentence defining "configured" for a run's readers.
pub fn configured_meaning(configured: &ValidSettings, source: &str) -> String {
    format!(
        "\"configured\" is the method as set up for this run, {source}: method {}, scaling {}, components {}, \
         kappa {}, normalization {}{}. Every other row changes only what its name says (method, scaling or \
         criterion) and keeps the rest, limits and costs included; their full settings are in summary.json.",
        configured.method,
        configured.scaling,
        configured.components,
        configured.kappa,
        configured.normalization,
        if configured.implementation_active() { ", with the limits and costs listed" } else { "" }
    )
}

/// SHA-256 of a canonical encoding of a history (names, labels, returns and
/// market as little-endian IEEE bits), lower-case hex: the fingerprint of an
/// input that did not come from a file.
pub fn history_sha256(panel: &ReturnPanel) -> String {
    let mut h = Sha256::new();
    h.update(b"keelson-history-v1\0");
    fingerprint::hash_history(&mut h, panel);
    fingerprint::hex(&h.finalize())
}

/// `t` as `YYYY-MM-DDTHH:MM:SSZ` (proleptic Gregorian calendar).
pub fn rfc3339_utc(t: std::time::SystemTime) -> String {
    let secs = t.duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_secs()) as i64;
    let (days, rem) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
    let (year, month, day) = crate::estimator::frequency::civil_from_days(days);
    format!("{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z", rem / 3600, rem % 3600 / 60, rem % 60)
}

#[cfg(test)]
mod tests {
    use std::time::{Duration, UNIX_EPOCH};

    use super::{rfc3339_utc, sha256_hex};

    #[test]
    fn utc_times_match_known_dates() {
        // Unix times of these dates: `date -u -d 2000-02-29T12:34:56Z +%s` (GNU coreutils).
        assert_eq!(rfc3339_utc(UNIX_EPOCH), "1970-01-01T00:00:00Z");
        assert_eq!(rfc3339_utc(UNIX_EPOCH + Duration::from_secs(951_827_696)), "2000-02-29T12:34:56Z");
        assert_eq!(rfc3339_utc(UNIX_EPOCH + Duration::from_secs(4_102_444_799)), "2099-12-31T23:59:59Z");
    }

    #[test]
    fn sha256_matches_the_published_test_vector() {
        // FIPS 180-2, appendix B.1: SHA-256("abc").
        assert_eq!(sha256_hex(b"abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
    }
}

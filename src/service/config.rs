//! Server configuration, layered: built-in defaults < TOML file <
//! environment variables `KEELSON__SECTION__KEY` (for example
//! `KEELSON__SERVER__ADDRESS=0.0.0.0:50051`). Validated before the port is bound.

use std::net::SocketAddr;
use std::path::Path;

use serde::{Deserialize, Serialize};
use thiserror::Error;

use crate::estimator::{Settings, SettingsError, ValidSettings};

/// Everything `keelson serve` reads.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ServerConfig {
    /// Network and limits.
    pub server: ServerSection,
    /// Estimator settings applied to every field a request leaves unset.
    pub estimator: Settings,
    /// Logging.
    pub log: LogSection,
    /// TLS and mutual TLS.
    pub tls: TlsSection,
    /// Bearer-token authentication of the API methods.
    pub auth: AuthSection,
    /// The Prometheus metrics endpoint.
    pub metrics: MetricsSection,
    /// OpenTelemetry trace export.
    pub tracing: TracingSection,
}

/// The `[server]` section.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ServerSection {
    /// gRPC listen address.
    pub address: String,
    /// Largest request or response message, bytes (tonic's own default is 4 MiB).
    pub max_message_bytes: usize,
    /// Largest periods × factors per request.
    pub max_cells: usize,
    /// Largest number of factors per request.
    pub max_factors: usize,
    /// Most estimator fits one `RunBacktest` may need (refit dates × the
    /// strategies, their bootstrap draws, the sweep points and the runs of
    /// the implementation stage per date); more → RESOURCE_EXHAUSTED before
    /// any work.
    pub max_backtest_fits: u64,
    /// Largest estimated peak memory of one request (a fit with its
    /// implementation stage, or a whole backtest), bytes; more →
    /// RESOURCE_EXHAUSTED before any work.
    pub max_request_bytes_estimate: u64,
    /// Most factors of a request whose settings run the implementation
    /// stage (some limit or a cost); refused before any work above it.
    pub max_stage_factors: usize,
    /// Most periods × factors of the window the implementation stage runs
    /// on (the whole history for an expanding backtest); refused before any
    /// work above it. The default keeps one stage near 2 s and its
    /// cancellation under 100 ms on one core (README, Performance).
    pub max_stage_cells: u64,
    /// Requests admitted at once (computing or queued); more are shed with RESOURCE_EXHAUSTED.
    pub max_in_flight: usize,
    /// Requests computed in parallel on the blocking pool; 0 = number of CPUs.
    pub workers: usize,
    /// Longest a `ComputeWeights` call may run on the server, milliseconds.
    pub request_timeout_ms: u64,
    /// Longest a `RunBacktest` call may run on the server, milliseconds.
    pub backtest_timeout_ms: u64,
    /// How long a shutdown waits for in-flight requests, milliseconds.
    pub drain_timeout_ms: u64,
    /// Serve gRPC server reflection (v1 and v1alpha).
    pub reflection: bool,
    /// Connections older than this are closed gracefully (GOAWAY), so that
    /// clients reconnect and spread over replicas, milliseconds; 0 = never.
    pub max_connection_age_ms: u64,
    /// Time calls on an aged connection get to finish, milliseconds.
    pub max_connection_age_grace_ms: u64,
    /// A second, plaintext listener serving only `grpc.health.v1.Health`
    /// (for probes that cannot speak TLS); empty = off.
    pub health_address: String,
}

impl Default for ServerSection {
    fn default() -> Self {
        ServerSection {
            address: "0.0.0.0:50051".to_owned(),
            max_message_bytes: 64 * 1024 * 1024,
            max_cells: 4_000_000,
            max_factors: 10_000,
            // A 50-year monthly research backtest with every baseline and the
            // sweep up to K = 10 is 600 × (10 + 50) = 36,000 fits; daily refits
            // over 30 years (6,300 dates) of the configured method with every
            // baseline is 63,000. 250,000 admits both with room, and at the
            // ~2 ms of a 50 × 120 fit is about the default 10-minute time limit
            // of one worker: a larger backtest would time out anyway.
            max_backtest_fits: 250_000,
            // The shipped pod has 1 GiB and 2 workers: two requests at their
            // limit, plus 64 MiB messages in and out, stay inside it.
            max_request_bytes_estimate: 320 * 1024 * 1024,
            // The stage at N = 2,000 × T = 120 takes about 1.5 s on one core,
            // at 5,000 about 15 s and 230 MiB (README, Performance).
            max_stage_factors: 2_000,
            max_stage_cells: 250_000,
            max_in_flight: 64,
            workers: 0,
            request_timeout_ms: 30_000,
            backtest_timeout_ms: 600_000,
            drain_timeout_ms: 25_000,
            reflection: true,
            max_connection_age_ms: 300_000,
            // Covers the backtest time limit: a RunBacktest stream on an aged
            // connection finishes instead of ending UNAVAILABLE (which clients retry).
            max_connection_age_grace_ms: 630_000,
            health_address: String::new(),
        }
    }
}

/// The `[tls]` section: TLS when `cert_file` and `key_file` are set, mutual
/// TLS when `client_ca_file` is set too.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct TlsSection {
    /// PEM server certificate chain.
    pub cert_file: String,
    /// PEM private key of the server certificate.
    pub key_file: String,
    /// PEM bundle of the CAs whose client certificates are accepted; set = mTLS required.
    pub client_ca_file: String,
}

/// The `[auth]` section: when any token is configured, the API methods need
/// `authorization: Bearer <token>`; health checks stay open.
#[derive(Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct AuthSection {
    /// File with one accepted token per line (`#` comments and blank lines ignored).
    pub tokens_file: String,
    /// Accepted tokens, usually from `KEELSON__AUTH__TOKENS` (comma-separated).
    pub tokens: Vec<String>,
}

impl std::fmt::Debug for AuthSection {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("AuthSection")
            .field("tokens_file", &self.tokens_file)
            .field("tokens", &format_args!("[{} redacted]", self.tokens.len()))
            .finish()
    }
}

/// The `[metrics]` section.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct MetricsSection {
    /// Listen address of the Prometheus endpoint (`GET /metrics`); empty = off.
    pub address: String,
}

impl Default for MetricsSection {
    fn default() -> Self {
        MetricsSection { address: "0.0.0.0:9090".to_owned() }
    }
}

/// The `[tracing]` section: OpenTelemetry trace export over OTLP/gRPC.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct TracingSection {
    /// Collector address, `http://HOST:PORT` (OTLP/gRPC, usually port 4317); empty = off.
    pub otlp_endpoint: String,
    /// Share of new traces sampled, 0 to 1; a caller's sampling decision is always followed.
    pub sample_ratio: f64,
    /// The `service.name` resource attribute.
    pub service_name: String,
    /// How often queued spans are sent.
    pub export_interval_ms: u64,
    /// Time limit of one export call.
    pub export_timeout_ms: u64,
    /// Spans held for export at most; more are dropped, never waited for.
    pub max_queued_spans: usize,
}

impl Default for TracingSection {
    fn default() -> Self {
        TracingSection {
            otlp_endpoint: String::new(),
            sample_ratio: 1.0,
            service_name: "keelson".to_owned(),
            export_interval_ms: 5_000,
            export_timeout_ms: 10_000,
            max_queued_spans: 2_048,
        }
    }
}

impl TracingSection {
    fn check(&self) -> Result<(), ConfigError> {
        let invalid = |key: &'static str, reason: &str| ConfigError::Invalid { key, reason: reason.to_owned() };
        if !(0.0..=1.0).contains(&self.sample_ratio) {
            return Err(invalid("tracing.sample_ratio", "must be between 0 and 1"));
        }
        if self.otlp_endpoint.is_empty() {
            return Ok(());
        }
        let uri: http::Uri = self.otlp_endpoint.parse().map_err(|e| ConfigError::Invalid {
            key: "tracing.otlp_endpoint",
            reason: format!("\"{}\" is not a URL ({e})", self.otlp_endpoint),
        })?;
        if uri.scheme_str() != Some("http") || uri.host().is_none() {
            return Err(invalid(
                "tracing.otlp_endpoint",
                "must be http://HOST:PORT (plaintext OTLP/gRPC to a sidecar or node-local collector, which forwards \
                 with TLS)",
            ));
        }
        if self.service_name.trim().is_empty() {
            return Err(invalid("tracing.service_name", "must not be empty"));
        }
        for (key, v) in [
            ("tracing.export_interval_ms", self.export_interval_ms),
            ("tracing.export_timeout_ms", self.export_timeout_ms),
        ] {
            if v == 0 || v > 600_000 {
                return Err(invalid(key, "must be between 1 and 600000"));
            }
        }
        if self.max_queued_spans == 0 || self.max_queued_spans > 1_000_000 {
            return Err(invalid("tracing.max_queued_spans", "must be between 1 and 1000000"));
        }
        Ok(())
    }
}

/// TLS material read and parsed at start-up.
#[derive(Clone)]
pub struct TlsMaterial {
    /// PEM certificate chain.
    pub cert: Vec<u8>,
    /// PEM private key.
    pub key: Vec<u8>,
    /// PEM client CA bundle, for mutual TLS.
    pub client_ca: Option<Vec<u8>>,
}

impl std::fmt::Debug for TlsMaterial {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TlsMaterial").field("mutual", &self.client_ca.is_some()).finish_non_exhaustive()
    }
}

/// The `[log]` section.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct LogSection {
    /// `json` (one object per line) or `text`.
    pub format: LogFormat,
    /// A `tracing` filter, e.g. `info` or `keelson=debug`.
    pub level: String,
}

impl Default for LogSection {
    fn default() -> Self {
        LogSection { format: LogFormat::Json, level: "info".to_owned() }
    }
}

/// Log line format.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum LogFormat {
    /// One JSON object per line.
    Json,
    /// Human-readable lines.
    Text,
}

/// A configuration that cannot be used.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum ConfigError {
    /// The file or environment could not be read or parsed.
    #[error("configuration: {0}")]
    Load(String),
    /// A key has an unusable value.
    #[error("configuration key `{key}`: {reason}")]
    Invalid {
        /// Dotted key, e.g. `server.address`.
        key: &'static str,
        /// What is wrong.
        reason: String,
    },
    /// The `[estimator]` section is invalid.
    #[error("configuration section `estimator`: {0}")]
    Estimator(#[from] SettingsError),
}

/// A configuration that passed [`ServerConfig::check`].
#[derive(Clone, Debug)]
pub struct ValidConfig {
    /// The configuration as given.
    pub raw: ServerConfig,
    /// Parsed listen address.
    pub address: SocketAddr,
    /// Validated default settings.
    pub defaults: ValidSettings,
    /// Worker count with 0 resolved.
    pub workers: usize,
    /// TLS material, when TLS is on.
    pub tls: Option<TlsMaterial>,
    /// Accepted bearer tokens (SHA-256 digests); empty = authentication off.
    pub tokens: super::auth::TokenSet,
    /// Metrics endpoint address, when on.
    pub metrics_address: Option<SocketAddr>,
    /// Plaintext health-only address, when on.
    pub health_address: Option<SocketAddr>,
}

impl ValidConfig {
    /// The configuration as JSON with every secret replaced by a count, for the start-up log.
    pub fn redacted_json(&self) -> String {
        let mut raw = self.raw.clone();
        let n = raw.auth.tokens.len();
        raw.auth.tokens = if n == 0 { Vec::new() } else { vec![format!("<{n} redacted>")] };
        serde_json::to_string(&raw).unwrap_or_default()
    }
}

impl ServerConfig {
    /// Loads defaults, then `file` if given, then `KEELSON__…` variables from `env`.
    ///
    /// # Errors
    /// [`ConfigError::Load`] naming the file or variable that failed.
    pub fn load(
        file: Option<&Path>,
        env: impl IntoIterator<Item = (String, String)>,
    ) -> Result<ServerConfig, ConfigError> {
        let load = |e: config::ConfigError| ConfigError::Load(e.to_string());
        let defaults = config::Config::try_from(&ServerConfig::default()).map_err(load)?;
        let mut builder = config::Config::builder().add_source(defaults);
        if let Some(f) = file {
            let text = std::fs::read_to_string(f)
                .map_err(|e| ConfigError::Load(format!("cannot read {}: {e}", f.display())))?;
            builder = builder.add_source(config::File::from_str(&text, config::FileFormat::Toml));
        }
        let vars: std::collections::HashMap<String, String> =
            env.into_iter().filter(|(k, _)| k.starts_with("KEELSON__")).collect();
        builder = builder.add_source(
            config::Environment::with_prefix("KEELSON")
                .prefix_separator("__")
                .separator("__")
                .try_parsing(true)
                .list_separator(",")
                .with_list_parse_key("auth.tokens")
                .source(Some(vars)),
        );
        builder.build().map_err(load)?.try_deserialize().map_err(load)
    }

    /// Validates every key.
    ///
    /// # Errors
    /// [`ConfigError::Invalid`] or [`ConfigError::Estimator`] naming the key.
    pub fn check(self) -> Result<ValidConfig, ConfigError> {
        let s = &self.server;
        let address: SocketAddr = s.address.parse().map_err(|e| ConfigError::Invalid {
            key: "server.address",
            reason: format!("\"{}\" is not HOST:PORT with a numeric host ({e})", s.address),
        })?;
        let positive = |key: &'static str, v: u64| {
            if v == 0 { Err(ConfigError::Invalid { key, reason: "must be greater than 0".into() }) } else { Ok(()) }
        };
        positive("server.max_message_bytes", s.max_message_bytes as u64)?;
        positive("server.max_cells", s.max_cells as u64)?;
        positive("server.max_factors", s.max_factors as u64)?;
        positive("server.max_backtest_fits", s.max_backtest_fits)?;
        positive("server.max_request_bytes_estimate", s.max_request_bytes_estimate)?;
        positive("server.max_stage_factors", s.max_stage_factors as u64)?;
        positive("server.max_stage_cells", s.max_stage_cells)?;
        positive("server.max_in_flight", s.max_in_flight as u64)?;
        positive("server.request_timeout_ms", s.request_timeout_ms)?;
        positive("server.backtest_timeout_ms", s.backtest_timeout_ms)?;
        if s.max_connection_age_ms > 0 && s.max_connection_age_grace_ms < s.backtest_timeout_ms {
            return Err(ConfigError::Invalid {
                key: "server.max_connection_age_grace_ms",
                reason: format!(
                    "{} ms is below server.backtest_timeout_ms = {} ms: a backtest on a connection reaching \
                     server.max_connection_age_ms would be cut off as UNAVAILABLE and retried from the start",
                    s.max_connection_age_grace_ms, s.backtest_timeout_ms
                ),
            });
        }
        if s.max_message_bytes > u32::MAX as usize {
            return Err(ConfigError::Invalid { key: "server.max_message_bytes", reason: "must be below 4 GiB".into() });
        }
        let workers =
            if s.workers == 0 { std::thread::available_parallelism().map_or(1, |n| n.get()) } else { s.workers };
        if workers > 1024 {
            return Err(ConfigError::Invalid { key: "server.workers", reason: "at most 1024".into() });
        }
        tracing_subscriber::EnvFilter::try_new(&self.log.level)
            .map_err(|e| ConfigError::Invalid { key: "log.level", reason: e.to_string() })?;
        let defaults = self.estimator.clone().check()?;
        let tls = self.tls.load()?;
        let tokens = self.auth.load()?;
        self.tracing.check()?;
        let optional_address = |key: &'static str, v: &str| -> Result<Option<SocketAddr>, ConfigError> {
            if v.is_empty() {
                return Ok(None);
            }
            let a: SocketAddr = v.parse().map_err(|e| ConfigError::Invalid {
                key,
                reason: format!("\"{v}\" is not HOST:PORT with a numeric host ({e})"),
            })?;
            if a.port() != 0 && a.port() == address.port() && (a.ip() == address.ip() || a.ip().is_unspecified()) {
                return Err(ConfigError::Invalid { key, reason: "must differ from server.address".into() });
            }
            Ok(Some(a))
        };
        let metrics_address = optional_address("metrics.address", &self.metrics.address)?;
        let health_address = optional_address("server.health_address", &self.server.health_address)?;
        if let (Some(m), Some(h)) = (metrics_address, health_address)
            && m.port() != 0
            && m.port() == h.port()
        {
            return Err(ConfigError::Invalid {
                key: "server.health_address",
                reason: "must differ from metrics.address".into(),
            });
        }
        Ok(ValidConfig { raw: self, address, defaults, workers, tls, tokens, metrics_address, health_address })
    }
}

fn read_file(key: &'static str, path: &str) -> Result<Vec<u8>, ConfigError> {
    std::fs::read(path).map_err(|e| ConfigError::Invalid { key, reason: format!("cannot read {path}: {e}") })
}

impl TlsSection {
    fn load(&self) -> Result<Option<TlsMaterial>, ConfigError> {
        match (self.cert_file.is_empty(), self.key_file.is_empty()) {
            (true, true) if self.client_ca_file.is_empty() => return Ok(None),
            (true, true) => {
                return Err(ConfigError::Invalid {
                    key: "tls.client_ca_file",
                    reason: "mutual TLS needs tls.cert_file and tls.key_file too".into(),
                });
            }
            (true, false) => {
                return Err(ConfigError::Invalid { key: "tls.cert_file", reason: "needed with tls.key_file".into() });
            }
            (false, true) => {
                return Err(ConfigError::Invalid { key: "tls.key_file", reason: "needed with tls.cert_file".into() });
            }
            (false, false) => {}
        }
        let cert = read_file("tls.cert_file", &self.cert_file)?;
        let key = read_file("tls.key_file", &self.key_file)?;
        let pem_check = |key: &'static str, bytes: &[u8], marker: &str| {
            if String::from_utf8_lossy(bytes).contains(marker) {
                Ok(())
            } else {
                Err(ConfigError::Invalid { key, reason: format!("no PEM block `{marker}` found") })
            }
        };
        pem_check("tls.cert_file", &cert, "-----BEGIN CERTIFICATE-----")?;
        pem_check("tls.key_file", &key, "PRIVATE KEY-----")?;
        let client_ca = if self.client_ca_file.is_empty() {
            None
        } else {
            let ca = read_file("tls.client_ca_file", &self.client_ca_file)?;
            pem_check("tls.client_ca_file", &ca, "-----BEGIN CERTIFICATE-----")?;
            Some(ca)
        };
        Ok(Some(TlsMaterial { cert, key, client_ca }))
    }
}

impl AuthSection {
    fn load(&self) -> Result<super::auth::TokenSet, ConfigError> {
        let mut tokens: Vec<String> =
            self.tokens.iter().map(|t| t.trim().to_owned()).filter(|t| !t.is_empty()).collect();
        if !self.tokens_file.is_empty() {
            let bytes = read_file("auth.tokens_file", &self.tokens_file)?;
            let text = String::from_utf8(bytes)
                .map_err(|_| ConfigError::Invalid { key: "auth.tokens_file", reason: "not UTF-8 text".into() })?;
            tokens.extend(
                text.lines().map(str::trim).filter(|l| !l.is_empty() && !l.starts_with('#')).map(str::to_owned),
            );
            if tokens.is_empty() {
                return Err(ConfigError::Invalid {
                    key: "auth.tokens_file",
                    reason: "the file holds no token; remove the key to turn authentication off".into(),
                });
            }
        }
        for t in &tokens {
            if t.len() < 16 || !t.bytes().all(|b| b.is_ascii_graphic()) {
                // Never echo the token itself.
                return Err(ConfigError::Invalid {
                    key: "auth.tokens",
                    reason: "every token needs at least 16 printable ASCII characters without spaces".into(),
                });
            }
        }
        Ok(super::auth::TokenSet::new(&tokens))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn env(pairs: &[(&str, &str)]) -> Vec<(String, String)> {
        pairs.iter().map(|(k, v)| ((*k).to_owned(), (*v).to_owned())).collect()
    }

    /// A connection grace shorter than the backtest limit would cut a
    /// RunBacktest stream off as UNAVAILABLE on an aged connection: refused
    /// at start, naming the key; the defaults cover it.
    #[test]
    fn connection_grace_must_cover_the_backtest_limit() {
        let ok = ServerConfig::load(None, Vec::new()).unwrap();
        assert!(ok.server.max_connection_age_grace_ms >= ok.server.backtest_timeout_ms);
        assert!(ok.check().is_ok());
        let short =
            ServerConfig::load(None, env(&[("KEELSON__SERVER__MAX_CONNECTION_AGE_GRACE_MS", "30000")])).unwrap();
        match short.check() {
            Err(ConfigError::Invalid { key, .. }) => assert_eq!(key, "server.max_connection_age_grace_ms"),
            other => panic!("expected the grace refused, got {:?}", other.err()),
        }
        let never_aged = ServerConfig::load(
            None,
            env(&[
                ("KEELSON__SERVER__MAX_CONNECTION_AGE_GRACE_MS", "30000"),
                ("KEELSON__SERVER__MAX_CONNECTION_AGE_MS", "0"),
            ]),
        )
        .unwrap();
        assert!(never_aged.check().is_ok(), "no connection age, no grace needed");
    }

    #[test]
    fn defaults_then_file_then_environment() {
        let dir = std::env::temp_dir().join(format!("keelson-config-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let f = dir.join("k.toml");
        std::fs::write(
            &f,
            "[server]\naddress = \"127.0.0.1:7000\"\nmax_in_flight = 5\n[estimator]\nscaling = \"covariance\"\n",
        )
        .unwrap();
        let c = ServerConfig::load(
            Some(&f),
            env(&[
                ("KEELSON__SERVER__MAX_IN_FLIGHT", "9"),
                ("KEELSON__ESTIMATOR__MAX_COMPONENTS", "12"),
                ("OTHER", "x"),
            ]),
        )
        .unwrap();
        assert_eq!(c.server.address, "127.0.0.1:7000");
        assert_eq!(c.server.max_in_flight, 9, "environment beats file");
        assert_eq!(c.estimator.max_components, 12);
        assert_eq!(c.estimator.scaling, crate::estimator::Scaling::Covariance);
        assert_eq!(c.server.request_timeout_ms, 30_000, "default kept");
        c.check().unwrap();
    }

    #[test]
    fn bad_values_are_named() {
        let c = ServerConfig::load(None, env(&[("KEELSON__SERVER__ADDRESS", "nowhere")])).unwrap();
        let e = c.check().unwrap_err().to_string();
        assert!(e.contains("server.address"), "{e}");
        let e = ServerConfig::load(None, env(&[("KEELSON__SERVER__MAX_IN_FLIGHT", "lots")])).unwrap_err();
        assert!(e.to_string().contains("max_in_flight"), "{e}");
        let c = ServerConfig::load(None, env(&[("KEELSON__ESTIMATOR__FOLDS", "1")])).unwrap();
        assert!(c.check().unwrap_err().to_string().contains("folds"));
    }
}

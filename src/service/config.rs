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
}

impl Default for ServerSection {
    fn default() -> Self {
        ServerSection {
            address: "0.0.0.0:50051".to_owned(),
            max_message_bytes: 64 * 1024 * 1024,
            max_cells: 4_000_000,
            max_factors: 10_000,
            max_in_flight: 64,
            workers: 0,
            request_timeout_ms: 30_000,
            backtest_timeout_ms: 600_000,
            drain_timeout_ms: 25_000,
            reflection: true,
        }
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
        positive("server.max_in_flight", s.max_in_flight as u64)?;
        positive("server.request_timeout_ms", s.request_timeout_ms)?;
        positive("server.backtest_timeout_ms", s.backtest_timeout_ms)?;
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
        Ok(ValidConfig { raw: self, address, defaults, workers })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn env(pairs: &[(&str, &str)]) -> Vec<(String, String)> {
        pairs.iter().map(|(k, v)| ((*k).to_owned(), (*v).to_owned())).collect()
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

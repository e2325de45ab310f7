//! `[webhook]`: how live mode delivers its alarm-state notifications (attempts, back-off, time per
//! attempt, queue, and for `https://` the trusted roots). The URL itself is not here: it comes from
//! `--webhook-url-file`, since it usually holds a token and a site file is widely read.

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use crate::settings::{Check, ConfigError};

/// `[webhook]` in `site.toml`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct WebhookSection {
    /// Attempts per notification, the first included (1–20; default 6).
    #[serde(default = "default_max_attempts")]
    pub max_attempts: u32,
    /// Wait before the first retry \[s\] (0.1–600; default 1); doubled per retry.
    #[serde(default = "default_backoff_first_s")]
    pub backoff_first_s: f64,
    /// Longest wait between retries \[s\] (from `backoff_first_s` to 3600; default 60).
    #[serde(default = "default_backoff_max_s")]
    pub backoff_max_s: f64,
    /// Time allowed for one attempt: connect, TLS, send, response head \[s\] (0.5–120; default 10).
    #[serde(default = "default_attempt_timeout_s")]
    pub attempt_timeout_s: f64,
    /// Notifications waiting at most (1–10000; default 64); a change arriving at a full queue is
    /// dropped, counted and logged.
    #[serde(default = "default_queue_max")]
    pub queue_max: usize,
    /// For an `https://` URL: a PEM file of the certificates to trust (relative to the site file);
    /// default the system's bundle (`/etc/ssl/certs/ca-certificates.crt` and the like).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ca_file: Option<PathBuf>,
}

fn default_max_attempts() -> u32 {
    6
}
fn default_backoff_first_s() -> f64 {
    1.0
}
fn default_backoff_max_s() -> f64 {
    60.0
}
fn default_attempt_timeout_s() -> f64 {
    10.0
}
fn default_queue_max() -> usize {
    64
}

impl Default for WebhookSection {
    fn default() -> Self {
        WebhookSection {
            max_attempts: default_max_attempts(),
            backoff_first_s: default_backoff_first_s(),
            backoff_max_s: default_backoff_max_s(),
            attempt_timeout_s: default_attempt_timeout_s(),
            queue_max: default_queue_max(),
            ca_file: None,
        }
    }
}

impl WebhookSection {
    /// Whether every field has its default (the section is then left out when written).
    pub fn is_default(&self) -> bool {
        *self == WebhookSection::default()
    }

    /// Check every field.
    pub(crate) fn validate(&self, c: &Check<'_>) -> Result<(), ConfigError> {
        if !(1..=20).contains(&self.max_attempts) {
            return Err(c.invalid("webhook.max_attempts", "a whole number from 1 to 20", self.max_attempts.to_string()));
        }
        c.range("webhook.backoff_first_s", self.backoff_first_s, 0.1, 600.0)?;
        c.range("webhook.backoff_max_s", self.backoff_max_s, self.backoff_first_s, 3600.0)?;
        c.range("webhook.attempt_timeout_s", self.attempt_timeout_s, 0.5, 120.0)?;
        if !(1..=10_000).contains(&self.queue_max) {
            return Err(c.invalid("webhook.queue_max", "a whole number from 1 to 10000", self.queue_max.to_string()));
        }
        Ok(())
    }
}

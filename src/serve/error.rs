//! Why live mode could not start, or what `live --check` found wrong.
//!
//! Each message names the option, file or variable and what was expected. A cause from another
//! library (I/O, SQLite, the PEM parser) is written into the message rather than chained as a
//! source, so a front end that prints the whole chain prints it once.

use std::net::SocketAddr;
use std::path::PathBuf;

use super::guard::ACK_TOKEN_ENV;

/// An error of the live mode's set-up.
#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    /// The site, calibration or base-height files are bad.
    #[error(transparent)]
    Setup(#[from] crate::nowcast::SetupError),
    /// The server options (timeouts, limits, hosts, acknowledgement limits) are refused.
    #[error("server options: {0}")]
    ServerOptions(String),
    /// The health options (thresholds, measurement feed, retention) are refused.
    #[error("{0}")]
    HealthOptions(String),
    /// A non-loopback address without an acknowledgement token and without the explicit flag.
    #[error(
        "--bind {0}: a non-loopback address is refused without an acknowledgement token (--ack-token-file or {env}); add --allow-non-loopback to serve it anyway",
        env = ACK_TOKEN_ENV
    )]
    NonLoopback(SocketAddr),
    /// Both the token file and the token variable are given.
    #[error("--ack-token-file {} and {env} are both given: expected one source for the token", .0.display(), env = ACK_TOKEN_ENV)]
    TokenSources(PathBuf),
    /// The token file cannot be read.
    #[error("--ack-token-file {}: {error}", path.display())]
    TokenFile {
        /// The file.
        path: PathBuf,
        /// What reading it said.
        error: std::io::Error,
    },
    /// The token (from the file or the variable) is not what is expected.
    #[error("{origin}: expected {expected}")]
    Token {
        /// `--ack-token-file <path>` or the variable's name.
        origin: String,
        /// What was expected, and what was found.
        expected: String,
    },
    /// A TLS file is not the PEM object expected.
    #[error("{}: expected {expected}: {error}", path.display())]
    Pem {
        /// The file.
        path: PathBuf,
        /// What it should hold.
        expected: &'static str,
        /// What the PEM parser said.
        error: String,
    },
    /// The certificate file holds no certificate.
    #[error("{}: expected a PEM certificate chain, found no certificate", .0.display())]
    NoCertificate(PathBuf),
    /// The TLS library refused its protocol set-up.
    #[error("TLS: {0}")]
    Tls(String),
    /// The certificate and key do not belong together (or are unusable).
    #[error("{} / {}: the certificate and key do not make a usable pair: {error}", cert.display(), key.display())]
    KeyPair {
        /// The certificate file.
        cert: PathBuf,
        /// The key file.
        key: PathBuf,
        /// What the TLS library said.
        error: String,
    },
    /// TLS files are given to a build without the `tls` feature.
    #[error("TLS certificate {} given, but this build has no TLS support: build with `cargo build --release --features tls`", .0.display())]
    NoTlsSupport(PathBuf),
    /// The database cannot be opened or read.
    #[error("{}: {error}", path.display())]
    Database {
        /// The database file.
        path: PathBuf,
        /// What SQLite said.
        error: rusqlite::Error,
    },
    /// The Modbus options are refused (the message names the option).
    #[error("{0}")]
    ModbusOptions(String),
    /// The Modbus address cannot be bound.
    #[error("--modbus-bind {addr}: {error}")]
    ModbusBind {
        /// The address.
        addr: SocketAddr,
        /// What binding said.
        error: std::io::Error,
    },
    /// The webhook options are refused.
    #[error("{0}")]
    Webhook(String),
    /// The measurement feed's file is bad (the message names it).
    #[error("{0}")]
    Feed(String),
    /// A folder that a path needs does not exist.
    #[error("{option} {}: the folder {} does not exist", path.display(), folder.display())]
    MissingFolder {
        /// The option giving the path.
        option: &'static str,
        /// The path given.
        path: PathBuf,
        /// The folder that is missing.
        folder: PathBuf,
    },
    /// The shared state's lock is poisoned (a thread panicked holding it).
    #[error("state lock")]
    StateLock,
    /// The system refused an operation (creating the incoming folder, binding the HTTP address).
    #[error(transparent)]
    Io(#[from] std::io::Error),
}

impl ServeError {
    /// Whether the system, not the input, is at fault (a command exits with status 1 for these and
    /// with 2 for the others).
    pub fn is_system(&self) -> bool {
        matches!(self, Self::Io(_))
    }
}

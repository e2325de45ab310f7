//! The live server's connection handling: its own accept loop over hyper's HTTP/1.1 connection
//! builder, so that every connection has bounded time and the number of connections is bounded.
//!
//! * **Connection cap.** A connection holds one permit of a semaphore from accept to close; at the
//!   cap the loop stops accepting (clients wait in the kernel's backlog) until one closes. The cap
//!   is also kept below the process's open-file limit, so running out of descriptors cannot stall
//!   the accept loop. The event stream holds a permit like any other connection.
//! * **Header timeout.** The request line and headers must arrive within `header_timeout`,
//!   counted from the connection's start or the end of the previous response (so it is also how
//!   long a kept-alive connection may sit idle between requests).
//! * **Idle timeout.** A connection on which no byte moves either way for `idle_timeout` is
//!   closed (a client that stops reading its response, or stalls mid-body). The event stream
//!   writes a keep-alive comment every [`SSE_KEEP_ALIVE`], so it is never idle while it streams.
//! * **Body timeout.** Handlers that read a body bound it in time (`body_timeout`) and size.
//! * **TLS** (Cargo feature `tls`): rustls, with the handshake inside the header timeout.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use axum::Router;
use hyper_util::rt::{TokioIo, TokioTimer};
use tokio::io::{AsyncRead, AsyncWrite};
use tokio::sync::Semaphore;
use tower::ServiceExt as _;

use super::ServeError;
use super::guard::AckLimits;
pub(crate) use super::net::{IdleIo, effective_max_connections, listen};

/// How often the event stream writes a keep-alive comment.
pub const SSE_KEEP_ALIVE: Duration = Duration::from_secs(15);


/// Certificate chain and private key (PEM files) for HTTPS.
#[derive(Debug, Clone, PartialEq)]
pub struct TlsFiles {
    /// The certificate chain, leaf first (PEM).
    pub cert_pem: PathBuf,
    /// The private key (PEM: PKCS#8, PKCS#1 or SEC1).
    pub key_pem: PathBuf,
}

/// How the live server guards itself.
#[derive(Debug, Clone, PartialEq)]
pub struct ServerOptions {
    /// Time for a request's line and headers, from the connection's start or the end of the
    /// previous response (default 10 s).
    pub header_timeout: Duration,
    /// Time for a request body (default 10 s).
    pub body_timeout: Duration,
    /// A connection on which nothing moves for this long is closed (default 60 s; keep it above
    /// [`SSE_KEEP_ALIVE`]).
    pub idle_timeout: Duration,
    /// Connections open at once (default 2048; lowered to fit the open-file limit).
    pub max_connections: usize,
    /// Host names (or IP literals) allowed in `Host` besides the loopback names.
    pub allowed_hosts: Vec<String>,
    /// Serve on a non-loopback address without an acknowledgement token (a warning is given).
    pub allow_non_loopback: bool,
    /// HTTPS instead of HTTP (needs the `tls` feature).
    pub tls: Option<TlsFiles>,
    /// The acknowledgement rate limiter's limits.
    pub ack_limits: AckLimits,
    /// The read-only Modbus TCP server for plant controllers (none: not served).
    pub modbus: Option<super::modbus::ModbusOptions>,
    /// Where alarm-state changes are POSTed (none: no notifications).
    pub webhook: Option<super::notify::WebhookOptions>,
}

impl Default for ServerOptions {
    fn default() -> Self {
        Self {
            header_timeout: Duration::from_secs(10),
            body_timeout: Duration::from_secs(10),
            idle_timeout: Duration::from_secs(60),
            max_connections: 2048,
            allowed_hosts: vec![],
            allow_non_loopback: false,
            tls: None,
            ack_limits: AckLimits::default(),
            modbus: None,
            webhook: None,
        }
    }
}

impl ServerOptions {
    /// Check the limits; the message names the option.
    ///
    /// # Errors
    /// A zero or absurd limit.
    pub fn validate(&self) -> Result<(), String> {
        let secs = |name: &str, d: Duration| {
            if d < Duration::from_millis(100) || d > Duration::from_secs(3600) {
                Err(format!("{name}: expected 0.1 s to 1 h, got {:.3} s", d.as_secs_f64()))
            } else {
                Ok(())
            }
        };
        secs("header timeout", self.header_timeout)?;
        secs("body timeout", self.body_timeout)?;
        secs("idle timeout", self.idle_timeout)?;
        if self.idle_timeout <= SSE_KEEP_ALIVE {
            return Err(format!("idle timeout: expected more than the event stream's keep-alive ({} s), got {:.3} s", SSE_KEEP_ALIVE.as_secs(), self.idle_timeout.as_secs_f64()));
        }
        if !(1..=1_000_000).contains(&self.max_connections) {
            return Err(format!("max connections: expected 1 to 1000000, got {}", self.max_connections));
        }
        for h in &self.allowed_hosts {
            if super::guard::host_name(h).is_none() {
                return Err(format!("allowed host: expected a host name or IP literal, got {h:?}"));
            }
        }
        Ok(())
    }
}

/// The client's address, put into every request's extensions.
#[derive(Debug, Clone, Copy)]
pub struct ClientAddr(pub SocketAddr);

#[cfg(feature = "tls")]
type Acceptor = tokio_rustls::TlsAcceptor;
/// Without the `tls` feature there is no acceptor (this type has no value).
#[cfg(not(feature = "tls"))]
#[derive(Clone)]
pub(crate) enum Acceptor {}

/// Load the certificate and key for HTTPS (when asked for).
///
/// # Errors
/// Unreadable or invalid PEM files, named; asking for TLS in a build without the `tls` feature.
pub(crate) fn tls_acceptor(tls: Option<&TlsFiles>) -> Result<Option<Acceptor>, ServeError> {
    let Some(files) = tls else { return Ok(None) };
    #[cfg(feature = "tls")]
    {
        use tokio_rustls::rustls;
        use tokio_rustls::rustls::pki_types::pem::PemObject as _;
        use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer};
        let certs: Vec<CertificateDer<'static>> = CertificateDer::pem_file_iter(&files.cert_pem)
            .and_then(|it| it.collect::<Result<Vec<_>, _>>())
            .map_err(|e| ServeError::Pem { path: files.cert_pem.clone(), expected: "a PEM certificate chain", error: e.to_string() })?;
        if certs.is_empty() {
            return Err(ServeError::NoCertificate(files.cert_pem.clone()));
        }
        let key = PrivateKeyDer::from_pem_file(&files.key_pem)
            .map_err(|e| ServeError::Pem { path: files.key_pem.clone(), expected: "a PEM private key", error: e.to_string() })?;
        let provider = Arc::new(rustls::crypto::ring::default_provider());
        let mut config = rustls::ServerConfig::builder_with_provider(provider)
            .with_safe_default_protocol_versions()
            .map_err(|e| ServeError::Tls(e.to_string()))?
            .with_no_client_auth()
            .with_single_cert(certs, key)
            .map_err(|e| ServeError::KeyPair { cert: files.cert_pem.clone(), key: files.key_pem.clone(), error: e.to_string() })?;
        config.alpn_protocols = vec![b"http/1.1".to_vec()];
        Ok(Some(tokio_rustls::TlsAcceptor::from(Arc::new(config))))
    }
    #[cfg(not(feature = "tls"))]
    {
        Err(ServeError::NoTlsSupport(files.cert_pem.clone()))
    }
}

/// Serve `router` on `listener` until `shutdown` fires.
pub(crate) async fn serve(
    listener: tokio::net::TcpListener,
    router: Router,
    opts: ServerOptions,
    max_connections: usize,
    tls: Option<Acceptor>,
    shutdown: tokio::sync::oneshot::Receiver<()>,
) {
    let permits = Arc::new(Semaphore::new(max_connections));
    let mut builder = hyper::server::conn::http1::Builder::new();
    builder.timer(TokioTimer::new()).header_read_timeout(opts.header_timeout).keep_alive(true).max_buf_size(64 * 1024);
    let mut shutdown = shutdown;
    loop {
        let permit = tokio::select! {
            _ = &mut shutdown => break,
            p = permits.clone().acquire_owned() => match p { Ok(p) => p, Err(_) => break },
        };
        let (stream, peer) = tokio::select! {
            _ = &mut shutdown => break,
            r = listener.accept() => match r {
                Ok(x) => x,
                // Out of descriptors or a reset before accept: wait a little, never spin.
                Err(_) => { tokio::time::sleep(Duration::from_millis(50)).await; continue; }
            },
        };
        let _ = stream.set_nodelay(true);
        let router = router.clone();
        let builder = builder.clone();
        let idle = opts.idle_timeout;
        let handshake = opts.header_timeout;
        let tls = tls.clone();
        tokio::spawn(async move {
            let _permit = permit;
            #[cfg(feature = "tls")]
            if let Some(acceptor) = tls {
                if let Ok(Ok(s)) = tokio::time::timeout(handshake, acceptor.accept(stream)).await {
                    serve_connection(s, peer, router, builder, idle).await;
                }
                return;
            }
            #[cfg(not(feature = "tls"))]
            let _ = (tls, handshake);
            serve_connection(stream, peer, router, builder, idle).await;
        });
    }
}

async fn serve_connection<I>(io: I, peer: SocketAddr, router: Router, builder: hyper::server::conn::http1::Builder, idle: Duration)
where
    I: AsyncRead + AsyncWrite + Unpin + Send + 'static,
{
    let io = TokioIo::new(IdleIo::new(io, idle));
    let svc = hyper::service::service_fn(move |mut req: hyper::Request<hyper::body::Incoming>| {
        req.extensions_mut().insert(ClientAddr(peer));
        router.clone().oneshot(req)
    });
    let _ = builder.serve_connection(io, svc).await;
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid_and_bad_limits_are_named() {
        assert!(ServerOptions::default().validate().is_ok());
        let o = ServerOptions { idle_timeout: Duration::from_secs(5), ..Default::default() };
        assert!(o.validate().unwrap_err().starts_with("idle timeout"));
        let o = ServerOptions { max_connections: 0, ..Default::default() };
        assert!(o.validate().unwrap_err().starts_with("max connections"));
        let o = ServerOptions { allowed_hosts: vec!["a b".into()], ..Default::default() };
        assert!(o.validate().unwrap_err().starts_with("allowed host"));
    }
}

//! Accepting connections: the serving loop under [`super::run`].
//!
//! It does what `axum::serve` leaves open: a connection must deliver each
//! request's headers within [`ConnectionSettings::header_timeout`] (so idle
//! and slow-header sockets are closed), at most
//! [`ConnectionSettings::max_connections`] are open at once (the rest wait in
//! the kernel's accept queue, so descriptors never run out), and shutdown
//! drains for at most [`ConnectionSettings::drain`] before closing what is left.
//! With a [`Tls`] acceptor (`--tls-cert`, `--tls-key`) each connection first
//! completes a TLS handshake (rustls), within the header timeout.

use std::future::Future;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use axum::body::Body;
use axum::extract::Request;
use axum::Router;
use hyper::body::Incoming;
use hyper_util::rt::{TokioIo, TokioTimer};
use hyper_util::service::TowerToHyperService;
use tokio::io::{AsyncRead, AsyncWrite};
use tokio::net::TcpListener;
use tokio::sync::{watch, Semaphore};
use tokio::task::JoinSet;
use tokio_rustls::rustls;
use tokio_rustls::rustls::pki_types::pem::PemObject;
use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer};
use tokio_rustls::TlsAcceptor;
use tower::ServiceExt;

/// Default time to send a request's headers, from a connection's opening or its previous answer.
pub const DEFAULT_HEADER_TIMEOUT_SECS: u64 = 10;
/// Default cap on open connections: far above what trainer nodes hold open,
/// below the usual descriptor limit of 65,536 with room for files and sockets of our own.
pub const DEFAULT_MAX_CONNECTIONS: usize = 16_384;
/// Default drain time at shutdown; below an orchestrator's usual 30 s grace period.
pub const DEFAULT_DRAIN_SECS: u64 = 20;
/// Descriptors kept for the store, the bank, the encoders' libraries and logs.
const RESERVED_DESCRIPTORS: u64 = 256;

/// How connections are accepted and closed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConnectionSettings {
    pub header_timeout: Duration,
    pub max_connections: usize,
    pub drain: Duration,
}

impl Default for ConnectionSettings {
    fn default() -> Self {
        ConnectionSettings {
            header_timeout: Duration::from_secs(DEFAULT_HEADER_TIMEOUT_SECS),
            max_connections: DEFAULT_MAX_CONNECTIONS,
            drain: Duration::from_secs(DEFAULT_DRAIN_SECS),
        }
    }
}

/// The connection cap can not be kept under the process's descriptor limit.
#[derive(Debug, thiserror::Error)]
#[error("--max-connections {asked} does not fit under this process's open-file limit of {limit} (with {RESERVED_DESCRIPTORS} kept for befit's own files); lower --max-connections or raise the limit (ulimit -n)")]
pub struct TooManyConnections {
    pub asked: usize,
    pub limit: u64,
}

impl ConnectionSettings {
    /// The cap when none is asked for: [`DEFAULT_MAX_CONNECTIONS`], or less
    /// where the descriptor limit `open_files` is lower (1,024 is a common
    /// soft limit; containers often have it), keeping [`RESERVED_DESCRIPTORS`]
    /// and at least 64 connections.
    pub fn default_cap(open_files: Option<u64>) -> usize {
        match open_files {
            Some(limit) => (limit.saturating_sub(RESERVED_DESCRIPTORS) as usize)
                .clamp(64, DEFAULT_MAX_CONNECTIONS),
            None => DEFAULT_MAX_CONNECTIONS,
        }
    }

    /// Refuses a connection cap the descriptor limit `open_files` could not hold.
    pub fn check(&self, open_files: Option<u64>) -> Result<(), TooManyConnections> {
        match open_files {
            Some(limit) if self.max_connections as u64 + RESERVED_DESCRIPTORS > limit => {
                Err(TooManyConnections {
                    asked: self.max_connections,
                    limit,
                })
            }
            _ => Ok(()),
        }
    }
}

/// A certificate or key that could not be used for TLS.
#[derive(Debug, thiserror::Error)]
pub enum TlsError {
    #[error("give both --tls-cert and --tls-key, or neither")]
    Half,
    #[error("reading {what} {}: {source}", path.display())]
    Pem {
        what: &'static str,
        path: PathBuf,
        #[source]
        source: rustls::pki_types::pem::Error,
    },
    #[error("--tls-cert {}: no certificate in the file (PEM `CERTIFICATE` blocks)", path.display())]
    NoCertificate { path: PathBuf },
    #[error("the certificate and key can not serve TLS: {0}")]
    Config(#[from] rustls::Error),
}

/// What TLS connections are accepted with.
#[derive(Clone)]
pub struct Tls(TlsAcceptor);

impl Tls {
    /// TLS from a PEM certificate chain and its PEM private key; `None` when
    /// neither is given.
    pub fn from_files(cert: Option<&Path>, key: Option<&Path>) -> Result<Option<Tls>, TlsError> {
        let (cert, key) = match (cert, key) {
            (None, None) => return Ok(None),
            (Some(cert), Some(key)) => (cert, key),
            _ => return Err(TlsError::Half),
        };
        fn pem(
            what: &'static str,
            path: &Path,
        ) -> impl Fn(rustls::pki_types::pem::Error) -> TlsError {
            let path = path.to_path_buf();
            move |source| TlsError::Pem {
                what,
                path: path.clone(),
                source,
            }
        }
        let chain = CertificateDer::pem_file_iter(cert)
            .map_err(pem("--tls-cert", cert))?
            .collect::<Result<Vec<_>, _>>()
            .map_err(pem("--tls-cert", cert))?;
        if chain.is_empty() {
            return Err(TlsError::NoCertificate {
                path: cert.to_path_buf(),
            });
        }
        let key = PrivateKeyDer::from_pem_file(key).map_err(pem("--tls-key", key))?;
        let mut config = rustls::ServerConfig::builder_with_provider(Arc::new(
            rustls::crypto::ring::default_provider(),
        ))
        .with_safe_default_protocol_versions()?
        .with_no_client_auth()
        .with_single_cert(chain, key)?;
        config.alpn_protocols = vec![b"http/1.1".to_vec()];
        Ok(Some(Tls(TlsAcceptor::from(Arc::new(config)))))
    }
}

impl std::fmt::Debug for Tls {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Tls")
    }
}

/// Serves `app` on `listener` (over TLS when `tls` is given) until
/// `shutdown` resolves, then drains.
pub async fn serve(
    listener: TcpListener,
    app: Router,
    settings: ConnectionSettings,
    tls: Option<Tls>,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    let slots = Arc::new(Semaphore::new(settings.max_connections.max(1)));
    let (stop_tx, stop_rx) = watch::channel(false);
    let mut connections = JoinSet::new();
    let mut shutdown = std::pin::pin!(shutdown);
    loop {
        let slot = tokio::select! {
            slot = Arc::clone(&slots).acquire_owned() => slot.expect("the slot semaphore is never closed"),
            () = &mut shutdown => break,
        };
        let stream = tokio::select! {
            accepted = listener.accept() => match accepted {
                Ok((stream, _)) => stream,
                Err(e) => {
                    // Out of descriptors or a connection reset before accept: pause, go on.
                    tracing::warn!(error = %e, "accept failed");
                    tokio::time::sleep(Duration::from_millis(50)).await;
                    continue;
                }
            },
            () = &mut shutdown => break,
        };
        let _ = stream.set_nodelay(true);
        let app = app.clone();
        let stop = stop_rx.clone();
        let header_timeout = settings.header_timeout;
        let tls = tls.clone();
        connections.spawn(async move {
            match tls {
                None => serve_connection(stream, app, header_timeout, stop).await,
                Some(Tls(acceptor)) => {
                    // A handshake is held to the header timeout, as slow headers are.
                    match tokio::time::timeout(header_timeout, acceptor.accept(stream)).await {
                        Ok(Ok(stream)) => serve_connection(stream, app, header_timeout, stop).await,
                        Ok(Err(e)) => tracing::debug!(error = %e, "TLS handshake failed"),
                        Err(_) => {
                            tracing::debug!("TLS handshake took longer than the header timeout")
                        }
                    }
                }
            }
            drop(slot);
        });
        // Finished connections are reaped as we go, so the set stays small.
        while connections.try_join_next().is_some() {}
    }
    drop(listener);
    let _ = stop_tx.send(true);
    let drained = tokio::time::timeout(settings.drain, async {
        while connections.join_next().await.is_some() {}
    })
    .await;
    if drained.is_err() {
        tracing::warn!(
            left = connections.len(),
            "connections still open after the drain time (--drain-secs); closing them"
        );
        connections.shutdown().await;
    }
    Ok(())
}

/// Serves one connection's requests until it closes, or gracefully once `stop` changes.
async fn serve_connection<I>(
    io: I,
    app: Router,
    header_timeout: Duration,
    mut stop: watch::Receiver<bool>,
) where
    I: AsyncRead + AsyncWrite + Unpin + Send + 'static,
{
    let service = app.map_request(|r: Request<Incoming>| r.map(Body::new));
    let service = TowerToHyperService::new(service);
    let mut builder = hyper::server::conn::http1::Builder::new();
    builder
        .timer(TokioTimer::new())
        .header_read_timeout(header_timeout);
    let connection = builder.serve_connection(TokioIo::new(io), service);
    let mut connection = std::pin::pin!(connection);
    loop {
        tokio::select! {
            _ = connection.as_mut() => break,
            changed = stop.changed() => {
                connection.as_mut().graceful_shutdown();
                if changed.is_err() {
                    // The loop is gone; finish this connection as it is.
                    let _ = connection.as_mut().await;
                    break;
                }
            }
        }
    }
}

/// The soft limit on open files, where the platform says.
pub fn open_file_limit() -> Option<u64> {
    let text = std::fs::read_to_string("/proc/self/limits").ok()?;
    let line = text.lines().find(|l| l.starts_with("Max open files"))?;
    line.split_whitespace().nth(3)?.parse().ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_cap_over_the_descriptor_limit_is_refused() {
        let settings = ConnectionSettings {
            max_connections: 1000,
            ..ConnectionSettings::default()
        };
        assert!(settings.check(Some(1256)).is_ok());
        let e = settings.check(Some(1255)).unwrap_err();
        assert!(e.to_string().contains("ulimit -n"), "{e}");
        assert!(settings.check(None).is_ok());
        // Without a cap asked for, it follows the limit: 1,024 descriptors leave 768.
        assert_eq!(ConnectionSettings::default_cap(Some(1024)), 768);
        assert_eq!(
            ConnectionSettings::default_cap(Some(1 << 20)),
            DEFAULT_MAX_CONNECTIONS
        );
        assert_eq!(ConnectionSettings::default_cap(Some(100)), 64);
        let fitted = ConnectionSettings {
            max_connections: ConnectionSettings::default_cap(Some(1024)),
            ..ConnectionSettings::default()
        };
        assert!(fitted.check(Some(1024)).is_ok());
    }

    #[test]
    fn tls_takes_a_certificate_and_its_key_or_says_what_is_wrong() {
        let dir = tempfile::tempdir().unwrap();
        let made = rcgen::generate_simple_self_signed(vec!["localhost".to_string()]).unwrap();
        let cert = dir.path().join("cert.pem");
        let key = dir.path().join("key.pem");
        std::fs::write(&cert, made.cert.pem()).unwrap();
        std::fs::write(&key, made.key_pair.serialize_pem()).unwrap();
        assert!(Tls::from_files(None, None).unwrap().is_none());
        assert!(Tls::from_files(Some(&cert), Some(&key)).unwrap().is_some());
        assert!(matches!(
            Tls::from_files(Some(&cert), None),
            Err(TlsError::Half)
        ));
        // The key given as the certificate: no CERTIFICATE block in it.
        let e = Tls::from_files(Some(&key), Some(&key)).unwrap_err();
        assert!(matches!(e, TlsError::NoCertificate { .. }), "{e}");
        // Another certificate's key does not match this certificate.
        let other = rcgen::generate_simple_self_signed(vec!["localhost".to_string()]).unwrap();
        let wrong = dir.path().join("wrong.pem");
        std::fs::write(&wrong, other.key_pair.serialize_pem()).unwrap();
        let e = Tls::from_files(Some(&cert), Some(&wrong)).unwrap_err();
        assert!(matches!(e, TlsError::Config(_)), "{e}");
        let e = Tls::from_files(Some(&cert), Some(&dir.path().join("absent.pem"))).unwrap_err();
        assert!(e.to_string().contains("--tls-key"), "{e}");
    }

    #[test]
    fn reads_this_process_open_file_limit() {
        // /proc/self/limits is Linux's (proc(5)); the soft limit is a positive number or "unlimited".
        if std::path::Path::new("/proc/self/limits").exists() {
            let text = std::fs::read_to_string("/proc/self/limits").unwrap();
            let unlimited = text
                .lines()
                .any(|l| l.starts_with("Max open files") && l.contains("unlimited"));
            assert_eq!(open_file_limit().is_some(), !unlimited);
        }
    }
}

//! TLS for the aggregator's two endpoints — gRPC for devices and the review
//! pages for clinicians — with rustls and its `ring` provider, and
//! development certificates.
//!
//! Rule (enforced by the `serve` command): off loopback, both endpoints
//! serve TLS only, unless the operator passes `--insecure-plaintext`.
//!
//! A development certificate is a private certificate authority of its own
//! (`ca.pem`, handed to devices and browsers that should trust the
//! aggregator) and a server certificate it signed (`aggregator.pem`, with
//! `aggregator.key`). The CA's private key is not kept: nothing else can be
//! signed with it. Pilots with a real domain use a certificate from their
//! institution instead; the files have the same form.

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use anyhow::{Context, bail};
use rcgen::{
    BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
    KeyUsagePurpose,
};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::mpsc;
use tokio_rustls::TlsAcceptor;
use tokio_rustls::rustls::pki_types::pem::PemObject;
use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer};
use tokio_rustls::rustls::{self, ServerConfig};

/// Longest a client may take over its TLS handshake with the review pages.
const HANDSHAKE_TIMEOUT: Duration = Duration::from_secs(10);

/// A server certificate chain and its private key, read and checked.
#[derive(Clone)]
pub struct TlsIdentity {
    cert_pem: Vec<u8>,
    key_pem: Vec<u8>,
    chain: Vec<CertificateDer<'static>>,
    cert_path: PathBuf,
}

impl std::fmt::Debug for TlsIdentity {
    // The private key never reaches a log.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TlsIdentity")
            .field("cert_path", &self.cert_path)
            .field("certificates", &self.chain.len())
            .finish_non_exhaustive()
    }
}

impl TlsIdentity {
    /// Reads a PEM certificate chain (server certificate first) and a PEM
    /// private key. Errors name the file and what is wrong with it.
    pub fn load(cert: &Path, key: &Path) -> anyhow::Result<TlsIdentity> {
        let cert_pem = std::fs::read(cert)
            .with_context(|| format!("reading certificate {}", cert.display()))?;
        let key_pem =
            std::fs::read(key).with_context(|| format!("reading private key {}", key.display()))?;
        Self::from_pem(cert_pem, key_pem, cert, key)
    }

    fn from_pem(
        cert_pem: Vec<u8>,
        key_pem: Vec<u8>,
        cert: &Path,
        key: &Path,
    ) -> anyhow::Result<TlsIdentity> {
        let chain = CertificateDer::pem_slice_iter(&cert_pem)
            .collect::<Result<Vec<_>, _>>()
            .map_err(|e| anyhow::anyhow!("{}: not a PEM certificate chain: {e}", cert.display()))?;
        if chain.is_empty() {
            bail!(
                "{}: no `BEGIN CERTIFICATE` block found (expected a PEM certificate chain)",
                cert.display()
            );
        }
        PrivateKeyDer::from_pem_slice(&key_pem).map_err(|e| {
            anyhow::anyhow!(
                "{}: not a PEM private key (PKCS#8, PKCS#1 or SEC1): {e}",
                key.display()
            )
        })?;
        let identity = TlsIdentity {
            cert_pem,
            key_pem,
            chain,
            cert_path: cert.to_owned(),
        };
        // Building the configuration checks that the key matches the
        // certificate.
        identity
            .server_config(Vec::new())
            .with_context(|| format!("{} with {}", cert.display(), key.display()))?;
        Ok(identity)
    }

    fn server_config(&self, alpn: Vec<Vec<u8>>) -> anyhow::Result<ServerConfig> {
        let key = PrivateKeyDer::from_pem_slice(&self.key_pem)?;
        let mut config =
            ServerConfig::builder_with_provider(Arc::new(rustls::crypto::ring::default_provider()))
                .with_safe_default_protocol_versions()?
                .with_no_client_auth()
                .with_single_cert(self.chain.clone(), key)
                .context("the private key does not fit the certificate")?;
        config.alpn_protocols = alpn;
        Ok(config)
    }

    /// The gRPC server's TLS configuration.
    pub fn grpc_config(&self) -> tonic::transport::ServerTlsConfig {
        tonic::transport::ServerTlsConfig::new().identity(tonic::transport::Identity::from_pem(
            &self.cert_pem,
            &self.key_pem,
        ))
    }

    /// An acceptor for HTTP/1.1 over TLS (the review pages).
    pub fn http_acceptor(&self) -> anyhow::Result<TlsAcceptor> {
        Ok(TlsAcceptor::from(Arc::new(
            self.server_config(vec![b"http/1.1".to_vec()])?,
        )))
    }
}

/// A listener whose connections have completed a TLS handshake. Handshakes
/// run in their own tasks with a time limit, so a slow or silent client
/// delays nobody else.
#[derive(Debug)]
pub struct TlsListener {
    ready: mpsc::Receiver<(tokio_rustls::server::TlsStream<TcpStream>, SocketAddr)>,
    local: SocketAddr,
}

impl TlsListener {
    pub fn new(listener: TcpListener, acceptor: TlsAcceptor) -> std::io::Result<TlsListener> {
        let local = listener.local_addr()?;
        let (tx, ready) = mpsc::channel(64);
        tokio::spawn(async move {
            loop {
                let accepted = tokio::select! {
                    a = listener.accept() => a,
                    () = tx.closed() => return,
                };
                let (tcp, peer) = match accepted {
                    Ok(c) => c,
                    Err(e) => {
                        tracing::warn!(error = %e, "accepting a review connection failed");
                        tokio::time::sleep(Duration::from_millis(50)).await;
                        continue;
                    }
                };
                let acceptor = acceptor.clone();
                let tx = tx.clone();
                tokio::spawn(async move {
                    match tokio::time::timeout(HANDSHAKE_TIMEOUT, acceptor.accept(tcp)).await {
                        Ok(Ok(tls)) => {
                            let _ = tx.send((tls, peer)).await;
                        }
                        Ok(Err(e)) => tracing::debug!(%peer, error = %e, "TLS handshake failed"),
                        Err(_) => tracing::debug!(%peer, "TLS handshake timed out"),
                    }
                });
            }
        });
        Ok(TlsListener { ready, local })
    }
}

impl axum::serve::Listener for TlsListener {
    type Io = tokio_rustls::server::TlsStream<TcpStream>;
    type Addr = SocketAddr;

    async fn accept(&mut self) -> (Self::Io, Self::Addr) {
        match self.ready.recv().await {
            Some(connection) => connection,
            // The accept task ended (runtime shutting down): accept nothing.
            None => std::future::pending().await,
        }
    }

    fn local_addr(&self) -> std::io::Result<SocketAddr> {
        Ok(self.local)
    }
}

/// Files written by [`write_dev_certificate`].
#[derive(Debug, Clone)]
pub struct DevCertificate {
    /// The development CA's certificate: what devices and browsers trust.
    pub ca: PathBuf,
    /// The server certificate chain (server certificate, then the CA).
    pub cert: PathBuf,
    /// The server's private key (owner read/write only).
    pub key: PathBuf,
}

/// Writes a development CA and a server certificate for `hosts` (DNS names
/// or IP addresses) valid for `days` days into `dir`. Refuses to overwrite
/// existing files.
pub fn write_dev_certificate(
    dir: &Path,
    hosts: &[String],
    days: u32,
) -> anyhow::Result<DevCertificate> {
    if hosts.is_empty() {
        bail!("at least one host name or address is needed");
    }
    if days == 0 {
        bail!("the certificate must be valid for at least one day");
    }
    let files = DevCertificate {
        ca: dir.join("ca.pem"),
        cert: dir.join("aggregator.pem"),
        key: dir.join("aggregator.key"),
    };
    for f in [&files.ca, &files.cert, &files.key] {
        if f.exists() {
            bail!(
                "{} already exists; remove it or choose another folder",
                f.display()
            );
        }
    }
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;

    let now = rcgen::date_time_ymd(1970, 1, 1)
        + Duration::from_millis(crate::service::now_ms().max(0) as u64);
    let not_before = now - Duration::from_secs(3600);
    let not_after = now + Duration::from_secs(u64::from(days) * 86_400);

    let mut ca_params = CertificateParams::new(Vec::<String>::new())?;
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Constrained(0));
    ca_params
        .distinguished_name
        .push(DnType::CommonName, "Plimsoll development CA");
    ca_params.key_usages = vec![KeyUsagePurpose::KeyCertSign, KeyUsagePurpose::CrlSign];
    ca_params.not_before = not_before;
    ca_params.not_after = not_after;
    let ca_key = KeyPair::generate()?;
    let ca_cert = ca_params.self_signed(&ca_key)?;
    let issuer = Issuer::new(ca_params, ca_key);

    let mut params = CertificateParams::new(hosts.to_vec())
        .context("a host is neither a DNS name nor an IP address")?;
    params
        .distinguished_name
        .push(DnType::CommonName, "Plimsoll aggregator (development)");
    params.key_usages = vec![KeyUsagePurpose::DigitalSignature];
    params.extended_key_usages = vec![ExtendedKeyUsagePurpose::ServerAuth];
    params.not_before = not_before;
    params.not_after = not_after;
    let key = KeyPair::generate()?;
    let cert = params.signed_by(&key, &issuer)?;

    std::fs::write(&files.ca, ca_cert.pem())
        .with_context(|| format!("writing {}", files.ca.display()))?;
    std::fs::write(&files.cert, cert.pem() + &ca_cert.pem())
        .with_context(|| format!("writing {}", files.cert.display()))?;
    write_private(&files.key, key.serialize_pem().as_bytes())?;
    Ok(files)
}

/// Writes `bytes` to a new file only its owner may read.
fn write_private(path: &Path, bytes: &[u8]) -> anyhow::Result<()> {
    use std::io::Write;
    let mut options = std::fs::OpenOptions::new();
    options.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        options.mode(0o600);
    }
    let mut file = options
        .open(path)
        .with_context(|| format!("creating {}", path.display()))?;
    file.write_all(bytes)
        .with_context(|| format!("writing {}", path.display()))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_dev_certificate_loads_and_is_not_overwritten() {
        let dir = tempfile::tempdir().unwrap();
        let files =
            write_dev_certificate(dir.path(), &["localhost".into(), "127.0.0.1".into()], 30)
                .unwrap();
        let identity = TlsIdentity::load(&files.cert, &files.key).unwrap();
        assert_eq!(identity.chain.len(), 2, "server certificate, then the CA");
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(&files.key).unwrap().permissions().mode();
            assert_eq!(mode & 0o777, 0o600);
        }
        let again = write_dev_certificate(dir.path(), &["localhost".into()], 30).unwrap_err();
        assert!(again.to_string().contains("already exists"), "{again}");
    }

    #[test]
    fn bad_files_are_named_in_the_error() {
        let dir = tempfile::tempdir().unwrap();
        let files = write_dev_certificate(dir.path(), &["localhost".into()], 1).unwrap();
        let not_pem = dir.path().join("not.pem");
        std::fs::write(&not_pem, "hello").unwrap();
        let err = TlsIdentity::load(&not_pem, &files.key).unwrap_err();
        assert!(err.to_string().contains("not.pem"), "{err:#}");
        let err = TlsIdentity::load(&files.cert, &not_pem).unwrap_err();
        assert!(err.to_string().contains("not.pem"), "{err:#}");
        // A key that does not belong to the certificate.
        let other = tempfile::tempdir().unwrap();
        let other_files = write_dev_certificate(other.path(), &["localhost".into()], 1).unwrap();
        let err = TlsIdentity::load(&files.cert, &other_files.key).unwrap_err();
        assert!(format!("{err:#}").contains("does not fit"), "{err:#}");
        let missing = TlsIdentity::load(&dir.path().join("none.pem"), &files.key).unwrap_err();
        assert!(missing.to_string().contains("none.pem"), "{missing}");
    }
}

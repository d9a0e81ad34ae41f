//! Sockets with or without TLS: the daemon's two listeners wrap accepted connections in TLS (tokio-rustls)
//! when `tls_cert`/`tls_key` are configured, and the clients (`feed`, `listen`, `withdraw`) connect in TLS
//! when given a CA file. Everything above this module sees one boxed byte stream either way.
//! Two mistakes get named rather than an internal error: a CA certificate configured as the server's own
//! (refused at load, and explained on the client's side), and a plain client on a TLS port (told by the
//! first bytes, so the listener can answer it in its own plain protocol).

use std::fs::File;
use std::io::BufReader;
use std::path::Path;
use std::sync::Arc;
use std::time::Duration;

use anyhow::{Context, anyhow};
use tokio::io::{AsyncRead, AsyncWrite};
use tokio::net::TcpStream;
use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer, ServerName};
use tokio_rustls::rustls::{ClientConfig, RootCertStore, ServerConfig};
use tokio_rustls::{TlsAcceptor, TlsConnector};

use crate::config::TlsConfig;

/// A byte stream: plain TCP or TLS over TCP.
pub(crate) trait Io: AsyncRead + AsyncWrite + Unpin + Send {}
impl<T: AsyncRead + AsyncWrite + Unpin + Send> Io for T {}

/// A connection of either kind.
pub(crate) type BoxIo = Box<dyn Io>;

/// How long a TLS handshake may take before the connection is dropped.
const HANDSHAKE_TIMEOUT: Duration = Duration::from_secs(10);

fn read_certs(path: &Path) -> anyhow::Result<Vec<CertificateDer<'static>>> {
    let f = File::open(path).with_context(|| format!("cannot open certificate file {}", path.display()))?;
    let certs = rustls_pemfile::certs(&mut BufReader::new(f))
        .collect::<Result<Vec<_>, _>>()
        .with_context(|| format!("cannot read PEM certificates from {}", path.display()))?;
    if certs.is_empty() {
        return Err(anyhow!("{} holds no PEM certificate", path.display()));
    }
    Ok(certs)
}

/// Whether a DER certificate says it is a CA (basicConstraints with cA TRUE). A minimal read of the one
/// extension: its OID (2.5.29.19), an optional critical flag, then the OCTET STRING holding
/// `SEQUENCE { BOOLEAN TRUE, ... }`; anything else reads as not a CA (then the TLS library judges it).
pub(crate) fn is_ca_certificate(der: &[u8]) -> bool {
    const OID: [u8; 5] = [0x06, 0x03, 0x55, 0x1d, 0x13];
    let Some(at) = der.windows(OID.len()).position(|w| w == OID) else {
        return false;
    };
    let mut rest = &der[at + OID.len()..];
    if rest.starts_with(&[0x01, 0x01]) && rest.len() >= 3 {
        rest = &rest[3..];
    }
    // OCTET STRING (short length) around SEQUENCE (short length) whose first element is BOOLEAN TRUE.
    matches!(rest, [0x04, _, 0x30, _, 0x01, 0x01, v, ..] if *v != 0)
}

/// The server side of TLS for a listener.
pub(crate) fn acceptor(cfg: &TlsConfig) -> anyhow::Result<TlsAcceptor> {
    let certs = read_certs(&cfg.cert)?;
    if certs.first().is_some_and(|c| is_ca_certificate(c)) {
        return Err(anyhow!(
            "{} is a CA certificate (basicConstraints CA:TRUE), which clients refuse as a server's own: \
             sign a leaf certificate for this host with that CA and configure the leaf (README: TLS certificates)",
            cfg.cert.display()
        ));
    }
    let f = File::open(&cfg.key).with_context(|| format!("cannot open key file {}", cfg.key.display()))?;
    let key: PrivateKeyDer<'static> = rustls_pemfile::private_key(&mut BufReader::new(f))
        .with_context(|| format!("cannot read PEM key from {}", cfg.key.display()))?
        .ok_or_else(|| anyhow!("{} holds no PEM private key", cfg.key.display()))?;
    let server = ServerConfig::builder()
        .with_no_client_auth()
        .with_single_cert(certs, key)
        .with_context(|| {
            format!(
                "certificate {} and key {} do not form a usable pair",
                cfg.cert.display(),
                cfg.key.display()
            )
        })?;
    Ok(TlsAcceptor::from(Arc::new(server)))
}

/// Why an accepted connection did not become a stream.
#[derive(Debug)]
pub(crate) enum AcceptError {
    /// The peer spoke plain bytes on a TLS port: the connection, for the listener to answer in its own
    /// (plain) protocol and close.
    PlainOnTls(TcpStream),
    /// The handshake failed or took too long.
    Failed(anyhow::Error),
}

/// What a listener tells a plain client on its TLS port.
pub(crate) const PLAIN_ON_TLS: &str =
    "this port speaks TLS and the connection is plain TCP: connect with TLS (e.g. --tls-ca FILE)";

/// Wraps an accepted connection in TLS when the listener has an acceptor. A TLS client opens with a
/// handshake record (0x16, then major version 3); a glint frame never does (its second byte is a field
/// tag), so a plain client is told apart before the handshake would fail on its bytes.
pub(crate) async fn accept(tcp: TcpStream, acceptor: Option<&TlsAcceptor>) -> Result<BoxIo, AcceptError> {
    tcp.set_nodelay(true)
        .context("set TCP_NODELAY")
        .map_err(AcceptError::Failed)?;
    match acceptor {
        None => Ok(Box::new(tcp)),
        Some(a) => {
            let mut first = [0u8; 2];
            let peeked = tokio::time::timeout(HANDSHAKE_TIMEOUT, async {
                loop {
                    let n = tcp.peek(&mut first).await?;
                    if n == 0 || n == first.len() {
                        return Ok::<usize, std::io::Error>(n);
                    }
                    tokio::time::sleep(Duration::from_millis(5)).await;
                }
            })
            .await
            .map_err(|_| {
                AcceptError::Failed(anyhow!(
                    "no TLS handshake within {} s",
                    HANDSHAKE_TIMEOUT.as_secs()
                ))
            })?
            .map_err(|e| AcceptError::Failed(anyhow!("reading the first bytes: {e}")))?;
            if peeked == first.len() && first != [0x16, 0x03] {
                return Err(AcceptError::PlainOnTls(tcp));
            }
            let tls = tokio::time::timeout(HANDSHAKE_TIMEOUT, a.accept(tcp))
                .await
                .map_err(|_| {
                    AcceptError::Failed(anyhow!(
                        "TLS handshake took longer than {} s",
                        HANDSHAKE_TIMEOUT.as_secs()
                    ))
                })?
                .context("TLS handshake")
                .map_err(AcceptError::Failed)?;
            Ok(Box::new(tls))
        }
    }
}

/// A client's TLS failure in words: a CA certificate presented as the daemon's own, or one no trusted CA
/// signed, named as such rather than by the library's error name.
fn explain_handshake(addr: &str, e: &std::io::Error) -> String {
    let text = e.to_string();
    if text.contains("CaUsedAsEndEntity") {
        format!(
            "{addr} presents a CA certificate (basicConstraints CA:TRUE) as its own: the daemon needs a leaf \
             certificate signed by the CA you trust (README: TLS certificates)"
        )
    } else if text.contains("UnknownIssuer") {
        format!("{addr} presents a certificate that no CA in the --tls-ca file signed")
    } else if text.contains("NotValidForName") {
        format!("{addr} presents a certificate not made for that host name: {text}")
    } else {
        format!("TLS handshake with {addr}: {text}")
    }
}

/// TLS settings of a client: the CA that signed the daemon's certificate.
#[derive(Clone)]
pub(crate) struct ClientTls {
    connector: TlsConnector,
}

impl std::fmt::Debug for ClientTls {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("ClientTls")
    }
}

impl ClientTls {
    /// Trusts the certificates in the PEM file `ca`.
    pub(crate) fn from_ca_file(ca: &Path) -> anyhow::Result<Self> {
        let mut roots = RootCertStore::empty();
        for c in read_certs(ca)? {
            roots
                .add(c)
                .with_context(|| format!("certificate in {} is not a usable trust anchor", ca.display()))?;
        }
        let cfg = ClientConfig::builder()
            .with_root_certificates(roots)
            .with_no_client_auth();
        Ok(Self {
            connector: TlsConnector::from(Arc::new(cfg)),
        })
    }
}

/// Connects to `addr` (`HOST:PORT`), in TLS when `tls` is given (the host part is the name checked against
/// the certificate).
pub(crate) async fn connect(addr: &str, tls: Option<&ClientTls>) -> anyhow::Result<BoxIo> {
    let tcp = TcpStream::connect(addr)
        .await
        .with_context(|| format!("cannot connect to {addr}"))?;
    tcp.set_nodelay(true).context("set TCP_NODELAY")?;
    match tls {
        None => Ok(Box::new(tcp)),
        Some(t) => {
            let host = addr
                .rsplit_once(':')
                .map_or(addr, |(h, _)| h)
                .trim_start_matches('[')
                .trim_end_matches(']');
            let name = ServerName::try_from(host.to_string())
                .with_context(|| format!("'{host}' is not a server name"))?;
            let stream = tokio::time::timeout(HANDSHAKE_TIMEOUT, t.connector.connect(name, tcp))
                .await
                .map_err(|_| {
                    anyhow!(
                        "TLS handshake with {addr} took longer than {} s",
                        HANDSHAKE_TIMEOUT.as_secs()
                    )
                })?
                .map_err(|e| anyhow!(explain_handshake(addr, &e)))?;
            Ok(Box::new(stream))
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use tokio::io::{AsyncReadExt, AsyncWriteExt};

    #[tokio::test]
    async fn tls_round_trip_on_loopback_and_untrusted_server_is_refused() {
        let tmp = tempfile::tempdir().unwrap();
        let ck = rcgen::generate_simple_self_signed(vec!["localhost".to_string()]).unwrap();
        let cert = tmp.path().join("cert.pem");
        let key = tmp.path().join("key.pem");
        std::fs::write(&cert, ck.cert.pem()).unwrap();
        std::fs::write(&key, ck.signing_key.serialize_pem()).unwrap();
        let acc = acceptor(&TlsConfig {
            cert: cert.clone(),
            key,
        })
        .unwrap();
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let port = listener.local_addr().unwrap().port();
        let server = tokio::spawn(async move {
            let mut results = Vec::new();
            for _ in 0..2 {
                let (tcp, _) = listener.accept().await.unwrap();
                match accept(tcp, Some(&acc)).await.map_err(|_| ()) {
                    Ok(mut s) => {
                        let mut buf = [0u8; 5];
                        s.read_exact(&mut buf).await.unwrap();
                        s.write_all(&buf).await.unwrap();
                        s.flush().await.unwrap();
                        results.push(true);
                    }
                    Err(_) => results.push(false),
                }
            }
            results
        });
        let tls = ClientTls::from_ca_file(&cert).unwrap();
        let mut c = connect(&format!("localhost:{port}"), Some(&tls)).await.unwrap();
        c.write_all(b"glint").await.unwrap();
        let mut back = [0u8; 5];
        c.read_exact(&mut back).await.unwrap();
        assert_eq!(&back, b"glint");
        drop(c);
        // A client trusting another CA refuses the daemon's certificate.
        let other = rcgen::generate_simple_self_signed(vec!["localhost".to_string()]).unwrap();
        let other_ca = tmp.path().join("other.pem");
        std::fs::write(&other_ca, other.cert.pem()).unwrap();
        let wrong = ClientTls::from_ca_file(&other_ca).unwrap();
        assert!(connect(&format!("localhost:{port}"), Some(&wrong)).await.is_err());
        assert_eq!(server.await.unwrap(), vec![true, false]);
    }
}

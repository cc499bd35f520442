//! The CLI over `https://`: README says its certificates are checked against the system's trust
//! store. A daemon is served behind a TLS proxy written here (as `deploy/`'s proxy would stand
//! in front of it) with a certificate signed by a test authority (`tests/fixtures/tls`), and the
//! real `halfwave` binary is pointed at it with `SSL_CERT_FILE` naming the trust store (the
//! environment variable the TLS stack's native-roots loader reads in place of the system's
//! store, as OpenSSL does; see the rustls-native-certs documentation): trusting that authority,
//! the command answers; trusting another one only, it refuses the daemon, says that the
//! certificate is not trusted and what to do, not that the daemon may be down.

mod daemon_support;
// The daemon support reads the engine support's frequencies.
mod engine_support;

use daemon_support::Bench;
use std::path::PathBuf;
use std::sync::Arc;
use tokio::net::{TcpListener, TcpStream};
use tokio::process::Command;
use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer, PrivatePkcs8KeyDer};
use tokio_rustls::rustls::ServerConfig;
use tokio_rustls::TlsAcceptor;

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/fixtures/tls")
        .join(name)
}

/// The DER bytes of the one PEM block in the fixture `name`.
fn pem_block(name: &str) -> Vec<u8> {
    use base64::Engine as _;
    let text = std::fs::read_to_string(fixture(name)).unwrap();
    let body: String = text
        .lines()
        .filter(|line| !line.starts_with("-----"))
        .collect();
    base64::engine::general_purpose::STANDARD
        .decode(body)
        .unwrap()
}

/// Listens on a free loopback port and forwards each TLS connection, decrypted, to the daemon at
/// `backend_port`; returns the proxy's port.
async fn tls_proxy(backend_port: u16) -> u16 {
    let certificate = CertificateDer::from(pem_block("server.pem"));
    let key = PrivateKeyDer::Pkcs8(PrivatePkcs8KeyDer::from(pem_block("server-key.pem")));
    let config = ServerConfig::builder()
        .with_no_client_auth()
        .with_single_cert(vec![certificate], key)
        .unwrap();
    let acceptor = TlsAcceptor::from(Arc::new(config));
    let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
    let port = listener.local_addr().unwrap().port();
    tokio::spawn(async move {
        while let Ok((tcp, _)) = listener.accept().await {
            let acceptor = acceptor.clone();
            tokio::spawn(async move {
                // A refused handshake (the client did not trust the certificate) ends here.
                let Ok(mut tls) = acceptor.accept(tcp).await else {
                    return;
                };
                if let Ok(mut daemon) = TcpStream::connect(("127.0.0.1", backend_port)).await {
                    let _ = tokio::io::copy_bidirectional(&mut tls, &mut daemon).await;
                }
            });
        }
    });
    port
}

#[tokio::test]
async fn the_cli_checks_an_https_daemon_against_the_trust_store() {
    let bench = Bench::new(73).await;
    let _daemon = bench.serve("serve.log").await;
    let token = bench.operator_token().await;
    let proxy = tls_proxy(bench.port()).await;
    let benches = |trust: &str, url: String| {
        let mut command = Command::new(env!("CARGO_BIN_EXE_halfwave"));
        command
            .args(["benches", "--url", &url])
            .env("HALFWAVE_TOKEN", &token)
            .env("SSL_CERT_FILE", fixture(trust))
            .env_remove("SSL_CERT_DIR");
        command
    };

    // Trusting the authority that signed the daemon's certificate: the bench list comes back.
    let url = format!("https://localhost:{proxy}");
    let trusted = benches("ca.pem", url.clone()).output().await.unwrap();
    let stdout = String::from_utf8_lossy(&trusted.stdout);
    let stderr = String::from_utf8_lossy(&trusted.stderr);
    println!(
        "trusted: exit {:?}\n{stdout}{stderr}",
        trusted.status.code()
    );
    assert!(trusted.status.success(), "{stderr}");
    assert!(
        stdout.contains("sim"),
        "the configured bench is listed: {stdout}"
    );

    // The same address by IP, which the certificate also names.
    let by_ip = benches("ca.pem", format!("https://127.0.0.1:{proxy}"))
        .output()
        .await
        .unwrap();
    assert!(
        by_ip.status.success(),
        "{}",
        String::from_utf8_lossy(&by_ip.stderr)
    );

    // Trusting only an authority that did not sign it: refused, and the message says so.
    let untrusted = benches("other-ca.pem", url).output().await.unwrap();
    let stderr = String::from_utf8_lossy(&untrusted.stderr);
    println!("untrusted: exit {:?}\n{stderr}", untrusted.status.code());
    assert!(!untrusted.status.success());
    assert!(
        untrusted.stdout.is_empty(),
        "nothing printed as if it had answered"
    );
    assert!(
        stderr.contains("TLS certificate this machine does not trust")
            && stderr.contains("SSL_CERT_FILE"),
        "the refusal names the certificate and what to do: {stderr}"
    );
    assert!(
        !stderr.contains("is `halfwave serve` running"),
        "not the advice for a daemon that does not answer: {stderr}"
    );
}

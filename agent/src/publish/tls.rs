//! The TLS client configuration of every MQTT connection leaktally makes:
//! the agent's publisher (`[mqtt]`) and the fleet view (`--tls-*`). The
//! two differ only in where the files were given, which the messages name
//! so that each says how to fix itself there.

use rustls_pki_types::pem::PemObject;
use rustls_pki_types::{CertificateDer, PrivateKeyDer};
use std::path::Path;
use std::sync::Arc;

/// How to fix each file, in the words of where it was given.
pub struct Hints {
    /// The CA file (or, without one, the system's CAs).
    pub ca: &'static str,
    /// The client certificate and its key.
    pub client: &'static str,
}

/// A rustls client configuration that trusts the certificates in `ca`
/// (the system's CAs without it) and shows the client certificate
/// `client` (certificate file, key file) when given.
pub fn client_config(
    ca: Option<&Path>,
    client: Option<(&Path, &Path)>,
    hints: &Hints,
) -> anyhow::Result<rustls::ClientConfig> {
    let fix = hints.ca;
    let mut roots = rustls::RootCertStore::empty();
    match ca {
        Some(ca) => {
            let certs = CertificateDer::pem_file_iter(ca).map_err(|e| {
                anyhow::anyhow!("cannot read the CA file {}: {e}; {fix}", ca.display())
            })?;
            for cert in certs {
                let cert = cert.map_err(|e| {
                    anyhow::anyhow!("the CA file {} is not valid PEM: {e}; {fix}", ca.display())
                })?;
                roots.add(cert).map_err(|e| {
                    anyhow::anyhow!(
                        "the CA file {} holds a certificate rustls cannot use: {e}; {fix}",
                        ca.display()
                    )
                })?;
            }
            if roots.is_empty() {
                anyhow::bail!("the CA file {} holds no certificate; {fix}", ca.display());
            }
        }
        None => {
            let found = rustls_native_certs::load_native_certs();
            roots.add_parsable_certificates(found.certs);
            if roots.is_empty() {
                anyhow::bail!(
                    "this system has no CA certificates to trust the broker by (apt-get install ca-certificates); {fix}"
                );
            }
        }
    }
    // ring, though rustls 0.23.48 deprecates it for lack of post-quantum
    // key exchange: its other provider (aws-lc-rs) needs cmake and a C
    // toolchain to build, and a broker on the plant network needs TLS 1.2
    // and 1.3 with the classical groups (X25519, P-256), which ring has.
    #[allow(deprecated)]
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let builder = rustls::ClientConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()?
        .with_root_certificates(roots);
    let Some((cert, key)) = client else {
        return Ok(builder.with_no_client_auth());
    };
    let fix = hints.client;
    let chain = CertificateDer::pem_file_iter(cert)
        .and_then(|certs| certs.collect::<Result<Vec<_>, _>>())
        .map_err(|e| {
            anyhow::anyhow!(
                "cannot read the client certificate {}: {e}; {fix}",
                cert.display()
            )
        })?;
    if chain.is_empty() {
        anyhow::bail!(
            "the client certificate file {} holds no certificate; {fix}",
            cert.display()
        );
    }
    let private = PrivateKeyDer::from_pem_file(key).map_err(|e| {
        anyhow::anyhow!("cannot read the private key {}: {e}; {fix}", key.display())
    })?;
    builder.with_client_auth_cert(chain, private).map_err(|e| {
        anyhow::anyhow!(
            "the client certificate {} and the key {} do not go together: {e}; {fix}",
            cert.display(),
            key.display()
        )
    })
}

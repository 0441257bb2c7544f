//! The MQTT client's options from `[mqtt]`: the broker, the credentials
//! (the password read from its file), TLS with the configured CA and an
//! optional client certificate, the last will, the keep-alive.
//!
//! Read at every connection attempt, not once: a password or certificate
//! renewed on disk is used at the next reconnect, and a file missing at
//! start is an error the publisher reports and retries, never one that
//! stops the daemon (the site's estimates come first).

use super::topics;
use crate::config::mqtt::Mqtt;
use anyhow::Context as _;
use rumqttc::{LastWill, MqttOptions, QoS, TlsConfiguration, Transport};
use rustls_pki_types::pem::PemObject;
use rustls_pki_types::{CertificateDer, PrivateKeyDer};
use std::sync::Arc;

/// The QoS of `[mqtt] qos`.
pub fn qos(m: &Mqtt) -> QoS {
    match m.qos {
        0 => QoS::AtMostOnce,
        2 => QoS::ExactlyOnce,
        _ => QoS::AtLeastOnce,
    }
}

/// The client's options for one connection attempt made at `at_ms`: the
/// last will is stamped with it, as is the `online` message that follows
/// (one connection, one time), so a view that sees both takes the will as
/// the later news.
pub fn options(m: &Mqtt, at_ms: i64) -> anyhow::Result<MqttOptions> {
    let mut options = MqttOptions::new(&m.client_id, &m.host, m.port);
    options.set_keep_alive(m.keep_alive);
    // The agent resends what the broker has not acknowledged from its own
    // outbox, in order, at every connection: a persistent session would
    // only add the broker's copy of the same.
    options.set_clean_session(true);
    // Status documents are a few kB; a summary of a long event no more.
    options.set_max_packet_size(1 << 20, 1 << 20);
    options.set_last_will(LastWill::new(
        topics::state(m),
        topics::state_payload(m, false, at_ms),
        qos(m),
        true,
    ));
    if let (Some(user), Some(file)) = (&m.username, &m.password_file) {
        options.set_credentials(user, password(file)?);
    }
    if m.tls() {
        options.set_transport(Transport::tls_with_config(TlsConfiguration::Rustls(
            Arc::new(tls(m)?),
        )));
    }
    Ok(options)
}

/// The password: the file's first line, without its line end.
fn password(file: &std::path::Path) -> anyhow::Result<String> {
    let text = std::fs::read_to_string(file)
        .with_context(|| format!("cannot read the MQTT password file {}", file.display()))?;
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        if let Ok(meta) = std::fs::metadata(file)
            && meta.permissions().mode() & 0o004 != 0
        {
            tracing::warn!(
                "the MQTT password file {} can be read by every user of this machine; make it readable by the daemon's user only (chmod 600, or 640 with the daemon's group)",
                file.display()
            );
        }
    }
    Ok(text.lines().next().unwrap_or("").to_owned())
}

/// TLS with `ca_file`'s certificates as the only trust anchors (the
/// system's without it), and the client certificate when one is
/// configured; ring as the provider.
fn tls(m: &Mqtt) -> anyhow::Result<rustls::ClientConfig> {
    let mut roots = rustls::RootCertStore::empty();
    match &m.ca_file {
        Some(ca) => {
            let certs = CertificateDer::pem_file_iter(ca)
                .with_context(|| format!("cannot read the MQTT CA file {}", ca.display()))?;
            for cert in certs {
                let cert = cert.with_context(|| format!("the MQTT CA file {}", ca.display()))?;
                roots.add(cert).with_context(|| {
                    format!("a certificate in the MQTT CA file {}", ca.display())
                })?;
            }
            if roots.is_empty() {
                anyhow::bail!("the MQTT CA file {} holds no certificate", ca.display());
            }
        }
        None => {
            let found = rustls_native_certs::load_native_certs();
            roots.add_parsable_certificates(found.certs);
            if roots.is_empty() {
                anyhow::bail!(
                    "[mqtt] tls = true without ca_file, and this system has no CA certificates (apt-get install ca-certificates, or give ca_file)"
                );
            }
        }
    }
    // ring, not rustls's default aws-lc-rs (which needs cmake and a C
    // toolchain to build); ring's key exchange is the classical kind
    // (X25519, P-256), which every broker speaks, hence the allowance.
    #[allow(deprecated)]
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let builder = rustls::ClientConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()
        .context("TLS protocol versions")?
        .with_root_certificates(roots);
    Ok(match (&m.client_cert_file, &m.client_key_file) {
        (Some(cert), Some(key)) => {
            let chain = CertificateDer::pem_file_iter(cert)
                .and_then(|c| c.collect::<Result<Vec<_>, _>>())
                .with_context(|| {
                    format!("cannot read the MQTT client certificate {}", cert.display())
                })?;
            let key = PrivateKeyDer::from_pem_file(key)
                .with_context(|| format!("cannot read the MQTT client key {}", key.display()))?;
            builder
                .with_client_auth_cert(chain, key)
                .context("the MQTT client certificate and key")?
        }
        _ => builder.with_no_client_auth(),
    })
}

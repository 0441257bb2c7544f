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
/// configured.
fn tls(m: &Mqtt) -> anyhow::Result<rustls::ClientConfig> {
    let client = match (&m.client_cert_file, &m.client_key_file) {
        (Some(cert), Some(key)) => Some((cert.as_path(), key.as_path())),
        _ => None,
    };
    super::tls::client_config(
        m.ca_file.as_deref(),
        client,
        &super::tls::Hints {
            ca: "set [mqtt] ca_file to the PEM file of the CA that signed the broker's certificate",
            client: "set [mqtt] client_cert_file to the client certificate and client_key_file to its private key, both PEM",
        },
    )
}

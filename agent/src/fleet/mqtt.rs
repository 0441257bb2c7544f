//! The fleet view's MQTT connection: subscribe to the sites' topics, feed
//! every message to the board, and keep trying while the broker is
//! unreachable, saying why on the page and in the log.
//!
//! The session is clean (nothing kept at the broker between connections):
//! on every connection the broker sends the retained documents again,
//! which the board takes as duplicates or older ones, so nothing is
//! missed across an outage and nothing is applied twice. QoS 1, the sites'
//! publishing QoS. The view publishes nothing and needs read access only
//! (`{prefix}/#`).
//!
//! Left out: the board's rules (`board.rs`) and the options' parsing
//! (`crate::commands::fleet`).

use super::board::{Board, MAX_PAYLOAD, Outcome};
use super::topics;
use rumqttc::{
    AsyncClient, ConnectReturnCode, ConnectionError, Event, EventLoop, MqttOptions, Packet, QoS,
    StateError, SubscribeFilter, SubscribeReasonCode, TlsConfiguration, Transport,
};
use std::path::PathBuf;
use std::sync::{Arc, Mutex, PoisonError};
use std::time::Duration;
use tokio_util::sync::CancellationToken;
use tracing::{info, warn};

/// The longest wait between two connection attempts.
pub const RETRY_AT_MOST: Duration = Duration::from_secs(30);
/// The first wait after a failure; doubled after each failure in a row.
pub const RETRY_FIRST: Duration = Duration::from_secs(1);
/// Problems with messages logged one by one; after these, every
/// power-of-two count is.
const PROBLEMS_LOGGED: u64 = 20;

/// Where and how to reach the broker.
#[derive(Debug, Clone)]
pub struct Broker {
    pub host: String,
    pub port: u16,
    /// TLS, checked against the certificates of this CA file.
    pub tls_ca: Option<PathBuf>,
    /// A client certificate and its key (PEM files), for a broker that
    /// asks for one.
    pub tls_client: Option<(PathBuf, PathBuf)>,
    pub username: Option<String>,
    /// The password, read from this file.
    pub password: Option<(String, PathBuf)>,
    pub client_id: String,
    pub prefix: String,
}

impl Broker {
    /// `host:port`, as the page and the log say it.
    pub fn address(&self) -> String {
        if self.host.contains(':') {
            format!("[{}]:{}", self.host, self.port)
        } else {
            format!("{}:{}", self.host, self.port)
        }
    }

    /// The client options: clean session, QoS 1 subscriptions, TLS and
    /// credentials as given. Fails with a clear message on a CA file that
    /// cannot be read or holds no certificate.
    pub fn options(&self) -> anyhow::Result<MqttOptions> {
        let mut options = MqttOptions::new(&self.client_id, &self.host, self.port);
        options
            .set_clean_session(true)
            .set_keep_alive(Duration::from_secs(15))
            // A status document is a few kB; a payload past the board's
            // bound is refused there with a word, rather than here by
            // dropping the connection, up to four times that.
            .set_max_packet_size(4 * MAX_PAYLOAD + 1024, 64 * 1024);
        if let Some(user) = &self.username {
            let password = self.password.as_ref().map_or("", |(p, _)| p.as_str());
            options.set_credentials(user, password);
        }
        if let Some(ca) = &self.tls_ca {
            options.set_transport(Transport::tls_with_config(TlsConfiguration::Rustls(
                Arc::new(crate::publish::tls::client_config(
                    Some(ca),
                    self.tls_client.as_ref().map(|(c, k)| (c.as_path(), k.as_path())),
                    &crate::publish::tls::Hints {
                        ca: "give --tls-ca the PEM file of the CA that signed the broker's certificate",
                        client: "give --tls-cert the client certificate and --tls-key its private key, both PEM",
                    },
                )?),
            )));
        }
        Ok(options)
    }
}

/// The connection's state, for the page, the JSON and the metrics.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct LinkState {
    /// Connected and subscribed.
    pub connected: bool,
    /// When the present state (connected, or unreachable) began, UTC ms;
    /// `None` before the first attempt ended.
    pub since_ms: Option<i64>,
    /// Why the broker is unreachable, or refused a subscription: what,
    /// where, and how to fix it.
    pub error: Option<String>,
    /// Connections made, the first included.
    pub connections: u64,
}

/// The connection's state, shared.
#[derive(Debug, Default)]
pub struct Link(Mutex<LinkState>);

impl Link {
    pub fn snapshot(&self) -> LinkState {
        self.0
            .lock()
            .unwrap_or_else(PoisonError::into_inner)
            .clone()
    }

    pub(crate) fn update(&self, f: impl FnOnce(&mut LinkState)) {
        f(&mut self.0.lock().unwrap_or_else(PoisonError::into_inner));
    }
}

/// Connects, subscribes and feeds the board until `cancel` fires,
/// reconnecting after every failure (waits of [`RETRY_FIRST`] doubling to
/// [`RETRY_AT_MOST`]).
pub async fn run(
    broker: Broker,
    options: MqttOptions,
    board: Arc<Mutex<Board>>,
    link: Arc<Link>,
    cancel: CancellationToken,
) {
    let (client, mut events): (AsyncClient, EventLoop) = AsyncClient::new(options, 64);
    let mut wait = RETRY_FIRST;
    let mut problems: u64 = 0;
    let mut failing_since: Option<i64> = None;
    let mut last_said: Option<String> = None;
    loop {
        let polled = tokio::select! {
            () = cancel.cancelled() => break,
            polled = events.poll() => polled,
        };
        match polled {
            Ok(Event::Incoming(Packet::ConnAck(_))) => {
                let filters = topics::filters(&broker.prefix)
                    .into_iter()
                    .map(|f| SubscribeFilter::new(f, QoS::AtLeastOnce));
                if let Err(e) = client.try_subscribe_many(filters) {
                    warn!("fleet: cannot ask the broker for the sites' topics: {e}");
                }
            }
            Ok(Event::Incoming(Packet::SubAck(ack))) => {
                wait = RETRY_FIRST;
                let refused = ack
                    .return_codes
                    .iter()
                    .filter(|c| matches!(c, SubscribeReasonCode::Failure))
                    .count();
                let now = crate::store::now_ms();
                if refused > 0 {
                    let who = broker
                        .username
                        .as_deref()
                        .map_or("this client".to_owned(), |u| format!("user {u:?}"));
                    let why = format!(
                        "the broker at {at} refused {refused} of the view's 3 subscriptions (under {prefix}/); give {who} read access to {prefix}/# in the broker's access list",
                        at = broker.address(),
                        prefix = broker.prefix,
                    );
                    warn!("fleet: {why}");
                    link.update(|l| l.error = Some(why));
                } else {
                    last_said = None;
                    let was_down = failing_since.take();
                    let connections = link.snapshot().connections + 1;
                    info!(
                        "fleet: subscribed to {} at {}{}",
                        crate::fleet::topics::filters(&broker.prefix).join(", "),
                        broker.address(),
                        was_down.map_or(String::new(), |since| format!(
                            " (unreachable since {})",
                            crate::report::rfc3339(since)
                        ))
                    );
                    link.update(|l| {
                        *l = LinkState {
                            connected: true,
                            since_ms: Some(now),
                            error: None,
                            connections,
                        }
                    });
                }
            }
            Ok(Event::Incoming(Packet::Publish(message))) => {
                let now = crate::store::now_ms();
                let outcome = board.lock().unwrap_or_else(PoisonError::into_inner).ingest(
                    &message.topic,
                    &message.payload,
                    message.retain,
                    now,
                );
                let why = match outcome {
                    Outcome::Malformed(why) => format!("ignored: {why}"),
                    Outcome::OverCapacity(why) => format!("not shown: {why}"),
                    Outcome::UnknownTopic => {
                        "ignored: a topic the view does not read (README, \"Fleet view\")".into()
                    }
                    _ => continue,
                };
                problems += 1;
                if problems <= PROBLEMS_LOGGED || problems.is_power_of_two() {
                    warn!(
                        "fleet: a message on {} {} ({problems} such so far{})",
                        crate::logging::one_line(&message.topic),
                        crate::logging::one_line(&why),
                        if problems == PROBLEMS_LOGGED {
                            "; from now on only every power of two is logged"
                        } else {
                            ""
                        }
                    );
                }
            }
            Ok(_) => {}
            Err(e) => {
                let now = crate::store::now_ms();
                let why = explain(&broker, &e);
                if failing_since.is_none() {
                    failing_since = Some(now);
                }
                // Once per outage, and again whenever the reason changes
                // (the broker stopped, then refuses connections).
                if last_said.as_deref() != Some(why.as_str()) {
                    warn!(
                        "fleet: {why}; retrying every {} s at most",
                        RETRY_AT_MOST.as_secs()
                    );
                    last_said = Some(why.clone());
                }
                let since = failing_since;
                link.update(|l| {
                    l.connected = false;
                    l.since_ms = since;
                    l.error = Some(why);
                });
                tokio::select! {
                    () = cancel.cancelled() => break,
                    () = tokio::time::sleep(wait) => {}
                }
                wait = (wait * 2).min(RETRY_AT_MOST);
            }
        }
    }
    let _ = client.try_disconnect();
}

/// A connection failure said for people: what, where, how to fix it.
pub fn explain(broker: &Broker, e: &ConnectionError) -> String {
    let at = broker.address();
    match e {
        ConnectionError::ConnectionRefused(code) => match code {
            // Mosquitto 2 answers a wrong password with "not authorised";
            // other brokers with "bad user name or password".
            ConnectReturnCode::BadUserNamePassword | ConnectReturnCode::NotAuthorized => format!(
                "the broker at {at} refused the credentials ({}): check --username ({}) and the password in --password-file ({}), and that the broker lets that user connect",
                if *code == ConnectReturnCode::NotAuthorized {
                    "not authorised"
                } else {
                    "bad user name or password"
                },
                broker.username.as_deref().unwrap_or("none given"),
                broker
                    .password
                    .as_ref()
                    .map_or("none given".to_owned(), |(_, f)| f.display().to_string())
            ),
            ConnectReturnCode::BadClientId => format!(
                "the broker at {at} refused the client id {:?}; choose another with --client-id",
                broker.client_id
            ),
            ConnectReturnCode::RefusedProtocolVersion => {
                format!("the broker at {at} does not speak MQTT 3.1.1, which the view uses")
            }
            other => {
                format!("the broker at {at} refused the connection ({other:?}); try again later")
            }
        },
        ConnectionError::Io(io) if io.kind() == std::io::ErrorKind::ConnectionRefused => format!(
            "the broker at {at} is unreachable: nothing accepts connections there (connection refused); check --mqtt and that the broker runs"
        ),
        ConnectionError::Io(io) => format!(
            "the broker at {at} is unreachable: {io}; check --mqtt, the network and any firewall"
        ),
        ConnectionError::MqttState(StateError::ConnectionAborted | StateError::Io(_)) => format!(
            "the broker at {at} closed the connection (it stopped or restarted, or dropped this client: is another client using --client-id {:?}?)",
            broker.client_id
        ),
        ConnectionError::NetworkTimeout => format!(
            "the broker at {at} did not answer in time; check --mqtt, the network and any firewall"
        ),
        ConnectionError::Tls(tls) => format!(
            "TLS with the broker at {at} failed: {tls}; check that --tls-ca ({}) holds the CA that signed the broker's certificate, and that the certificate names {}",
            broker
                .tls_ca
                .as_ref()
                .map_or(String::new(), |p| p.display().to_string()),
            broker.host
        ),
        other => format!("the connection to the broker at {at} failed: {other}"),
    }
}

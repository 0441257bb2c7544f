//! The MQTT publisher (issue 18): sends the outbox to the site's broker,
//! in order, and deletes what the broker acknowledged.
//!
//! The tracker puts every message in the outbox (`store::outbox`) in the
//! same unit of work as what it reports; this task only reads the outbox,
//! oldest first, publishes each message under its topic (`topics`), and
//! deletes it once the broker's PUBACK for it has come (PUBCOMP at QoS 2;
//! at QoS 0, once it is written to the socket). While the broker is out of reach nothing is
//! deleted, and at every new connection the outbox is sent again from its
//! oldest message: what waits goes out in the order it was made, so a
//! retained document is never replaced by an older one. A message sent
//! but not acknowledged before a connection dropped may arrive twice;
//! each carries its event, revision and sample time to dedupe by (QoS 1
//! is "at least once").
//!
//! On connecting the agent publishes its state message, `online`
//! (retained), to its state topic; the last will publishes `offline` there
//! when the connection is lost without a goodbye (a killed daemon, a cut
//! network), and a daemon that stops says `offline` itself.
//!
//! The connection: rumqttc's event loop runs in a task of its own and
//! hands its events over a channel (its `poll` is not to be cancelled
//! part way, and this loop waits on other things too). Each connection
//! attempt is a fresh client, so the library never resends anything of
//! its own: only the outbox is the record of what is unsent.
//!
//! Left out: what goes in the outbox (`tracker`), the topics' design
//! (`topics`), the options and TLS (`connect`).

pub mod connect;
pub mod tls;
pub mod topics;

use crate::config::mqtt::Mqtt;
use crate::store::outbox::OutboxState;
use crate::store::{Lane, Store, StoreResult};
use rumqttc::{AsyncClient, ConnectReturnCode, Event, Outgoing, Packet, QoS};
use std::collections::VecDeque;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::{Notify, mpsc};
use tokio_util::sync::CancellationToken;
use tracing::{debug, info, warn};

/// Messages sent and not yet acknowledged, at most: under rumqttc's own
/// in-flight limit (100) and its request channel ([`REQUESTS`]), so a
/// publish never waits inside the library.
pub const WINDOW: usize = 64;
/// rumqttc's request channel.
const REQUESTS: usize = 2 * WINDOW;
/// Acknowledged messages are deleted in one unit when this many are, or
/// after [`DELETE_EVERY`].
const DELETE_BATCH: usize = 256;
const DELETE_EVERY: Duration = Duration::from_millis(200);
/// The outbox is looked at this often when nothing rings (and its depth
/// refreshed for the page).
const LOOK_EVERY: Duration = Duration::from_secs(1);
/// Reconnection waits from this, doubling, up to [`RETRY_MAX`].
const RETRY_FIRST: Duration = Duration::from_millis(500);
const RETRY_MAX: Duration = Duration::from_secs(5);
/// How long a stopping daemon waits for the broker to take `offline` (and
/// what is in flight).
const GOODBYE_WITHIN: Duration = Duration::from_secs(2);
/// Failed attempts between repeated warnings (about a minute at 5 s).
const WARN_EVERY_ATTEMPTS: u64 = 12;

/// The publisher's handle on the daemon.
pub struct Publisher {
    pub mqtt: Mqtt,
    pub store: Arc<Store>,
    pub state: Arc<OutboxState>,
    /// Rung by the daemon after each commit: the outbox may hold more.
    pub bell: Arc<Notify>,
}

/// How a connection ended.
enum Ended {
    Stopped,
    Lost(String),
}

impl Publisher {
    /// Publishes until `stop`, reconnecting as long as it takes.
    pub async fn run(self, stop: CancellationToken) {
        let mut wait = RETRY_FIRST;
        let mut attempts = 0u64;
        self.refresh_depth().await;
        loop {
            let at_ms = crate::store::now_ms();
            let ended = match connect::options(&self.mqtt, at_ms) {
                Ok(options) => self.session(options, at_ms, &stop, &mut wait).await,
                Err(e) => Ended::Lost(format!("{e:#}")),
            };
            self.state.set_connected(false);
            let why = match ended {
                Ended::Stopped => return,
                Ended::Lost(why) => why,
            };
            attempts += 1;
            self.state.set_error(crate::store::now_ms(), why.clone());
            let message = format!(
                "MQTT broker {}:{}: {why}; the messages wait in the outbox (retrying every {} s at most)",
                self.mqtt.host,
                self.mqtt.port,
                RETRY_MAX.as_secs()
            );
            if attempts == 1 || attempts.is_multiple_of(WARN_EVERY_ATTEMPTS) {
                warn!("{message}");
            } else {
                debug!("{message}");
            }
            // Waiting, the outbox's depth is still looked at for the page.
            let until = tokio::time::Instant::now() + wait;
            while tokio::time::Instant::now() < until {
                tokio::select! {
                    () = stop.cancelled() => return,
                    () = tokio::time::sleep_until(until.min(tokio::time::Instant::now() + LOOK_EVERY)) => {}
                }
                self.refresh_depth().await;
            }
            wait = (wait * 2).min(RETRY_MAX);
            if wait == RETRY_MAX {
                attempts = attempts.max(1);
            }
        }
    }

    /// One connection: waits for the broker's CONNACK, says `online`, then
    /// sends the outbox from its oldest message, and what comes after, until
    /// the connection is lost or the daemon stops.
    async fn session(
        &self,
        options: rumqttc::MqttOptions,
        at_ms: i64,
        stop: &CancellationToken,
        wait: &mut Duration,
    ) -> Ended {
        let (client, mut eventloop) = AsyncClient::new(options, REQUESTS);
        let (events_tx, mut events) = mpsc::channel(REQUESTS);
        let driver = tokio::spawn(async move {
            loop {
                let event = eventloop.poll().await;
                let failed = event.is_err();
                if events_tx.send(event).await.is_err() || failed {
                    return;
                }
            }
        });
        let ended = self.converse(&client, &mut events, at_ms, stop, wait).await;
        driver.abort();
        ended
    }

    async fn converse(
        &self,
        client: &AsyncClient,
        events: &mut mpsc::Receiver<Result<Event, rumqttc::ConnectionError>>,
        at_ms: i64,
        stop: &CancellationToken,
        wait: &mut Duration,
    ) -> Ended {
        // The CONNACK.
        loop {
            let event = tokio::select! {
                () = stop.cancelled() => return Ended::Stopped,
                event = events.recv() => event,
            };
            match event {
                Some(Ok(Event::Incoming(Packet::ConnAck(ack)))) => {
                    if ack.code == ConnectReturnCode::Success {
                        break;
                    }
                    return Ended::Lost(format!(
                        "the broker refused the connection: {:?}",
                        ack.code
                    ));
                }
                Some(Ok(_)) => {}
                Some(Err(e)) => return Ended::Lost(describe(&e)),
                None => return Ended::Lost("the connection ended".into()),
            }
        }
        *wait = RETRY_FIRST;
        self.state.set_connected(true);
        info!(
            "connected to the MQTT broker {}:{} as {}, publishing under {}/{}/#",
            self.mqtt.host,
            self.mqtt.port,
            self.mqtt.client_id,
            self.mqtt.topic_prefix,
            self.mqtt.site_id
        );
        let qos = connect::qos(&self.mqtt);
        let mut flight = Flight::default();
        if client
            .try_publish(
                topics::state(&self.mqtt),
                qos,
                true,
                topics::state_payload(&self.mqtt, true, at_ms),
            )
            .is_err()
        {
            return Ended::Lost("the client's request queue refused a message".into());
        }
        flight.sent.push_back(Slot::new(None));
        // The last message of the outbox handed to the client.
        let mut cursor = 0i64;
        // Whether the outbox had nothing after `cursor` at the last look.
        let mut drained = false;
        let mut last_delete = tokio::time::Instant::now();
        let mut look = tokio::time::interval(LOOK_EVERY);
        look.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            if !drained && flight.sent.len() < WINDOW {
                let room = WINDOW - flight.sent.len();
                let next = self.store.read(move |r| r.outbox_next(cursor, room)).await;
                let next = match next {
                    Ok(next) => next,
                    Err(e) => return Ended::Lost(format!("reading the outbox: {e}")),
                };
                drained = next.len() < room;
                for queued in next {
                    let (topic, retain) = topics::of(&self.mqtt, &queued.message);
                    if client
                        .try_publish(topic, qos, retain, queued.message.payload)
                        .is_err()
                    {
                        return Ended::Lost("the client's request queue refused a message".into());
                    }
                    cursor = queued.seq;
                    flight.sent.push_back(Slot::new(Some(queued.seq)));
                }
            }
            if !flight.acked.is_empty()
                && (flight.acked.len() >= DELETE_BATCH || last_delete.elapsed() >= DELETE_EVERY)
            {
                last_delete = tokio::time::Instant::now();
                if let Err(e) = self.delete(&mut flight.acked).await {
                    warn!("deleting sent messages from the outbox: {e}");
                }
            }
            let busy = !drained && flight.sent.len() < WINDOW;
            tokio::select! {
                biased;
                () = stop.cancelled() => {
                    self.goodbye(client, events, &mut flight, qos).await;
                    return Ended::Stopped;
                }
                event = events.recv() => match event {
                    Some(Ok(event)) => flight.on(&event, qos),
                    Some(Err(e)) => {
                        let _ = self.delete(&mut flight.acked).await;
                        return Ended::Lost(describe(&e));
                    }
                    None => return Ended::Lost("the connection ended".into()),
                },
                () = self.bell.notified(), if drained => drained = false,
                _ = look.tick() => {
                    drained = false;
                    self.refresh_depth().await;
                }
                // Room in the window and more to send: go round at once.
                () = std::future::ready(()), if busy => {}
                () = tokio::time::sleep(DELETE_EVERY), if !flight.acked.is_empty() => {}
            }
        }
    }

    /// Says `offline` and waits a moment for what is in flight.
    async fn goodbye(
        &self,
        client: &AsyncClient,
        events: &mut mpsc::Receiver<Result<Event, rumqttc::ConnectionError>>,
        flight: &mut Flight,
        qos: QoS,
    ) {
        if client
            .try_publish(
                topics::state(&self.mqtt),
                qos,
                true,
                topics::state_payload(&self.mqtt, false, crate::store::now_ms()),
            )
            .is_ok()
        {
            flight.sent.push_back(Slot::new(None));
        }
        let until = tokio::time::Instant::now() + GOODBYE_WITHIN;
        while !flight.sent.is_empty() {
            match tokio::time::timeout_at(until, events.recv()).await {
                Ok(Some(Ok(event))) => flight.on(&event, qos),
                _ => break,
            }
        }
        let _ = self.delete(&mut flight.acked).await;
        let _ = client.try_disconnect();
        let _ = tokio::time::timeout_at(until, async {
            while let Some(Ok(event)) = events.recv().await {
                if matches!(event, Event::Outgoing(Outgoing::Disconnect)) {
                    return;
                }
            }
        })
        .await;
        info!("said offline to the MQTT broker");
    }

    /// Deletes the acknowledged messages, and counts them sent.
    async fn delete(&self, acked: &mut Vec<i64>) -> StoreResult<()> {
        if acked.is_empty() {
            return Ok(());
        }
        let seqs = std::mem::take(acked);
        let n = seqs.len() as u64;
        // Lax: a deletion lost to a power cut only sends a message again.
        let (depth, oldest) = self
            .store
            .write_lax(Lane::Background, move |tx| {
                tx.outbox_delete(&seqs)?;
                tx.outbox_depth()
            })
            .await?;
        self.state.add_sent(n, crate::store::now_ms());
        self.state.set_depth(depth, oldest);
        Ok(())
    }

    async fn refresh_depth(&self) {
        if let Ok((depth, oldest)) = self.store.read(|r| r.outbox_depth()).await {
            self.state.set_depth(depth, oldest);
        }
    }
}

/// What one connection has sent and what came back.
#[derive(Default)]
struct Flight {
    /// In the order handed to the client; the packet id once it is known.
    sent: VecDeque<Slot>,
    /// Outbox messages acknowledged, to delete.
    acked: Vec<i64>,
}

struct Slot {
    /// The outbox message, or `None` for the state topic's.
    seq: Option<i64>,
    pkid: Option<u16>,
    acked: bool,
}

impl Slot {
    fn new(seq: Option<i64>) -> Self {
        Self {
            seq,
            pkid: None,
            acked: false,
        }
    }
}

impl Flight {
    fn on(&mut self, event: &Event, qos: QoS) {
        match event {
            // The client writes publishes in the order they were handed
            // to it, so the first without a packet id is this one.
            Event::Outgoing(Outgoing::Publish(pkid)) => {
                if let Some(slot) = self.sent.iter_mut().find(|s| s.pkid.is_none()) {
                    slot.pkid = Some(*pkid);
                    if qos == QoS::AtMostOnce {
                        slot.acked = true;
                    }
                }
            }
            // QoS 1's PUBACK, or QoS 2's PUBCOMP (the end of its exchange).
            Event::Incoming(Packet::PubAck(rumqttc::PubAck { pkid }))
            | Event::Incoming(Packet::PubComp(rumqttc::PubComp { pkid })) => {
                if let Some(slot) = self
                    .sent
                    .iter_mut()
                    .find(|s| s.pkid == Some(*pkid) && !s.acked)
                {
                    slot.acked = true;
                }
            }
            _ => return,
        }
        while self.sent.front().is_some_and(|s| s.acked) {
            if let Some(Slot { seq: Some(seq), .. }) = self.sent.pop_front() {
                self.acked.push(seq);
            }
        }
    }
}

/// A connection error in words, with the fix where there is one.
fn describe(e: &rumqttc::ConnectionError) -> String {
    use rumqttc::ConnectionError as E;
    match e {
        E::ConnectionRefused(code) => match code {
            ConnectReturnCode::BadUserNamePassword | ConnectReturnCode::NotAuthorized => format!(
                "the broker refused the connection ({code:?}): check [mqtt] username and password_file, and the broker's access list"
            ),
            _ => format!("the broker refused the connection ({code:?})"),
        },
        E::Io(io) => format!("cannot reach the broker: {io}"),
        E::Tls(tls) => format!("TLS: {tls} (check [mqtt] ca_file and the broker's certificate)"),
        other => other.to_string(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rumqttc::PubAck;

    /// Acknowledgements free the outbox's messages in the order sent, the
    /// state topic's own message taking its place without a row; one acked
    /// out of turn waits for those before it.
    #[test]
    fn acknowledged_messages_are_freed_in_order() {
        let mut flight = Flight::default();
        flight.sent.push_back(Slot::new(None));
        for seq in [10, 11, 12] {
            flight.sent.push_back(Slot::new(Some(seq)));
        }
        let qos = QoS::AtLeastOnce;
        for pkid in 1..=4 {
            flight.on(&Event::Outgoing(Outgoing::Publish(pkid)), qos);
        }
        let ack = |pkid| Event::Incoming(Packet::PubAck(PubAck::new(pkid)));
        flight.on(&ack(3), qos);
        assert!(flight.acked.is_empty(), "11 waits for the state and 10");
        flight.on(&ack(1), qos);
        flight.on(&ack(2), qos);
        assert_eq!(flight.acked, [10, 11]);
        flight.on(&ack(4), qos);
        assert_eq!(flight.acked, [10, 11, 12]);
        assert!(flight.sent.is_empty());
    }

    #[test]
    fn at_qos_0_a_message_written_is_done() {
        let mut flight = Flight::default();
        flight.sent.push_back(Slot::new(Some(5)));
        flight.on(&Event::Outgoing(Outgoing::Publish(0)), QoS::AtMostOnce);
        assert_eq!(flight.acked, [5]);
    }
}

//! The top of the live part: when the figures are from, the caution, an
//! alarm when the figures are not being updated (the database takes no
//! writes, or the daemon is not running), and how many events are open.
//!
//! Left out: the events themselves (`event.rs`) and any figure.

use crate::report::Presentation;
use crate::status::StatusDocument;
use crate::store::health::HealthSnapshot;
use crate::store::outbox::OutboxSnapshot;
use crate::web::html::{Html, markup};
use std::fmt::Write as _;

/// The top of `<main>`: when the figures are from, the caution, the
/// daemon's state, and how many events are open.
pub(super) fn top(doc: &StatusDocument, store: &HealthSnapshot) -> Html {
    let people = &doc.presentation;
    let mut top = markup!(
        r#"<p class="stamp">Figures as of <time data-field="generated-at" datetime="{machine}">{at}</time> · times in <span data-field="time-zone">{zone}</span> · refreshed every 5 s</p>
<aside class="caution" role="note" data-field="caution"><strong>Caution</strong> {caution}</aside>
"#,
        machine = doc.generated_at,
        at = people.time(doc.generated_at_ms),
        zone = people.zone_text(doc.generated_at_ms),
        caution = doc.caution.strip_prefix("CAUTION: ").unwrap_or(doc.caution),
    );
    top.push(daemon_state(doc, store));
    top.push(summary(doc.events.len()));
    top
}

/// An alarm when the figures are not being updated: the database takes no
/// writes, or the daemon is not running. Nothing while all is well.
fn daemon_state(doc: &StatusDocument, store: &HealthSnapshot) -> Html {
    if let Some((since, why)) = store.failing {
        let mut text = format!(
            "The database has taken none of the agent's writes since {}: {}. {} poll cycles ({} samples) wait in the agent's memory and will be stored when it does; the figures below stop at that time.",
            doc.presentation.time(since),
            why.describe(),
            store.held_cycles,
            store.held_samples
        );
        if store.dropped_samples > 0 {
            let _ = write!(
                text,
                " To bound memory, {} samples of tanks with no open event were given up; every event sample is kept.",
                store.dropped_samples
            );
        }
        markup!(
            r#"<p class="alarm" role="alert" data-field="store">{text}</p>
"#,
            text = text
        )
    } else if !doc.daemon_running {
        // (While writes fail the heartbeat is stale too, but this page is
        // served by the daemon itself, so the message above is the true one.)
        markup!(
            r#"<p class="alarm" role="alert">The agent's daemon is not running (last seen {seen}); these figures are not being updated.</p>
"#,
            seen = doc
                .daemon_last_seen_ms
                .map_or("never".to_owned(), |ms| doc.presentation.time(ms))
        )
    } else {
        Html::new()
    }
}

/// The MQTT broker: whether the agent reaches it, and what waits to be
/// sent; said plainly, an alarm only while the broker cannot be reached.
pub(super) fn outbox(broker: &str, outbox: &OutboxSnapshot, people: &Presentation) -> Html {
    let since = outbox
        .oldest_ms
        .map(|ms| format!(" (the oldest from {})", people.time(ms)))
        .unwrap_or_default();
    let waiting = match outbox.depth {
        0 => "nothing waits to be sent".to_owned(),
        1 => format!("1 message{since} waits to be sent"),
        n => format!("{n} messages{since} wait to be sent"),
    };
    let mut text = if outbox.connected {
        format!("Events are sent to the broker {broker}: connected, {waiting}.")
    } else {
        let since = outbox
            .down_since_ms
            .map(|ms| format!(" since {}", people.time(ms)))
            .unwrap_or_default();
        let why = outbox
            .last_error
            .as_deref()
            .map(|w| format!(" ({w})"))
            .unwrap_or_default();
        format!(
            "The broker {broker} cannot be reached{since}{why}. The agent goes on estimating; {waiting}, kept in the database and sent in order when the broker is back."
        )
    };
    if outbox.dropped > 0 {
        let _ = write!(
            text,
            " The outbox is full: {} older messages were given up (readings first, then status documents a newer one replaces).",
            outbox.dropped
        );
    }
    let class = if outbox.connected { "stamp" } else { "alarm" };
    markup!(
        r#"<p class="{class}" data-field="outbox">{text}</p>
"#,
        class = class,
        text = text
    )
}

/// How many events are open, or how one appears when none is.
fn summary(open: usize) -> Html {
    let text = match open {
        0 => markup!(
            "No open leak events. Events appear here as soon as an operator flags a leak (`leaktally leak open`) or the control system raises a tank's leak flag."
        ),
        1 => markup!("1 open leak event"),
        n => markup!("{n} open leak events, newest first", n = n),
    };
    markup!(
        r#"<p class="summary" data-field="open-events">{text}</p>
"#,
        text = text
    )
}

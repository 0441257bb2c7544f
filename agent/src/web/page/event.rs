//! One event's card: the section with its head (tank, what it holds, since
//! when), the alarms that say its figures are not current (not tracked, no
//! sample yet, no new sample), the headline tiles, the parameters, and the
//! sections of its estimate and notes in order.
//!
//! Left out: the sections' own markup, in `figures.rs`, `trend.rs`,
//! `details.rs` and `notes.rs`.

use super::{EventExtras, details, figures, notes, span, trend};
use crate::report::{self, Presentation};
use crate::status::EventStatus;
use crate::web::html::{Html, markup};

/// One event's card: its head, why its figures may not be current, the
/// headline figures with the reportable quantities, the parameters, the
/// chart, how the figures are made, and the operators' notes.
pub(super) fn card(
    e: &EventStatus,
    extras: &EventExtras,
    people: &Presentation,
    now_ms: i64,
    stale_after_ms: i64,
) -> Html {
    let id = e.event;
    let at_ms = e.estimate.as_ref().map_or(Html::new(), |est| {
        markup!(r#" data-estimate-at-ms="{at}""#, at = est.at_ms)
    });
    let mut card = markup!(
        r#"<section class="event" id="event-{id}" data-event="{id}" data-tank="{tank}"{at_ms}>
"#,
        id = id,
        tank = e.tank,
        at_ms = at_ms,
    );
    card.push(head(e, extras, people, now_ms));
    if let Some(why) = &e.tracking_error {
        markup!(
            &mut card,
            r#"<p class="alarm" role="alert" data-field="not-tracked" data-event="{id}">Not tracked: {why}. These figures are not being updated.</p>
"#,
            id = id,
            why = why
        );
    }
    match &e.estimate {
        None => markup!(
            &mut card,
            r#"<p class="waiting" data-field="no-estimate" data-event="{id}">No usable sample yet: the first figures appear with the tank's next good level reading.</p>
"#,
            id = id
        ),
        Some(est) => {
            let age = now_ms - est.at_ms;
            if age > stale_after_ms {
                markup!(
                    &mut card,
                    r#"<p class="alarm" role="alert" data-field="stale" data-event="{id}">No new sample for {age}: these figures are from {at} and are not current. Check the link to the tank's device.</p>
"#,
                    id = id,
                    age = span(age),
                    at = people.time(est.at_ms)
                );
            }
            card.push(figures::figures(id, est, people, now_ms));
            card.push(params(e));
            card.push(trend::trend(id, e.start_ms, est, &extras.series, people));
            card.push(details::details(id, est, people, age));
        }
    }
    if e.estimate.is_none() {
        card.push(params(e));
    }
    card.push(notes::panel(id, &extras.notes, people));
    markup!(&mut card, "</section>\n");
    card
}

/// The parameters the figures rest on, after the headline figures (on a
/// phone they would push those below the fold).
fn params(e: &EventStatus) -> Html {
    markup!(
        r#"<p class="params">Parameters: {params}</p>
"#,
        params = e.params_text
    )
}

/// The tank, what it holds, and when the leak started.
fn head(e: &EventStatus, extras: &EventExtras, people: &Presentation, now_ms: i64) -> Html {
    let id = e.event;
    let what: Vec<&str> = [extras.description.as_str(), extras.substance.as_str()]
        .into_iter()
        .filter(|t| !t.is_empty())
        .collect();
    let what = if what.is_empty() {
        Html::new()
    } else {
        markup!(
            r#" <span class="what">{what}</span>"#,
            what = what.join(" · ")
        )
    };
    markup!(
        r#"<header class="event-head">
<h2><span data-field="tank" data-event="{id}">{tank}</span>{what}</h2>
<p class="meta">Event <span data-field="event" data-event="{id}">{id}</span> · leaking since <time data-field="since" data-event="{id}" datetime="{machine}">{since}</time> ({ago} ago) · flagged by {source} · revision {revision}</p>
</header>
"#,
        id = id,
        tank = e.tank,
        what = what,
        machine = report::rfc3339(e.start_ms),
        since = people.time(e.start_ms),
        ago = span(now_ms - e.start_ms),
        source = e.source,
        revision = e.revision,
    )
}

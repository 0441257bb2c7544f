//! The events closed lately, after the open ones: each with its final
//! total and band, when it started and ended in the site's time, and how
//! long it ran, so that a closed event does not vanish from the page without
//! its final figures. The list comes from `crate::status::history`, the
//! same as `leaktally events` and `/api/events`.
//!
//! Left out: the closed event's full figures (`/api/events/ID`, or
//! `leaktally status ID`).

use crate::model::{Mass, TimeSpan};
use crate::report::{self, Presentation};
use crate::status::history::EventSummary;
use crate::web::html::{Html, markup};

/// The list of closed events; a line saying there are none when the
/// history holds none in the window.
pub(super) fn list(closed: &[EventSummary], people: &Presentation) -> Html {
    let mut out = markup!(
        r#"<section class="closed" data-field="closed-events">
<h2>Closed in the last 7 days</h2>
"#
    );
    if closed.is_empty() {
        markup!(
            &mut out,
            "<p class=\"fine\">None. An event appears here, with its final figures, once it is closed.</p>\n"
        );
    } else {
        markup!(&mut out, "<ol>\n");
        out.extend(closed.iter().map(|e| line(e, people)));
        markup!(&mut out, "</ol>\n");
    }
    markup!(&mut out, "</section>\n");
    out
}

/// One closed event: tank, final total with band, start, end, duration.
fn line(e: &EventSummary, people: &Presentation) -> Html {
    let id = e.event;
    let time = |ms: i64| {
        markup!(
            r#"<time datetime="{machine}">{text}</time>"#,
            machine = report::rfc3339(ms),
            text = people.time(ms)
        )
    };
    let total = match (e.released_best_kg, e.released_low_kg, e.released_high_kg) {
        (Some(best), Some(low), Some(high)) => markup!(
            r#"<span class="final" data-field="closed-total" data-event="{id}">{best}</span> <span class="band">band {low} to {high}</span>"#,
            id = id,
            best = people.mass(Mass::kilograms(best)),
            low = people.mass(Mass::kilograms(low)),
            high = people.mass(Mass::kilograms(high)),
        ),
        _ => markup!(
            r#"<span class="final" data-field="closed-total" data-event="{id}">no usable sample</span>"#,
            id = id
        ),
    };
    markup!(
        r#"<li data-event="{id}"><p class="closed-head"><span class="tank">{tank}</span> · event {id} · final total {total}</p>
<p class="fine">from {start} to {end} · <span data-field="closed-duration" data-event="{id}">{duration}</span> · revision {revision} · flagged by {source}</p></li>
"#,
        id = id,
        tank = e.tank,
        total = total,
        start = time(e.start_ms),
        end = e.end_ms.map_or(markup!("now"), time),
        duration = report::duration(TimeSpan::seconds(e.duration_s)),
        revision = e.revision,
        source = e.source,
    )
}

//! Suspected losses: an alarm per tank, with no event open, whose level
//! falls faster than its metered transfers explain, beyond the gauge's
//! noise (`crate::loss`): since when, about how much and how fast, and the
//! command that confirms it as an event, back-dated to then.
//!
//! Left out: anything while no alert stands (the page stays as it was),
//! and the watch's statistics (`/metrics` has them).

use crate::loss::Standing;
use crate::model::{Density, Mass, MassRate};
use crate::report::{Presentation, rfc3339};
use crate::web::html::{Html, markup};

/// A standing alert and the density of its tank's contents, to show its
/// volume in the site's units.
pub struct Suspected {
    pub standing: Standing,
    pub density: Density,
}

/// The alarms, most recent start last; nothing when none stands.
pub(super) fn list(losses: &[Suspected], people: &Presentation) -> Html {
    let mut out = Html::default();
    for s in losses {
        let a = &s.standing.suspicion;
        let tank = s.standing.tank.as_str();
        let rho = s.density.si();
        let volume = people.volume(Mass::from_si(a.volume_m3.max(0.0) * rho), s.density);
        let rate = people.rate(MassRate::from_si(a.rate_m3_s.max(0.0) * rho));
        let since = rfc3339(a.since_ms);
        let command = crate::report::confirm_loss_command(tank, a.since_ms);
        markup!(
            &mut out,
            r#"<section class="alarm" role="alert" data-field="suspected-loss" data-tank="{tank}">
<h2>Suspected loss on {tank}</h2>
<p>With no event open, its level has fallen more than its metered transfers explain, beyond what the gauge's noise allows: about {volume} since <time datetime="{since}">{since_text}</time> (about {rate}). Raised at {raised}. This is an alert from an estimate, not a measurement: check the tank.</p>
<p>If it leaks, open an event from then: <code>{command}</code></p>
</section>
"#,
            tank = tank,
            volume = volume,
            since = since.as_str(),
            since_text = people.time(a.since_ms),
            rate = rate,
            raised = people.time(a.raised_ms),
            command = command,
        );
    }
    out
}

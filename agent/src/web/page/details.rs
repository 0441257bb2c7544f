//! How an estimate is made, below its figures: the warnings (the given
//! hole's disagreement with the level first), more on the headline figures
//! (the band in volumes and what makes it, the phase and level, where the
//! forecast stops), the method and why, the level balance, the fitted hole,
//! and the data quality.
//!
//! Left out: the figures themselves (`figures.rs`) and the wording of the
//! warnings and reasons, which is `report::estimate`'s.

use super::span;
use crate::estimate::Warning;
use crate::model::{Density, Mass};
use crate::report::{Presentation, estimate as words};
use crate::status::EstimateView;
use crate::web::html::{Html, markup};

/// How the figure is made, after any warning the operator must see, and
/// the data quality.
pub(super) fn details(id: i64, est: &EstimateView, people: &Presentation, age_ms: i64) -> Html {
    let mut out = markup!("<div class=\"details\">\n");
    out.push(warnings(id, est));
    out.push(more(id, est, people));
    out.push(basis(id, est, people));
    out.push(quality(id, est, people, age_ms));
    markup!(&mut out, "</div>\n");
    out
}

/// The given hole's disagreement with the level first, then the other
/// warnings.
pub(crate) fn warnings(id: i64, est: &EstimateView) -> Html {
    let mut out = est.consistency.as_ref().map_or(Html::new(), |warning| {
        markup!(
            r#"<p class="caution" data-field="consistency" data-event="{id}"><strong>Check the hole size:</strong> {warning}</p>
"#,
            id = id,
            warning = warning
        )
    });
    let others: Vec<&String> = est
        .warnings
        .iter()
        .zip(&est.words.warnings_text)
        .filter(|(w, _)| *w != Warning::HoleInconsistent)
        .map(|(_, text)| text)
        .collect();
    if !others.is_empty() {
        markup!(
            &mut out,
            r#"<ul class="warnings" data-field="warnings" data-event="{id}">
"#,
            id = id
        );
        out.extend(
            others
                .into_iter()
                .map(|text| markup!("<li>{text}</li>\n", text = text)),
        );
        markup!(&mut out, "</ul>\n");
    }
    out
}

/// More on the headline figures: the band as volumes and what makes it,
/// the density the volumes are at, the phase and level, and the level the
/// forecast stops at.
fn more(id: i64, est: &EstimateView, people: &Presentation) -> Html {
    let rho = Density::kg_per_cubic_metre(est.density_kg_m3);
    let volume = |kg: f64| people.volume(Mass::kilograms(kg), rho);
    let mut out = markup!(
        r#"<div class="panel more">
<h3>About these figures</h3>
<dl>
<dt>Band</dt><dd>{low} to {high}</dd>
<dt>Band from</dt><dd data-field="band-causes" data-event="{id}">{causes}</dd>
<dt>Volumes at</dt><dd>{rho}</dd>
<dt>Flow</dt><dd>{phase} phase, level {level}</dd>
"#,
        low = volume(est.released_low_kg),
        high = volume(est.released_high_kg),
        id = id,
        causes = est.words.band_text,
        rho = format!("{} kg/m³", crate::report::number(est.density_kg_m3)),
        phase = words::phase_text(est),
        level = people.length(est.level_m),
    );
    if let Some(f) = est
        .forecast
        .as_ref()
        .filter(|f| f.stops_after_s.is_finite())
    {
        markup!(
            &mut out,
            "<dt>Flow stops</dt><dd>at level {level}</dd>\n",
            level = people.length(f.stop_level_m)
        );
    }
    markup!(&mut out, "</dl>\n</div>\n");
    out
}

/// How it is estimated: the method and why, the level balance, the hole.
fn basis(id: i64, est: &EstimateView, people: &Presentation) -> Html {
    let mass = |kg: f64| people.mass(Mass::kilograms(kg));
    let mut out = markup!(
        r#"<div class="panel basis">
<h3>How it is estimated</h3>
<dl>
<dt>Best from</dt><dd data-field="method" data-event="{id}">{method}</dd>
<dt>Why</dt><dd>{reason}</dd>
"#,
        id = id,
        method = words::method_name(est.method),
        reason = est.words.method_reason,
    );
    if let Some(inv) = est.inventory_kg {
        markup!(
            &mut out,
            "<dt>Level balance</dt><dd>{inv} ± {band} lost from the tank</dd>\n",
            inv = mass(inv),
            band = mass(est.band.inventory_kg)
        );
    }
    if let Some(text) = &est.words.implied_cd_text {
        markup!(
            &mut out,
            "<dt>Implied Cd</dt><dd>{text}</dd>\n",
            text = text
        );
    }
    markup!(
        &mut out,
        r#"<dt>Fitted hole</dt><dd>{hole}</dd>
<dt>Above the hole</dt><dd>{rem} still in the tank</dd>
</dl>
</div>
"#,
        hole = est.words.fit_status,
        rem = mass(est.remaining_above_hole_kg),
    );
    out
}

/// Data quality: the last sample, samples used and skipped, gaps.
fn quality(id: i64, est: &EstimateView, people: &Presentation, age_ms: i64) -> Html {
    let q = &est.quality;
    let bridged = if q.gaps_bridged == 0 {
        "in the data".to_owned()
    } else {
        format!(
            "bridged by the model ({}, longest {:.0} s)",
            people.mass(Mass::kilograms(q.bridged_kg)),
            q.longest_gap_s
        )
    };
    markup!(
        r#"<div class="panel quality">
<h3>Data quality</h3>
<dl>
<dt>Last sample</dt><dd><time data-field="estimate-at" data-event="{id}" datetime="{machine}">{last}</time> ({age} ago)</dd>
<dt>Samples</dt><dd><span data-field="samples-used" data-event="{id}">{used}</span> used, <span data-field="samples-skipped" data-event="{id}">{skipped}</span> skipped as bad</dd>
<dt>Pressure held</dt><dd>{held} samples on the last good pressure</dd>
<dt>Gaps</dt><dd><span data-field="gaps-bridged" data-event="{id}">{gaps}</span> {bridged}</dd>
</dl>
</div>
"#,
        id = id,
        machine = crate::report::rfc3339(est.at_ms),
        last = people.time(est.at_ms),
        age = span(age_ms),
        used = q.samples_used,
        skipped = q.samples_skipped,
        held = q.pressure_held,
        gaps = q.gaps_bridged,
        bridged = bridged,
    )
}

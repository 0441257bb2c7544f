//! The trend row of a card: the chart of the release so far with its key,
//! and the reportable quantities, each crossed (by the best estimate or the
//! band's high end) or how far off.
//!
//! Left out: drawing the chart, which is `web::chart`'s.

use crate::estimate::Crossing;
use crate::report::{self, estimate as words};
use crate::status::EstimateView;
use crate::web::chart::{self, Point};
use crate::web::html::{Html, markup};

/// The chart, and the reportable quantities beside it.
pub(super) fn trend(id: i64, start_ms: i64, est: &EstimateView, series: &[Point]) -> Html {
    let thresholds: Vec<f64> = est.crossings.iter().map(|c| c.quantity_kg).collect();
    let chart = chart::svg(id, start_ms, series, &thresholds).unwrap_or_else(|| {
        markup!(r#"<p class="fine">The chart appears with the second estimate.</p>"#)
    });
    let mut out = markup!(
        r#"<div class="trend">
<figure class="plot">{chart}<figcaption><span class="key best"></span> best estimate <span class="key band"></span> low to high band <span class="key threshold"></span> reportable quantity</figcaption></figure>
<div class="panel reportable">
<h3>Reportable quantities</h3>
"#,
        chart = chart
    );
    if est.crossings.is_empty() {
        markup!(
            &mut out,
            "<p class=\"fine\">None configured for this tank.</p>\n"
        );
    } else {
        markup!(&mut out, "<ul>\n");
        out.extend(
            est.crossings
                .iter()
                .map(|c| crossing(id, c, est.released_best_kg)),
        );
        markup!(&mut out, "</ul>\n");
    }
    markup!(&mut out, "</div>\n</div>\n");
    out
}

/// One reportable quantity: when the best estimate crossed it, or when
/// the band's high end did, or how far off it is.
fn crossing(id: i64, c: &Crossing, released_kg: f64) -> Html {
    let q = chart::whole(c.quantity_kg);
    if c.at_ms.is_none() && c.high_at_ms.is_none() {
        return markup!(
            r#"<li class="pending" data-field="reportable" data-event="{id}" data-quantity-kg="{qty}"><strong>{q} kg</strong> not reached ({left} kg to go)</li>
"#,
            id = id,
            qty = c.quantity_kg,
            q = q,
            left = report::number((c.quantity_kg - released_kg).max(0.0))
        );
    }
    let crossed = c.at_ms.map_or(Html::new(), |at| {
        markup!(r#" data-crossed-at-ms="{at}""#, at = at)
    });
    let high = c.high_at_ms.map_or(Html::new(), |at| {
        markup!(r#" data-high-at-ms="{at}""#, at = at)
    });
    markup!(
        r#"<li class="crossed" data-field="reportable" data-event="{id}" data-quantity-kg="{qty}"{crossed}{high}><strong>{q} kg</strong> {text}</li>
"#,
        id = id,
        qty = c.quantity_kg,
        crossed = crossed,
        high = high,
        q = q,
        text = words::crossing_text(c, &report::Presentation::default())
    )
}

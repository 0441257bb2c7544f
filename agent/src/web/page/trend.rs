//! The trend row of a card: the chart of the release so far with its key.
//! (The reportable quantities it draws are listed, with when each was
//! crossed, among the headline tiles, `figures.rs`.)
//!
//! Left out: drawing the chart, which is `web::chart`'s.

use crate::report::Presentation;
use crate::status::EstimateView;
use crate::web::chart::{self, Point};
use crate::web::html::{Html, markup};

/// The chart with its key.
pub(super) fn trend(
    id: i64,
    start_ms: i64,
    est: &EstimateView,
    series: &[Point],
    people: &Presentation,
) -> Html {
    let thresholds: Vec<f64> = est.crossings.iter().map(|c| c.quantity_kg).collect();
    let chart = chart::svg(id, start_ms, series, &thresholds, people).unwrap_or_else(|| {
        markup!(r#"<p class="fine">The chart appears with the second estimate.</p>"#)
    });
    markup!(
        r#"<div class="trend">
<figure class="plot">{chart}<figcaption><span class="key best"></span> best estimate <span class="key band"></span> low to high band <span class="key threshold"></span> reportable quantity</figcaption></figure>
</div>
"#,
        chart = chart
    )
}

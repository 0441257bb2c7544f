//! The document around the live part: the head (title, style sheet,
//! refresh script), the masthead with the site's name, the offline notice
//! the refresh script shows, and the footer with the links for machines.
//! (The caution is said once, at the top of the live part: said twice it
//! took a quarter of a phone's screen.)
//!
//! Left out: everything inside `<main>`, which the refresh script swaps.

use crate::web::html::{Html, markup};

/// The document's head and the masthead, up to the live part.
pub(super) fn head(open: usize, site: &str) -> Html {
    let title = match open {
        0 => "No open leaks".to_owned(),
        1 => "1 open leak".to_owned(),
        n => format!("{n} open leaks"),
    };
    markup!(
        r#"<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{title} · {site} · leaktally</title>
<link rel="stylesheet" href="/assets/leaktally.css">
<link rel="icon" href="/assets/icon.svg" type="image/svg+xml">
<script src="/assets/refresh.js" defer></script>
<noscript><meta http-equiv="refresh" content="10"></noscript>
</head>
<body>
<header class="masthead">
<p class="brand">leaktally <span>responder view · read-only</span></p>
<h1 data-field="site">{site}</h1>
</header>
<p id="offline" class="offline" role="alert" hidden>Cannot reach the agent. The figures below are from the time shown and are not updating.</p>
"#,
        title = title,
        site = site,
    )
}

/// The links for machines, closing the document.
pub(super) fn foot() -> Html {
    markup!(
        r#"<footer class="foot">
<p>For machines: <a href="/api/status">/api/status</a> (the document of <code>leaktally status --json</code>), <a href="/api/events">/api/events</a> (every event, open and closed), <code>/api/events/ID</code>, <code>/api/events/ID/series</code>, <a href="/metrics">/metrics</a>. Times there are RFC 3339 UTC and figures SI.</p>
</footer>
</body>
</html>
"#
    )
}

//! Router tests: the page, `/api/fleet` and `/metrics` from a board fed
//! real status documents, with a hostile site id and tank id; the methods
//! and `Host`s refused; the broker's outage on the page.

use super::*;
use crate::fleet::mqtt::LinkState;
use crate::fleet::testing::{HOSTILE_TANK, SiteDb, state};
use axum::body::Body;
use axum::http::{HeaderMap, Request as HttpRequest};
use tower::ServiceExt;

/// A site id that is topic-safe and would still break the page unescaped.
const HOSTILE_SITE: &str = r#"n<b>&'x""#;
const LISTEN: &str = "127.0.0.1:8480";

struct Fixture {
    router: Router,
    link: Arc<Link>,
    site: SiteDb,
}

/// Two sites: `ff` online with one open event, the hostile one offline
/// with a closed event.
fn fixture() -> Fixture {
    let site = SiteDb::new("fleet-http");
    site.store(1, 0..120);
    let open = site.document();
    let other = SiteDb::new("fleet-http-closed");
    other.store(1, 0..60);
    other.close(other.estimates[59].at_ms);
    let closed = other.document();
    let now = crate::store::now_ms();
    let mut board = Board::new("leaktally");
    for (topic, payload) in [
        (
            "leaktally/ff/state".to_owned(),
            // As the agent publishes it; the other site's is the stamped form.
            b"online".to_vec(),
        ),
        ("leaktally/ff/events/1/status".to_owned(), open),
        (
            format!("leaktally/{HOSTILE_SITE}/state"),
            state(HOSTILE_SITE, "offline", now - 60_000),
        ),
        (format!("leaktally/{HOSTILE_SITE}/events/1/summary"), closed),
    ] {
        assert_eq!(
            board.ingest(&topic, &payload, false, now),
            crate::fleet::board::Outcome::Applied,
            "{topic}"
        );
    }
    assert!(matches!(
        board.ingest("leaktally/ff/state", b"not json", false, now),
        crate::fleet::board::Outcome::Malformed(_)
    ));
    let link = Arc::new(Link::default());
    link.update(|l| {
        *l = LinkState {
            connected: true,
            since_ms: Some(now - 1_000),
            error: None,
            connections: 1,
        }
    });
    let shared = Arc::new(Shared::new(
        Arc::new(Mutex::new(board)),
        Arc::clone(&link),
        "broker.example:1883".into(),
        "leaktally".into(),
        60_000,
        LISTEN.parse().unwrap(),
    ));
    Fixture {
        router: router(shared),
        link,
        site,
    }
}

async fn call(
    router: &Router,
    host: Option<&str>,
    method: &str,
    uri: &str,
) -> (StatusCode, HeaderMap, String) {
    let mut request = HttpRequest::builder().method(method).uri(uri);
    if let Some(host) = host {
        request = request.header(header::HOST, host);
    }
    let response = router
        .clone()
        .oneshot(request.body(Body::empty()).unwrap())
        .await
        .unwrap();
    let status = response.status();
    let headers = response.headers().clone();
    let body = axum::body::to_bytes(response.into_body(), 1 << 24)
        .await
        .unwrap();
    (status, headers, String::from_utf8(body.to_vec()).unwrap())
}

async fn get(router: &Router, uri: &str) -> (StatusCode, HeaderMap, String) {
    call(router, Some(LISTEN), "GET", uri).await
}

fn content_type(headers: &HeaderMap) -> &str {
    headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
}

#[tokio::test]
async fn the_json_has_every_site_and_event_with_the_sites_figures() {
    let f = fixture();
    let (status, headers, body) = get(&f.router, "/api/fleet").await;
    assert_eq!(status, StatusCode::OK, "{body}");
    assert_eq!(content_type(&headers), "application/json");
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(doc["format"], 1);
    assert_eq!(doc["caution"], crate::report::CAUTION);
    assert_eq!(doc["broker"]["connected"], true);
    assert_eq!(doc["broker"]["address"], "broker.example:1883");
    let sites = doc["sites"].as_array().unwrap();
    let site = |id: &str| sites.iter().find(|s| s["site"] == id).unwrap();
    assert_eq!(site("ff")["state"], "online");
    assert_eq!(site("ff")["open_events"], 1);
    assert_eq!(site(HOSTILE_SITE)["state"], "offline");
    assert_eq!(site(HOSTILE_SITE)["open_events"], 0);
    let [open] = doc["events"].as_array().unwrap().as_slice() else {
        panic!("{body}")
    };
    let last = &f.site.estimates[119];
    assert_eq!(
        (open["site"].as_str(), open["event"].as_i64()),
        (Some("ff"), Some(1))
    );
    assert_eq!(open["tank"], HOSTILE_TANK);
    assert_eq!(open["state"], "open");
    // Bit for bit the site's figure.
    assert_eq!(
        open["estimate"]["released_best_kg"].as_f64(),
        Some(last.released_best_kg)
    );
    assert_eq!(open["estimate"]["at_ms"].as_i64(), Some(last.at_ms));
    let age = open["data_age_ms"].as_i64().unwrap();
    assert!(age >= crate::store::now_ms() - 1_000 - last.at_ms - 60_000 && age > 0);
    let [closed] = doc["closed"].as_array().unwrap().as_slice() else {
        panic!("{body}")
    };
    assert_eq!(closed["site"], HOSTILE_SITE);
    assert_eq!(closed["state"], "closed");
    assert!(closed["closed_at_ms"].is_i64());
    assert_eq!(doc["messages"]["applied"], 4);
    assert_eq!(doc["messages"]["malformed"], 1);
    assert_eq!(doc["limits"]["sites"], crate::fleet::board::MAX_SITES);
}

#[tokio::test]
async fn the_page_shows_every_site_and_open_event_escaped_with_the_caution() {
    let f = fixture();
    let (status, headers, page) = get(&f.router, "/").await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(content_type(&headers), "text/html; charset=utf-8");
    assert!(headers.contains_key(header::CONTENT_SECURITY_POLICY));
    let caution = crate::report::CAUTION.strip_prefix("CAUTION: ").unwrap();
    assert!(page.contains(crate::web::html::Html::text(caution).as_str()));
    assert!(page.contains("<title>1 open leak · fleet · leaktally</title>"));
    // Nothing from the broker reaches the page unescaped.
    assert!(
        !page.contains("<b>") && !page.contains(HOSTILE_TANK),
        "{page}"
    );
    let site = crate::web::html::Html::text(HOSTILE_SITE).into_string();
    let tank = crate::web::html::Html::text(HOSTILE_TANK).into_string();
    for expected in [
        r#"data-site="ff""#.to_owned(),
        r#"data-field="site-state" data-state="online""#.to_owned(),
        format!(r#"data-site="{site}""#),
        r#"data-field="site-state" data-state="offline""#.to_owned(),
        format!(r#"<section class="event" data-site="ff" data-event="1" data-tank="{tank}">"#),
        r#"data-field="released-best-kg" data-event="1""#.to_owned(),
        r#"data-field="rate-best" data-event="1""#.to_owned(),
        r#"data-field="data-age" data-event="1""#.to_owned(),
        r#"data-field="closed-total""#.to_owned(),
        "1 open leak event".to_owned(),
        r#"<span data-field="malformed">1</span> messages that were not what their topic promises"#
            .to_owned(),
    ] {
        assert!(page.contains(&expected), "{expected} not in:\n{page}");
    }
    // The released total as the site's page would say it (metric, UTC).
    let best = crate::report::Presentation::default().mass(crate::model::Mass::kilograms(
        f.site.estimates[119].released_best_kg,
    ));
    let number = best.split_once(' ').unwrap().0;
    assert!(
        page.contains(&format!(r#"data-unit="kg">{number}</span>"#)),
        "{best} not in:\n{page}"
    );
    assert!(!page.contains("Broker unreachable"));
    // Why the figure is what it is, in the site's words, and the site's
    // warnings beside the figures.
    let est = &f.site.estimates[119];
    let view = crate::status::EstimateView::new(
        est.clone(),
        &SiteDb::params(),
        &crate::report::Presentation::default(),
    );
    let why = crate::web::html::Html::text(&view.words.method_reason).into_string();
    assert!(
        page.contains(&format!("Why: {why}")),
        "{why} not in:
{page}"
    );
    assert!(!view.words.warnings_text.is_empty());
    for warning in &view.words.warnings_text {
        let text = crate::web::html::Html::text(warning).into_string();
        assert!(
            page.contains(&text),
            "{text} not in:
{page}"
        );
    }
    // No stale flag: the data is about two minutes old but the limit is
    // the event's, from the last sample: 125 s - 119 s, under 60 s.
    assert!(!page.contains(r#"data-field="stale""#), "{page}");
}

#[tokio::test]
async fn an_unreachable_broker_is_said_on_the_page_with_the_figures_kept() {
    let f = fixture();
    let since = crate::store::now_ms() - 90_000;
    f.link.update(|l| {
        *l = LinkState {
            connected: false,
            since_ms: Some(since),
            error: Some("the broker at broker.example:1883 is unreachable: nothing accepts connections there (connection refused); check --mqtt and that the broker runs".into()),
            connections: 1,
        }
    });
    let (_, _, page) = get(&f.router, "/").await;
    assert!(page.contains("Broker unreachable since"), "{page}");
    assert!(page.contains(&crate::report::rfc3339(since)), "{page}");
    assert!(page.contains("check --mqtt and that the broker runs"));
    assert!(page.contains(r#"data-field="released-best-kg" data-event="1""#));
    let (_, _, json) = get(&f.router, "/api/fleet").await;
    let doc: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!(doc["broker"]["connected"], false);
    assert_eq!(doc["broker"]["since_ms"].as_i64(), Some(since));
    let (_, _, metrics) = get(&f.router, "/metrics").await;
    assert!(
        metrics.contains("leaktally_fleet_broker_connected 0\n"),
        "{metrics}"
    );
}

#[tokio::test]
async fn metrics_give_each_sites_state_and_each_events_figures() {
    let f = fixture();
    let (status, headers, body) = get(&f.router, "/metrics").await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(content_type(&headers), crate::web::METRICS_CONTENT_TYPE);
    let best = f.site.estimates[119].released_best_kg;
    let tank = r#"T<1>&\"x\""#;
    for expected in [
        "leaktally_fleet_broker_connected 1\n".to_owned(),
        "leaktally_fleet_site_online{site=\"ff\"} 1\n".to_owned(),
        "leaktally_fleet_site_online{site=\"n<b>&'x\\\"\"} 0\n".to_owned(),
        "leaktally_fleet_open_events 1\n".to_owned(),
        format!(
            "leaktally_fleet_released_kg{{site=\"ff\",event=\"1\",tank=\"{tank}\",bound=\"best\"}} {best}\n"
        ),
        "leaktally_fleet_messages_total{outcome=\"applied\"} 4\n".to_owned(),
    ] {
        assert!(body.contains(&expected), "{expected} not in:\n{body}");
    }
}

#[tokio::test]
async fn nothing_can_be_changed_and_foreign_hosts_are_refused() {
    let f = fixture();
    for method in ["POST", "PUT", "DELETE", "PATCH"] {
        for path in ["/", "/api/fleet", "/metrics", "/nowhere"] {
            let (status, headers, _) = call(&f.router, Some(LISTEN), method, path).await;
            assert_eq!(status, StatusCode::METHOD_NOT_ALLOWED, "{method} {path}");
            assert_eq!(headers[header::ALLOW], "GET, HEAD");
        }
    }
    let (status, _, body) = call(&f.router, Some("evil.example:8480"), "GET", "/api/fleet").await;
    assert_eq!(status, StatusCode::MISDIRECTED_REQUEST, "{body}");
    assert!(!body.contains("released"));
    let (status, _, _) = call(&f.router, None, "GET", "/").await;
    assert_eq!(status, StatusCode::BAD_REQUEST);
    let (status, _, _) = call(&f.router, Some("localhost:8480"), "GET", "/").await;
    assert_eq!(status, StatusCode::OK);
    let (status, _, body) = get(&f.router, "/api/status").await;
    assert_eq!(status, StatusCode::NOT_FOUND);
    assert!(body.contains("/api/fleet"));
    for asset in [
        "/assets/leaktally.css",
        "/assets/refresh.js",
        "/assets/icon.svg",
    ] {
        assert_eq!(get(&f.router, asset).await.0, StatusCode::OK, "{asset}");
    }
}

//! Router tests: the routes, methods, content types and escaping, against a
//! real SQLite file with an event whose tank id and notes are hostile.

use super::*;
use crate::acquire::sample::{Reading, TankSample};
use crate::estimate::LeakParams;
use crate::estimator::Estimator;
use crate::store::scratch::ScratchDir as Scratch;
use axum::http::Request as HttpRequest;
use tower::ServiceExt;

/// A tank id and description that would break the page if not escaped.
const HOSTILE_ID: &str = r#"T<1>&"x""#;
const HOSTILE_NOTE: &str = "<script>alert('note')</script>";

const SITE: &str = r#"[site]
name = "Test <site> & co"
[[device]]
id = "d\"1"
address = "127.0.0.1:1502"
[[tank]]
id = "T<1>&\"x\""
description = "<b>bold</b> tank"
device = "d\"1"
geometry = { shape = "vertical_cylinder", diameter_m = 3.0, height_m = 5.0 }
substance = { name = "diesel", density_kg_m3 = 840.0, reportable_kg = [50.0, 5000.0] }
level = { register = "input", address = 0, type = "u16", raw = [4000, 20000], range = [0.0, 5.0], unit = "m" }
"#;

/// A site, a database with one open event of 120 estimates, one event
/// closed two days ago with a final total and one closed eight days ago
/// (older than the page lists), and the router.
fn fixture() -> (Scratch, Router, i64) {
    let (scratch, router, id, _) = fixture_with_health();
    (scratch, router, id)
}

/// As [`fixture`], with the daemon's store health to set.
fn fixture_with_health() -> (Scratch, Router, i64, Arc<StoreHealth>) {
    fixture_with(Arc::default())
}

/// As [`fixture_with_health`], showing the suspected losses of `losses`.
fn fixture_with(losses: Arc<crate::loss::Board>) -> (Scratch, Router, i64, Arc<StoreHealth>) {
    let scratch = Scratch::new("web");
    let config = Arc::new(crate::config::parse(SITE, std::path::Path::new("site.toml")).unwrap());
    let db = scratch.db();
    let conn = store::open_read_write(&db).unwrap();
    store::register_tanks(&conn, [HOSTILE_ID]).unwrap();
    let now = store::now_ms();
    let start = now - 130_000;
    let params = LeakParams {
        hole_diameter_m: Some(0.04),
        hole_height_m: 0.3,
        cd: 0.61,
        density_kg_m3: None,
        ..LeakParams::default()
    };
    let id = store::create_event(&conn, HOSTILE_ID, start, start, "operator", &params).unwrap();
    let mut estimator = Estimator::new(&config.tanks[0], params, start, 1000).unwrap();
    let estimates: Vec<_> = (0..120)
        .filter_map(|i| {
            estimator.push_and_estimate(&TankSample {
                tank: 0,
                tank_id: HOSTILE_ID.into(),
                at_ms: start + 1000 * i,
                level: Reading::good(4.2 - 0.0008 * i as f64),
                pressure: None,
                transfer: None,
                temperature: None,
                leak_flag: None,
            })
        })
        .collect();
    assert_eq!(estimates.len(), 120);
    store::insert_estimates(&conn, id, 1, &estimates).unwrap();
    let day = 86_400_000;
    let recent = store::create_event(
        &conn,
        HOSTILE_ID,
        start - 2 * day,
        start - 2 * day,
        "leak flag",
        &params,
    )
    .unwrap();
    store::insert_estimates(&conn, recent, 1, &estimates[..60]).unwrap();
    store::close_event(&conn, recent, start - 2 * day + 5_400_000).unwrap();
    let old = store::create_event(
        &conn,
        HOSTILE_ID,
        start - 8 * day,
        start - 8 * day,
        "operator",
        &params,
    )
    .unwrap();
    store::close_event(&conn, old, start - 8 * day + 60_000).unwrap();
    let who = ("op".to_owned(), "cr1".to_owned());
    let note = store::request_action(
        &conn,
        "note",
        Some(id),
        &serde_json::json!({"kind": "note", "event": id, "text": HOSTILE_NOTE}),
        &who,
    )
    .unwrap();
    store::finish_action(&conn, note, Some(id), true, "noted").unwrap();
    store::beat(&conn, 1, now, "site.toml").unwrap();
    drop(conn);
    let stats = Arc::new(Stats::new(&config));
    let health = Arc::new(StoreHealth::default());
    let shared =
        Arc::new(Shared::new(db, config, stats, Arc::clone(&health), now).with_losses(losses));
    (scratch, router(shared), id, health)
}

async fn call(router: &Router, method: &str, uri: &str) -> (StatusCode, HeaderMap, String) {
    call_for(router, Some("127.0.0.1:8470"), method, uri).await
}

/// As [`call`], with the `Host` header given (or none).
async fn call_for(
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

use axum::http::HeaderMap;

fn content_type(headers: &HeaderMap) -> &str {
    headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
}

#[tokio::test]
async fn every_method_but_get_and_head_is_refused_on_every_path() {
    let (_scratch, router, id) = fixture();
    let series = format!("/api/events/{id}/series");
    for method in ["POST", "PUT", "DELETE", "PATCH", "OPTIONS", "TRACE"] {
        for path in [
            "/",
            "/api/status",
            series.as_str(),
            "/metrics",
            "/no/such/page",
        ] {
            let (status, headers, body) = call(&router, method, path).await;
            assert_eq!(status, StatusCode::METHOD_NOT_ALLOWED, "{method} {path}");
            assert_eq!(headers.get(header::ALLOW).unwrap(), "GET, HEAD");
            assert!(body.contains("read-only"), "{body}");
        }
    }
    let (status, _, body) = call(&router, "HEAD", "/").await;
    assert_eq!(status, StatusCode::OK);
    assert!(body.is_empty(), "HEAD has no body");
}

#[tokio::test]
async fn unknown_paths_and_events_are_404() {
    let (_scratch, router, _) = fixture();
    for path in ["/nope", "/api", "/api/event", "/index.html"] {
        let (status, headers, _) = call(&router, "GET", path).await;
        assert_eq!(status, StatusCode::NOT_FOUND, "{path}");
        assert!(content_type(&headers).starts_with("text/plain"));
    }
    for path in [
        "/api/events/999",
        "/api/events/abc",
        "/api/events/999/series",
    ] {
        let (status, headers, body) = call(&router, "GET", path).await;
        assert_eq!(status, StatusCode::NOT_FOUND, "{path}");
        assert_eq!(content_type(&headers), "application/json");
        let error: serde_json::Value = serde_json::from_str(&body).unwrap();
        assert!(
            error["error"].as_str().unwrap().contains("no event"),
            "{body}"
        );
    }
}

#[tokio::test]
async fn the_page_escapes_every_text_from_the_site_and_the_operators() {
    let (_scratch, router, id) = fixture();
    let (status, headers, page) = call(&router, "GET", "/").await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(content_type(&headers), "text/html; charset=utf-8");
    let policy = headers.get(header::CONTENT_SECURITY_POLICY).unwrap();
    assert!(policy.to_str().unwrap().contains("script-src 'self'"));
    assert_eq!(headers.get(header::CACHE_CONTROL).unwrap(), "no-store");
    assert_eq!(
        headers.get(header::X_CONTENT_TYPE_OPTIONS).unwrap(),
        "nosniff"
    );

    for raw in [HOSTILE_ID, HOSTILE_NOTE, "<b>bold</b>", "<site>"] {
        assert!(!page.contains(raw), "{raw} unescaped");
    }
    assert!(page.contains("T&lt;1&gt;&amp;&quot;x&quot;"));
    assert!(page.contains("&lt;script&gt;alert(&#39;note&#39;)&lt;/script&gt;"));
    assert!(page.contains("&lt;b&gt;bold&lt;/b&gt; tank"));
    // The only script is the page's own file.
    assert_eq!(page.matches("<script").count(), 1);
    assert!(page.contains(r#"<script src="/assets/refresh.js" defer></script>"#));

    // The figures are there, marked for scripts, with the caution.
    for field in [
        "released-best-kg",
        "released-low-kg",
        "released-high-kg",
        "released-best-volume",
        "rate-best",
        "forecast-stop-at",
        "forecast-total-kg",
    ] {
        assert!(
            page.contains(&format!(r#"data-field="{field}" data-event="{id}""#)),
            "{field}"
        );
    }
    assert_eq!(
        page.matches("estimates for emergency planning, not measurements")
            .count(),
        1,
        "the caution, once"
    );
    assert!(
        page.contains(r#"class="crossed" data-field="reportable""#),
        "50 kg passed"
    );
    assert!(page.contains("<svg class=\"chart\""));
    // Site time (UTC here, the site names no zone) with the zone said.
    assert!(page.contains("times in <span data-field=\"time-zone\">UTC</span>"));
    assert!(page.contains(" UTC</time>"));
    // The event closed two days ago is listed with its final total; the
    // one closed eight days ago is not.
    let closed = page
        .split_once(r#"data-field="closed-events""#)
        .expect("the closed events")
        .1;
    assert_eq!(
        closed.matches(r#"data-field="closed-total""#).count(),
        1,
        "{closed}"
    );
    assert!(closed.contains("1 h 30 min"), "{closed}");
    assert!(
        closed.contains(" kg</span> <span class=\"band\">band "),
        "{closed}"
    );
}

#[tokio::test]
async fn the_event_history_is_served_with_its_format_and_filters() {
    let (_scratch, router, id) = fixture();
    let (status, headers, body) = call(&router, "GET", "/api/events").await;
    assert_eq!(status, StatusCode::OK, "{body}");
    assert_eq!(content_type(&headers), "application/json");
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(doc["format"], status::history::FORMAT);
    let events = doc["events"].as_array().unwrap();
    assert_eq!(events.len(), 3, "{body}");
    let open: Vec<_> = events.iter().filter(|e| e["state"] == "open").collect();
    assert_eq!((open.len(), &open[0]["event"]), (1, &serde_json::json!(id)));
    let closed = events
        .iter()
        .find(|e| e["state"] == "closed" && !e["released_best_kg"].is_null())
        .expect("the closed event with a total");
    assert!(closed["released_best_kg"].as_f64().unwrap() > 0.0);
    assert!(closed["end"].as_str().unwrap().ends_with('Z'), "RFC 3339");

    let (_, _, body) = call(&router, "GET", "/api/events?state=closed&limit=1").await;
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    let events = doc["events"].as_array().unwrap();
    assert_eq!(events.len(), 1);
    assert_eq!(events[0]["state"], "closed");
    let (_, _, body) = call(
        &router,
        "GET",
        "/api/events?tank=T%3C1%3E%26%22x%22&state=open",
    )
    .await;
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(doc["events"].as_array().unwrap().len(), 1, "{body}");
    let (_, _, body) = call(&router, "GET", "/api/events?tank=T2").await;
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(doc["events"].as_array().unwrap().len(), 0, "{body}");

    for bad in ["state=shut", "limit=ten", "tanks=T1", "tank=%zz"] {
        let (status, headers, body) = call(&router, "GET", &format!("/api/events?{bad}")).await;
        assert_eq!(status, StatusCode::BAD_REQUEST, "{bad}: {body}");
        assert_eq!(content_type(&headers), "application/json");
        let error: serde_json::Value = serde_json::from_str(&body).unwrap();
        assert_eq!(error["format"], 1);
        assert!(
            error["error"]
                .as_str()
                .unwrap()
                .contains("/api/events takes"),
            "{body}"
        );
    }
    // The series carries its format too.
    let (_, _, body) = call(&router, "GET", &format!("/api/events/{id}/series")).await;
    let series: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(series["format"], chart::SERIES_FORMAT);
}

#[tokio::test]
async fn the_json_is_the_status_document_and_the_series_is_thin() {
    let (_scratch, router, id) = fixture();
    let (status, headers, body) = call(&router, "GET", "/api/status").await;
    assert_eq!(status, StatusCode::OK);
    assert_eq!(content_type(&headers), "application/json");
    let doc: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(doc["format"], 2);
    assert_eq!(doc["events"][0]["tank"], HOSTILE_ID);
    assert_eq!(doc["events"][0]["event"], id);

    let (status, _, body) = call(&router, "GET", &format!("/api/events/{id}")).await;
    assert_eq!(status, StatusCode::OK);
    let one: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(one["events"].as_array().unwrap().len(), 1);
    assert_eq!(
        one["events"][0]["estimate"], doc["events"][0]["estimate"],
        "the same document either way"
    );

    let (status, _, body) = call(&router, "GET", &format!("/api/events/{id}/series")).await;
    assert_eq!(status, StatusCode::OK);
    let series: serde_json::Value = serde_json::from_str(&body).unwrap();
    let points = series["points"].as_array().unwrap();
    assert_eq!(series["estimates"], 120);
    assert_eq!(points.len(), 120, "under the limit: every point");
    let last = &points[points.len() - 1];
    assert_eq!(
        last["best_kg"],
        doc["events"][0]["estimate"]["released_best_kg"]
    );
    assert!(last["low_kg"].as_f64() <= last["best_kg"].as_f64());
    assert!(last["high_kg"].as_f64() >= last["best_kg"].as_f64());
}

#[tokio::test]
async fn metrics_and_assets_have_their_content_types() {
    let (_scratch, router, id) = fixture();
    let (status, headers, body) = call(&router, "GET", "/metrics").await;
    assert_eq!(status, StatusCode::OK);
    assert!(content_type(&headers).starts_with("text/plain; version=0.0.4"));
    assert!(body.contains("\nleaktally_up 1\n"), "{body}");
    assert!(body.contains("leaktally_poll_successes_total{device=\"d\\\"1\"} 0\n"));
    assert!(body.contains(&format!(
        "leaktally_event_released_kilograms{{event=\"{id}\",tank=\"T<1>&\\\"x\\\"\",estimate=\"best\"}}"
    )));
    assert!(body.contains("leaktally_open_events 1\n"));

    let (_, headers, css) = call(&router, "GET", "/assets/leaktally.css").await;
    assert_eq!(content_type(&headers), "text/css; charset=utf-8");
    assert!(css.contains(".big"));
    let (_, headers, js) = call(&router, "GET", "/assets/refresh.js").await;
    assert_eq!(content_type(&headers), "text/javascript; charset=utf-8");
    assert!(js.contains("fetch("));
}

#[tokio::test]
async fn a_database_that_takes_no_writes_is_shown_on_the_page_and_in_the_metrics() {
    use crate::store::health::WriteFailure;
    let (_scratch, router, _, health) = fixture_with_health();
    let (_, _, page) = call(&router, "GET", "/").await;
    assert!(!page.contains(r#"data-field="store""#));
    let (_, _, metrics) = call(&router, "GET", "/metrics").await;
    assert!(
        metrics.contains("\nleaktally_store_writes_failing 0\n"),
        "{metrics}"
    );

    health.record_failure(1_700_000_000_000, WriteFailure::Full);
    health.set_held(7, 21);
    let (_, _, page) = call(&router, "GET", "/").await;
    assert!(page.contains(r#"data-field="store""#), "{page}");
    assert!(page.contains("since 2023-11-14 22:13:20 UTC: the disk holding the database is full; free space on it. 7 poll cycles (21 samples) wait"), "{page}");
    let (_, _, metrics) = call(&router, "GET", "/metrics").await;
    assert!(
        metrics.contains("\nleaktally_store_writes_failing 1\n"),
        "{metrics}"
    );
    assert!(
        metrics.contains("\nleaktally_store_held_samples 21\n"),
        "{metrics}"
    );
    assert!(
        metrics.contains("\nleaktally_store_failed_commits_total 1\n"),
        "{metrics}"
    );
}

/// A request for a name that is not the page's (as a DNS-rebinding page
/// makes a browser send) gets 421 and no data, on every path and method;
/// the page's own names are answered.
#[tokio::test]
async fn a_foreign_host_is_refused_everywhere_and_the_page_names_are_answered() {
    let (_scratch, router, id) = fixture();
    let paths = [
        "/".to_owned(),
        "/api/status".to_owned(),
        format!("/api/events/{id}"),
        format!("/api/events/{id}/series"),
        "/metrics".to_owned(),
        "/assets/refresh.js".to_owned(),
        "/nowhere".to_owned(),
    ];
    for host in [
        "rebind.attacker.example:8470",
        "rebind.attacker.example",
        "127.0.0.1:8471",
        "127.0.0.2:8470",
        "localhost:9999",
        "127.0.0.1:8470, evil.example",
        "",
    ] {
        for path in &paths {
            for method in ["GET", "HEAD", "POST"] {
                let (status, headers, body) = call_for(&router, Some(host), method, path).await;
                assert_eq!(
                    status,
                    StatusCode::MISDIRECTED_REQUEST,
                    "{method} {path} for {host:?}"
                );
                assert!(!body.contains("released"), "{body}");
                assert_eq!(headers[header::X_CONTENT_TYPE_OPTIONS], "nosniff");
                if method == "GET" {
                    assert!(
                        body.contains("answers only for 127.0.0.1:8470, localhost:8470")
                            && body.contains("[web] hosts"),
                        "{body}"
                    );
                }
            }
        }
    }
    let (status, _, body) = call_for(&router, None, "GET", "/api/status").await;
    assert_eq!(status, StatusCode::BAD_REQUEST, "{body}");
    for host in ["127.0.0.1:8470", "localhost:8470", "LOCALHOST:8470"] {
        let (status, _, body) = call_for(&router, Some(host), "GET", "/api/status").await;
        assert_eq!(status, StatusCode::OK, "{host}: {body}");
        assert!(body.contains("\"events\""), "{body}");
    }
    // Two Host headers, the page's first: refused, whichever a check read.
    for hosts in [
        ["127.0.0.1:8470", "evil.example"],
        ["evil.example", "127.0.0.1:8470"],
    ] {
        let request = HttpRequest::builder()
            .uri("/api/status")
            .header(header::HOST, hosts[0])
            .header(header::HOST, hosts[1])
            .body(Body::empty())
            .unwrap();
        let response = router.clone().oneshot(request).await.unwrap();
        assert_eq!(response.status(), StatusCode::BAD_REQUEST, "{hosts:?}");
    }
    // An absolute URI's authority stands for Host.
    let (status, _, _) = call_for(
        &router,
        Some("127.0.0.1:8470"),
        "GET",
        "http://evil.example:8470/api/status",
    )
    .await;
    assert_eq!(status, StatusCode::MISDIRECTED_REQUEST);
}

#[test]
fn host_names_are_matched_with_their_ports() {
    use crate::config::HostName;
    let extra = [
        HostName {
            name: "responders.site.example".into(),
            port: None,
        },
        HostName {
            name: "10.0.0.5".into(),
            port: Some(8470),
        },
    ];
    let loopback: SocketAddr = "127.0.0.1:8470".parse().unwrap();
    let anywhere: SocketAddr = "0.0.0.0:8470".parse().unwrap();
    let v6: SocketAddr = "[::1]:8470".parse().unwrap();
    let lan: Option<SocketAddr> = Some("192.0.2.7:8470".parse().unwrap());
    // (host, listen, connection's local address, allowed)
    let cases: &[(&str, SocketAddr, Option<SocketAddr>, bool)] = &[
        ("127.0.0.1:8470", loopback, None, true),
        ("localhost:8470", loopback, None, true),
        ("localhost", loopback, None, false),
        ("127.0.0.1", loopback, None, false),
        ("evil.example:8470", loopback, None, false),
        ("responders.site.example", loopback, None, true),
        ("Responders.Site.Example:443", loopback, None, true),
        ("10.0.0.5:8470", anywhere, lan, true),
        ("10.0.0.5:80", anywhere, lan, false),
        // Listening everywhere: the address the request came in on.
        ("192.0.2.7:8470", anywhere, lan, true),
        ("192.0.2.8:8470", anywhere, lan, false),
        ("0.0.0.0:8470", anywhere, lan, false),
        ("localhost:8470", anywhere, lan, false),
        ("[::1]:8470", v6, None, true),
        ("localhost:8470", v6, None, true),
        ("[::2]:8470", v6, None, false),
        ("[::1", v6, None, false),
        ("a b:8470", loopback, None, false),
        ("127.0.0.1:8470/", loopback, None, false),
    ];
    for &(host, listen, local, allowed) in cases {
        assert_eq!(
            host_allowed(host, listen, local, &extra),
            allowed,
            "{host} on {listen} via {local:?}"
        );
    }
}

/// A suspected loss standing is an alarm on the page, escaped, with the
/// start it offers and the command, and a gauge in the metrics.
#[tokio::test]
async fn a_suspected_loss_is_shown_on_the_page_and_in_the_metrics() {
    let losses = Arc::new(crate::loss::Board::default());
    let (_scratch, router, _, _) = fixture_with(Arc::clone(&losses));
    let (_, _, page) = call(&router, "GET", "/").await;
    assert!(!page.contains("suspected-loss"));
    let (_, _, metrics) = call(&router, "GET", "/metrics").await;
    assert!(
        metrics.contains("\nleaktally_suspected_loss{tank=\"T<1>&\\\"x\\\"\"} 0\n"),
        "{metrics}"
    );

    losses.count_raised();
    losses.set(
        HOSTILE_ID,
        Some(crate::loss::Suspicion {
            since_ms: 1_700_000_000_000,
            raised_ms: 1_700_000_600_000,
            volume_m3: 0.5,
            rate_m3_s: 0.5 / 600.0,
            statistic: 12.0,
        }),
    );
    let (_, _, page) = call(&router, "GET", "/").await;
    assert!(page.contains(r#"data-field="suspected-loss""#), "{page}");
    assert!(
        page.contains("Suspected loss on T&lt;1&gt;&amp;&quot;x&quot;"),
        "{page}"
    );
    assert!(
        page.contains(
            "since <time datetime=\"2023-11-14T22:13:20.000Z\">2023-11-14 22:13:20 UTC</time>"
        ),
        "{page}"
    );
    assert!(
        // Quoted for the shell, then escaped for HTML.
        page.contains("leaktally leak open --tank &#39;T&lt;1&gt;&amp;&quot;x&quot;&#39; --since 2023-11-14T22:13:20.000Z"),
        "{page}"
    );
    assert!(page.contains("not a measurement"));
    let (_, _, metrics) = call(&router, "GET", "/metrics").await;
    for line in [
        "\nleaktally_suspected_loss{tank=\"T<1>&\\\"x\\\"\"} 1\n",
        "\nleaktally_suspected_loss_since_timestamp_seconds{tank=\"T<1>&\\\"x\\\"\"} 1700000000\n",
        "\nleaktally_suspected_loss_cubic_metres{tank=\"T<1>&\\\"x\\\"\"} 0.5\n",
        "\nleaktally_suspected_losses_raised_total 1\n",
    ] {
        assert!(metrics.contains(line), "{line} in {metrics}");
    }
}

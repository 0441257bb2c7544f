//! The fleet view's web side: `/` (the page), `/api/fleet` (the JSON) and
//! `/metrics`, with the agent page's style sheet, refresh script and icon.
//!
//! Read-only, as the agent's page: GET and HEAD only (405 with `Allow`
//! otherwise), and only for a `Host` that names the page (its listen
//! address, the address the connection came in on, `localhost` on
//! loopback), against DNS rebinding; connections are served by the agent's
//! server (`crate::web::server`), with its bounds and timeouts.
//!
//! Left out: authentication and TLS (a reverse proxy's job), as for the
//! agent's page.

use super::board::Board;
use super::mqtt::Link;
use super::view;
use crate::web::{self, server};
use axum::Router;
use axum::extract::{Request, State};
use axum::http::{StatusCode, header};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use std::net::SocketAddr;
use std::sync::{Arc, Mutex, OnceLock, PoisonError};
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

/// What every handler shares.
pub struct Shared {
    pub board: Arc<Mutex<Board>>,
    pub link: Arc<Link>,
    /// The broker's address, as the page says it.
    pub broker: String,
    pub prefix: String,
    pub stale_after_ms: i64,
    /// The address the page is served on.
    pub listen: SocketAddr,
    bound: OnceLock<SocketAddr>,
}

impl Shared {
    pub fn new(
        board: Arc<Mutex<Board>>,
        link: Arc<Link>,
        broker: String,
        prefix: String,
        stale_after_ms: i64,
        listen: SocketAddr,
    ) -> Self {
        Self {
            board,
            link,
            broker,
            prefix,
            stale_after_ms,
            listen,
            bound: OnceLock::new(),
        }
    }

    /// The document as of now.
    pub fn document(&self) -> view::FleetDocument {
        let link = self.link.snapshot();
        let board = self.board.lock().unwrap_or_else(PoisonError::into_inner);
        view::document(
            &board,
            &link,
            &self.broker,
            &self.prefix,
            crate::store::now_ms(),
            self.stale_after_ms,
        )
    }
}

/// Serves the view on `listener` until `cancel` fires.
pub async fn serve(listener: TcpListener, shared: Arc<Shared>, cancel: CancellationToken) {
    if let Ok(bound) = listener.local_addr() {
        let _ = shared.bound.set(bound);
    }
    let limit = server::connection_limit(server::raise_open_file_limit(), 0);
    server::serve(listener, router(shared), limit, cancel).await;
}

/// The routes, with the read-only guard around them.
pub fn router(shared: Arc<Shared>) -> Router {
    let guarded = Arc::clone(&shared);
    Router::new()
        .route("/", get(index))
        .route("/api/fleet", get(api_fleet))
        .route("/metrics", get(metrics))
        .route("/assets/leaktally.css", get(web::style))
        .route("/assets/refresh.js", get(web::script))
        .route("/assets/icon.svg", get(web::icon))
        .fallback(not_found)
        .with_state(shared)
        .layer(middleware::from_fn_with_state(guarded, read_only))
}

/// Refuses a foreign `Host` and every method but GET and HEAD.
async fn read_only(State(shared): State<Arc<Shared>>, request: Request, next: Next) -> Response {
    let listen = shared.bound.get().copied().unwrap_or(shared.listen);
    let local = request
        .extensions()
        .get::<server::ConnectedTo>()
        .map(|c| c.0);
    let mut response = match web::request_host(&request) {
        Err(refusal) => refusal,
        Ok(host) if !web::host_allowed(&host, listen, local, &[]) => web::text(
            StatusCode::MISDIRECTED_REQUEST,
            format!(
                "this page answers only for {listen}{}, not for {:?}; reach it by that address\n",
                if listen.ip().is_loopback() {
                    format!(" and localhost:{}", listen.port())
                } else {
                    String::new()
                },
                crate::logging::one_line(&host)
            ),
        ),
        Ok(_) if web::is_read(request.method()) => next.run(request).await,
        Ok(_) => web::method_refused(request.method(), "the fleet view"),
    };
    web::with_common_headers(&mut response);
    response
}

async fn index(State(shared): State<Arc<Shared>>) -> Response {
    (
        StatusCode::OK,
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8"),
            (header::CONTENT_SECURITY_POLICY, web::PAGE_POLICY),
        ],
        view::page(&shared.document()),
    )
        .into_response()
}

async fn api_fleet(State(shared): State<Arc<Shared>>) -> Response {
    web::json(StatusCode::OK, &shared.document())
}

async fn metrics(State(shared): State<Arc<Shared>>) -> Response {
    (
        StatusCode::OK,
        [(header::CONTENT_TYPE, web::METRICS_CONTENT_TYPE)],
        view::metrics(&shared.document()),
    )
        .into_response()
}

async fn not_found(request: Request) -> Response {
    web::text(
        StatusCode::NOT_FOUND,
        format!(
            "nothing at {}; try / (the page), /api/fleet or /metrics\n",
            crate::logging::one_line(request.uri().path())
        ),
    )
}

#[cfg(test)]
mod tests;

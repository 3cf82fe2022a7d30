//! The local status page and JSON API: `GET /api/status` (the [`Status`] document) and
//! `GET /` (a self-contained HTML page that polls the API every second).
//!
//! Read-only on purpose: nothing here can switch a load or change a limit, so exposing
//! it on a LAN leaks readings but cannot drive the plant. It binds loopback unless the
//! operator names another address.

use std::future::Future;
use std::sync::Arc;

use axum::Router;
use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::get;
use tokio::net::TcpListener;
use tokio::sync::watch;

use super::Status;

/// The page: markup, style and script in one file, no external assets.
pub const PAGE: &str = include_str!("page.html");

/// The routes over a status channel.
pub fn router(status: watch::Receiver<Arc<Status>>) -> Router {
    Router::new().route("/", get(page)).route("/api/status", get(api)).with_state(status)
}

/// Serves until `shutdown` completes, then lets open requests finish.
pub async fn serve(
    listener: TcpListener,
    status: watch::Receiver<Arc<Status>>,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    axum::serve(listener, router(status)).with_graceful_shutdown(shutdown).await
}

async fn page() -> Html<&'static str> {
    Html(PAGE)
}

async fn api(State(status): State<watch::Receiver<Arc<Status>>>) -> Response {
    let doc = Arc::clone(&status.borrow());
    match serde_json::to_string(&*doc) {
        Ok(body) => {
            ([(header::CONTENT_TYPE, "application/json"), (header::CACHE_CONTROL, "no-store")], body).into_response()
        }
        Err(e) => (StatusCode::INTERNAL_SERVER_ERROR, format!("status cannot be encoded: {e}")).into_response(),
    }
}

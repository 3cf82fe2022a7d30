//! The local status page and JSON API: `GET /api/status` (the [`Status`] document),
//! `GET /metrics` (the same document as OpenMetrics text, for Prometheus) and `GET /` (a
//! self-contained HTML page that polls the API every second).
//!
//! Read-only on purpose: nothing here can switch a load or change a limit, so exposing
//! it on a LAN leaks readings but cannot drive the plant. It binds loopback unless the
//! operator names another address.
//!
//! Bound to loopback, it answers only requests addressed to a loopback name
//! (`localhost`, `127.0.0.1`, `[::1]`): a web page from elsewhere that points its own
//! host name at 127.0.0.1 (DNS rebinding) would otherwise read the site's status
//! through the owner's browser. Bound to another address, the operator chose who may
//! reach it, and any `Host` is answered.

use std::future::Future;
use std::sync::Arc;

use axum::Router;
use axum::extract::{Request, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::middleware::{self, Next};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::get;
use tokio::net::TcpListener;
use tokio::sync::watch;

use super::Status;

/// The page: markup, style and script in one file, no external assets.
pub const PAGE: &str = include_str!("page.html");

/// The routes over a status channel; `loopback_only` refuses requests whose `Host` is
/// not a loopback name (see the module docs).
pub fn router(status: watch::Receiver<Arc<Status>>, loopback_only: bool) -> Router {
    let routes = Router::new()
        .route("/", get(page))
        .route("/api/status", get(api))
        .route("/metrics", get(metrics))
        .with_state(status);
    if loopback_only { routes.layer(middleware::from_fn(loopback_host)) } else { routes }
}

/// Serves until `shutdown` completes, then lets open requests finish.
pub async fn serve(
    listener: TcpListener,
    status: watch::Receiver<Arc<Status>>,
    shutdown: impl Future<Output = ()> + Send + 'static,
) -> std::io::Result<()> {
    let loopback_only = listener.local_addr()?.ip().is_loopback();
    axum::serve(listener, router(status, loopback_only)).with_graceful_shutdown(shutdown).await
}

/// Lets through requests addressed to a loopback name (or with no `Host` at all, as
/// HTTP/1.0 clients send them; a browser always sends one).
async fn loopback_host(headers: HeaderMap, request: Request, next: Next) -> Response {
    match headers.get(header::HOST).map(|h| h.to_str()) {
        None => next.run(request).await,
        Some(Ok(host)) if is_loopback_host(host) => next.run(request).await,
        _ => (
            StatusCode::FORBIDDEN,
            "this status page is bound to loopback and answers only to localhost, 127.0.0.1 or [::1]; \
             to reach it from another machine, bind it to that network's address (--http ADDR)\n",
        )
            .into_response(),
    }
}

/// Whether a `Host` header names this machine's loopback: `localhost`, an address in
/// 127.0.0.0/8 or `[::1]`, with or without a port.
fn is_loopback_host(host: &str) -> bool {
    let name = match host.strip_prefix('[') {
        Some(rest) => match rest.split_once(']') {
            Some((v6, port)) if port.is_empty() || port.starts_with(':') => v6,
            _ => return false,
        },
        None => host.rsplit_once(':').map_or(host, |(name, _)| name),
    };
    if name.eq_ignore_ascii_case("localhost") {
        return true;
    }
    name.parse::<std::net::IpAddr>().is_ok_and(|ip| ip.is_loopback())
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

async fn metrics(State(status): State<watch::Receiver<Arc<Status>>>) -> Response {
    let doc = Arc::clone(&status.borrow());
    match super::metrics::render(&doc) {
        Ok(body) => ([(header::CONTENT_TYPE, super::metrics::CONTENT_TYPE), (header::CACHE_CONTROL, "no-store")], body)
            .into_response(),
        Err(e) => (StatusCode::INTERNAL_SERVER_ERROR, format!("metrics cannot be encoded: {e}")).into_response(),
    }
}

#[cfg(test)]
mod tests {
    use super::is_loopback_host;

    #[test]
    fn loopback_names_are_recognised_with_or_without_a_port() {
        for host in
            ["localhost", "LOCALHOST:8080", "127.0.0.1", "127.0.0.1:8080", "127.1.2.3:80", "[::1]", "[::1]:8080"]
        {
            assert!(is_loopback_host(host), "{host}");
        }
    }

    #[test]
    fn other_names_are_not_loopback() {
        for host in [
            "evil.example",
            "evil.example:8080",
            "localhost.evil.example",
            "192.168.1.10:8080",
            "[::2]:8080",
            "[::1]junk",
            "0.0.0.0",
            "",
        ] {
            assert!(!is_loopback_host(host), "{host}");
        }
    }
}

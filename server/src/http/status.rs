//! The status page: `GET /status` and its two assets, embedded in the binary. The page and
//! its script hold no data and answer without credentials; the script asks for the admin token,
//! keeps it in the browser tab's session storage, and reads everything it shows from the admin
//! API and `/metrics` with that token as its bearer. A Content-Security-Policy limits the page
//! to this origin, so a browser refuses any request it would make elsewhere.

use axum::http::header::{
    CACHE_CONTROL, CONTENT_SECURITY_POLICY, CONTENT_TYPE, X_CONTENT_TYPE_OPTIONS,
};
use axum::response::IntoResponse;

/// The page, its style sheet and its script, as served.
pub const PAGE_HTML: &str = include_str!("status/page.html");
pub const PAGE_CSS: &str = include_str!("status/page.css");
pub const PAGE_JS: &str = include_str!("status/page.js");

/// Only this origin, for every kind of request; no inline script or style; no framing.
const POLICY: &str = "default-src 'none'; script-src 'self'; style-src 'self'; connect-src 'self'; \
     img-src 'self' data:; base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

fn asset(content_type: &'static str, body: &'static str) -> impl IntoResponse {
    (
        [
            (CONTENT_TYPE, content_type),
            (CONTENT_SECURITY_POLICY, POLICY),
            (X_CONTENT_TYPE_OPTIONS, "nosniff"),
            (CACHE_CONTROL, "no-cache"),
        ],
        body,
    )
}

/// `GET /status`.
#[utoipa::path(get, path = "/status", operation_id = "status_page", tag = "operations",
    responses((status = 200, description = "The status page; it asks for the admin token and reads the admin API with it", content_type = "text/html", body = String)))]
pub async fn page() -> impl IntoResponse {
    asset("text/html; charset=utf-8", PAGE_HTML)
}

/// `GET /status/page.css`.
#[utoipa::path(get, path = "/status/page.css", operation_id = "status_page_style", tag = "operations",
    responses((status = 200, description = "The status page's style sheet", content_type = "text/css", body = String)))]
pub async fn style() -> impl IntoResponse {
    asset("text/css; charset=utf-8", PAGE_CSS)
}

/// `GET /status/page.js`.
#[utoipa::path(get, path = "/status/page.js", operation_id = "status_page_script", tag = "operations",
    responses((status = 200, description = "The status page's script", content_type = "text/javascript", body = String)))]
pub async fn script() -> impl IntoResponse {
    asset("text/javascript; charset=utf-8", PAGE_JS)
}

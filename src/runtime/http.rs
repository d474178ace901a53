//! The HTTP API (axum): cursor pulls of releases, the budget, Prometheus metrics, health
//! probes and the dashboard page. Handlers only read published snapshots.
//!
//! Two kinds of endpoint:
//! - *Consumer* endpoints (`/v1/releases`, `/v1/budget`, `/`, probes) show only released,
//!   noisy values and the (public) budget.
//! - *Operator* endpoints (`/metrics`, `/v1/ingest`) show exact operational counts (events
//!   accepted, rejected, late), which are raw functions of the input and not differentially
//!   private. With `http.operator_token_file` they require `Authorization: Bearer <token>`.

use std::sync::Arc;
use std::sync::atomic::Ordering;

use axum::extract::{Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::get;
use axum::{Json, Router};
use serde::Deserialize;

use crate::runtime::daemon::{DEFAULT_LIMIT, MAX_LIMIT, Shared};

/// The dashboard page, served from the binary (no CDN, no build step).
pub const DASHBOARD_HTML: &str = include_str!("../../ops/dashboard.html");

/// Builds the router.
pub fn router(shared: Arc<Shared>) -> Router {
    Router::new()
        .route("/", get(dashboard))
        .route("/v1/releases", get(releases))
        .route("/v1/budget", get(budget))
        .route("/metrics", get(metrics))
        .route("/v1/ingest", get(ingest))
        .route("/healthz", get(|| async { "ok\n" }))
        .route("/readyz", get(readyz))
        .with_state(shared)
}

#[derive(Deserialize)]
struct Page {
    after: Option<u64>,
    limit: Option<usize>,
}

async fn releases(State(s): State<Arc<Shared>>, Query(p): Query<Page>) -> Response {
    let limit = p.limit.unwrap_or(DEFAULT_LIMIT).clamp(1, MAX_LIMIT);
    let page = match s.releases.read() {
        Ok(store) => store.page(p.after, limit),
        Err(_) => return StatusCode::INTERNAL_SERVER_ERROR.into_response(),
    };
    let next_after = page.last().map(|r| r.seq).or(p.after);
    Json(serde_json::json!({ "releases": page, "next_after": next_after })).into_response()
}

async fn budget(State(s): State<Arc<Shared>>) -> Response {
    let view = s.budget.borrow().clone();
    Json((*view).clone()).into_response()
}

/// Whether `headers` carry the operator token (always true when none is configured). The
/// comparison runs over every byte whatever the first mismatch, so its time does not tell an
/// attacker how much of a guess was right.
fn authorised(s: &Shared, headers: &HeaderMap) -> bool {
    let Some(token) = &s.operator_token else {
        return true;
    };
    let given = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.strip_prefix("Bearer "))
        .unwrap_or("");
    let (a, b) = (given.as_bytes(), token.as_bytes());
    let mut diff = u8::from(a.len() != b.len());
    for (i, t) in b.iter().enumerate() {
        diff |= a.get(i).copied().unwrap_or(0) ^ t;
    }
    diff == 0
}

fn unauthorised() -> Response {
    (
        StatusCode::UNAUTHORIZED,
        [(header::WWW_AUTHENTICATE, "Bearer")],
        "operator endpoint: send Authorization: Bearer <token from http.operator_token_file>\n",
    )
        .into_response()
}

async fn ingest(State(s): State<Arc<Shared>>, headers: HeaderMap) -> Response {
    if !authorised(&s, &headers) {
        return unauthorised();
    }
    let view = s.budget.borrow().clone();
    Json(view.ingest.clone()).into_response()
}

async fn metrics(State(s): State<Arc<Shared>>, headers: HeaderMap) -> Response {
    if !authorised(&s, &headers) {
        return unauthorised();
    }
    let text = s.metrics.lock().map(|m| m.render()).unwrap_or_default();
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4")], text).into_response()
}

async fn readyz(State(s): State<Arc<Shared>>) -> Response {
    if s.ready.load(Ordering::SeqCst) {
        (StatusCode::OK, "ready\n").into_response()
    } else {
        (StatusCode::SERVICE_UNAVAILABLE, "starting\n").into_response()
    }
}

async fn dashboard() -> Html<&'static str> {
    Html(DASHBOARD_HTML)
}

//! The HTTP API (axum): cursor pulls of releases, the budget, Prometheus metrics, health
//! probes and the dashboard page. Handlers only read published snapshots; no endpoint can
//! reach an un-noised value because none exists outside the engine.

use std::sync::Arc;
use std::sync::atomic::Ordering;

use axum::extract::{Query, State};
use axum::http::{StatusCode, header};
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

async fn metrics(State(s): State<Arc<Shared>>) -> Response {
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

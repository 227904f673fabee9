//! The dashboard: server-rendered HTML pages with inline SVG plots, no JS build chain.
//! `/` is the fleet overview (counts per state, search, filters, paging; see `overview`);
//! `/experiments/{id}` shows, per
//! metric, the posterior densities, the lift against the control with its interval and ROPE,
//! P(best) and expected loss over time with the threshold of caring, the rule timeline with
//! the alerts, and the data-quality checks. `?part=main` returns only the main part, which the
//! page's small inline script re-fetches every few seconds and swaps in.

pub mod clock;
mod markup;
pub mod overview;
pub mod page;
pub mod svg;

use std::sync::Arc;

use axum::extract::{Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;

use crate::service::Service;

/// The dashboard's routes and the history route (merged into the API router).
pub fn routes() -> Router<Arc<Service>> {
    Router::new()
        .route("/", get(overview::overview))
        .route("/v1/event-time", get(clock::get_event_time))
        .route("/experiments/{id}", get(experiment))
        .route(
            "/v1/experiments/{id}/history",
            get(super::history::get_history),
        )
}

/// `?part=main`: only the main part, for the refresh script.
#[derive(serde::Deserialize)]
struct Part {
    part: Option<String>,
}

/// What the pages may do: their own inline style and script, fetches from this origin, forms
/// that submit to this origin (the overview's search), and nothing else — no external
/// resources, no framing by other sites. Everything
/// interpolated into a page is escaped (`markup::escape`), so the inline script is the only one.
const CONTENT_SECURITY_POLICY: &str = "default-src 'none'; style-src 'unsafe-inline'; \
script-src 'unsafe-inline'; connect-src 'self'; img-src 'self' data:; base-uri 'none'; \
form-action 'self'; frame-ancestors 'none'";

fn html(status: StatusCode, body: String) -> Response {
    (
        status,
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8"),
            (header::CACHE_CONTROL, "no-store"),
            (header::CONTENT_SECURITY_POLICY, CONTENT_SECURITY_POLICY),
            (header::X_CONTENT_TYPE_OPTIONS, "nosniff"),
        ],
        body,
    )
        .into_response()
}

fn wants_main(part: &Part) -> bool {
    part.part.as_deref() == Some("main")
}

async fn experiment(
    State(service): State<Arc<Service>>,
    Path(id): Path<String>,
    Query(part): Query<Part>,
) -> Response {
    let Some(snapshot) = service.lock_shards().snapshot(&id) else {
        let main = format!(
            r#"<h1>No experiment “{}”</h1><p><a href="/">All experiments</a></p>"#,
            markup::escape(&id)
        );
        return html(
            StatusCode::NOT_FOUND,
            page::layout("posteriord · not found", "not found", &main, "/"),
        );
    };
    let history = service.recorder().lock().experiment(&id).cloned();
    let alerts: Vec<_> = service.with_alerts(|book| {
        book.alerts()
            .iter()
            .filter(|a| a.key.experiment == id)
            .cloned()
            .collect()
    });
    let now = crate::service::now_micros();
    let evidence = service.with_alerts(|book| book.evidence().subset(&snapshot.def.state_key()));
    let rendered = super::blocking(move || {
        let reading = service.reading(snapshot);
        let (summary, mut findings) = (Arc::clone(&reading.summary), reading.findings.clone());
        crate::decide::add_evidence_findings(&summary, &evidence, &mut findings);
        let standings = crate::decide::standing::standings(&summary, &findings, Some(&evidence));
        page::experiment_main(&page::ExperimentView {
            summary,
            findings,
            standings,
            history,
            alerts,
            now,
        })
    })
    .await;
    match rendered {
        Err(r) => r,
        Ok(main) if wants_main(&part) => html(StatusCode::OK, main),
        Ok(main) => {
            let refresh = format!("/experiments/{id}?part=main");
            html(
                StatusCode::OK,
                page::layout(&format!("posteriord · {id}"), &id, &main, &refresh),
            )
        }
    }
}

//! The HTTP API (axum): event ingest, experiment documents and definitions, alerts, health,
//! readiness, metrics and the OpenAPI description.
//!
//! Handlers copy what they need out of the engine under its lock and do all derived work
//! (quadrature, JSON) outside it, on the blocking pool, so reads never stall ingest for long.
//! Every route sits behind `guard` (tokens, timeout, panic capture, JSON errors).

pub mod dashboard;
pub mod define;
pub mod fleet;
pub mod guard;
pub mod history;

use std::sync::Arc;

use axum::body::Bytes;
use axum::extract::{DefaultBodyLimit, Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use serde_json::{json, Value};
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

use crate::decode::split_body;
use crate::doc;
use crate::event::Outcome;
use crate::service::Service;

/// The OpenAPI 3.1 description of every route, kept by hand beside the handlers (a test
/// checks that it describes every route below and that real replies fit its schemas).
pub const OPENAPI: &str = include_str!("openapi.json");

/// Build the router over `service`, guarded by `auth` (see [`guard::guard`]).
///
/// Every route is registered here, in one table: `GET`/`HEAD` routes are reads (open, or
/// token-protected with `http.protect_reads`), every other method is a write and needs a
/// token; both kinds get the same timeout, panic capture and JSON errors.
pub fn router(
    service: Arc<Service>,
    http: &crate::config::HttpConfig,
    auth: guard::Auth,
) -> Router {
    let routes = Router::new()
        // Operations: probes (never token-protected) and the Prometheus scrape.
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/metrics", get(metrics))
        .route("/v1/openapi.json", get(openapi))
        // Experiments: reads, and definitions at run time (PUT, DELETE). Further read routes
        // (the dashboard's pages, `/v1/experiments/{id}/history`) belong in this table too:
        // as GET routes they inherit `protect_reads`, the timeout and the JSON errors, and
        // tests/api.rs asks for each to be described in openapi.json.
        .route("/v1/experiments", get(fleet::api::list_experiments))
        .route(
            "/v1/experiments/{id}",
            get(get_experiment)
                .put(define::put_experiment)
                .layer(DefaultBodyLimit::max(define::MAX_DEFINITION_BYTES))
                .delete(define::delete_experiment),
        )
        .route("/v1/alerts", get(fleet::api::list_alerts))
        // Writes that are not definitions.
        .route("/v1/events", post(ingest))
        .route("/v1/alerts/{id}/ack", post(ack_alert))
        // History of decision quantities and the HTML dashboard.
        .merge(dashboard::routes())
        .fallback(not_found)
        .layer(DefaultBodyLimit::max(http.max_body_bytes))
        .with_state(service.clone());
    // Outside the guards, so refused (401/403), timed-out and failed requests count too.
    guard::guard(routes, http, auth)
        .layer(axum::middleware::from_fn_with_state(service, count_request))
}

/// Counts each request and its duration by method, route template and status. The template
/// (`/v1/experiments/{id}`), not the path, so ids never become label values; paths no route
/// matches count as `other`.
async fn count_request(
    State(service): State<Arc<Service>>,
    request: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let started = std::time::Instant::now();
    let method = request.method().as_str().to_owned();
    let route = request
        .extensions()
        .get::<axum::extract::MatchedPath>()
        .map_or_else(|| "other".to_owned(), |p| p.as_str().to_owned());
    let response = next.run(request).await;
    service.metrics().observe_http(
        &method,
        &route,
        response.status().as_u16(),
        started.elapsed().as_secs_f64(),
    );
    response
}

async fn openapi() -> Response {
    ([(header::CONTENT_TYPE, "application/json")], OPENAPI).into_response()
}

/// Serve `router` on `listener` until `shutdown` fires, then finish in-flight requests.
pub async fn serve(
    listener: TcpListener,
    router: Router,
    shutdown: CancellationToken,
) -> std::io::Result<()> {
    axum::serve(listener, router)
        .with_graceful_shutdown(async move { shutdown.cancelled().await })
        .await
}

fn error(status: StatusCode, code: &str, message: &str) -> Response {
    guard::error(status, code, message, Value::Null)
}

async fn not_found() -> Response {
    error(StatusCode::NOT_FOUND, "not_found", "no such route")
}

async fn healthz() -> Json<Value> {
    Json(json!({ "status": "ok" }))
}

async fn readyz(State(service): State<Arc<Service>>) -> Response {
    let kafka = service.kafka_reachable();
    let restoring = service.is_restoring();
    // Not ready for writes while any file of the state directory cannot be written: events
    // posted now would be refused (HTTP) or re-read after a restart (Kafka).
    let failing = service.store_failures();
    let ready = kafka.unwrap_or(true) && !restoring && failing.is_empty();
    let store = if !service.is_stored() {
        json!({ "status": "not configured" })
    } else if failing.is_empty() {
        json!({ "status": "writable", "free_bytes": service.store_free_bytes() })
    } else {
        json!({
            "status": "not_durable",
            "free_bytes": service.store_free_bytes(),
            "failing": failing
                .iter()
                .map(|(file, error)| json!({ "file": file, "error": error }))
                .collect::<Vec<_>>(),
        })
    };
    let body = json!({
        "ready": ready,
        "checks": {
            "kafka": match kafka {
                None => "not configured",
                Some(true) => "reachable",
                Some(false) => "unreachable",
            },
            "state": if restoring { "restoring" } else { "ready" },
            "store": store,
        }
    });
    let status = if ready {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (status, Json(body)).into_response()
}

/// Runs `f` on the blocking pool; a panic there becomes a 500, never a dropped connection.
async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> T + Send + 'static,
) -> Result<T, Response> {
    tokio::task::spawn_blocking(f).await.map_err(|e| {
        tracing::error!(error = %e, "request handler failed");
        error(
            StatusCode::INTERNAL_SERVER_ERROR,
            "internal",
            "internal error; see the server log",
        )
    })
}

/// Why a whole ingest request failed.
enum IngestFailure {
    /// The body holds no events.
    BadBody(String),
    /// The write-ahead log refused the write.
    NotDurable,
}

/// `POST /v1/events?source=NAME`: the events are in the shape of a configured `[[source]]`.
#[derive(Debug, serde::Deserialize)]
struct IngestQuery {
    source: Option<String>,
}

async fn ingest(
    State(service): State<Arc<Service>>,
    axum::extract::Query(query): axum::extract::Query<IngestQuery>,
    body: Bytes,
) -> Response {
    if let Some(name) = &query.source {
        if service.mapping(name).is_none() {
            return error(
                StatusCode::BAD_REQUEST,
                "unknown_source",
                &format!("no [[source]] named `{name}` is configured"),
            );
        }
    }
    let result = blocking(move || {
        let items = match split_body(&body) {
            Ok(items) => items,
            Err(e) => return Err(IngestFailure::BadBody(e.to_string())),
        };
        let bytes: Vec<&[u8]> = items.iter().map(|(_, b)| *b).collect();
        let mapping = query.source.as_deref().and_then(|n| service.mapping(n));
        let report = match mapping {
            Some(m) => service.ingest_http_mapped(m, &bytes),
            None => service.ingest_http(&bytes),
        };
        let report = match report {
            Ok(r) => r,
            Err(e) => {
                tracing::error!(error = %e, "cannot log posted events; refusing the request");
                return Err(IngestFailure::NotDurable);
            }
        };
        let errors: Vec<doc::IngestError> = report
            .rejects()
            .map(|(i, rej)| doc::IngestError::new(items[i].0, rej))
            .collect();
        let mut not_applied = serde_json::Map::new();
        for o in Outcome::ALL.into_iter().filter(|o| *o != Outcome::Applied) {
            not_applied.insert(o.as_str().into(), json!(report.count(o)));
        }
        Ok(json!({
            "received": items.len(),
            "applied": report.count(Outcome::Applied),
            "not_applied": not_applied,
            "rejected": errors.len(),
            "errors": errors,
            // Applied at their receive time because their own was out of bounds
            // (`[event_time.http] on_skew = "clamp"`).
            "clamped": report.skewed.iter().filter(|s| s.clamped).count(),
        }))
    })
    .await;
    match result {
        Err(response) => response,
        Ok(Err(IngestFailure::BadBody(message))) => error(StatusCode::BAD_REQUEST, "bad_body", &message),
        Ok(Err(IngestFailure::NotDurable)) => error(
            StatusCode::SERVICE_UNAVAILABLE,
            "not_durable",
            "the events could not be written to the state directory and were not applied; retry later",
        ),
        Ok(Ok(body)) => {
            let status = if body["rejected"].as_u64() == Some(0) {
                StatusCode::OK
            } else {
                StatusCode::UNPROCESSABLE_ENTITY
            };
            (status, Json(body)).into_response()
        }
    }
}

async fn ack_alert(State(service): State<Arc<Service>>, Path(id): Path<String>) -> Response {
    // The alert file is written (fsync) under the desk's lock: keep it off the async threads.
    let key = id.clone();
    match blocking(move || service.acknowledge_alert(&key)).await {
        Err(response) => response,
        Ok(None) => error(
            StatusCode::NOT_FOUND,
            "unknown_alert",
            &format!("no alert `{id}`"),
        ),
        Ok(Some(alert)) => Json(doc::alert(&alert)).into_response(),
    }
}

async fn get_experiment(
    State(service): State<Arc<Service>>,
    Path(id): Path<String>,
    Query(q): Query<define::ArchiveQuery>,
) -> Response {
    if q.archived {
        return define::get_archived(&service, &id, q.archive).await;
    }
    let source = if service.lock_catalog().is_api(&id) {
        "api"
    } else {
        "config"
    };
    let snapshot = service.lock_shards().snapshot(&id);
    let Some(snapshot) = snapshot else {
        return error(
            StatusCode::NOT_FOUND,
            "unknown_experiment",
            &format!("no experiment `{id}`"),
        );
    };
    let generation = snapshot.def.generation;
    let evidence = service.with_alerts(|book| book.evidence().subset(&snapshot.def.state_key()));
    let ownership = service.group_view(&id).map(|g| {
        json!({
            "owner_partition": g.owner_partition,
            "owned_here": g.owned_here,
            "evaluated_through": g.evaluated.and_then(doc::time_text),
            "partitions_passed": g.watermark.and_then(doc::time_text),
        })
    });
    match blocking(move || {
        let mut d = doc::experiment_document(&service.reading(snapshot), Some(&evidence));
        d["source"] = json!(source);
        d["generation"] = json!(generation);
        if let Some(o) = ownership {
            d["ownership"] = o;
        }
        d
    })
    .await
    {
        Ok(body) => Json(body).into_response(),
        Err(response) => response,
    }
}

async fn metrics(State(service): State<Arc<Service>>) -> Response {
    match blocking(move || service.scrape()).await {
        Ok(text) => (
            [(
                header::CONTENT_TYPE,
                "text/plain; version=0.0.4; charset=utf-8",
            )],
            text,
        )
            .into_response(),
        Err(response) => response,
    }
}

//! Experiments defined at run time: `PUT` and `DELETE /v1/experiments/{id}`, and reading the
//! archive (`?archived=true`). The rules live in `catalog`; this is their HTTP face.

use std::sync::Arc;

use axum::body::Bytes;
use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde_json::{json, Value};

use super::blocking;
use super::guard::error;
use crate::decide::evaluation::Reading;
use crate::doc;
use crate::service::catalog::{Archived, CatalogError};
use crate::service::Service;
use crate::summary::DEFAULT_LEVEL;

/// Largest `PUT /v1/experiments/{id}` body: a 64-variant, 64-metric experiment with every
/// rule spelled out stays far below it.
pub const MAX_DEFINITION_BYTES: usize = 1024 * 1024;

/// `?archived=` and `?archive=` of the experiment reads.
#[derive(Debug, Default, serde::Deserialize)]
pub struct ArchiveQuery {
    /// Read archived experiments instead of running ones.
    #[serde(default)]
    pub archived: bool,
    /// Which archive of the id (1, 2, ...); the latest when absent.
    pub archive: Option<u32>,
}

fn refusal(e: CatalogError) -> Response {
    let message = e.to_string();
    match e {
        CatalogError::Invalid(c) => error(
            StatusCode::UNPROCESSABLE_ENTITY,
            "invalid_experiment",
            &message,
            json!({ "key": c.key, "message": c.message }),
        ),
        CatalogError::BadField { key, message: m } => error(
            StatusCode::UNPROCESSABLE_ENTITY,
            "invalid_experiment",
            &message,
            json!({ "key": key, "message": m }),
        ),
        CatalogError::DefinedInConfig(id) => error(
            StatusCode::CONFLICT,
            "defined_in_config",
            &message,
            json!({ "id": id, "source": "config" }),
        ),
        CatalogError::NeedsRestart { id, reason } => error(
            StatusCode::CONFLICT,
            "restart_required",
            &message,
            json!({ "id": id, "reason": reason }),
        ),
        CatalogError::Unknown(id) => error(
            StatusCode::NOT_FOUND,
            "unknown_experiment",
            &message,
            json!({ "id": id }),
        ),
        CatalogError::NotDurable(e) => {
            tracing::error!(error = %e, "cannot store an experiment definition");
            error(
                StatusCode::SERVICE_UNAVAILABLE,
                "not_durable",
                "the definition could not be written to the state directory; nothing changed, retry later",
                Value::Null,
            )
        }
    }
}

/// `PUT /v1/experiments/{id}`.
pub async fn put_experiment(
    State(service): State<Arc<Service>>,
    Path(id): Path<String>,
    body: Bytes,
) -> Response {
    let body: Value = match serde_json::from_slice(&body) {
        Ok(v) => v,
        Err(e) => {
            return error(
                StatusCode::BAD_REQUEST,
                "bad_body",
                &format!("the body is not JSON: {e}"),
                json!({ "line": e.line(), "column": e.column() }),
            )
        }
    };
    let s = Arc::clone(&service);
    let key = id.clone();
    // The catalog file is written (fsync) under the locks: keep it off the async threads.
    let result = match blocking(move || s.define_experiment(&key, body)).await {
        Ok(r) => r,
        Err(response) => return response,
    };
    match result {
        Err(e) => refusal(e),
        Ok(outcome) => {
            let entry = service
                .lock_shards()
                .snapshot(&id)
                .map(|s| entry(&s, "api"));
            let status = if outcome.created {
                StatusCode::CREATED
            } else {
                StatusCode::OK
            };
            let body = json!({
                "id": id,
                "created": outcome.created,
                "generation": outcome.generation,
                "restarted": outcome.archived.is_some(),
                "archived": outcome.archived,
                "added_variants": outcome.added_variants,
                "added_metrics": outcome.added_metrics,
                "experiment": entry,
            });
            (status, Json(body)).into_response()
        }
    }
}

/// `DELETE /v1/experiments/{id}`.
pub async fn delete_experiment(
    State(service): State<Arc<Service>>,
    Path(id): Path<String>,
) -> Response {
    let s = Arc::clone(&service);
    let key = id.clone();
    match blocking(move || s.delete_experiment(&key)).await {
        Err(response) => response,
        Ok(Err(e)) => refusal(e),
        Ok(Ok(number)) => {
            let catalog = service.lock_catalog();
            let body = catalog
                .archive(&id, Some(number))
                .map(archived_entry)
                .unwrap_or(Value::Null);
            Json(json!({ "id": id, "archived": body })).into_response()
        }
    }
}

/// One line of `GET /v1/experiments`, with where its definition comes from.
pub fn entry(snap: &crate::state::ExperimentSnapshot, source: &str) -> Value {
    let mut v = doc::experiment_entry(snap);
    v["source"] = json!(source);
    v["generation"] = json!(snap.def.generation);
    v
}

/// One line of `GET /v1/experiments?archived=true`.
pub fn archived_entry(a: &Archived) -> Value {
    let mut v = doc::experiment_entry(&a.snapshot);
    v["source"] = json!("api");
    v["generation"] = json!(a.def.generation);
    v["archive"] = archive_note(a);
    v
}

fn archive_note(a: &Archived) -> Value {
    json!({
        "number": a.number,
        "reason": a.reason,
        "archived_at": doc::time_text(a.archived_at),
    })
}

/// `GET /v1/experiments?archived=true`.
pub fn list_archived(service: &Service) -> Value {
    let catalog = service.lock_catalog();
    let entries: Vec<Value> = catalog.archived().iter().map(archived_entry).collect();
    json!({ "experiments": entries })
}

/// `GET /v1/experiments/{id}?archived=true[&archive=N]`.
pub async fn get_archived(service: &Service, id: &str, number: Option<u32>) -> Response {
    let found = service
        .lock_catalog()
        .archive(id, number)
        .map(|a| (a.snapshot.clone(), archive_note(a), a.def.generation));
    let Some((snapshot, note, generation)) = found else {
        return error(
            StatusCode::NOT_FOUND,
            "unknown_experiment",
            &match number {
                Some(n) => format!("no archive #{n} of experiment `{id}`"),
                None => format!("no archived experiment `{id}`"),
            },
            json!({ "id": id }),
        );
    };
    match blocking(move || {
        let mut d = doc::experiment_document(&Reading::of(snapshot, DEFAULT_LEVEL), None);
        d["source"] = json!("api");
        d["generation"] = json!(generation);
        d["archive"] = note;
        d
    })
    .await
    {
        Ok(body) => Json(body).into_response(),
        Err(response) => response,
    }
}

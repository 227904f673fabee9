//! `GET /v1/experiments/{id}/history?metric=M`: the recorded decision quantities of one metric
//! over time, as JSON.

use serde_json::{json, Value};

use crate::doc::time_text;
use crate::history::{ExperimentHistory, Point, Transition};
use crate::service::Service;

fn point(p: &Point, variants: &[String]) -> Value {
    json!({
        "at": time_text(p.at),
        "since": time_text(p.since),
        "covers": p.covers,
        "arms": p.arms.iter().zip(variants).map(|(a, name)| json!({
            "variant": name,
            "units": a.units,
            "mean": a.mean,
            "interval": { "lower": a.interval.0, "upper": a.interval.1 },
            "prob_best": a.prob_best,
            "expected_loss": a.expected_loss,
            "prob_better_than_control": a.prob_better_than_control,
            "lift": a.lift.map(|(mean, lower, upper)| json!({
                "mean": if mean.is_finite() { json!(mean) } else { Value::Null },
                "interval": { "lower": lower, "upper": upper },
            })),
            "prob_harm": a.prob_harm,
        })).collect::<Vec<_>>(),
    })
}

/// The JSON of one transition, naming metric and variant.
pub fn transition(t: &Transition, h: &ExperimentHistory) -> Value {
    let (rule, metric, variant) = t.key;
    json!({
        "at": time_text(t.at),
        "change": t.change.as_str(),
        "rule": rule.as_str(),
        "metric": metric.and_then(|m| h.metrics().get(m)),
        "variant": variant.and_then(|v| h.variants().get(v)),
        "value": t.value,
        "threshold": t.threshold,
    })
}

/// The history document of metric `metric` (which `h` must hold).
pub fn document(
    id: &str,
    def: &crate::experiment::ExperimentDef,
    h: &ExperimentHistory,
    metric: &str,
) -> Value {
    let series = h.series(metric).unwrap_or(&[]);
    let m = h.metrics().iter().position(|n| n == metric);
    let mdef = m.and_then(|m| def.metrics.get(m));
    let transitions: Vec<Value> = h
        .transitions()
        .filter(|t| t.key.1.is_none() || t.key.1 == m)
        .map(|t| transition(t, h))
        .collect();
    json!({
        "experiment": id,
        "metric": metric,
        "kind": mdef.map(|d| d.kind.as_str()),
        "control": def.variants.get(def.control).map(|v| &v.name),
        "variants": h.variants(),
        "threshold_of_caring": mdef.and_then(|d| d.rules.ship).map(|s| s.threshold_of_caring),
        "rope": mdef.map(|d| d.rules.rope),
        "capacity": h.capacity(),
        "evaluations": h.evaluations(),
        "points": series.iter().map(|p| point(p, h.variants())).collect::<Vec<_>>(),
        "quality": h.quality().iter().map(|q| json!({
            "at": time_text(q.at),
            "sample_ratio_p": q.sample_ratio_p,
            "crossovers": q.crossovers,
            "orphans": q.orphans,
        })).collect::<Vec<_>>(),
        "transitions": transitions,
    })
}

/// Query of the history route.
#[derive(serde::Deserialize)]
pub struct HistoryQuery {
    metric: Option<String>,
}

/// `GET /v1/experiments/{id}/history?metric=M`.
pub async fn get_history(
    axum::extract::State(service): axum::extract::State<std::sync::Arc<Service>>,
    axum::extract::Path(id): axum::extract::Path<String>,
    query: Result<axum::extract::Query<HistoryQuery>, axum::extract::rejection::QueryRejection>,
) -> axum::response::Response {
    use axum::http::StatusCode;
    use axum::response::IntoResponse;
    let def = service
        .lock_shards()
        .defs()
        .iter()
        .find(|d| d.id == id)
        .cloned();
    let Some(def) = def else {
        return super::error(
            StatusCode::NOT_FOUND,
            "unknown_experiment",
            &format!("no experiment `{id}`"),
        );
    };
    let names: Vec<&str> = def.metrics.iter().map(|m| m.name.as_str()).collect();
    let metric = match query {
        Ok(axum::extract::Query(HistoryQuery { metric: Some(m) })) => m,
        Ok(_) | Err(_) => {
            return error_with_metrics(
                StatusCode::BAD_REQUEST,
                "bad_query",
                &format!("name the metric: ?metric=one of {}", names.join(", ")),
                &names,
            )
        }
    };
    if !names.contains(&metric.as_str()) {
        return error_with_metrics(
            StatusCode::NOT_FOUND,
            "unknown_metric",
            &format!("experiment `{id}` has no metric `{metric}`"),
            &names,
        );
    }
    let body = {
        let history = service.recorder().lock();
        match history.experiment(&id) {
            Some(h) if h.series(&metric).is_some() => document(&id, &def, h, &metric),
            // Not evaluated yet (or redefined since): an empty series of the right shape.
            _ => document(&id, &def, &history.empty_for(&def), &metric),
        }
    };
    axum::Json(body).into_response()
}

fn error_with_metrics(
    status: axum::http::StatusCode,
    code: &str,
    message: &str,
    names: &[&str],
) -> axum::response::Response {
    use axum::response::IntoResponse;
    (
        status,
        axum::Json(crate::doc::error_body(
            code,
            message,
            json!({ "metrics": names }),
        )),
    )
        .into_response()
}

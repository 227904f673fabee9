//! `GET /v1/experiments` and `GET /v1/alerts` with filters and cursor paging.

use std::sync::Arc;

use axum::extract::{Query, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::Json;
use serde_json::{json, Value};

use super::facts;
use super::query::{self, Cursor, Key, ListParams, Order, QueryError};
use crate::decide::alerts::AlertState;
use crate::decide::Rule;
use crate::doc;
use crate::http::{define, guard};
use crate::service::fleet::Member;
use crate::service::Service;

/// The query of `GET /v1/experiments`. (Spelled out rather than flattening [`ListParams`]:
/// a flattened struct makes `serde_urlencoded` refuse typed fields such as `archived`.)
#[derive(Debug, Default, serde::Deserialize)]
pub struct ExperimentsQuery {
    /// See [`ListParams::state`].
    pub state: Option<String>,
    /// See [`ListParams::rule`].
    pub rule: Option<String>,
    /// See [`ListParams::metric`].
    pub metric: Option<String>,
    /// See [`ListParams::q`].
    pub q: Option<String>,
    /// See [`ListParams::alerting`].
    pub alerting: Option<String>,
    /// See [`ListParams::sort`].
    pub sort: Option<String>,
    /// Page size.
    pub limit: Option<String>,
    /// The `next` cursor of the previous page.
    pub after: Option<String>,
    /// The archive instead (not paged).
    #[serde(default)]
    pub archived: bool,
}

impl ExperimentsQuery {
    fn list(&self) -> ListParams {
        ListParams {
            state: self.state.clone(),
            rule: self.rule.clone(),
            metric: self.metric.clone(),
            q: self.q.clone(),
            alerting: self.alerting.clone(),
            sort: self.sort.clone(),
        }
    }
}

fn refused(e: &QueryError) -> Response {
    guard::error(
        StatusCode::BAD_REQUEST,
        "bad_filter",
        &e.to_string(),
        json!({ "parameter": e.param }),
    )
}

/// `GET /v1/experiments`: one page of running experiments, by id unless `sort` says
/// otherwise; or, with `archived=true`, the whole archive.
pub async fn list_experiments(
    State(service): State<Arc<Service>>,
    Query(q): Query<ExperimentsQuery>,
) -> Response {
    if q.archived {
        return Json(define::list_archived(&service)).into_response();
    }
    let list = q.list();
    let asked = (|| {
        let filter = list.filter()?;
        let order = list.order(Order::Id)?;
        let limit = query::limit(q.limit.as_deref())?;
        let from = match q.after.as_deref() {
            None => None,
            Some(text) => Some(Cursor::decode(text, order.as_str())?),
        };
        Ok::<_, QueryError>((filter, order, limit, from))
    })();
    let (filter, order, limit, from) = match asked {
        Ok(a) => a,
        Err(e) => return refused(&e),
    };
    let all = service.fleet();
    let rows = all.iter().map(|m| (facts(m), m)).collect();
    let page = query::page(rows, &filter, order, from.as_ref(), limit);
    let entries = entries(&service, &page.rows);
    Json(json!({
        "experiments": entries,
        "matched": page.matched,
        "limit": limit,
        "next": page.next.as_ref().map(Cursor::encode),
    }))
    .into_response()
}

/// The list lines of `page`, with live totals. An experiment deleted since the page was
/// chosen is left out (the cursor still moves past it).
fn entries(service: &Service, page: &[&Member]) -> Vec<Value> {
    let catalog = service.lock_catalog();
    let shards = service.lock_shards();
    page.iter()
        .filter_map(|m| {
            let snap = shards.snapshot(&m.def.id)?;
            let source = if catalog.is_api(&m.def.id) {
                "api"
            } else {
                "config"
            };
            let mut e = define::entry(&snap, source);
            e["state"] = json!(m.standing.as_str());
            e["rules_holding"] = json!(m.rules().iter().map(|r| r.as_str()).collect::<Vec<_>>());
            e["open_alerts"] = json!(m.alerts.open);
            e["summarised"] = json!(m.verdict.is_some());
            Some(e)
        })
        .collect()
}

/// The query of `GET /v1/alerts`.
#[derive(Debug, Default, serde::Deserialize)]
pub struct AlertsQuery {
    /// Only this experiment's alerts.
    pub experiment: Option<String>,
    /// Only alerts in this state.
    pub state: Option<String>,
    /// Only alerts of this rule.
    pub rule: Option<String>,
    /// Only alerts about this metric.
    pub metric: Option<String>,
    /// Page size.
    pub limit: Option<String>,
    /// The `next` cursor of the previous page.
    pub after: Option<String>,
}

/// Name of the alert list's one order (by opening time, then id) in cursors.
const ALERT_ORDER: &str = "opened";

/// `GET /v1/alerts`: one page of alerts, oldest opening first. An alert's opening time and id
/// never change, so a walk sees every alert that exists throughout exactly once.
pub async fn list_alerts(
    State(service): State<Arc<Service>>,
    Query(q): Query<AlertsQuery>,
) -> Response {
    let asked = (|| {
        let state = match q.state.as_deref() {
            None => None,
            Some(s) => Some(AlertState::from_name(s).ok_or_else(|| QueryError {
                param: "state",
                message: format!(
                    "must be one of {}",
                    AlertState::ALL.map(|s| s.as_str()).join(", ")
                ),
            })?),
        };
        let rule = match q.rule.as_deref() {
            None => None,
            Some(r) => Some(Rule::from_name(r).ok_or_else(|| QueryError {
                param: "rule",
                message: format!(
                    "must be one of {}",
                    Rule::ALL.map(|r| r.as_str()).join(", ")
                ),
            })?),
        };
        let limit = query::limit(q.limit.as_deref())?;
        let from = match q.after.as_deref() {
            None => None,
            Some(text) => Some(Cursor::decode(text, ALERT_ORDER)?),
        };
        Ok::<_, QueryError>((state, rule, limit, from))
    })();
    let (state, rule, limit, from) = match asked {
        Ok(a) => a,
        Err(e) => return refused(&e),
    };
    let (matched, next, alerts) = service.with_alerts(|book| {
        let mut kept: Vec<_> = book
            .alerts()
            .iter()
            .filter(|a| q.experiment.as_ref().is_none_or(|e| *e == a.key.experiment))
            .filter(|a| state.is_none_or(|s| s == a.state))
            .filter(|a| rule.is_none_or(|r| r == a.key.rule))
            .filter(|a| {
                q.metric
                    .as_ref()
                    .is_none_or(|m| a.key.metric.as_ref() == Some(m))
            })
            .collect();
        let matched = kept.len();
        if let Some(c) = &from {
            kept.retain(|a| (a.opened_at, a.id.as_str()) > (c.key.a, c.key.id.as_str()));
        }
        kept.sort_unstable_by(|x, y| (x.opened_at, &x.id).cmp(&(y.opened_at, &y.id)));
        let next = (kept.len() > limit).then(|| {
            let last = kept[limit - 1];
            Cursor {
                order: ALERT_ORDER,
                key: Key {
                    a: last.opened_at,
                    b: 0,
                    id: last.id.clone(),
                },
            }
            .encode()
        });
        let alerts: Vec<Value> = kept.iter().take(limit).map(|a| doc::alert(a)).collect();
        (matched, next, alerts)
    });
    Json(json!({
        "alerts": alerts,
        "matched": matched,
        "limit": limit,
        "next": next,
    }))
    .into_response()
}

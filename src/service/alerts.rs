//! The alert desk: the alert book, the outbox of deliveries not yet made, and the file that keeps
//! both, under one lock.
//!
//! The book and the pending deliveries live in one file (`<store.dir>/alerts.json`), replaced
//! atomically whenever either changes: an alert is never recorded without its deliveries, nor
//! a delivery without its alert. Each change becomes one CloudEvents 1.0 JSON envelope per
//! configured sink, fixed when the alert changes so that retries send identical bytes; the
//! sinks (an edge) take due deliveries from here and report back.

use std::path::{Path, PathBuf};
use std::time::Duration;

use serde_json::{json, Value};

use super::metrics::Metrics;
use super::store::{write_atomic, StoreError, StoreHealth};
use crate::config::AlertsConfig;
use crate::decide::alerts::{Alert, AlertBook, AlertChange, AlertKey, AlertState};
use crate::decide::{Finding, Rule};
use crate::event::Micros;

/// Why the stored alerts cannot be read.
#[derive(Debug, thiserror::Error)]
pub enum AlertFileError {
    /// The file exists but cannot be read.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What failed.
        source: std::io::Error,
    },
    /// The file is not the JSON this version writes (damaged while posteriord was stopped:
    /// it is only ever replaced whole).
    #[error("{path}: {source}. Fix: restore it from a backup; or move it aside (`mv {path} {path}.damaged`) to start with no alerts and no pending deliveries (alerts that still hold open again under new ids)", path = path.display())]
    Unreadable {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        source: serde_json::Error,
    },
}

/// One pending delivery of one alert change to one sink.
#[derive(Debug, Clone, PartialEq)]
pub struct Delivery {
    /// `webhook/<index>` or `kafka`.
    pub sink: String,
    /// The CloudEvent id (`<alert id>.<change>`).
    pub event_id: String,
    /// The exact body to send (fixed when the alert changed, so retries are identical).
    pub body: String,
    /// Experiment id, the Kafka message key.
    pub experiment: String,
    /// Attempts so far.
    pub attempts: u32,
    /// Not before this time (µs since the epoch).
    pub next_attempt: Micros,
}

/// The CloudEvent for one alert change.
pub fn cloud_event(alert: &Alert, change: &str, time: Micros) -> Value {
    let mut data = crate::doc::alert(alert);
    data["change"] = json!(change);
    json!({
        "specversion": "1.0",
        "type": format!("posteriord.alert.{change}"),
        "source": "/posteriord",
        "id": format!("{}.{change}", alert.id),
        "time": crate::doc::time_text(time),
        "subject": alert.key.experiment,
        "datacontenttype": "application/json",
        "data": data,
    })
}

/// Deliveries for `changes` to each of `sinks`.
fn deliveries_for(changes: &[AlertChange], sinks: &[String], now: Micros) -> Vec<Delivery> {
    let mut out = Vec::new();
    for change in changes {
        let (name, alert) = match change {
            AlertChange::Opened(a) => ("opened", a),
            AlertChange::Closed(a) => ("closed", a),
        };
        let event = cloud_event(alert, name, now);
        let body = event.to_string();
        let event_id = event["id"].as_str().unwrap_or_default().to_string();
        for sink in sinks {
            out.push(Delivery {
                sink: sink.clone(),
                event_id: event_id.clone(),
                body: body.clone(),
                experiment: alert.key.experiment.clone(),
                attempts: 0,
                next_attempt: now,
            });
        }
    }
    out
}

/// The alert book, its pending deliveries and (with a store) their file. Held behind one lock
/// by the service, so the three never disagree.
#[derive(Debug)]
pub struct AlertDesk {
    book: AlertBook,
    outbox: Vec<Delivery>,
    file: Option<AlertFile>,
    /// Sink names a change is delivered to, from the alert settings.
    sinks: Vec<String>,
    /// Where a failed write of the file is reported.
    health: Option<StoreHealth>,
}

/// What [`StoreHealth`] calls the alert file.
pub const ALERTS_FILE: &str = "alerts.json";

impl AlertDesk {
    /// An empty desk kept in memory only, with alerts held down `hold_down` µs.
    pub fn in_memory(cfg: &AlertsConfig) -> AlertDesk {
        AlertDesk {
            book: AlertBook::new(cfg.hold_down.as_micros() as i64),
            outbox: Vec::new(),
            file: None,
            sinks: sink_names(cfg),
            health: None,
        }
    }

    /// The desk stored in the store directory `dir` (empty when nothing is stored yet).
    pub fn restore(dir: &Path, cfg: &AlertsConfig) -> Result<AlertDesk, AlertFileError> {
        let file = AlertFile::new(dir);
        let (alerts, pending, evidence) = file.load()?;
        if !pending.is_empty() {
            tracing::info!(
                pending = pending.len(),
                "alert deliveries pending from before the restart"
            );
        }
        Ok(AlertDesk {
            book: {
                let mut book = AlertBook::from_alerts(alerts, cfg.hold_down.as_micros() as i64);
                for (key, processes) in evidence {
                    book.evidence_mut().import(&key, processes);
                }
                book
            },
            outbox: pending,
            file: Some(file),
            sinks: sink_names(cfg),
            health: None,
        })
    }

    /// The alert book.
    pub fn book(&self) -> &AlertBook {
        &self.book
    }

    /// Fold `changes` (already applied to the book) into the outbox, one delivery per sink,
    /// stamped `now`, and store both before anything is announced.
    pub(super) fn record(&mut self, changes: &[AlertChange], now: Micros) {
        self.outbox
            .extend(deliveries_for(changes, &self.sinks, now));
        self.save();
    }

    /// Mutable book, for the evaluator's fold (which then calls [`AlertDesk::record`]).
    pub(super) fn book_mut(&mut self) -> &mut AlertBook {
        &mut self.book
    }

    /// Acknowledge alert `id` at `now`, stored at once; the alert as it is now.
    pub(super) fn acknowledge(&mut self, id: &str, now: Micros) -> Option<Alert> {
        let alert = self.book.acknowledge(id, now).cloned();
        if alert.is_some() {
            self.save();
        }
        alert
    }

    /// Deliveries due at `now`.
    pub(super) fn due(&self, now: Micros) -> Vec<Delivery> {
        self.outbox
            .iter()
            .filter(|d| d.next_attempt <= now)
            .cloned()
            .collect()
    }

    /// Take the results of delivery attempts: a delivered one leaves the outbox, a failed one
    /// waits `backoff(attempts)` from `now`. Counted, logged, then stored.
    pub(super) fn settle(
        &mut self,
        results: &[(Delivery, Result<(), String>)],
        now: Micros,
        backoff: impl Fn(u32) -> Duration,
        metrics: &Metrics,
    ) {
        for (d, r) in results {
            let sink_kind = if d.sink == "kafka" {
                "kafka"
            } else {
                "webhook"
            };
            match r {
                Ok(()) => {
                    self.outbox
                        .retain(|p| !(p.sink == d.sink && p.event_id == d.event_id));
                    metrics
                        .alert_deliveries
                        .with_label_values(&[sink_kind, "ok"])
                        .inc();
                    tracing::info!(sink = %d.sink, event_id = %d.event_id, attempts = d.attempts + 1, "alert delivered");
                }
                Err(e) => {
                    if let Some(p) = self
                        .outbox
                        .iter_mut()
                        .find(|p| p.sink == d.sink && p.event_id == d.event_id)
                    {
                        p.attempts += 1;
                        p.next_attempt = now + backoff(p.attempts).as_micros() as i64;
                    }
                    metrics
                        .alert_deliveries
                        .with_label_values(&[sink_kind, "error"])
                        .inc();
                    if d.attempts < 3 || d.attempts % 20 == 0 {
                        tracing::warn!(sink = %d.sink, event_id = %d.event_id, attempts = d.attempts + 1, error = %e, "alert delivery failed; will retry");
                    }
                }
            }
        }
        self.save();
    }

    /// Experiment `id`'s part of the desk as JSON: its alerts and its pending deliveries (what
    /// an owner hands over with the experiment).
    pub(super) fn experiment_json(&self, id: &str, state_key: &str) -> Value {
        json!({
            "alerts": self.book.alerts().iter().filter(|a| a.key.experiment == id).map(alert_json).collect::<Vec<_>>(),
            "pending": self.outbox.iter().filter(|d| d.experiment == id).map(delivery_json).collect::<Vec<_>>(),
            "evidence": evidence_json(self.book.evidence(), state_key),
        })
    }

    /// Take experiment `id`'s alerts from `part` (an [`AlertDesk::experiment_json`] of another
    /// instance) in place of this desk's; with `deliveries`, also its pending deliveries not in
    /// the outbox yet (this instance now owns the experiment and sends them; a change sent by
    /// both carries one id). Stored at once.
    pub(super) fn adopt_experiment(
        &mut self,
        id: &str,
        state_key: &str,
        part: &Value,
        deliveries: bool,
    ) {
        let alerts = part["alerts"]
            .as_array()
            .map(|a| a.iter().filter_map(alert_from).collect())
            .unwrap_or_default();
        self.book.replace_experiment(id, alerts);
        self.book
            .evidence_mut()
            .import(state_key, evidence_from_json(&part["evidence"]));
        if deliveries {
            for d in part["pending"]
                .as_array()
                .map(|a| a.iter().filter_map(delivery_from).collect::<Vec<_>>())
                .unwrap_or_default()
            {
                let known = self
                    .outbox
                    .iter()
                    .any(|p| p.sink == d.sink && p.event_id == d.event_id);
                if !known && d.experiment == id && self.sinks.contains(&d.sink) {
                    self.outbox.push(d);
                }
            }
        }
        self.save();
    }

    /// Report failed and successful writes of the file to `health`.
    pub fn watch(&mut self, health: StoreHealth) {
        self.health = Some(health);
    }

    /// Write the book and the outbox together (no-op without a store). A failure is logged
    /// and reported; the service retries on its snapshot cadence.
    pub(super) fn save(&self) {
        let Some(file) = &self.file else { return };
        let result = file.save(&self.book, &self.outbox);
        if let Some(h) = &self.health {
            h.note(ALERTS_FILE, &result);
        }
        if let Err(e) = result {
            tracing::error!(error = %e, "cannot save alerts and their pending deliveries; will retry");
        }
    }
}

/// `webhook/<i>` per webhook, then `kafka` with an alerts topic.
fn sink_names(cfg: &AlertsConfig) -> Vec<String> {
    let mut sinks: Vec<String> = (0..cfg.webhooks.len())
        .map(|i| format!("webhook/{i}"))
        .collect();
    if cfg.kafka_topic.is_some() {
        sinks.push("kafka".into());
    }
    sinks
}

fn alert_json(a: &Alert) -> Value {
    json!({
        "id": a.id,
        "experiment": a.key.experiment,
        "metric": a.key.metric,
        "variant": a.key.variant,
        "rule": a.key.rule.as_str(),
        "state": a.state.as_str(),
        "opened_at": a.opened_at,
        "last_held_at": a.last_held_at,
        "closed_at": a.closed_at,
        "acknowledged_at": a.acknowledged_at,
        "finding": {
            "metric": a.finding.metric,
            "variant": a.finding.variant,
            "value": a.finding.value,
            "threshold": a.finding.threshold,
            "message": a.finding.message,
            "evidence": {
                "arms": a.finding.evidence.arms.iter().map(|x| json!({
                    "variant": x.variant, "name": x.name, "posterior": x.posterior.map(crate::doc::posterior_params), "units": x.units,
                })).collect::<Vec<_>>(),
                "event_time": a.finding.evidence.event_time,
                "positions": a.finding.evidence.positions.iter().map(|(s, n)| json!([s, n])).collect::<Vec<_>>(),
            },
        },
    })
}

fn alert_from(v: &Value) -> Option<Alert> {
    let rule = Rule::from_name(v["rule"].as_str()?)?;
    let state = AlertState::from_name(v["state"].as_str()?)?;
    let f = &v["finding"];
    Some(Alert {
        id: v["id"].as_str()?.to_string(),
        key: AlertKey {
            experiment: v["experiment"].as_str()?.to_string(),
            metric: v["metric"].as_str().map(str::to_string),
            variant: v["variant"].as_str().map(str::to_string),
            rule,
        },
        state,
        opened_at: v["opened_at"].as_i64()?,
        last_held_at: v["last_held_at"].as_i64()?,
        closed_at: v["closed_at"].as_i64(),
        acknowledged_at: v["acknowledged_at"].as_i64(),
        finding: Finding {
            rule,
            metric: f["metric"].as_u64().map(|m| m as usize),
            variant: f["variant"].as_u64().map(|m| m as usize),
            value: f["value"].as_f64()?,
            threshold: f["threshold"].as_f64()?,
            test: rule.test(),
            message: f["message"].as_str()?.to_string(),
            evidence: evidence_from(&f["evidence"]),
        },
    })
}

fn evidence_from(v: &Value) -> crate::decide::Evidence {
    let arms = v["arms"]
        .as_array()
        .map(|a| {
            a.iter()
                .filter_map(|x| {
                    // Named parameters; the pairs older versions wrote do not say their
                    // family, so such evidence comes back without its posterior (the next
                    // evaluation of a finding that still holds writes it again).
                    let p = &x["posterior"];
                    let posterior = match (p["alpha"].as_f64(), p["beta"].as_f64()) {
                        (Some(alpha), Some(beta)) => {
                            Some(crate::decide::PosteriorParams::Beta { alpha, beta })
                        }
                        _ => match (p["shape"].as_f64(), p["rate"].as_f64()) {
                            (Some(shape), Some(rate)) => {
                                Some(crate::decide::PosteriorParams::Gamma { shape, rate })
                            }
                            _ => None,
                        },
                    };
                    Some(crate::decide::ArmEvidence {
                        variant: x["variant"].as_u64()? as usize,
                        name: x["name"].as_str()?.to_string(),
                        posterior,
                        units: x["units"].as_u64()?,
                    })
                })
                .collect()
        })
        .unwrap_or_default();
    let positions = v["positions"]
        .as_array()
        .map(|a| {
            a.iter()
                .filter_map(|p| Some((p.get(0)?.as_str()?.to_string(), p.get(1)?.as_i64()?)))
                .collect()
        })
        .unwrap_or_default();
    crate::decide::Evidence {
        arms,
        event_time: v["event_time"].as_i64(),
        positions,
    }
}

/// One experiment's anytime-valid harm processes: (metric, variant, numbers).
type Evidence = Vec<(usize, usize, Vec<f64>)>;

/// Experiment `state_key`'s harm processes as JSON, numbers as IEEE bits so a handed-over or
/// restored process continues bit for bit.
fn evidence_json(book: &crate::decide::betting::EvidenceBook, state_key: &str) -> Value {
    Value::Array(
        book.export(state_key)
            .into_iter()
            .map(|(m, v, n)| json!([m, v, n.iter().map(|x| x.to_bits()).collect::<Vec<_>>()]))
            .collect(),
    )
}

fn evidence_from_json(v: &Value) -> Evidence {
    v.as_array()
        .map(|a| {
            a.iter()
                .filter_map(|p| {
                    Some((
                        p.get(0)?.as_u64()? as usize,
                        p.get(1)?.as_u64()? as usize,
                        p.get(2)?
                            .as_array()?
                            .iter()
                            .map(|x| x.as_u64().map(f64::from_bits))
                            .collect::<Option<Vec<f64>>>()?,
                    ))
                })
                .collect()
        })
        .unwrap_or_default()
}

fn delivery_json(d: &Delivery) -> Value {
    json!({
        "sink": d.sink, "event_id": d.event_id, "body": d.body,
        "experiment": d.experiment, "attempts": d.attempts, "next_attempt": d.next_attempt,
    })
}

fn delivery_from(d: &Value) -> Option<Delivery> {
    Some(Delivery {
        sink: d["sink"].as_str()?.to_string(),
        event_id: d["event_id"].as_str()?.to_string(),
        body: d["body"].as_str()?.to_string(),
        experiment: d["experiment"].as_str()?.to_string(),
        attempts: d["attempts"].as_u64()? as u32,
        next_attempt: d["next_attempt"].as_i64()?,
    })
}

/// The alert file: the book and the pending deliveries, together.
#[derive(Debug, Clone)]
struct AlertFile {
    path: PathBuf,
}

impl AlertFile {
    /// The alert file of the store at `dir`.
    fn new(dir: &Path) -> AlertFile {
        AlertFile {
            path: dir.join("alerts.json"),
        }
    }

    /// Atomically replace the file with `alerts` and `pending`.
    fn save(&self, book: &AlertBook, pending: &[Delivery]) -> Result<(), StoreError> {
        let evidence: serde_json::Map<String, Value> = book
            .evidence()
            .keys()
            .into_iter()
            .map(|k| {
                let v = evidence_json(book.evidence(), &k);
                (k, v)
            })
            .collect();
        let doc = json!({
            "version": 1,
            "alerts": book.alerts().iter().map(alert_json).collect::<Vec<_>>(),
            "evidence": evidence,
            "pending": pending.iter().map(delivery_json).collect::<Vec<_>>(),
        });
        write_atomic(&self.path, doc.to_string().as_bytes())
    }

    /// The stored alerts and pending deliveries (empty when there is no file yet).
    #[allow(clippy::type_complexity)]
    fn load(&self) -> Result<(Vec<Alert>, Vec<Delivery>, Vec<(String, Evidence)>), AlertFileError> {
        let text = match std::fs::read_to_string(&self.path) {
            Ok(t) => t,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                return Ok((Vec::new(), Vec::new(), Vec::new()))
            }
            Err(source) => {
                return Err(AlertFileError::Io {
                    path: self.path.clone(),
                    source,
                })
            }
        };
        let doc: Value =
            serde_json::from_str(&text).map_err(|source| AlertFileError::Unreadable {
                path: self.path.clone(),
                source,
            })?;
        let alerts = doc["alerts"]
            .as_array()
            .map(|a| a.iter().filter_map(alert_from).collect())
            .unwrap_or_default();
        let pending = doc["pending"]
            .as_array()
            .map(|a| a.iter().filter_map(delivery_from).collect())
            .unwrap_or_default();
        let evidence = doc["evidence"]
            .as_object()
            .map(|m| {
                m.iter()
                    .map(|(k, v)| (k.clone(), evidence_from_json(v)))
                    .collect()
            })
            .unwrap_or_default();
        Ok((alerts, pending, evidence))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::state::{ExperimentState, MetricTotals};
    use std::sync::Arc;

    /// The harm processes are stored with the book and continue after a restore, bit for bit.
    #[test]
    fn harm_processes_survive_a_restore() {
        let dir = tempfile::tempdir().unwrap();
        let cfg = crate::config::AlertsConfig::default();
        let def = Arc::new(crate::service::test_checkout_copy());
        let mut snap = ExperimentState::new(Arc::clone(&def)).snapshot();
        for (m, metric) in snap.metrics.iter_mut().enumerate() {
            if let MetricTotals::Conversion(t) = metric {
                t[0].trials = 900;
                t[0].successes = 110 + m as u64;
                t[1].trials = 880;
                t[1].successes = 40;
            }
        }
        let mut desk = AlertDesk::restore(dir.path(), &cfg).unwrap();
        desk.book_mut().evidence_mut().advance(&snap);
        let before = desk.book().evidence().export(&def.state_key());
        assert!(
            !before.is_empty(),
            "the metric has an anytime-valid harm rule"
        );
        desk.save();
        let restored = AlertDesk::restore(dir.path(), &cfg).unwrap();
        assert_eq!(restored.book().evidence().export(&def.state_key()), before);
    }
}

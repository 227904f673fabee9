//! Alert delivery: CloudEvents 1.0 JSON envelopes to signed webhooks and to a Kafka topic,
//! through a durable outbox so that an alert raised before a crash or during a receiver outage
//! is delivered afterwards, with its stable id as the idempotency key.
//!
//! The alert book and the pending deliveries live in one file (`<store.dir>/alerts.json`),
//! replaced atomically whenever either changes: an alert is never recorded without its
//! deliveries, nor a delivery without its alert. Delivery is at least once; receivers drop
//! repeats by the `id` of the event (also sent as `idempotency-key`).

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use hmac::{Hmac, Mac};
use rand::Rng;
use serde_json::{json, Value};
use sha2::Sha256;
use tokio_util::sync::CancellationToken;

use crate::app::Shared;
use crate::config::{AlertsConfig, KafkaConfig};
use crate::decide::alerts::{Alert, AlertBook, AlertChange, AlertKey, AlertState};
use crate::decide::{Finding, Rule};
use crate::event::Micros;

/// Header carrying `sha256=<hex HMAC-SHA256 of the body>` keyed with the webhook's secret.
pub const SIGNATURE_HEADER: &str = "posteriord-signature";
/// Header carrying the event id, for receivers that deduplicate on a header.
pub const IDEMPOTENCY_HEADER: &str = "idempotency-key";
/// Longest wait between two attempts of one delivery.
const MAX_BACKOFF: Duration = Duration::from_secs(60);
/// How often the delivery loop looks for due deliveries.
const DELIVERY_TICK: Duration = Duration::from_millis(250);

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
    let mut data = crate::http::doc::alert(alert);
    data["change"] = json!(change);
    json!({
        "specversion": "1.0",
        "type": format!("posteriord.alert.{change}"),
        "source": "/posteriord",
        "id": format!("{}.{change}", alert.id),
        "time": crate::http::doc::time_text(time),
        "subject": alert.key.experiment,
        "datacontenttype": "application/json",
        "data": data,
    })
}

/// Hex HMAC-SHA256 of `body` under `secret`.
pub fn sign(secret: &[u8], body: &[u8]) -> String {
    let mut mac = Hmac::<Sha256>::new_from_slice(secret).expect("HMAC takes keys of any length");
    mac.update(body);
    let bytes = mac.finalize().into_bytes();
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// Deliveries for `changes` to every configured sink.
pub fn deliveries_for(changes: &[AlertChange], cfg: &AlertsConfig, now: Micros) -> Vec<Delivery> {
    let mut out = Vec::new();
    for change in changes {
        let (name, alert) = match change {
            AlertChange::Opened(a) => ("opened", a),
            AlertChange::Closed(a) => ("closed", a),
        };
        let event = cloud_event(alert, name, now);
        let body = event.to_string();
        let event_id = event["id"].as_str().unwrap_or_default().to_string();
        let mut sinks: Vec<String> = (0..cfg.webhooks.len())
            .map(|i| format!("webhook/{i}"))
            .collect();
        if cfg.kafka_topic.is_some() {
            sinks.push("kafka".into());
        }
        for sink in sinks {
            out.push(Delivery {
                sink,
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

/// Wait before attempt `attempts + 1`: exponential from 0.5 s, capped, with full jitter so
/// many instances do not retry in step.
fn backoff(attempts: u32) -> Duration {
    let base = Duration::from_millis(500).saturating_mul(1 << attempts.min(10));
    let cap = base.min(MAX_BACKOFF);
    let jitter = rand::rng().random_range(0.5..=1.0);
    cap.mul_f64(jitter)
}

// ---- persistence -------------------------------------------------------------------------

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
                    "variant": x.variant, "name": x.name, "posterior": x.posterior.map(|(p, q)| [p, q]), "units": x.units,
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
                    let posterior = x["posterior"]
                        .as_array()
                        .and_then(|p| Some((p.first()?.as_f64()?, p.get(1)?.as_f64()?)));
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

/// The alert file: the book and the pending deliveries, together.
#[derive(Debug, Clone)]
pub struct AlertFile {
    path: PathBuf,
}

impl AlertFile {
    /// The alert file of the store at `dir`.
    pub fn new(dir: &Path) -> AlertFile {
        AlertFile {
            path: dir.join("alerts.json"),
        }
    }

    /// Atomically replace the file with `alerts` and `pending`.
    pub fn save(&self, alerts: &[Alert], pending: &[Delivery]) -> std::io::Result<()> {
        let doc = json!({
            "version": 1,
            "alerts": alerts.iter().map(alert_json).collect::<Vec<_>>(),
            "pending": pending.iter().map(|d| json!({
                "sink": d.sink, "event_id": d.event_id, "body": d.body,
                "experiment": d.experiment, "attempts": d.attempts, "next_attempt": d.next_attempt,
            })).collect::<Vec<_>>(),
        });
        let tmp = self.path.with_extension("json.tmp");
        {
            use std::io::Write;
            let mut f = std::fs::File::create(&tmp)?;
            f.write_all(doc.to_string().as_bytes())?;
            f.sync_all()?;
        }
        std::fs::rename(&tmp, &self.path)?;
        if let Some(dir) = self.path.parent() {
            std::fs::File::open(dir)?.sync_all()?;
        }
        Ok(())
    }

    /// The stored alerts and pending deliveries (empty when there is no file yet).
    pub fn load(&self) -> Result<(Vec<Alert>, Vec<Delivery>), String> {
        let text = match std::fs::read_to_string(&self.path) {
            Ok(t) => t,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                return Ok((Vec::new(), Vec::new()))
            }
            Err(e) => return Err(format!("{}: {e}", self.path.display())),
        };
        let doc: Value =
            serde_json::from_str(&text).map_err(|e| format!("{}: {e}", self.path.display()))?;
        let alerts = doc["alerts"]
            .as_array()
            .map(|a| a.iter().filter_map(alert_from).collect())
            .unwrap_or_default();
        let pending = doc["pending"]
            .as_array()
            .map(|a| {
                a.iter()
                    .filter_map(|d| {
                        Some(Delivery {
                            sink: d["sink"].as_str()?.to_string(),
                            event_id: d["event_id"].as_str()?.to_string(),
                            body: d["body"].as_str()?.to_string(),
                            experiment: d["experiment"].as_str()?.to_string(),
                            attempts: d["attempts"].as_u64()? as u32,
                            next_attempt: d["next_attempt"].as_i64()?,
                        })
                    })
                    .collect()
            })
            .unwrap_or_default();
        Ok((alerts, pending))
    }
}

// ---- delivery ----------------------------------------------------------------------------

/// Sends deliveries to their sinks.
pub struct Sinks {
    http: reqwest::Client,
    webhooks: Vec<crate::config::WebhookConfig>,
    kafka: Option<(String, rdkafka::producer::FutureProducer)>,
}

impl Sinks {
    /// Clients for the configured sinks.
    pub fn new(cfg: &AlertsConfig, kafka: Option<&KafkaConfig>) -> Result<Sinks, String> {
        let http = reqwest::Client::builder()
            .timeout(Duration::from_secs(10))
            .build()
            .map_err(|e| format!("cannot build the webhook client: {e}"))?;
        let kafka = match (&cfg.kafka_topic, kafka) {
            (None, _) => None,
            (Some(_), None) => {
                return Err("alerts.kafka needs a [kafka] section for the brokers".into())
            }
            (Some(topic), Some(k)) => {
                let mut c = crate::kafka::producer_config(k);
                c.set("client.id", "posteriord-alerts");
                let p = c
                    .create()
                    .map_err(|e| format!("cannot create the alerts producer: {e}"))?;
                Some((topic.clone(), p))
            }
        };
        Ok(Sinks {
            http,
            webhooks: cfg.webhooks.clone(),
            kafka,
        })
    }

    async fn send(&self, d: &Delivery) -> Result<(), String> {
        if let Some(i) = d.sink.strip_prefix("webhook/") {
            let hook = i
                .parse::<usize>()
                .ok()
                .and_then(|i| self.webhooks.get(i))
                .ok_or_else(|| format!("sink {} is no longer configured", d.sink))?;
            let signature = format!("sha256={}", sign(&hook.secret, d.body.as_bytes()));
            let r = self
                .http
                .post(&hook.url)
                .header(
                    "content-type",
                    "application/cloudevents+json; charset=utf-8",
                )
                .header(SIGNATURE_HEADER, signature)
                .header(IDEMPOTENCY_HEADER, &d.event_id)
                .body(d.body.clone())
                .send()
                .await
                .map_err(|e| format!("POST {}: {e}", hook.url))?;
            if r.status().is_success() {
                Ok(())
            } else {
                Err(format!("POST {}: status {}", hook.url, r.status()))
            }
        } else if d.sink == "kafka" {
            let (topic, producer) = self
                .kafka
                .as_ref()
                .ok_or("alerts.kafka is no longer configured")?;
            let headers = rdkafka::message::OwnedHeaders::new()
                .insert(rdkafka::message::Header {
                    key: "ce_id",
                    value: Some(d.event_id.as_str()),
                })
                .insert(rdkafka::message::Header {
                    key: "content-type",
                    value: Some("application/cloudevents+json"),
                });
            let record = rdkafka::producer::FutureRecord::to(topic)
                .key(&d.experiment)
                .payload(&d.body)
                .headers(headers);
            producer
                .send(record, Duration::from_secs(10))
                .await
                .map(|_| ())
                .map_err(|(e, _)| format!("alerts topic {topic}: {e}"))
        } else {
            Err(format!("unknown sink {}", d.sink))
        }
    }
}

/// Deliver pending alert events until shutdown (and once more at shutdown).
pub async fn deliver_loop(shared: Arc<Shared>, sinks: Sinks, shutdown: CancellationToken) {
    loop {
        let stop = tokio::select! {
            _ = shutdown.cancelled() => true,
            _ = tokio::time::sleep(DELIVERY_TICK) => false,
        };
        deliver_due(&shared, &sinks).await;
        if stop {
            break;
        }
    }
}

async fn deliver_due(shared: &Shared, sinks: &Sinks) {
    let now = crate::app::now_micros();
    let due: Vec<Delivery> = shared
        .lock_outbox()
        .iter()
        .filter(|d| d.next_attempt <= now)
        .cloned()
        .collect();
    if due.is_empty() {
        return;
    }
    let mut results = Vec::with_capacity(due.len());
    for d in &due {
        results.push(sinks.send(d).await);
    }
    {
        let mut pending = shared.lock_outbox();
        for (d, r) in due.iter().zip(&results) {
            let sink_kind = if d.sink == "kafka" {
                "kafka"
            } else {
                "webhook"
            };
            match r {
                Ok(()) => {
                    pending.retain(|p| !(p.sink == d.sink && p.event_id == d.event_id));
                    shared
                        .metrics
                        .alert_deliveries
                        .with_label_values(&[sink_kind, "ok"])
                        .inc();
                    tracing::info!(sink = %d.sink, event_id = %d.event_id, attempts = d.attempts + 1, "alert delivered");
                }
                Err(e) => {
                    if let Some(p) = pending
                        .iter_mut()
                        .find(|p| p.sink == d.sink && p.event_id == d.event_id)
                    {
                        p.attempts += 1;
                        p.next_attempt = now + backoff(p.attempts).as_micros() as i64;
                    }
                    shared
                        .metrics
                        .alert_deliveries
                        .with_label_values(&[sink_kind, "error"])
                        .inc();
                    if d.attempts < 3 || d.attempts % 20 == 0 {
                        tracing::warn!(sink = %d.sink, event_id = %d.event_id, attempts = d.attempts + 1, error = %e, "alert delivery failed; will retry");
                    }
                }
            }
        }
    }
    shared.save_alerts();
}

/// Restore the alert book and outbox from `file`.
pub fn restore(file: &AlertFile, hold_down: Micros) -> Result<(AlertBook, Vec<Delivery>), String> {
    let (alerts, pending) = file.load()?;
    Ok((AlertBook::from_alerts(alerts, hold_down), pending))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hmac_matches_the_rfc_4231_test_vector() {
        // RFC 4231, test case 2: key "Jefe", data "what do ya want for nothing?".
        assert_eq!(
            sign(b"Jefe", b"what do ya want for nothing?"),
            "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
        );
    }

    #[test]
    fn backoff_grows_and_is_capped() {
        assert!(backoff(0) <= Duration::from_millis(500));
        assert!(backoff(3) >= Duration::from_secs(2));
        assert!(backoff(40) <= MAX_BACKOFF);
    }
}

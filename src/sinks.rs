//! Alert sinks: the deliveries the service's alert desk holds, sent as CloudEvents 1.0 JSON to
//! webhooks signed per the Standard Webhooks specification and to a Kafka topic, with the
//! event's stable id as the idempotency key. Delivery is at least once; receivers drop repeats
//! by the `id` of the event (also sent as `webhook-id`). Each alert carries the caution that
//! posteriors assume the model and that data quality comes first.
//!
//! The signature is written here with the `hmac`, `sha2` and `base64` crates: it is three
//! headers and one MAC, and the Standard Webhooks libraries for Rust bring an HTTP stack of
//! their own.

use std::sync::Arc;
use std::time::Duration;

use hmac::{Hmac, Mac};
use rand::Rng;
use sha2::Sha256;
use tokio_util::sync::CancellationToken;

use crate::config::{AlertsConfig, KafkaConfig};
use crate::service::alerts::Delivery;
use crate::service::{now_micros, Service};

/// Standard Webhooks: the message id, the same for every attempt (the CloudEvent's `id`).
pub const ID_HEADER: &str = "webhook-id";
/// Standard Webhooks: the attempt's time in whole seconds since the Unix epoch.
pub const TIMESTAMP_HEADER: &str = "webhook-timestamp";
/// Standard Webhooks: `v1,<base64 HMAC-SHA256 of "{id}.{timestamp}.{body}">`.
pub const SIGNATURE_HEADER: &str = "webhook-signature";
/// Longest wait between two attempts of one delivery.
const MAX_BACKOFF: Duration = Duration::from_secs(60);
/// How often the delivery loop looks for due deliveries.
const DELIVERY_TICK: Duration = Duration::from_millis(250);

/// The `webhook-signature` value for one attempt: `v1,` and the base64 HMAC-SHA256, keyed
/// with the webhook's key, of `{id}.{timestamp}.{body}` (Standard Webhooks, version 1).
pub fn sign(key: &[u8], id: &str, timestamp: i64, body: &[u8]) -> String {
    use base64::Engine;
    let mut mac = Hmac::<Sha256>::new_from_slice(key).expect("HMAC takes keys of any length");
    mac.update(id.as_bytes());
    mac.update(b".");
    mac.update(timestamp.to_string().as_bytes());
    mac.update(b".");
    mac.update(body);
    let bytes = mac.finalize().into_bytes();
    format!(
        "v1,{}",
        base64::engine::general_purpose::STANDARD.encode(bytes)
    )
}

/// Wait before attempt `attempts + 1`: exponential from 0.5 s, capped, with full jitter so
/// many instances do not retry in step.
fn backoff(attempts: u32) -> Duration {
    let base = Duration::from_millis(500).saturating_mul(1 << attempts.min(10));
    let cap = base.min(MAX_BACKOFF);
    let jitter = rand::rng().random_range(0.5..=1.0);
    cap.mul_f64(jitter)
}

/// Why the sinks cannot be set up.
#[derive(Debug, thiserror::Error)]
pub enum SinkError {
    /// The HTTP client for webhooks.
    #[error("cannot build the webhook client: {0}")]
    WebhookClient(#[source] reqwest::Error),
    /// An alerts topic without brokers.
    #[error("alerts.kafka needs a [kafka] section for the brokers")]
    NoBrokers,
    /// The Kafka producer for the alerts topic.
    #[error("cannot create the alerts producer: {0}")]
    Producer(#[source] rdkafka::error::KafkaError),
}

/// Sends deliveries to their sinks.
pub struct Sinks {
    http: reqwest::Client,
    webhooks: Vec<crate::config::WebhookConfig>,
    kafka: Option<(String, rdkafka::producer::FutureProducer)>,
}

impl Sinks {
    /// Clients for the configured sinks.
    pub fn new(cfg: &AlertsConfig, kafka: Option<&KafkaConfig>) -> Result<Sinks, SinkError> {
        let http = reqwest::Client::builder()
            .timeout(Duration::from_secs(10))
            .build()
            .map_err(SinkError::WebhookClient)?;
        let kafka = match (&cfg.kafka_topic, kafka) {
            (None, _) => None,
            (Some(_), None) => return Err(SinkError::NoBrokers),
            (Some(topic), Some(k)) => {
                let mut c = crate::kafka::client::producer_config(k);
                c.set("client.id", "posteriord-alerts");
                let p = c.create().map_err(SinkError::Producer)?;
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
            // The time of this attempt, not of the alert: receivers refuse timestamps far from
            // their clock, and a retry after an outage must still verify.
            let timestamp = now_micros().div_euclid(1_000_000);
            let signature = sign(&hook.secret, &d.event_id, timestamp, d.body.as_bytes());
            let r = self
                .http
                .post(&hook.url)
                .header(
                    "content-type",
                    "application/cloudevents+json; charset=utf-8",
                )
                .header(ID_HEADER, &d.event_id)
                .header(TIMESTAMP_HEADER, timestamp.to_string())
                .header(SIGNATURE_HEADER, signature)
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
pub async fn deliver_loop(service: Arc<Service>, sinks: Sinks, shutdown: CancellationToken) {
    loop {
        let stop = tokio::select! {
            _ = shutdown.cancelled() => true,
            _ = tokio::time::sleep(DELIVERY_TICK) => false,
        };
        deliver_due(&service, &sinks).await;
        if stop {
            break;
        }
    }
}

async fn deliver_due(service: &Service, sinks: &Sinks) {
    let now = now_micros();
    let due = service.due_deliveries(now);
    if due.is_empty() {
        return;
    }
    let mut results = Vec::with_capacity(due.len());
    for d in due {
        let r = sinks.send(&d).await;
        results.push((d, r));
    }
    service.settle_deliveries(&results, now, backoff);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn signature_matches_the_standard_webhooks_reference_vector() {
        // The example message of the Standard Webhooks reference libraries (values from memory
        // of their test suites), checked against the PyPI `standardwebhooks` 1.1.0 verifier:
        // `Webhook(secret).sign(id, 1614265330, body)` gives the same string.
        let key = crate::config::webhook_key("whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw").unwrap();
        assert_eq!(
            sign(
                &key,
                "msg_p5jXN8AQM9LWM0D4loKWxJek",
                1614265330,
                br#"{"test": 2432232314}"#
            ),
            "v1,g0hM9SsE+OTPJTGt/tmIKtSyZlE3uFJELVlNIOLJ1OE="
        );
    }

    #[test]
    fn backoff_grows_and_is_capped() {
        assert!(backoff(0) <= Duration::from_millis(500));
        assert!(backoff(3) >= Duration::from_secs(2));
        assert!(backoff(40) <= MAX_BACKOFF);
    }
}

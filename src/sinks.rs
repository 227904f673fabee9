//! Alert sinks: the deliveries the service's alert desk holds, sent as CloudEvents 1.0 JSON to
//! signed webhooks and to a Kafka topic, with the event's stable id as the idempotency key.
//! Delivery is at least once; receivers drop repeats by the `id` of the event (also sent as
//! `idempotency-key`). Each alert carries the caution that posteriors assume the model and that
//! data quality comes first.

use std::sync::Arc;
use std::time::Duration;

use hmac::{Hmac, Mac};
use rand::Rng;
use sha2::Sha256;
use tokio_util::sync::CancellationToken;

use crate::config::{AlertsConfig, KafkaConfig};
use crate::service::alerts::Delivery;
use crate::service::{now_micros, Service};

/// Header carrying `sha256=<hex HMAC-SHA256 of the body>` keyed with the webhook's secret.
pub const SIGNATURE_HEADER: &str = "posteriord-signature";
/// Header carrying the event id, for receivers that deduplicate on a header.
pub const IDEMPOTENCY_HEADER: &str = "idempotency-key";
/// Longest wait between two attempts of one delivery.
const MAX_BACKOFF: Duration = Duration::from_secs(60);
/// How often the delivery loop looks for due deliveries.
const DELIVERY_TICK: Duration = Duration::from_millis(250);

/// Hex HMAC-SHA256 of `body` under `secret`.
pub fn sign(secret: &[u8], body: &[u8]) -> String {
    let mut mac = Hmac::<Sha256>::new_from_slice(secret).expect("HMAC takes keys of any length");
    mac.update(body);
    let bytes = mac.finalize().into_bytes();
    bytes.iter().map(|b| format!("{b:02x}")).collect()
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

//! The Kafka client settings every posteriord client is built from (consumer, producers,
//! admin), and topic creation. Shared by the consumer, the changelog and the alert sinks.

use std::time::Duration;

use rdkafka::config::ClientConfig;
use rdkafka::consumer::BaseConsumer;
use rdkafka::error::KafkaError;

use crate::config::KafkaConfig;

/// Properties posteriord sets itself because its delivery guarantee depends on them.
const OWNED_PROPERTIES: [(&str, &str); 2] = [
    // Offsets are stored by hand after the events are applied ...
    ("enable.auto.offset.store", "false"),
    // ... and committed in the background from what was stored (for lag tooling).
    ("enable.auto.commit", "true"),
];

/// The consumer's librdkafka configuration for `cfg`: our defaults, then the user's
/// properties, then the properties the delivery guarantee depends on.
pub fn client_config(cfg: &KafkaConfig) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", &cfg.brokers)
        .set("group.id", &cfg.group)
        .set("auto.offset.reset", "earliest")
        .set("client.id", "posteriord")
        .set("statistics.interval.ms", "5000");
    for (k, v) in &cfg.properties {
        c.set(k, v);
    }
    for (k, v) in OWNED_PROPERTIES {
        if cfg.properties.get(k).is_some_and(|user| user != v) {
            tracing::warn!(property = k, "ignoring kafka.properties.{k}: posteriord sets it to {v} so offsets follow applied events");
        }
        c.set(k, v);
    }
    c
}

/// Check that librdkafka accepts the configured properties (names, values, and features of
/// this build such as TLS and SASL mechanisms) without connecting anywhere.
pub fn check_properties(cfg: &KafkaConfig) -> Result<(), String> {
    let consumer: Result<BaseConsumer, KafkaError> = client_config(cfg).create();
    match consumer {
        Ok(_) => Ok(()),
        Err(KafkaError::ClientCreation(message)) => Err(format!(
            "kafka.properties: librdkafka refused them: {message}"
        )),
        Err(e) => Err(format!("kafka.properties: {e}")),
    }
}

/// Connection and security properties of `cfg` (brokers, TLS, SASL, sockets), without the
/// consumer-only ones: the base of every client posteriord creates besides the consumer.
pub fn connection_config(cfg: &KafkaConfig) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", &cfg.brokers);
    for (k, v) in &cfg.properties {
        let shared = k.starts_with("security.")
            || k.starts_with("sasl.")
            || k.starts_with("ssl.")
            || k.starts_with("socket.")
            || k.starts_with("broker.")
            || k == "client.dns.lookup";
        if shared {
            c.set(k, v);
        }
    }
    c
}

/// An idempotent producer's configuration (dead letters, alerts).
pub fn producer_config(cfg: &KafkaConfig) -> ClientConfig {
    let mut c = connection_config(cfg);
    c.set("client.id", "posteriord-dead-letters")
        .set("enable.idempotence", "true")
        .set("linger.ms", "5");
    c
}

/// Create `topic` if the cluster does not have it, with `partitions` partitions,
/// broker-default replication and the given topic `settings`; returns its partition count.
/// Dead letters, alerts and the changelog thus have somewhere to go on clusters without topic
/// auto-creation.
pub async fn ensure_topic_with(
    cfg: &KafkaConfig,
    topic: &str,
    partitions: i32,
    settings: &[(&str, &str)],
) -> Result<i32, KafkaError> {
    use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
    use rdkafka::client::DefaultClientContext;
    let admin: AdminClient<DefaultClientContext> = connection_config(cfg).create()?;
    let existing = |admin: &AdminClient<DefaultClientContext>| -> Result<Option<i32>, KafkaError> {
        let md = admin
            .inner()
            .fetch_metadata(Some(topic), Duration::from_secs(10))?;
        Ok(md
            .topics()
            .iter()
            .find(|t| t.name() == topic && t.error().is_none() && !t.partitions().is_empty())
            .map(|t| t.partitions().len() as i32))
    };
    if let Some(n) = existing(&admin)? {
        return Ok(n);
    }
    let mut new = NewTopic::new(topic, partitions.max(1), TopicReplication::Fixed(-1));
    for (k, v) in settings {
        new = new.set(k, v);
    }
    let results = admin
        .create_topics(
            [&new],
            &AdminOptions::new().operation_timeout(Some(Duration::from_secs(10))),
        )
        .await?;
    for r in results {
        match r {
            Ok(_) => tracing::info!(topic, partitions, ?settings, "created the topic"),
            Err((_, rdkafka::types::RDKafkaErrorCode::TopicAlreadyExists)) => {}
            Err((name, code)) => {
                return Err(KafkaError::AdminOp(code)).inspect_err(|_| {
                    tracing::error!(topic = %name, error = %code, "cannot create the topic; create it by hand");
                })
            }
        }
    }
    Ok(existing(&admin)?.unwrap_or(partitions.max(1)))
}

/// [`ensure_topic_with`] for a plain one-partition topic.
pub async fn ensure_topic(cfg: &KafkaConfig, topic: &str) -> Result<(), KafkaError> {
    ensure_topic_with(cfg, topic, 1, &[]).await.map(|_| ())
}

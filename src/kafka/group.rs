//! The partials topic of a consumer group deciding experiments together
//! (`service::group`, docs/scaling-design.md): a compacted topic of one partition, so every
//! instance reads the messages in the order they were published. Each instance publishes its
//! co-partitioned shards' partials and heartbeats, follows the whole topic from the start, and
//! publishes the acknowledgements of the boundaries it evaluated as an owner.

use std::time::Duration;

use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::producer::{BaseRecord, Producer, ThreadedProducer};
use rdkafka::{Offset, TopicPartitionList};
use tokio_util::sync::CancellationToken;

use super::changelog::DeliveryCheck;
use super::client::{connection_config, ensure_topic_with};
use crate::config::KafkaConfig;
use crate::service::group::GroupMessage;
use crate::service::Service;

/// How often a follower at the end of the topic asks where the end is now.
const END_REFRESH: Duration = Duration::from_secs(1);

/// How often the follower evaluates the experiments it owns that have boundaries ready.
const SWEEP_INTERVAL: Duration = Duration::from_millis(250);

/// How long a publication waits for delivery.
const PUBLISH_TIMEOUT: Duration = Duration::from_secs(10);

/// The partials topic's name for a changelog topic.
pub fn topic_for(changelog_topic: &str) -> String {
    format!("{changelog_topic}-partials")
}

/// A producer on the partials topic.
pub struct GroupTopic {
    topic: String,
    producer: ThreadedProducer<DeliveryCheck>,
}

impl GroupTopic {
    /// Connect, creating the compacted one-partition topic if it is missing.
    pub async fn open(cfg: &KafkaConfig, topic: &str) -> Result<GroupTopic, KafkaError> {
        ensure_topic_with(cfg, topic, 1, &[("cleanup.policy", "compact")]).await?;
        let mut pc = connection_config(cfg);
        pc.set("client.id", "posteriord-partials")
            .set("enable.idempotence", "true")
            .set("linger.ms", "5");
        Ok(GroupTopic {
            topic: topic.to_string(),
            producer: pc.create_with_context(DeliveryCheck::default())?,
        })
    }

    /// The topic's name.
    pub fn topic(&self) -> &str {
        &self.topic
    }

    /// Publish `messages` in order and wait until all are delivered.
    pub fn publish(&self, messages: &[GroupMessage]) -> Result<(), KafkaError> {
        if messages.is_empty() {
            return Ok(());
        }
        let refused_before = self.producer.context().refused();
        for m in messages {
            let mut record: BaseRecord<'_, str, [u8]> = BaseRecord::to(&self.topic)
                .key(m.key.as_str())
                .payload(m.value.as_slice())
                .partition(0);
            loop {
                match self.producer.send(record) {
                    Ok(()) => break,
                    Err((
                        KafkaError::MessageProduction(rdkafka::types::RDKafkaErrorCode::QueueFull),
                        r,
                    )) => {
                        record = r;
                        std::thread::sleep(Duration::from_millis(10));
                    }
                    Err((e, _)) => return Err(e),
                }
            }
        }
        self.producer.flush(PUBLISH_TIMEOUT)?;
        self.producer.context().check(refused_before)
    }
}

/// Publish what the local shards have for the group; `false` (logged) if it could not be
/// delivered — the entries stay pending and go out with the next publication.
pub fn publish_pending(service: &Service, topic: &GroupTopic) -> bool {
    let messages = service.take_group_messages();
    match topic.publish(&messages) {
        Ok(()) => true,
        Err(e) => {
            service.requeue_group_messages();
            tracing::warn!(topic = topic.topic(), error = %e, "cannot publish partials; will retry");
            false
        }
    }
}

/// Follow the partials topic from its beginning until `shutdown`, handing every message to
/// the service and publishing the acknowledgements it returns.
pub fn follow(
    cfg: &KafkaConfig,
    topic: &GroupTopic,
    service: &Service,
    shutdown: &CancellationToken,
) -> Result<(), KafkaError> {
    let mut cc = connection_config(cfg);
    cc.set("group.id", "posteriord-partials-follower")
        .set("enable.auto.commit", "false")
        .set("client.id", "posteriord-partials-follower");
    let consumer: BaseConsumer = cc.create()?;
    let mut tpl = TopicPartitionList::new();
    tpl.add_partition_offset(topic.topic(), 0, Offset::Beginning)?;
    consumer.assign(&tpl)?;
    let mut last_sweep = std::time::Instant::now();
    // The topic's end as last asked for, when, and the next offset to read.
    let mut end = consumer
        .fetch_watermarks(topic.topic(), 0, Duration::from_secs(10))
        .map_or(0, |(_, high)| high);
    let mut asked = std::time::Instant::now();
    let mut next: i64 = 0;
    while !shutdown.is_cancelled() {
        if let Some(Ok(m)) = consumer.poll(Duration::from_millis(100)) {
            next = m.offset() + 1;
            if let Some(key) = m.key() {
                service.offer_group_message(key, m.payload());
            }
        }
        if last_sweep.elapsed() < SWEEP_INTERVAL {
            continue;
        }
        last_sweep = std::time::Instant::now();
        // Evaluate only once the topic is read to the end it had at most a second ago: what
        // lies behind may acknowledge those boundaries already. (Heartbeats keep coming, so
        // the end of this very moment is never quite reached; an acknowledgement of the last
        // second is the race that deterministic alert ids absorb.) Experiments whose
        // partition this instance gained by a rebalance are evaluated here too.
        if next < end {
            continue;
        }
        if asked.elapsed() >= END_REFRESH {
            if let Ok((_, high)) =
                consumer.fetch_watermarks(topic.topic(), 0, Duration::from_secs(2))
            {
                end = high;
                asked = std::time::Instant::now();
            }
        }
        let acks = service.evaluate_group_ready();
        while let Err(e) = topic.publish(&acks) {
            // An evaluated boundary must be acknowledged, or the shards keep its entries and
            // a new owner evaluates it again.
            tracing::warn!(error = %e, "cannot publish an acknowledgement; retrying");
            if shutdown.is_cancelled() {
                break;
            }
            std::thread::sleep(Duration::from_millis(500));
        }
    }
    Ok(())
}

//! The Kafka source: a consumer-group member that applies events in batches and stores each
//! partition's offset only after its events are applied, plus a broker probe for readiness.
//!
//! Consumption runs on a dedicated blocking thread with librdkafka's poll loop: applying events
//! is synchronous CPU work, and a thread lets one batch be decoded and applied under a single
//! lock without hopping between async tasks.

use std::collections::HashMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use rdkafka::config::ClientConfig;
use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::{Offset, TopicPartitionList};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::app::Shared;
use crate::config::KafkaConfig;
use crate::metrics::Source;

/// Most messages applied under one lock.
const MAX_BATCH: usize = 2_000;
/// How long a batch may wait to fill up before it is applied anyway.
const MAX_BATCH_WAIT: Duration = Duration::from_millis(20);
/// How often the shutdown token is checked while the topic is idle.
const POLL_TIMEOUT: Duration = Duration::from_millis(100);
/// How often readiness asks the brokers for metadata.
const PROBE_INTERVAL: Duration = Duration::from_secs(2);

/// Properties posteriord sets itself because its delivery guarantee depends on them.
const OWNED_PROPERTIES: [(&str, &str); 2] = [
    // Offsets are stored by hand after the events are applied ...
    ("enable.auto.offset.store", "false"),
    // ... and committed in the background from what was stored.
    ("enable.auto.commit", "true"),
];

/// The librdkafka configuration for `cfg`: our defaults, then the user's properties, then the
/// properties the delivery guarantee depends on.
pub fn client_config(cfg: &KafkaConfig) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", &cfg.brokers)
        .set("group.id", &cfg.group)
        .set("auto.offset.reset", "earliest")
        .set("client.id", "posteriord");
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

/// Start the consumer thread and the broker probe on `tracker`.
pub fn start(
    cfg: &KafkaConfig,
    shared: Arc<Shared>,
    shutdown: CancellationToken,
    tracker: &TaskTracker,
) -> Result<(), KafkaError> {
    let consumer: BaseConsumer = client_config(cfg).create()?;
    let topics: Vec<&str> = cfg.topics.iter().map(String::as_str).collect();
    consumer.subscribe(&topics)?;
    tracing::info!(brokers = %cfg.brokers, topics = ?cfg.topics, group = %cfg.group, "kafka consumer subscribed");

    let probe: BaseConsumer = client_config(cfg).create()?;
    {
        let shared = Arc::clone(&shared);
        let shutdown = shutdown.clone();
        tracker.spawn_blocking(move || probe_loop(&probe, &shared, &shutdown));
    }
    tracker.spawn_blocking(move || consume_loop(&consumer, &shared, &shutdown));
    Ok(())
}

fn probe_loop(probe: &BaseConsumer, shared: &Shared, shutdown: &CancellationToken) {
    let mut last: Option<bool> = None;
    while !shutdown.is_cancelled() {
        let started = Instant::now();
        let reachable = probe.fetch_metadata(None, PROBE_INTERVAL).is_ok();
        shared.set_kafka_reachable(reachable);
        if last != Some(reachable) {
            if reachable {
                tracing::info!("kafka brokers reachable");
            } else {
                tracing::warn!("kafka brokers unreachable; readiness is false until they answer");
            }
            last = Some(reachable);
        }
        // Sleep the rest of the interval in small steps so shutdown is not delayed.
        while !shutdown.is_cancelled() && started.elapsed() < PROBE_INTERVAL {
            std::thread::sleep(Duration::from_millis(50));
        }
    }
}

fn consume_loop(consumer: &BaseConsumer, shared: &Shared, shutdown: &CancellationToken) {
    // Next offset to commit per partition, i.e. last applied + 1.
    let mut applied: HashMap<(String, i32), i64> = HashMap::new();
    let mut last_error_log = Instant::now() - Duration::from_secs(60);
    while !shutdown.is_cancelled() {
        let mut batch = Vec::new();
        let deadline = Instant::now() + MAX_BATCH_WAIT;
        let mut timeout = POLL_TIMEOUT;
        while batch.len() < MAX_BATCH {
            match consumer.poll(timeout) {
                None => break,
                Some(Ok(msg)) => batch.push(msg),
                Some(Err(e)) => {
                    // Broker and partition errors are transient for a consumer; librdkafka
                    // retries by itself. Log at most every 10 s so an outage does not flood.
                    if last_error_log.elapsed() > Duration::from_secs(10) {
                        tracing::warn!(error = %e, "kafka consumer error");
                        last_error_log = Instant::now();
                    }
                    break;
                }
            }
            let now = Instant::now();
            if now >= deadline {
                break;
            }
            timeout = deadline - now;
        }
        if batch.is_empty() {
            continue;
        }
        crate::ingest::apply_batch(
            &shared.engine,
            &shared.metrics,
            Source::Kafka,
            batch.iter().map(|m| m.payload().unwrap_or_default()),
            shared.max_event_bytes,
        );
        // Rejected events are counted by reason in apply_batch; they still advance the
        // offset, since reading them again would refuse them again.
        let mut in_batch: HashMap<(String, i32), i64> = HashMap::new();
        for m in &batch {
            let next = m.offset() + 1;
            let entry = in_batch
                .entry((m.topic().to_string(), m.partition()))
                .or_insert(next);
            *entry = (*entry).max(next);
        }
        let mut tpl = TopicPartitionList::new();
        for ((topic, partition), next) in &in_batch {
            if let Err(e) = tpl.add_partition_offset(topic, *partition, Offset::Offset(*next)) {
                tracing::warn!(error = %e, topic, partition, "cannot record an applied offset");
            }
        }
        applied.extend(in_batch);
        if let Err(e) = consumer.store_offsets(&tpl) {
            // After a rebalance the partition may belong to another member; its events were
            // applied here, and the new owner re-reads from the last commit.
            tracing::debug!(error = %e, "cannot store offsets (partition revoked?)");
        }
    }
    commit_final(consumer, &applied);
}

fn commit_final(consumer: &BaseConsumer, applied: &HashMap<(String, i32), i64>) {
    if applied.is_empty() {
        return;
    }
    // Only partitions still assigned may be committed; the others moved to another member.
    let assigned = consumer.assignment().unwrap_or_default();
    let mut tpl = TopicPartitionList::new();
    for ((topic, partition), next) in applied {
        if assigned.find_partition(topic, *partition).is_some() {
            let _ = tpl.add_partition_offset(topic, *partition, Offset::Offset(*next));
        }
    }
    if tpl.count() == 0 {
        return;
    }
    match consumer.commit(&tpl, CommitMode::Sync) {
        Ok(()) => tracing::info!(
            partitions = applied.len(),
            "committed applied offsets on shutdown"
        ),
        Err(e) => {
            tracing::warn!(error = %e, "final offset commit failed; events since the last background commit will be read again")
        }
    }
}

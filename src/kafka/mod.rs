//! The Kafka source: a consumer-group member whose state is owned per partition and stored
//! together with that partition's offset, plus a dead-letter producer and a broker probe.
//!
//! Delivery guarantee (exactly-once effect on the posteriors): each partition's shard and its
//! `next_offset` change together under one lock, are written together in one atomic file
//! (`store`), and on assignment the consumer seeks the partition to the stored
//! `next_offset`. Events re-read after a crash are therefore applied to the state as it was at
//! that offset, and offsets below a shard's position are skipped. Kafka's committed offsets
//! are kept up to date for lag tooling but are not what restores use.
//!
//! Consumption runs on a dedicated blocking thread with librdkafka's poll loop; rebalance
//! callbacks (`partitions`) run inside `poll` on the same thread, which keeps restore, apply
//! and save strictly ordered without extra locking.

use std::collections::HashMap;
use std::sync::{Arc, OnceLock};
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::message::{Header, Message, OwnedHeaders};
use rdkafka::producer::BaseRecord;
use rdkafka::{Offset, TopicPartitionList};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

pub mod changelog;
pub mod client;
mod group;
mod merge;
mod partitions;

use changelog::Changelog;
use client::{client_config, ensure_topic, producer_config};
use partitions::{flush_dead_letters, publish_changed, DeadLetterProducer, PartitionContext};

use crate::config::KafkaConfig;
use crate::event::Reject;
use crate::service::ingest::Item;
use crate::service::metrics::Source;
use crate::service::Service;
use crate::state::shards::ShardId;

/// The librdkafka property naming the partition assignor.
const ASSIGNMENT_STRATEGY: &str = "partition.assignment.strategy";

/// Why the co-partitioned topics of the `[[source]]`s cannot be consumed.
#[derive(Debug, thiserror::Error)]
pub enum CoPartitionError {
    /// The topics differ in partition count.
    #[error("the unit-keyed topics of [[source]] must have the same partition count (partition i of each is read together), but they have: {0}; repartition them to one count")]
    Mismatch(String),
    /// A topic is not on the brokers.
    #[error("topic `{0}` of a [[source]] does not exist on the brokers")]
    Missing(String),
}

/// Check at start-up that the co-partitioned (mapped) `topics` exist and have one partition
/// count, which is returned; waits for the brokers to answer (`None` if `shutdown` comes
/// first). A mismatch is refused: partition i of one topic and partition i of another would
/// hold different units, and outcomes would look unexposed.
pub async fn check_co_partitioned(
    cfg: &KafkaConfig,
    topics: Vec<String>,
    shutdown: CancellationToken,
) -> Result<Option<i32>, CoPartitionError> {
    if topics.is_empty() {
        return Ok(None);
    }
    let cfg = cfg.clone();
    let check = move || {
        let mut logged = false;
        loop {
            if shutdown.is_cancelled() {
                return Ok(None);
            }
            let probe: Result<BaseConsumer, KafkaError> = client::connection_config(&cfg)
                .set("group.id", "posteriord-metadata")
                .create();
            let md = probe.and_then(|p| p.fetch_metadata(None, Duration::from_secs(3)));
            let md = match md {
                Ok(md) => md,
                Err(e) => {
                    if !logged {
                        tracing::warn!(error = %e, "cannot read the partition counts of the [[source]] topics yet; retrying");
                        logged = true;
                    }
                    std::thread::sleep(Duration::from_millis(500));
                    continue;
                }
            };
            let mut counts = Vec::new();
            for t in &topics {
                match md.topics().iter().find(|x| x.name() == t) {
                    Some(x) if x.error().is_none() && !x.partitions().is_empty() => {
                        counts.push((t.clone(), x.partitions().len() as i32))
                    }
                    _ => return Err(CoPartitionError::Missing(t.clone())),
                }
            }
            if counts.iter().any(|(_, n)| *n != counts[0].1) {
                let list: Vec<String> = counts.iter().map(|(t, n)| format!("`{t}` {n}")).collect();
                return Err(CoPartitionError::Mismatch(list.join(", ")));
            }
            tracing::info!(topics = ?topics, partitions = counts[0].1, "co-partitioned [[source]] topics checked");
            return Ok(Some(counts[0].1));
        }
    };
    tokio::task::spawn_blocking(check).await.unwrap_or(Ok(None))
}

/// Most messages applied under one lock.
const MAX_BATCH: usize = 2_000;
/// How long a batch may wait to fill up before it is applied anyway.
const MAX_BATCH_WAIT: Duration = Duration::from_millis(20);
/// How often the shutdown token is checked while the topic is idle.
const POLL_TIMEOUT: Duration = Duration::from_millis(100);
/// How often readiness asks the brokers for metadata.
const PROBE_INTERVAL: Duration = Duration::from_secs(2);

/// Start the consumer thread and the broker probe on `tracker`.
pub fn start(
    cfg: &KafkaConfig,
    service: Arc<Service>,
    shutdown: CancellationToken,
    tracker: &TaskTracker,
) -> Result<(), KafkaError> {
    let dead_letters = match &cfg.dead_letter_topic {
        None => None,
        Some(_) => Some(Arc::new(
            producer_config(cfg).create::<DeadLetterProducer>()?,
        )),
    };
    let changelog: Arc<OnceLock<Changelog>> = Arc::new(OnceLock::new());
    let group_topic: Arc<OnceLock<group::GroupTopic>> = Arc::new(OnceLock::new());
    let context = PartitionContext {
        service: Arc::clone(&service),
        dead_letters: dead_letters.clone(),
        changelog: Arc::clone(&changelog),
        group: Arc::clone(&group_topic),
        merge: merge::MergeShared::default(),
    };
    let mut consumer_config = client_config(cfg);
    if !service.mapped_topics().is_empty() {
        // Partition i of every co-partitioned topic must go to the same member; the range
        // assignor gives each member the same partition indices of topics of equal size.
        if cfg
            .properties
            .get(ASSIGNMENT_STRATEGY)
            .is_some_and(|s| s != "range")
        {
            tracing::warn!(
                "ignoring kafka.properties.{ASSIGNMENT_STRATEGY}: co-partitioned [[source]] topics need the range assignor"
            );
        }
        consumer_config.set(ASSIGNMENT_STRATEGY, "range");
    }
    let consumer: BaseConsumer<PartitionContext> = consumer_config.create_with_context(context)?;

    let mut probe_config = client_config(cfg);
    probe_config.set("statistics.interval.ms", "0");
    let probe: BaseConsumer = probe_config.create()?;
    {
        let service = Arc::clone(&service);
        let shutdown = shutdown.clone();
        tracker.spawn_blocking(move || probe_loop(&probe, &service, &shutdown));
    }
    let loop_cfg = LoopConfig {
        dead_letter_topic: cfg.dead_letter_topic.clone(),
        snapshot_interval: service.snapshot_interval(),
        changelog_interval: cfg.changelog_interval,
        group: Arc::clone(&group_topic),
        idle_allowance: cfg.idle_allowance,
    };
    if !service.mapped_topics().is_empty() {
        // Experiments of co-partitioned topics are decided by one owner on the partials of
        // every partition: follow them once the topic is open.
        let service = Arc::clone(&service);
        let shutdown = shutdown.clone();
        let kafka_cfg = cfg.clone();
        let group_topic = Arc::clone(&group_topic);
        tracker.spawn_blocking(move || {
            while group_topic.get().is_none() {
                if shutdown.is_cancelled() {
                    return;
                }
                std::thread::sleep(Duration::from_millis(100));
            }
            let g = group_topic.get().expect("checked above");
            if let Err(e) = group::follow(&kafka_cfg, g, &service, &shutdown) {
                tracing::error!(error = %e, "cannot follow the partials topic; experiments of co-partitioned topics are not evaluated here");
            }
        });
    }
    let handle = tokio::runtime::Handle::current();
    let kafka_cfg = cfg.clone();
    {
        let changelog = Arc::clone(&changelog);
        let service = Arc::clone(&service);
        let shutdown = shutdown.clone();
        let kafka_cfg = cfg.clone();
        tracker.spawn_blocking(move || {
            // Reads of other instances' partitions follow the changelog once it exists.
            while changelog.get().is_none() {
                if shutdown.is_cancelled() {
                    return;
                }
                std::thread::sleep(Duration::from_millis(100));
            }
            let c = changelog.get().expect("checked above");
            if let Err(e) = changelog::follow(&kafka_cfg, c.topic(), c.n_partitions(), &service, &shutdown) {
                tracing::error!(error = %e, "cannot follow the changelog; reads cover local partitions only");
            }
        });
    }
    tracker.spawn_blocking(move || {
        if let Some(topic) = &loop_cfg.dead_letter_topic {
            if let Err(e) = handle.block_on(ensure_topic(&kafka_cfg, topic)) {
                tracing::error!(topic, error = %e, "dead-letter topic unavailable; the producer keeps retrying");
            }
        }
        // State handoff needs the changelog, so nothing is consumed before it is reachable.
        let mut logged = false;
        while !shutdown.is_cancelled() && changelog.get().is_none() {
            // librdkafka's metadata calls cannot be interrupted, so wait for the probe to see
            // the brokers before trying: a drain during an outage stays prompt.
            if service.kafka_reachable() != Some(true) {
                std::thread::sleep(Duration::from_millis(100));
                continue;
            }
            let partitions = changelog::input_partitions(&kafka_cfg, &service.mapped_topics()).unwrap_or(1);
            match handle.block_on(Changelog::open(&kafka_cfg, &kafka_cfg.changelog_topic, partitions)) {
                Ok(c) => {
                    tracing::info!(topic = c.topic(), partitions = c.n_partitions(), "changelog ready");
                    // Experiments defined over the API on other instances, before any event
                    // is consumed (an unknown experiment's events would be refused).
                    match c.read_partition(0) {
                        Ok(contents) => {
                            for bytes in contents.catalogs.values() {
                                service.adopt_catalog(bytes);
                            }
                        }
                        Err(e) => tracing::error!(error = %e, "cannot read the experiment catalog from the changelog; using the local one"),
                    }
                    let _ = changelog.set(c);
                    let published = Arc::clone(&changelog);
                    service.set_catalog_publisher(Box::new(move |instance, bytes| {
                        if let Some(c) = published.get() {
                            if let Err(e) = c.publish_catalog(instance, bytes) {
                                tracing::error!(error = %e, "cannot publish the experiment catalog; other instances learn of the change at its next publication");
                            }
                        }
                    }));
                    // Ours may hold changes made while the changelog was out of reach.
                    service.publish_catalog();
                }
                Err(e) => {
                    if !logged {
                        tracing::warn!(error = %e, "changelog not reachable yet; retrying");
                        logged = true;
                    }
                    for _ in 0..20 {
                        if shutdown.is_cancelled() {
                            break;
                        }
                        std::thread::sleep(Duration::from_millis(100));
                    }
                }
            }
        }
        let Some(c) = changelog.get() else { return };
        let mapped = service.mapped_topics();
        if !mapped.is_empty() {
            let topic = group::topic_for(c.topic());
            loop {
                if shutdown.is_cancelled() {
                    return;
                }
                match handle.block_on(group::GroupTopic::open(&kafka_cfg, &topic)) {
                    Ok(g) => {
                        let partitions = changelog::input_partitions(&kafka_cfg, &mapped).unwrap_or(1);
                        service.start_group(partitions.max(1) as u32);
                        tracing::info!(topic, partitions, "partials topic ready: experiments of co-partitioned topics are decided by their owner at reference-time boundaries");
                        let _ = loop_cfg.group.set(g);
                        break;
                    }
                    Err(e) => {
                        tracing::warn!(topic, error = %e, "partials topic not reachable yet; retrying");
                        std::thread::sleep(Duration::from_secs(1));
                    }
                }
            }
        }
        let topics: Vec<&str> = kafka_cfg
            .topics
            .iter()
            .chain(&mapped)
            .map(String::as_str)
            .collect();
        if let Err(e) = consumer.subscribe(&topics) {
            tracing::error!(error = %e, "cannot subscribe");
            return;
        }
        tracing::info!(brokers = %kafka_cfg.brokers, topics = ?topics, group = %kafka_cfg.group, "kafka consumer subscribed");
        consume_loop(&consumer, &service, dead_letters.as_deref(), c, &loop_cfg, &shutdown)
    });
    Ok(())
}

/// Shard id of each (topic, partition) seen by the consumer.
type ShardIds = HashMap<String, HashMap<i32, ShardId>>;

struct LoopConfig {
    dead_letter_topic: Option<String>,
    snapshot_interval: Duration,
    changelog_interval: Duration,
    /// The partials topic, once open (co-partitioned topics only).
    group: Arc<OnceLock<group::GroupTopic>>,
    /// See [`merge`]: how long an idle co-partitioned topic may hold the others back.
    idle_allowance: Duration,
}

/// How often partials are published while records flow.
const GROUP_PUBLISH_INTERVAL: Duration = Duration::from_millis(250);

fn probe_loop(probe: &BaseConsumer, service: &Service, shutdown: &CancellationToken) {
    let mut last: Option<bool> = None;
    while !shutdown.is_cancelled() {
        let started = Instant::now();
        let reachable = probe.fetch_metadata(None, PROBE_INTERVAL).is_ok();
        service.set_kafka_reachable(reachable);
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

fn dead_letter(
    producer: &DeadLetterProducer,
    topic: &str,
    msg: &rdkafka::message::BorrowedMessage<'_>,
    reject: &Reject,
    service: &Service,
) {
    let source = format!("{}/{}/{}", msg.topic(), msg.partition(), msg.offset());
    let headers = OwnedHeaders::new()
        .insert(Header {
            key: "posteriord-reason",
            value: Some(reject.reason.as_str()),
        })
        .insert(Header {
            key: "posteriord-message",
            value: Some(reject.message.as_str()),
        })
        .insert(Header {
            key: "posteriord-source",
            value: Some(source.as_str()),
        });
    let payload = msg.payload().unwrap_or_default();
    let mut record: BaseRecord<'_, [u8], [u8]> =
        BaseRecord::to(topic).payload(payload).headers(headers);
    if let Some(key) = msg.key() {
        record = record.key(key);
    }
    match producer.send(record) {
        Ok(()) => service
            .metrics()
            .dead_letters
            .with_label_values(&[reject.reason.as_str()])
            .inc(),
        Err((e, _)) => {
            tracing::warn!(error = %e, %source, "cannot queue a dead letter");
            service.metrics().dead_letter_errors.inc();
        }
    }
}

fn consume_loop(
    consumer: &BaseConsumer<PartitionContext>,
    service: &Service,
    dead_letters: Option<&DeadLetterProducer>,
    changelog: &Changelog,
    cfg: &LoopConfig,
    shutdown: &CancellationToken,
) {
    let mut shard_ids = ShardIds::new();
    let mut last_error_log = Instant::now() - Duration::from_secs(60);
    let mut last_save = Instant::now();
    let mut last_publish = Instant::now();
    let mut last_group = Instant::now();
    // Co-partitioned topics are applied in reference-time order (see `merge`); the built-in
    // format's topics go straight to their batch as before.
    let mut merger = merge::Merger::new(service.mapped_topics(), cfg.idle_allowance);
    let shared = &consumer.context().merge;
    while !shutdown.is_cancelled() {
        let mut batch = Vec::new();
        let mut polled = 0;
        let deadline = Instant::now() + MAX_BATCH_WAIT;
        let mut timeout = POLL_TIMEOUT;
        while polled < MAX_BATCH {
            let next = consumer.poll(timeout);
            if merger.is_on() {
                // Before anything this poll returned is queued: a rebalance inside it moved
                // the positions, and what was buffered before is fetched again.
                merger.after_poll(consumer, shared);
            }
            match next {
                None => break,
                Some(Ok(msg)) => {
                    polled += 1;
                    if !merger.is_on() {
                        batch.push(msg);
                    } else if let Some(msg) = merger.offer(consumer, shared, service, msg) {
                        batch.push(msg);
                    }
                }
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
        if !batch.is_empty() {
            apply_messages(consumer, service, dead_letters, cfg, &batch, &mut shard_ids);
        }
        if merger.is_on() {
            let (ready, marks) = merger.take_ready(consumer, service);
            if !ready.is_empty() {
                apply_messages(consumer, service, dead_letters, cfg, &ready, &mut shard_ids);
            }
            for (shard, mark) in &marks {
                service.note_reference_watermark(shard, *mark);
            }
            merger.resume_drained(consumer, shared);
        }
        // Partials before any save or changelog publication: a restored shard re-creates
        // only the boundary entries after its image, so those before must be out already.
        let group_published = match cfg.group.get() {
            Some(g)
                if last_group.elapsed() >= GROUP_PUBLISH_INTERVAL
                    || last_save.elapsed() >= cfg.snapshot_interval
                    || last_publish.elapsed() >= cfg.changelog_interval =>
            {
                last_group = Instant::now();
                group::publish_pending(service, g)
            }
            _ => true,
        };
        if last_save.elapsed() >= cfg.snapshot_interval && group_published {
            if flush_dead_letters(dead_letters, service) {
                service.save_dirty(ShardId::is_kafka);
            }
            last_save = Instant::now();
        }
        if last_publish.elapsed() >= cfg.changelog_interval && group_published {
            // Dead letters first, for the same reason as before a local save.
            if flush_dead_letters(dead_letters, service) {
                publish_changed(service, changelog, None);
            }
            last_publish = Instant::now();
        }
    }
    if let Some(g) = cfg.group.get() {
        group::publish_pending(service, g);
    }
    if !flush_dead_letters(dead_letters, service) {
        tracing::error!(
            "dead letters undelivered at shutdown; their events will be read again after restart"
        );
    } else if !service.save_dirty(ShardId::is_kafka) {
        tracing::error!(
            "state could not be saved at shutdown; events since the last save will be read again"
        );
    }
    commit_positions(consumer, service);
}

fn apply_messages(
    consumer: &BaseConsumer<PartitionContext>,
    service: &Service,
    dead_letters: Option<&DeadLetterProducer>,
    cfg: &LoopConfig,
    batch: &[rdkafka::message::BorrowedMessage<'_>],
    shard_ids: &mut ShardIds,
) {
    // Keyed by topic, then partition, so that looking up a message's shard allocates nothing
    // once the partition has been seen.
    for m in batch {
        if !shard_ids
            .get(m.topic())
            .is_some_and(|p| p.contains_key(&m.partition()))
        {
            shard_ids
                .entry(m.topic().to_string())
                .or_default()
                .insert(m.partition(), service.kafka_shard(m.topic(), m.partition()));
        }
    }
    let items: Vec<Item<'_>> = batch
        .iter()
        .map(|m| {
            // A mapped topic is read under its source's mapping, into the shard of its
            // partition index, with its own offset there.
            let mapping = service.topic_mapping(m.topic());
            Item {
                shard: shard_ids[m.topic()][&m.partition()].as_str(),
                offset: Some(m.offset()),
                bytes: m.payload().unwrap_or_default(),
                mapping,
                topic: mapping.map(|_| m.topic()),
                // The record's timestamp (producer create time or broker append time, as the
                // topic is configured): stored in the log, so replay checks against the same.
                reference: m.timestamp().to_millis().map(|ms| ms.saturating_mul(1_000)),
            }
        })
        .collect();
    let report = service.apply(Source::Kafka, &items);
    for (why, r) in &report.released {
        if let Err(reject) = r {
            // A held outcome refused when decided: its message was consumed long ago.
            tracing::warn!(?why, reason = reject.reason.as_str(), message = %reject.message, "held outcome refused when decided");
        }
    }
    for (i, reject) in report.rejects() {
        let m = &batch[i];
        tracing::debug!(
            topic = m.topic(),
            partition = m.partition(),
            offset = m.offset(),
            reason = reject.reason.as_str(),
            "refused event"
        );
        if let (Some(p), Some(topic)) = (dead_letters, &cfg.dead_letter_topic) {
            dead_letter(p, topic, m, reject, service);
        }
    }
    // Keep the group's committed offsets close to what is applied, for lag tooling.
    let mut next: HashMap<(&str, i32), i64> = HashMap::new();
    for m in batch {
        let e = next.entry((m.topic(), m.partition())).or_insert(0);
        *e = (*e).max(m.offset() + 1);
    }
    let mut tpl = TopicPartitionList::new();
    for ((topic, partition), offset) in &next {
        let _ = tpl.add_partition_offset(topic, *partition, Offset::Offset(*offset));
        service
            .metrics()
            .kafka_next_offset
            .with_label_values(&[*topic, partition.to_string().as_str()])
            .set(*offset);
    }
    if let Err(e) = consumer.store_offsets(&tpl) {
        tracing::debug!(error = %e, "cannot store offsets (partition revoked?)");
    }
}

/// Commit the applied positions of still-assigned partitions on shutdown.
fn commit_positions(consumer: &BaseConsumer<PartitionContext>, service: &Service) {
    let assigned = consumer.assignment().unwrap_or_default();
    let shards = service.lock_shards();
    let mut tpl = TopicPartitionList::new();
    for e in assigned.elements() {
        let id = service.kafka_shard(e.topic(), e.partition());
        let next = shards
            .shard(&id)
            .and_then(|s| match id.is_co_partitioned() {
                true => s.stream_offset(e.topic()),
                false => s.next_offset(),
            });
        if let Some(next) = next {
            let _ = tpl.add_partition_offset(e.topic(), e.partition(), Offset::Offset(next));
        }
    }
    drop(shards);
    if tpl.count() == 0 {
        return;
    }
    match consumer.commit(&tpl, CommitMode::Sync) {
        Ok(()) => tracing::info!(
            partitions = tpl.count(),
            "committed applied offsets on shutdown"
        ),
        Err(e) => {
            tracing::warn!(error = %e, "final offset commit failed (the stored state keeps the exact position)")
        }
    }
}

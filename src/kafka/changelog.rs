//! The changelog: each partition's state published to a compacted Kafka topic, so that a new
//! owner on another machine restores the exact state (with its offset) when a partition moves,
//! and every instance can answer reads for all experiments. The broker is the shared store.
//!
//! Layout: changelog partition `p` carries the shards of input partition `p` (modulo the
//! changelog's partition count), so a restore reads one changelog partition. A shard's state
//! at input position `g` (its `next_offset`, the *generation*) is the store's encoded image,
//! split into chunks under keys `<shard>@<g, 20 digits>#<chunk>`. A generation counts only when
//! all its chunks are present; after a generation is fully delivered, the keys of the previous
//! one are tombstoned. Compaction therefore never removes the last complete generation.

use std::collections::{BTreeMap, HashMap};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::producer::{BaseRecord, DeliveryResult, Producer, ProducerContext, ThreadedProducer};
use rdkafka::ClientContext;
use rdkafka::{Offset, TopicPartitionList};

use super::client::{connection_config, ensure_topic_with};
use crate::config::KafkaConfig;
use crate::state::shards::{ShardId, ShardImage};

/// Largest chunk value, well below the common 1 MB message limit.
const CHUNK_BYTES: usize = 512 * 1024;
const CHUNK_MAGIC: &[u8; 8] = b"PSTDCHG1";
/// How long a publish waits for delivery.
const PUBLISH_TIMEOUT: Duration = Duration::from_secs(10);
/// How long a restore may take to read one changelog partition.
const RESTORE_TIMEOUT: Duration = Duration::from_secs(60);

/// Changelog failures.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ChangelogError {
    /// The client or broker failed.
    #[error("changelog {topic}: {source}")]
    Kafka {
        /// Changelog topic.
        topic: String,
        /// The error.
        source: KafkaError,
    },
    /// Reading a partition did not finish in time.
    #[error("changelog {topic} partition {partition}: not read to its end within {timeout:?}")]
    Timeout {
        /// Changelog topic.
        topic: String,
        /// Partition.
        partition: i32,
        /// The limit.
        timeout: Duration,
    },
    /// A stored generation could not be decoded.
    #[error("changelog {topic}: shard {shard} generation {generation} is unreadable: {reason}")]
    Corrupt {
        /// Changelog topic.
        topic: String,
        /// Shard.
        shard: String,
        /// Generation.
        generation: i64,
        /// What is wrong.
        reason: String,
    },
}

/// Key prefix of the catalogs of experiments defined over the API: each instance publishes
/// its catalog under `posteriord-catalog/<instance>` on changelog partition 0, and compaction
/// keeps the newest per instance; readers merge them all. Without `@`/`#`, such a key never
/// parses as a shard chunk key.
pub const CATALOG_KEY: &str = "posteriord-catalog";

fn is_catalog_key(key: &[u8]) -> bool {
    key.starts_with(CATALOG_KEY.as_bytes())
}

fn key(shard: &str, generation: i64, chunk: u32) -> String {
    format!("{shard}@{generation:020}#{chunk}")
}

fn parse_key(key: &str) -> Option<(&str, i64, u32)> {
    let (rest, chunk) = key.rsplit_once('#')?;
    let (shard, generation) = rest.rsplit_once('@')?;
    Some((shard, generation.parse().ok()?, chunk.parse().ok()?))
}

/// Chunks of one generation as read back.
#[derive(Debug, Default)]
struct Generation {
    n_chunks: u32,
    chunks: BTreeMap<u32, Vec<u8>>,
}

impl Generation {
    fn complete(&self) -> bool {
        self.n_chunks > 0 && self.chunks.len() == self.n_chunks as usize
    }

    fn bytes(&self) -> Vec<u8> {
        self.chunks.values().flatten().copied().collect()
    }
}

/// What one changelog partition holds, per shard and generation.
#[derive(Debug, Default)]
pub struct PartitionContents {
    shards: HashMap<String, BTreeMap<i64, Generation>>,
    /// The newest catalog message of each instance that published one.
    pub catalogs: BTreeMap<Vec<u8>, Vec<u8>>,
}

impl PartitionContents {
    fn apply(&mut self, key: &[u8], value: Option<&[u8]>) {
        if is_catalog_key(key) {
            match value {
                Some(v) => self.catalogs.insert(key.to_vec(), v.to_vec()),
                None => self.catalogs.remove(key),
            };
            return;
        }
        let Some((shard, generation, chunk)) = std::str::from_utf8(key).ok().and_then(parse_key)
        else {
            return;
        };
        let gens = self.shards.entry(shard.to_string()).or_default();
        match value {
            None => {
                if let Some(g) = gens.get_mut(&generation) {
                    g.chunks.remove(&chunk);
                    if g.chunks.is_empty() {
                        gens.remove(&generation);
                    }
                }
            }
            Some(v) => {
                if v.len() < 16 || &v[..8] != CHUNK_MAGIC {
                    return;
                }
                let index = u32::from_le_bytes(v[8..12].try_into().expect("4 bytes"));
                let n_chunks = u32::from_le_bytes(v[12..16].try_into().expect("4 bytes"));
                if index != chunk || n_chunks == 0 {
                    return;
                }
                let g = gens.entry(generation).or_default();
                g.n_chunks = n_chunks;
                g.chunks.insert(chunk, v[16..].to_vec());
            }
        }
    }

    /// The newest complete generation of `shard`, decoded.
    pub fn latest(&self, topic: &str, shard: &str) -> Result<Option<ShardImage>, ChangelogError> {
        let Some(gens) = self.shards.get(shard) else {
            return Ok(None);
        };
        let Some((generation, g)) = gens.iter().rev().find(|(_, g)| g.complete()) else {
            return Ok(None);
        };
        crate::service::store::decode(&g.bytes())
            .map(Some)
            .map_err(|reason| ChangelogError::Corrupt {
                topic: topic.to_string(),
                shard: shard.to_string(),
                generation: *generation,
                reason,
            })
    }

    /// Generations present for `shard` (complete or not), oldest first.
    fn generations(&self, shard: &str) -> Vec<(i64, u32)> {
        self.shards
            .get(shard)
            .map(|g| {
                g.iter()
                    .map(|(k, v)| (*k, v.n_chunks.max(v.chunks.len() as u32)))
                    .collect()
            })
            .unwrap_or_default()
    }
}

/// The changelog topic of one consumer group.
pub struct Changelog {
    topic: String,
    n_partitions: i32,
    producer: ThreadedProducer<DeliveryCheck>,
    /// Reader for restores (assigned one partition at a time).
    reader: Mutex<BaseConsumer>,
    /// Generations known to be in the topic per shard, to tombstone after the next publish.
    known: Mutex<HashMap<ShardId, Vec<(i64, u32)>>>,
}

/// Counts deliveries the broker refused, so a publication can tell that one of its chunks
/// was lost (librdkafka reports that only in the delivery callback).
#[derive(Default)]
pub(super) struct DeliveryCheck {
    refused: std::sync::atomic::AtomicU64,
    last: Mutex<Option<KafkaError>>,
}

impl DeliveryCheck {
    pub(super) fn refused(&self) -> u64 {
        self.refused.load(std::sync::atomic::Ordering::SeqCst)
    }

    /// `Err` with the last refusal if any delivery was refused since `before`.
    pub(super) fn check(&self, before: u64) -> Result<(), KafkaError> {
        if self.refused() == before {
            return Ok(());
        }
        let last = self.last.lock().unwrap_or_else(|p| p.into_inner()).clone();
        Err(last.unwrap_or(KafkaError::Flush(rdkafka::types::RDKafkaErrorCode::Fail)))
    }
}

impl ClientContext for DeliveryCheck {}

impl ProducerContext for DeliveryCheck {
    type DeliveryOpaque = ();
    fn delivery(&self, result: &DeliveryResult<'_>, _: ()) {
        if let Err((e, _)) = result {
            *self.last.lock().unwrap_or_else(|p| p.into_inner()) = Some(e.clone());
            self.refused
                .fetch_add(1, std::sync::atomic::Ordering::SeqCst);
        }
    }
}

impl Changelog {
    /// Connect, creating the compacted topic with `n_partitions` if it is missing.
    pub async fn open(
        cfg: &KafkaConfig,
        topic: &str,
        n_partitions: i32,
    ) -> Result<Changelog, ChangelogError> {
        let err = |source| ChangelogError::Kafka {
            topic: topic.to_string(),
            source,
        };
        let n = ensure_topic_with(cfg, topic, n_partitions, &[("cleanup.policy", "compact")])
            .await
            .map_err(err)?;
        let mut pc = connection_config(cfg);
        pc.set("client.id", "posteriord-changelog")
            .set("enable.idempotence", "true")
            .set("linger.ms", "5");
        let producer = pc
            .create_with_context(DeliveryCheck::default())
            .map_err(err)?;
        let mut rc = connection_config(cfg);
        rc.set("group.id", "posteriord-changelog-reader")
            .set("enable.auto.commit", "false")
            .set("client.id", "posteriord-changelog-reader");
        let reader: BaseConsumer = rc.create().map_err(err)?;
        Ok(Changelog {
            topic: topic.to_string(),
            n_partitions: n,
            producer,
            reader: Mutex::new(reader),
            known: Mutex::new(HashMap::new()),
        })
    }

    /// The changelog topic.
    pub fn topic(&self) -> &str {
        &self.topic
    }

    /// Changelog partition of input partition `partition`.
    pub fn partition_for(&self, partition: i32) -> i32 {
        partition.rem_euclid(self.n_partitions.max(1))
    }

    /// Publish `image` of `shard` (input partition `partition`) and wait for delivery; then
    /// tombstone the shard's older generations.
    pub fn publish(
        &self,
        shard: &str,
        partition: i32,
        image: &ShardImage,
    ) -> Result<(), ChangelogError> {
        let err = |source| ChangelogError::Kafka {
            topic: self.topic.clone(),
            source,
        };
        let generation = image.next_offset.unwrap_or(-1);
        let bytes = crate::service::store::encode(image);
        let chunks: Vec<&[u8]> = bytes.chunks(CHUNK_BYTES).collect();
        let n = chunks.len() as u32;
        let cp = self.partition_for(partition);
        for (i, chunk) in chunks.iter().enumerate() {
            let mut value = Vec::with_capacity(16 + chunk.len());
            value.extend_from_slice(CHUNK_MAGIC);
            value.extend_from_slice(&(i as u32).to_le_bytes());
            value.extend_from_slice(&n.to_le_bytes());
            value.extend_from_slice(chunk);
            let k = key(shard, generation, i as u32);
            self.send(&k, Some(&value), cp).map_err(err)?;
        }
        let refused_before = self.producer.context().refused();
        self.producer.flush(PUBLISH_TIMEOUT).map_err(err)?;
        // flush() only waits for the queue to empty: a chunk the broker refused (too large,
        // no such partition) must not count as published, or the older generations below
        // would be tombstoned with no complete one left.
        self.producer.context().check(refused_before).map_err(err)?;
        let mut known = self.known.lock().unwrap_or_else(|p| p.into_inner());
        let old = known
            .insert(ShardId::from(shard), vec![(generation, n)])
            .unwrap_or_default();
        for (g, count) in old.into_iter().filter(|(g, _)| *g != generation) {
            for i in 0..count {
                self.send(&key(shard, g, i), None, cp).map_err(err)?;
            }
        }
        Ok(())
    }

    /// Publish `instance`'s catalog of API experiments (`bytes`, its JSON) and wait for
    /// delivery.
    pub fn publish_catalog(&self, instance: &str, bytes: &[u8]) -> Result<(), ChangelogError> {
        let err = |source| ChangelogError::Kafka {
            topic: self.topic.clone(),
            source,
        };
        let key = format!("{CATALOG_KEY}/{instance}");
        let refused_before = self.producer.context().refused();
        self.send(&key, Some(bytes), 0).map_err(err)?;
        self.producer.flush(PUBLISH_TIMEOUT).map_err(err)?;
        self.producer.context().check(refused_before).map_err(err)
    }

    fn send(&self, key: &str, value: Option<&[u8]>, partition: i32) -> Result<(), KafkaError> {
        let mut record: BaseRecord<'_, str, [u8]> =
            BaseRecord::to(&self.topic).key(key).partition(partition);
        if let Some(v) = value {
            record = record.payload(v);
        }
        let mut record = record;
        loop {
            match self.producer.send(record) {
                Ok(()) => return Ok(()),
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

    /// Read changelog partition `cp` to its end.
    pub fn read_partition(&self, cp: i32) -> Result<PartitionContents, ChangelogError> {
        // One long-lived reader: creating a client per restore costs a connection and a
        // metadata round trip each, inside the rebalance callback.
        let reader = self.reader.lock().unwrap_or_else(|p| p.into_inner());
        let r = read_partition(&reader, &self.topic, cp, RESTORE_TIMEOUT);
        let _ = reader.unassign();
        r
    }

    /// The newest complete state of `shard` (input partition `partition`), if published.
    pub fn restore(
        &self,
        shard: &str,
        partition: i32,
    ) -> Result<Option<ShardImage>, ChangelogError> {
        let contents = self.read_partition(self.partition_for(partition))?;
        self.known
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .insert(ShardId::from(shard), contents.generations(shard));
        contents.latest(&self.topic, shard)
    }

    /// Whether generation `generation` of `shard` is the last one this process published or
    /// restored.
    pub fn is_current(&self, shard: &str, generation: Option<i64>) -> bool {
        let g = generation.unwrap_or(-1);
        self.known
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .get(shard)
            .is_some_and(|v| v.last().is_some_and(|(last, _)| *last == g))
    }

    /// Number of changelog partitions.
    pub fn n_partitions(&self) -> i32 {
        self.n_partitions
    }
}

/// Read `topic` partition `cp` from the beginning to the high watermark seen at the start.
pub fn read_partition(
    consumer: &BaseConsumer,
    topic: &str,
    cp: i32,
    timeout: Duration,
) -> Result<PartitionContents, ChangelogError> {
    let err = |source| ChangelogError::Kafka {
        topic: topic.to_string(),
        source,
    };
    let (low, high) = consumer
        .fetch_watermarks(topic, cp, Duration::from_secs(10))
        .map_err(err)?;
    let mut contents = PartitionContents::default();
    if high <= low {
        return Ok(contents);
    }
    let mut tpl = TopicPartitionList::new();
    tpl.add_partition_offset(topic, cp, Offset::Beginning)
        .map_err(err)?;
    consumer.assign(&tpl).map_err(err)?;
    let started = Instant::now();
    loop {
        if started.elapsed() > timeout {
            return Err(ChangelogError::Timeout {
                topic: topic.to_string(),
                partition: cp,
                timeout,
            });
        }
        match consumer.poll(Duration::from_millis(200)) {
            None => continue,
            Some(Err(e)) => {
                tracing::debug!(error = %e, topic, partition = cp, "changelog read error (retrying)");
                continue;
            }
            Some(Ok(m)) => {
                if let Some(k) = m.key() {
                    contents.apply(k, m.payload());
                }
                if m.offset() + 1 >= high {
                    return Ok(contents);
                }
            }
        }
    }
}

/// Follows the whole changelog and records, for every shard, the totals of its newest
/// complete generation in the shared state, so reads can merge partitions owned by other
/// instances. Keeps chunk bytes only until their generation is complete.
pub fn follow(
    cfg: &KafkaConfig,
    topic: &str,
    n_partitions: i32,
    service: &crate::service::Service,
    shutdown: &tokio_util::sync::CancellationToken,
) -> Result<(), ChangelogError> {
    let err = |source| ChangelogError::Kafka {
        topic: topic.to_string(),
        source,
    };
    let mut cc = connection_config(cfg);
    cc.set("group.id", "posteriord-changelog-follower")
        .set("enable.auto.commit", "false")
        .set("client.id", "posteriord-changelog-follower");
    let consumer: BaseConsumer = cc.create().map_err(err)?;
    let mut tpl = TopicPartitionList::new();
    for p in 0..n_partitions {
        tpl.add_partition_offset(topic, p, Offset::Beginning)
            .map_err(err)?;
    }
    consumer.assign(&tpl).map_err(err)?;
    let mut pending = PartitionContents::default();
    while !shutdown.is_cancelled() {
        let Some(Ok(m)) = consumer.poll(Duration::from_millis(100)) else {
            continue;
        };
        let Some(k) = m.key() else { continue };
        if is_catalog_key(k) {
            if let Some(bytes) = m.payload() {
                service.adopt_catalog(bytes);
            }
            continue;
        }
        let Some((shard, generation, _)) = std::str::from_utf8(k).ok().and_then(parse_key) else {
            continue;
        };
        let shard = shard.to_string();
        pending.apply(k, m.payload());
        let complete = pending
            .shards
            .get(&shard)
            .and_then(|g| g.get(&generation))
            .is_some_and(Generation::complete);
        if complete {
            match pending.latest(topic, &shard) {
                Ok(Some(image)) => service
                    .lock_shards()
                    .set_remote(ShardId::from(shard.as_str()), &image),
                Ok(None) => {}
                Err(e) => tracing::warn!(error = %e, "skipping an unreadable changelog generation"),
            }
            // Only newer generations matter from here on.
            if let Some(gens) = pending.shards.get_mut(&shard) {
                gens.retain(|g, _| *g > generation);
            }
        }
    }
    Ok(())
}

/// Partition count of input `topics` (the largest), for sizing the changelog.
pub fn input_partitions(cfg: &KafkaConfig, mapped: &[String]) -> Result<i32, KafkaError> {
    let consumer: BaseConsumer = connection_config(cfg)
        .set("group.id", "posteriord-metadata")
        .create()?;
    let md = consumer.fetch_metadata(None, Duration::from_secs(3))?;
    Ok(md
        .topics()
        .iter()
        .filter(|t| cfg.topics.iter().chain(mapped).any(|x| x == t.name()))
        .map(|t| t.partitions().len() as i32)
        .max()
        .unwrap_or(1))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn chunk(index: u32, n: u32, data: &[u8]) -> Vec<u8> {
        let mut v = CHUNK_MAGIC.to_vec();
        v.extend_from_slice(&index.to_le_bytes());
        v.extend_from_slice(&n.to_le_bytes());
        v.extend_from_slice(data);
        v
    }

    #[test]
    fn keys_round_trip() {
        let k = key("kafka/exp-events/3", 1234, 7);
        assert_eq!(k, "kafka/exp-events/3@00000000000000001234#7");
        assert_eq!(parse_key(&k), Some(("kafka/exp-events/3", 1234, 7)));
        assert_eq!(parse_key("garbage"), None);
    }

    #[test]
    fn only_complete_generations_count_and_tombstones_remove() {
        let image = ShardImage {
            next_offset: Some(10),
            ..ShardImage::default()
        };
        let bytes = crate::service::store::encode(&image);
        let (a, b) = bytes.split_at(bytes.len() / 2);
        let mut c = PartitionContents::default();
        c.apply(key("s", 10, 0).as_bytes(), Some(&chunk(0, 2, a)));
        assert!(
            c.latest("t", "s").unwrap().is_none(),
            "half a generation is not a state"
        );
        c.apply(key("s", 10, 1).as_bytes(), Some(&chunk(1, 2, b)));
        assert_eq!(c.latest("t", "s").unwrap(), Some(image.clone()));
        // A newer, incomplete generation does not hide the complete one.
        c.apply(key("s", 20, 0).as_bytes(), Some(&chunk(0, 3, a)));
        assert_eq!(c.latest("t", "s").unwrap().unwrap().next_offset, Some(10));
        c.apply(key("s", 10, 0).as_bytes(), None);
        assert!(c.latest("t", "s").unwrap().is_none());
        assert_eq!(c.generations("s"), vec![(10, 2), (20, 3)]);
    }
}

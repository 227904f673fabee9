//! The consumer's partitions: librdkafka's rebalance callbacks restore an assigned partition's
//! state (the newer of the local file and the changelog) and point the consumer at its
//! offset, and save, publish and drop a revoked one; statistics callbacks report lag. These
//! callbacks run inside `poll` on the consumer's thread, which keeps restore, apply and save
//! strictly ordered without extra locking.

use std::sync::{Arc, OnceLock};
use std::time::{Duration, Instant};

use rdkafka::client::ClientContext;
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext, RebalanceProtocol};
use rdkafka::producer::{DefaultProducerContext, Producer, ThreadedProducer};
use rdkafka::statistics::Statistics;
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{Offset, TopicPartitionList};

use super::changelog::Changelog;
use crate::service::Service;
use crate::state::shards::{Shard, ShardId};

/// How long a save waits for dead letters to be delivered first.
const DEAD_LETTER_FLUSH: Duration = Duration::from_secs(10);

/// The producer of dead letters.
pub(super) type DeadLetterProducer = ThreadedProducer<DefaultProducerContext>;

/// librdkafka callbacks: restore and release partition state on rebalance; lag from stats.
pub(super) struct PartitionContext {
    pub(super) service: Arc<Service>,
    pub(super) dead_letters: Option<Arc<DeadLetterProducer>>,
    /// Set once the changelog is reachable (before the consumer subscribes).
    pub(super) changelog: Arc<OnceLock<Changelog>>,
    /// Set once the partials topic is open (co-partitioned topics only).
    pub(super) group: Arc<OnceLock<super::group::GroupTopic>>,
    /// What the reference-time merge of co-partitioned topics shares with the callbacks.
    pub(super) merge: super::merge::MergeShared,
}

/// Publish every Kafka shard whose position moved since its last publication; `only` limits
/// it to some shards. Returns whether all publications succeeded.
pub(super) fn publish_changed(
    service: &Service,
    changelog: &Changelog,
    only: Option<&[ShardId]>,
) -> bool {
    // During an outage a publication would only wait out its timeout; the local file keeps
    // the exact position, and the next round publishes.
    if service.kafka_reachable() != Some(true) {
        return false;
    }
    let images: Vec<(ShardId, crate::state::shards::ShardImage)> = {
        let shards = service.lock_shards();
        shards
            .ids()
            .into_iter()
            .filter(ShardId::is_kafka)
            .filter(|id| only.is_none_or(|o| o.contains(id)))
            .filter_map(|id| {
                let shard = shards.shard(id.as_str())?;
                if changelog.is_current(id.as_str(), shard.next_offset()) {
                    return None;
                }
                Some((id, shard.image()))
            })
            .collect()
    };
    let mut ok = true;
    for (id, image) in images {
        let Some(partition) = id.kafka_partition() else {
            continue;
        };
        match changelog.publish(&id, partition, &image) {
            Ok(()) => service
                .metrics()
                .changelog_publishes
                .with_label_values(&["ok"])
                .inc(),
            Err(e) => {
                ok = false;
                service
                    .metrics()
                    .changelog_publishes
                    .with_label_values(&["error"])
                    .inc();
                tracing::warn!(shard = %id, error = %e, "cannot publish partition state to the changelog; will retry");
            }
        }
    }
    ok
}

impl ClientContext for PartitionContext {
    fn stats(&self, statistics: Statistics) {
        let shards = self.service.lock_shards();
        for (topic, t) in &statistics.topics {
            for (partition, p) in &t.partitions {
                if *partition < 0 {
                    continue; // librdkafka's internal "unassigned" partition
                }
                let id = self.service.kafka_shard(topic, *partition);
                let Some(shard) = shards.shard(&id) else {
                    continue;
                };
                let next = match id.is_co_partitioned() {
                    true => shard.stream_offset(topic),
                    false => shard.next_offset(),
                }
                .unwrap_or(0);
                let partition_label = partition.to_string();
                let labels = [topic.as_str(), partition_label.as_str()];
                if p.hi_offset >= 0 {
                    self.service
                        .metrics()
                        .kafka_lag
                        .with_label_values(&labels)
                        .set((p.hi_offset - next).max(0));
                }
            }
        }
    }
}

impl ConsumerContext for PartitionContext {
    fn rebalance(
        &self,
        consumer: &BaseConsumer<Self>,
        err: RDKafkaRespErr,
        tpl: &mut TopicPartitionList,
    ) {
        let cooperative = matches!(
            consumer.rebalance_protocol(),
            RebalanceProtocol::Cooperative
        );
        // Records the merge buffered are dropped and re-fetched from the restored positions.
        self.merge.rebalancing(consumer);
        match err {
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS => {
                self.restore(tpl);
                let r = if cooperative {
                    consumer.incremental_assign(tpl)
                } else {
                    consumer.assign(tpl)
                };
                if let Err(e) = r {
                    tracing::error!(error = %e, "cannot take the assigned partitions");
                }
            }
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__REVOKE_PARTITIONS => {
                self.release(tpl);
                let r = if cooperative {
                    consumer.incremental_unassign(tpl)
                } else {
                    consumer.unassign()
                };
                if let Err(e) = r {
                    tracing::error!(error = %e, "cannot release the revoked partitions");
                }
            }
            other => {
                tracing::error!(error = ?other, "rebalance error; releasing all partitions");
                let all = consumer.assignment().unwrap_or_default();
                self.release(&all);
                let _ = consumer.unassign();
            }
        }
    }
}

impl PartitionContext {
    /// The changelog's state of shard `id` if it is further along than `local`.
    fn newer_from_changelog(
        &self,
        id: &str,
        partition: i32,
        local: Option<Shard>,
    ) -> Option<Shard> {
        let Some(changelog) = self.changelog.get() else {
            return local;
        };
        let remote = match changelog.restore(id, partition) {
            Ok(r) => r,
            Err(e) => {
                tracing::error!(shard = id, error = %e, "cannot read the changelog; using local state only");
                return local;
            }
        };
        let local_pos = local.as_ref().and_then(|s| s.next_offset());
        match remote {
            Some(image) if image.next_offset > local_pos => {
                let shard = self.service.shard_from_image(id, image);
                tracing::info!(shard = id, next_offset = ?shard.next_offset(), "restored from the changelog");
                Some(shard)
            }
            _ => local,
        }
    }

    /// Load each assigned partition's stored state and point the assignment at its offset.
    fn restore(&self, tpl: &mut TopicPartitionList) {
        let partitions: Vec<(String, i32)> = tpl
            .elements()
            .iter()
            .map(|e| (e.topic().to_string(), e.partition()))
            .collect();
        self.service.add_restoring(partitions.len() as isize);
        for (topic, partition) in &partitions {
            let id = self.service.kafka_shard(topic, *partition);
            // A co-partitioned shard covers partition i of several topics: restored once
            // (with its first topic), then each topic seeks to its own stored offset.
            let present = self.service.lock_shards().shard(&id).is_some();
            if !present {
                self.restore_shard(&id, topic, *partition);
            }
            let next = {
                let shards = self.service.lock_shards();
                let shard = shards.shard(&id);
                match id.is_co_partitioned() {
                    true => shard.and_then(|s| s.stream_offset(topic)),
                    false => shard.and_then(Shard::next_offset),
                }
            };
            let offset = match next {
                Some(next) => Offset::Offset(next),
                None => Offset::Beginning,
            };
            if let Err(e) = tpl.set_partition_offset(topic, *partition, offset) {
                tracing::error!(topic, partition, error = %e, "cannot set the restore offset");
            }
            tracing::info!(topic, partition, shard = %id, ?offset, "partition assigned and restored");
        }
        self.service.add_restoring(-(partitions.len() as isize));
    }

    /// Load shard `id` (the newer of the local file and the changelog, else empty) and put
    /// it in place.
    fn restore_shard(&self, id: &ShardId, topic: &str, partition: i32) {
        let started = Instant::now();
        let local = match self.service.load_shard(id) {
            Ok(local) => local,
            Err(e) => {
                // The damaged file is kept for inspection; the changelog or a re-read
                // from the beginning rebuilds the state exactly.
                tracing::error!(topic, partition, error = %e, "stored state unreadable; ignoring it");
                self.service.set_aside_damaged(id);
                None
            }
        };
        let shard = self
            .newer_from_changelog(id, partition, local)
            .unwrap_or_else(|| {
                tracing::info!(
                    topic,
                    partition,
                    shard = %id,
                    "no stored state for the partition: reading it from the beginning"
                );
                Shard::new(self.service.lock_shards().defs())
            });
        tracing::info!(
            shard = %id,
            next_offset = ?shard.next_offset(),
            held = shard.n_held(),
            elapsed_ms = started.elapsed().as_millis() as u64,
            "partition state restored"
        );
        self.service.lock_shards().insert(id.clone(), shard);
    }

    /// Save and drop the state of revoked partitions: the next owner restores it.
    fn release(&self, tpl: &TopicPartitionList) {
        let mut ids: Vec<ShardId> = tpl
            .elements()
            .iter()
            .map(|e| self.service.kafka_shard(e.topic(), e.partition()))
            .collect();
        ids.sort();
        ids.dedup();
        if ids.is_empty() {
            return;
        }
        // Partials first: the next holder re-creates only the boundary entries after the
        // image saved here.
        if let Some(g) = self.group.get() {
            super::group::publish_pending(&self.service, g);
        }
        flush_dead_letters(self.dead_letters.as_deref(), &self.service);
        self.service.save_dirty(|id| ids.iter().any(|x| x == id));
        if let Some(changelog) = self.changelog.get() {
            publish_changed(&self.service, changelog, Some(&ids));
        }
        let mut shards = self.service.lock_shards();
        for id in &ids {
            shards.remove(id);
        }
        drop(shards);
        for e in tpl.elements() {
            // Another instance reports these partitions now.
            let labels = [e.topic(), &e.partition().to_string()];
            let _ = self
                .service
                .metrics()
                .kafka_lag
                .remove_label_values(&labels);
            let _ = self
                .service
                .metrics()
                .kafka_next_offset
                .remove_label_values(&labels);
        }
        tracing::info!(partitions = ?ids, "partitions revoked; state saved and released");
    }
}

/// Wait for dead letters to be delivered before offsets that follow them are saved, so a
/// saved offset never skips an undelivered dead letter. Returns whether all were delivered.
pub(super) fn flush_dead_letters(producer: Option<&DeadLetterProducer>, service: &Service) -> bool {
    let Some(p) = producer else { return true };
    match p.flush(DEAD_LETTER_FLUSH) {
        Ok(()) => true,
        Err(e) => {
            tracing::warn!(error = %e, "dead letters not yet delivered; postponing the state save");
            service.metrics().dead_letter_errors.inc();
            false
        }
    }
}

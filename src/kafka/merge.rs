//! Reference-time order for co-partitioned topics: records of partition *i* of every
//! `[[source]]` topic wait in one bounded lane per topic and leave in the order of
//! (record timestamp, topic order as configured, offset), so that a shard's state as of any
//! reference time is a function of the topic logs alone — the order `replay
//! --merge-by-reference` applies the same records in.
//!
//! The merge compares the lanes' heads: each topic is taken in offset order, and the lane
//! whose head has the smallest (timestamp, topic rank) goes next. A head may leave only when
//! every other lane either holds a later head or is *idle*: read to its end with nothing
//! buffered, in which case it is taken to have nothing before `now − allowance` (the idle
//! rule of docs/scaling-design.md). A record without a timestamp sorts before every other.
//!
//! [`Lanes`] is the bookkeeping, over any record type; [`Merger`] drives it for the consumer
//! loop: it pauses a topic partition whose lane is full and resumes it once drained
//! (librdkafka per-partition pause/resume, so memory stays bounded when one topic is far
//! ahead), tells which empty lanes are at their end (position at the high watermark), and
//! reports each shard's reference-time watermark to the service.

use std::collections::{BTreeMap, HashMap, VecDeque};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext};
use rdkafka::message::{BorrowedMessage, Message};
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{Offset, TopicPartitionList};

use crate::event::Micros;
use crate::service::Service;
use crate::state::shards::ShardId;

/// Records buffered per co-partitioned topic partition before it is paused.
const LANE_BOUND: usize = 2_000;
/// A paused topic partition is resumed once its lane is down to this.
const LANE_RESUME: usize = LANE_BOUND / 4;

/// One record waiting in its lane, with its sort time (`i64::MIN` for none).
struct Waiting<T> {
    at: Micros,
    record: T,
}

/// The lanes of every co-partitioned partition index held here.
pub(super) struct Lanes<T> {
    /// The co-partitioned topics, in configured order (a topic's rank is its index).
    topics: Vec<String>,
    /// Partition index → one lane per topic rank.
    parts: BTreeMap<i32, Vec<VecDeque<Waiting<T>>>>,
}

/// What one round of [`Lanes::take_ready`] gave for one partition index.
pub(super) struct Ready<T> {
    /// The records that may be applied now, in reference-time order.
    pub records: Vec<T>,
    /// The time below which every record of every topic of this partition index is now
    /// applied (or leaving in `records`), if it is known: every lane holds a head or is idle.
    pub watermark: Option<Micros>,
}

impl<T> Lanes<T> {
    /// No lanes yet, over the co-partitioned `topics` in configured order.
    pub(super) fn new(topics: Vec<String>) -> Lanes<T> {
        Lanes {
            topics,
            parts: BTreeMap::new(),
        }
    }

    /// The topics, in rank order.
    pub(super) fn topics(&self) -> &[String] {
        &self.topics
    }

    /// The rank of `topic`, if it is co-partitioned.
    pub(super) fn rank(&self, topic: &str) -> Option<usize> {
        self.topics.iter().position(|t| t == topic)
    }

    /// Drop every buffered record and forget the partitions; then hold lanes for
    /// `partitions` (after a rebalance: the restored positions re-fetch what was dropped).
    pub(super) fn reset(&mut self, partitions: impl IntoIterator<Item = i32>) {
        self.parts.clear();
        for p in partitions {
            self.parts
                .entry(p)
                .or_insert_with(|| (0..self.topics.len()).map(|_| VecDeque::new()).collect());
        }
    }

    /// The partition indices held.
    pub(super) fn partitions(&self) -> Vec<i32> {
        self.parts.keys().copied().collect()
    }

    /// Queue `record` (timestamp `at`) of topic rank `rank`, partition `partition`; returns
    /// the lane's length after.
    pub(super) fn push(
        &mut self,
        partition: i32,
        rank: usize,
        at: Option<Micros>,
        record: T,
    ) -> usize {
        let n = self.topics.len();
        let lanes = self
            .parts
            .entry(partition)
            .or_insert_with(|| (0..n).map(|_| VecDeque::new()).collect());
        lanes[rank].push_back(Waiting {
            at: at.unwrap_or(i64::MIN),
            record,
        });
        lanes[rank].len()
    }

    /// Records buffered in lane (`partition`, `rank`).
    pub(super) fn len(&self, partition: i32, rank: usize) -> usize {
        self.parts
            .get(&partition)
            .and_then(|l| l.get(rank))
            .map_or(0, VecDeque::len)
    }

    /// Take out, in reference-time order, the records of partition index `partition` that
    /// may be applied now. `at_end(rank)` says whether that topic's partition has been read
    /// to its end (asked only of empty lanes); `floor` is `now − allowance`, before which an
    /// idle topic is taken to have nothing.
    pub(super) fn take_ready(
        &mut self,
        partition: i32,
        floor: Micros,
        mut at_end: impl FnMut(usize) -> bool,
    ) -> Ready<T> {
        let mut out = Ready {
            records: Vec::new(),
            watermark: None,
        };
        let Some(lanes) = self.parts.get_mut(&partition) else {
            return out;
        };
        // Whether each lane, once empty, is at its end: asked at most once per lane and round.
        let mut idle: Vec<Option<bool>> = vec![None; lanes.len()];
        let mut is_idle = |rank: usize, idle: &mut Vec<Option<bool>>| {
            *idle[rank].get_or_insert_with(|| at_end(rank))
        };
        loop {
            let head = lanes
                .iter()
                .enumerate()
                .filter_map(|(rank, lane)| lane.front().map(|w| (w.at, rank)))
                .min();
            let Some((at, rank)) = head else { break };
            let blocked = (0..lanes.len())
                .any(|o| lanes[o].is_empty() && !(at < floor && is_idle(o, &mut idle)));
            if blocked {
                break;
            }
            let w = lanes[rank].pop_front().expect("a head was found");
            out.records.push(w.record);
        }
        let mut mark = Some(Micros::MAX);
        for (rank, lane) in lanes.iter().enumerate() {
            let bound = match lane.front() {
                Some(w) => Some(w.at),
                None if is_idle(rank, &mut idle) => Some(floor),
                None => None,
            };
            mark = match (mark, bound) {
                (Some(m), Some(b)) => Some(m.min(b)),
                _ => None,
            };
        }
        out.watermark = mark.filter(|m| *m != Micros::MAX && *m != i64::MIN);
        out
    }
}

/// What the rebalance callbacks and the consumer loop share about the merge (both run on the
/// consumer's thread, inside and outside `poll`).
#[derive(Default)]
pub(super) struct MergeShared {
    /// Rebalances so far: the loop drops its lanes when this moves.
    rebalances: AtomicU64,
    /// Topic partitions paused because their lane was full.
    paused: Mutex<Vec<(String, i32)>>,
}

impl MergeShared {
    /// Called by the rebalance callback before partitions are given up or taken: resumes
    /// what the merge paused (librdkafka keeps a partition's pause across an assignment, and
    /// a later owner of the partition in this process must fetch it) and tells the loop.
    pub(super) fn rebalancing<C: ConsumerContext>(&self, consumer: &BaseConsumer<C>) {
        self.rebalances.fetch_add(1, Ordering::SeqCst);
        let paused = std::mem::take(&mut *self.paused.lock().unwrap_or_else(|p| p.into_inner()));
        if paused.is_empty() {
            return;
        }
        let mut tpl = TopicPartitionList::new();
        for (topic, partition) in &paused {
            tpl.add_partition(topic, *partition);
        }
        if let Err(e) = consumer.resume(&tpl) {
            tracing::warn!(error = %e, "cannot resume paused partitions at a rebalance");
        }
    }
}

/// The merge of the co-partitioned topics' records, as the consumer loop runs it.
pub(super) struct Merger<'c> {
    lanes: Lanes<BorrowedMessage<'c>>,
    /// `now − allowance` is where an idle topic partition is taken to be.
    allowance: Micros,
    /// Rebalances seen (see [`MergeShared`]).
    rebalances_seen: u64,
    /// The reference-time watermark last reported per partition index.
    marks: HashMap<i32, Micros>,
    last_late_log: Instant,
}

impl<'c> Merger<'c> {
    /// A merge of `topics` (the co-partitioned ones, in configured order; none: the merge is
    /// off) with the idle `allowance`.
    pub(super) fn new(topics: Vec<String>, allowance: Duration) -> Merger<'c> {
        Merger {
            lanes: Lanes::new(topics),
            allowance: i64::try_from(allowance.as_micros()).unwrap_or(i64::MAX),
            rebalances_seen: 0,
            marks: HashMap::new(),
            last_late_log: Instant::now() - Duration::from_secs(60),
        }
    }

    /// Whether any topic is merged.
    pub(super) fn is_on(&self) -> bool {
        !self.lanes.topics().is_empty()
    }

    /// After each `poll`: if a rebalance ran inside it, drop every buffered record (the
    /// restored shards' positions re-fetch them) and hold lanes for the partitions now
    /// assigned.
    pub(super) fn after_poll<C: ConsumerContext>(
        &mut self,
        consumer: &BaseConsumer<C>,
        shared: &MergeShared,
    ) {
        let n = shared.rebalances.load(Ordering::SeqCst);
        if n == self.rebalances_seen {
            return;
        }
        self.rebalances_seen = n;
        let assigned = consumer.assignment().unwrap_or_default();
        let partitions: Vec<i32> = assigned
            .elements()
            .iter()
            .filter(|e| self.lanes.rank(e.topic()).is_some())
            .map(|e| e.partition())
            .collect();
        self.lanes.reset(partitions);
        self.marks.clear();
    }

    /// Queue `msg` if its topic is merged (pausing its partition when the lane is full);
    /// otherwise hand it back.
    pub(super) fn offer<C: ConsumerContext>(
        &mut self,
        consumer: &BaseConsumer<C>,
        shared: &MergeShared,
        service: &Service,
        msg: BorrowedMessage<'c>,
    ) -> Option<BorrowedMessage<'c>> {
        let Some(rank) = self.lanes.rank(msg.topic()) else {
            return Some(msg);
        };
        let partition = msg.partition();
        let mut at = msg
            .timestamp()
            .to_millis()
            .map(|ms| ms.saturating_mul(1_000));
        // A stamp far ahead of this instance's clock (a producer's clock wrong by hours, a
        // year 2099) would hold its whole topic partition back until that time comes: it
        // sorts as `now + allowance` instead, counted and logged, never silently.
        let ceiling = crate::service::now_micros().saturating_add(self.allowance);
        if let Some(t) = at.filter(|t| *t > ceiling) {
            service
                .metrics()
                .records_out_of_order
                .with_label_values(&[msg.topic(), "ahead_of_clock"])
                .inc();
            if self.last_late_log.elapsed() > Duration::from_secs(10) {
                tracing::warn!(
                    topic = msg.topic(),
                    partition,
                    offset = msg.offset(),
                    ahead_ms = (t - ceiling + self.allowance) / 1_000,
                    "a record's timestamp is ahead of this instance's clock by more than kafka.idle_allowance_secs; it is ordered as if stamped now + the allowance"
                );
                self.last_late_log = Instant::now();
            }
            at = Some(ceiling);
        }
        if let (Some(at), Some(mark)) = (at, self.marks.get(&partition)) {
            if at < *mark {
                service
                    .metrics()
                    .records_out_of_order
                    .with_label_values(&[msg.topic(), "behind_watermark"])
                    .inc();
                if self.last_late_log.elapsed() > Duration::from_secs(10) {
                    tracing::warn!(
                        topic = msg.topic(),
                        partition,
                        offset = msg.offset(),
                        behind_ms = (*mark - at) / 1_000,
                        "a record's timestamp is behind its shard's reference-time watermark (its producer's or broker's clock lags by more than kafka.idle_allowance_secs); applied now, out of reference-time order"
                    );
                    self.last_late_log = Instant::now();
                }
            }
        }
        let len = self.lanes.push(partition, rank, at, msg);
        if len >= LANE_BOUND {
            let topic = self.lanes.topics()[rank].clone();
            let mut paused = shared.paused.lock().unwrap_or_else(|p| p.into_inner());
            if !paused.iter().any(|(t, p)| *t == topic && *p == partition) {
                let mut tpl = TopicPartitionList::new();
                tpl.add_partition(&topic, partition);
                match consumer.pause(&tpl) {
                    Ok(()) => {
                        tracing::debug!(
                            topic,
                            partition,
                            buffered = len,
                            "merge lane full: partition paused"
                        );
                        paused.push((topic, partition))
                    }
                    Err(e) => {
                        tracing::warn!(topic, partition, error = %e, "cannot pause a partition whose merge buffer is full")
                    }
                }
            }
        }
        None
    }

    /// Take out every record that may be applied now, in reference-time order per shard,
    /// with the watermark each shard reaches once they are applied.
    pub(super) fn take_ready<C: ConsumerContext>(
        &mut self,
        consumer: &BaseConsumer<C>,
        service: &Service,
    ) -> (Vec<BorrowedMessage<'c>>, Vec<(ShardId, Micros)>) {
        let floor = crate::service::now_micros().saturating_sub(self.allowance);
        let topics = self.lanes.topics().to_vec();
        // The consumer's positions, asked once per round and only if a lane is empty.
        let mut positions: Option<TopicPartitionList> = None;
        let mut records = Vec::new();
        let mut marks = Vec::new();
        for partition in self.lanes.partitions() {
            let shard = ShardId::co_partitioned(partition);
            let ready = self.lanes.take_ready(partition, floor, |rank| {
                at_end(
                    consumer,
                    &topics[rank],
                    partition,
                    &mut positions,
                    service,
                    &shard,
                )
            });
            records.extend(ready.records);
            if let Some(mark) = ready.watermark {
                let m = self.marks.entry(partition).or_insert(mark);
                *m = (*m).max(mark);
                marks.push((shard, mark));
            }
        }
        (records, marks)
    }

    /// Resume the paused topic partitions whose lanes have drained.
    pub(super) fn resume_drained<C: ConsumerContext>(
        &self,
        consumer: &BaseConsumer<C>,
        shared: &MergeShared,
    ) {
        let mut paused = shared.paused.lock().unwrap_or_else(|p| p.into_inner());
        let mut tpl = TopicPartitionList::new();
        paused.retain(|(topic, partition)| {
            let drained = self
                .lanes
                .rank(topic)
                .is_none_or(|rank| self.lanes.len(*partition, rank) <= LANE_RESUME);
            if drained {
                tpl.add_partition(topic, *partition);
            }
            !drained
        });
        if tpl.count() > 0 {
            tracing::debug!(
                partitions = tpl.count(),
                "merge lanes drained: partitions resumed"
            );
            if let Err(e) = consumer.resume(&tpl) {
                tracing::warn!(error = %e, "cannot resume drained partitions");
            }
        }
    }
}

/// Whether `topic`'s partition `partition` has been read to its end: the consumer's position
/// (past what was delivered, control records included), or the shard's applied offset, is
/// at the high watermark librdkafka last fetched. Asked only for an empty lane, so everything
/// delivered is applied.
fn at_end<C: ConsumerContext>(
    consumer: &BaseConsumer<C>,
    topic: &str,
    partition: i32,
    positions: &mut Option<TopicPartitionList>,
    service: &Service,
    shard: &ShardId,
) -> bool {
    let Some((low, high)) = cached_watermarks(consumer, topic, partition) else {
        return false;
    };
    if high < 0 {
        return false; // nothing fetched yet
    }
    let positions = positions.get_or_insert_with(|| consumer.position().unwrap_or_default());
    let consumed = positions
        .find_partition(topic, partition)
        .and_then(|e| match e.offset() {
            Offset::Offset(o) => Some(o),
            _ => None,
        });
    let applied = service
        .lock_shards()
        .shard(shard)
        .and_then(|s| s.stream_offset(topic));
    let position = consumed
        .into_iter()
        .chain(applied)
        .max()
        .unwrap_or(low.max(0));
    position >= high
}

/// The low and high watermarks of a partition as of librdkafka's last fetch response (no
/// request to the brokers; rdkafka offers only the querying variant, which blocks).
fn cached_watermarks<C: ConsumerContext>(
    consumer: &BaseConsumer<C>,
    topic: &str,
    partition: i32,
) -> Option<(i64, i64)> {
    let topic = std::ffi::CString::new(topic).ok()?;
    let (mut low, mut high) = (-1_i64, -1_i64);
    // SAFETY: the client pointer is valid for the consumer's lifetime; the topic is a
    // NUL-terminated string that outlives the call; librdkafka writes only the two i64s we
    // pass and takes its own lock on the partition.
    let err = unsafe {
        rdkafka::bindings::rd_kafka_get_watermark_offsets(
            consumer.client().native_ptr(),
            topic.as_ptr(),
            partition,
            &mut low,
            &mut high,
        )
    };
    (err == RDKafkaRespErr::RD_KAFKA_RESP_ERR_NO_ERROR).then_some((low, high))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn lanes() -> Lanes<(usize, i64)> {
        Lanes::new(vec!["assign".into(), "rides".into()])
    }

    #[test]
    fn heads_leave_by_time_then_topic_order_then_offset() {
        let mut l = lanes();
        l.reset([0]);
        // Rides first on the wire, assignments later; timestamps interleave.
        for (offset, at) in [(0, 10), (1, 20), (2, 20), (3, 40)] {
            l.push(0, 1, Some(at), (1, offset));
        }
        for (offset, at) in [(0, 5), (1, 20), (2, 30)] {
            l.push(0, 0, Some(at), (0, offset));
        }
        // Both lanes have heads, so no end is asked about until one empties.
        let r = l.take_ready(0, 0, |_| false);
        // The assignment lane empties after (0,2) at 30: ride 40 waits for it.
        assert_eq!(
            r.records,
            vec![(0, 0), (1, 0), (0, 1), (1, 1), (1, 2), (0, 2)]
        );
        assert_eq!(
            r.watermark, None,
            "the assignment topic is neither buffered nor at its end"
        );
        assert_eq!(l.len(0, 1), 1);
    }

    #[test]
    fn an_idle_topic_holds_the_others_only_until_now_minus_the_allowance() {
        let mut l = lanes();
        l.reset([0]);
        l.push(0, 0, Some(100), (0, 0));
        l.push(0, 0, Some(200), (0, 1));
        // The ride topic is at its end: records before the floor pass, later ones wait.
        let r = l.take_ready(0, 150, |rank| rank == 1);
        assert_eq!(r.records, vec![(0, 0)]);
        assert_eq!(r.watermark, Some(150));
        // Not at its end (a fetch is on its way): nothing passes, whatever the time.
        let r = l.take_ready(0, 1_000, |_| false);
        assert!(r.records.is_empty());
        assert_eq!(r.watermark, None);
        let r = l.take_ready(0, 1_000, |_| true);
        assert_eq!(r.records, vec![(0, 1)]);
        assert_eq!(r.watermark, Some(1_000), "every lane empty and idle");
    }

    #[test]
    fn records_without_a_timestamp_go_first_and_the_watermark_is_the_smallest_head() {
        let mut l = lanes();
        l.reset([3]);
        l.push(3, 1, None, (1, 0));
        l.push(3, 1, Some(70), (1, 1));
        l.push(3, 0, Some(50), (0, 0));
        l.push(3, 0, Some(90), (0, 1));
        let r = l.take_ready(3, 0, |_| false);
        assert_eq!(r.records, vec![(1, 0), (0, 0), (1, 1)]);
        assert_eq!(r.watermark, None);
        l.push(3, 1, Some(95), (1, 2));
        let r = l.take_ready(3, 0, |_| false);
        assert_eq!(r.records, vec![(0, 1)]);
        assert_eq!(l.len(3, 1), 1);
        l.push(3, 0, Some(99), (0, 2));
        // The rides at their end once their lane empties: 99 is not before the floor of 97.
        let r = l.take_ready(3, 97, |rank| rank == 1);
        assert_eq!(r.records, vec![(1, 2)]);
        assert_eq!(
            r.watermark,
            Some(97),
            "the idle rides' floor is below the head at 99"
        );
    }

    /// The order replay uses, written separately: repeatedly take the topic whose next
    /// record has the smallest (timestamp, rank), each topic in its own order.
    fn offline_order(topics: &[Vec<Option<i64>>]) -> Vec<(usize, usize)> {
        let mut next = vec![0; topics.len()];
        let mut out = Vec::new();
        loop {
            let best = (0..topics.len())
                .filter(|&r| next[r] < topics[r].len())
                .min_by_key(|&r| (topics[r][next[r]].unwrap_or(i64::MIN), r));
            let Some(r) = best else { return out };
            out.push((r, next[r]));
            next[r] += 1;
        }
    }

    proptest::proptest! {
        /// However the records arrive (any interleaving of the topics' fetches, any rounds
        /// in between, any clock), what leaves is the offline order: the live order is a
        /// function of the logs.
        #[test]
        fn arrival_order_never_changes_the_order_of_application(
            topics in proptest::collection::vec(
                proptest::collection::vec(proptest::option::weighted(0.95, 0i64..50), 0..25),
                1..4,
            ),
            arrivals in proptest::collection::vec((0usize..4, 1usize..6, proptest::bool::ANY, -10i64..60), 0..60),
        ) {
            let names = (0..topics.len()).map(|r| format!("topic-{r}")).collect();
            let mut lanes: Lanes<(usize, usize)> = Lanes::new(names);
            lanes.reset([0]);
            let mut pushed = vec![0; topics.len()];
            let mut out = Vec::new();
            let push = |lanes: &mut Lanes<(usize, usize)>, pushed: &mut Vec<usize>, r: usize| {
                let i = pushed[r];
                lanes.push(0, r, topics[r][i], (r, i));
                pushed[r] += 1;
            };
            for (r, n, round, floor) in arrivals {
                let r = r % topics.len();
                for _ in 0..n {
                    if pushed[r] < topics[r].len() {
                        push(&mut lanes, &mut pushed, r);
                    }
                }
                if round {
                    // Truthful ends: a lane is at its end once its topic is all pushed.
                    let done: Vec<bool> = (0..topics.len()).map(|r| pushed[r] == topics[r].len()).collect();
                    out.extend(lanes.take_ready(0, floor, |r| done[r]).records);
                }
            }
            for r in 0..topics.len() {
                while pushed[r] < topics[r].len() {
                    push(&mut lanes, &mut pushed, r);
                }
            }
            out.extend(lanes.take_ready(0, i64::MAX, |_| true).records);
            proptest::prop_assert_eq!(out, offline_order(&topics));
        }
    }

    #[test]
    fn reset_drops_what_was_buffered() {
        let mut l = lanes();
        l.push(1, 0, Some(1), (0, 0));
        assert_eq!(l.partitions(), vec![1]);
        l.reset([2]);
        assert_eq!(l.partitions(), vec![2]);
        assert_eq!(l.len(1, 0), 0);
    }
}

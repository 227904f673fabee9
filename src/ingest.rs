//! The one path every source takes into the state: decode outside the lock, apply a whole batch
//! under one short lock, then count outcomes and rejects in metrics.

use std::sync::Mutex;

use crate::decode::decode_event;
use crate::event::{Event, Outcome, Reject};
use crate::metrics::{Metrics, Source};
use crate::state::shards::Shards;

/// One encoded event and where it goes.
#[derive(Debug, Clone, Copy)]
pub struct Item<'a> {
    /// Shard the event belongs to (its Kafka partition, or the source's own shard).
    pub shard: &'a str,
    /// Input offset within the shard, for sources that have one (Kafka).
    pub offset: Option<i64>,
    /// The encoded event.
    pub bytes: &'a [u8],
}

/// What happened to each event of a batch, in batch order.
#[derive(Debug, Default)]
pub struct BatchReport {
    /// One entry per input item; `None` for an item skipped because its offset was already
    /// applied (a redelivery after a seek).
    pub results: Vec<Option<Result<Outcome, Reject>>>,
}

impl BatchReport {
    /// How many events ended in `outcome`.
    pub fn count(&self, outcome: Outcome) -> u64 {
        self.results
            .iter()
            .filter(|r| matches!(r, Some(Ok(o)) if *o == outcome))
            .count() as u64
    }

    /// How many events were refused.
    pub fn n_rejected(&self) -> usize {
        self.results
            .iter()
            .filter(|r| matches!(r, Some(Err(_))))
            .count()
    }

    /// The refusals with their item index.
    pub fn rejects(&self) -> impl Iterator<Item = (usize, &Reject)> {
        self.results
            .iter()
            .enumerate()
            .filter_map(|(i, r)| match r {
                Some(Err(reject)) => Some((i, reject)),
                _ => None,
            })
    }
}

/// Decode and apply `items` from `source`.
///
/// Never fails as a whole: every item gets its own result, so one bad event cannot stop a
/// batch or a consumer. For items with an offset, the shard's `next_offset` advances under
/// the same lock as the state, so state and position never disagree; an item below the
/// shard's position was applied before and is skipped.
pub fn apply_batch(
    shards: &Mutex<Shards>,
    metrics: &Metrics,
    source: Source,
    items: &[Item<'_>],
    max_event_bytes: usize,
) -> BatchReport {
    let decoded: Vec<Result<Event<'_>, Reject>> = items
        .iter()
        .map(|item| decode_event(item.bytes, max_event_bytes))
        .collect();
    let results: Vec<Option<Result<Outcome, Reject>>> = {
        let mut shards = shards
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        items
            .iter()
            .zip(decoded)
            .map(|(item, decoded)| {
                let shard = shards.shard_mut(item.shard);
                if let Some(offset) = item.offset {
                    if shard.next_offset.is_some_and(|next| offset < next) {
                        return None;
                    }
                    shard.next_offset = Some(offset + 1);
                    shard.dirty = true;
                }
                Some(decoded.and_then(|event| shard.apply(&event)))
            })
            .collect()
    };
    let report = BatchReport { results };
    for outcome in Outcome::ALL {
        metrics.count_outcome(source, outcome, report.count(outcome));
    }
    for (_, reject) in report.rejects() {
        metrics.count_reject(source, reject.reason);
    }
    report
}

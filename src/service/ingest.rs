//! The one path every source takes into the state: decode outside the lock, apply a whole batch
//! under one short lock, then count outcomes and rejects in metrics.

use std::sync::Mutex;

use super::metrics::{Metrics, Source};
use crate::decode::decode_event;
use crate::event::{Event, Outcome, Reject};
use crate::mapping::Mapping;
use crate::state::cadence::Cadence;
use crate::state::shards::Shards;
use crate::state::ExperimentSnapshot;

/// How many events ahead of the one being applied to prefetch (enough to cover a memory
/// access at ~100-300 ns per event; measured in benches/targets.rs).
const PREFETCH_AHEAD: usize = 8;

/// One encoded event and where it goes.
#[derive(Debug, Clone, Copy)]
pub struct Item<'a> {
    /// Shard the event belongs to (its Kafka partition, or the source's own shard).
    pub shard: &'a str,
    /// Input offset within the shard, for sources that have one (Kafka).
    pub offset: Option<i64>,
    /// The encoded event.
    pub bytes: &'a [u8],
    /// How the event reads: a source's field mapping, or `None` for the built-in format.
    pub mapping: Option<&'a Mapping>,
}

/// Decode one item under its mapping; `Ok(None)` for a mapped event that maps to nothing.
pub fn decode_item<'a>(
    item: &Item<'a>,
    max_event_bytes: usize,
) -> Result<Option<Event<'a>>, Reject> {
    match item.mapping {
        None => decode_event(item.bytes, max_event_bytes).map(Some),
        Some(m) => m.decode(item.bytes, max_event_bytes),
    }
}

/// What happened to each event of a batch, in batch order.
#[derive(Debug, Default)]
pub struct BatchReport {
    /// One entry per input item; `None` for an item skipped because its offset was already
    /// applied (a redelivery after a seek).
    pub results: Vec<Option<Result<Outcome, Reject>>>,
    /// Snapshots of experiments that became due for evaluation, each taken at the event that
    /// made it due, in input order (only with a cadence).
    pub due: Vec<ExperimentSnapshot>,
    /// For each snapshot of `due`, the index in the batch of the event that made it due
    /// (`replay` names that event's line).
    pub due_items: Vec<usize>,
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
    apply_batch_due(shards, metrics, source, items, max_event_bytes, None)
}

/// [`apply_batch`], and with a `cadence` also the snapshots of experiments that became due
/// for evaluation (taken under the same lock, at the event that made them due), so decisions
/// are a function of the event order alone.
pub fn apply_batch_due(
    shards: &Mutex<Shards>,
    metrics: &Metrics,
    source: Source,
    items: &[Item<'_>],
    max_event_bytes: usize,
    cadence: Option<&Cadence>,
) -> BatchReport {
    let mut due = Vec::new();
    let mut due_items = Vec::new();
    // `Option` so that a refused event's reason can be taken out for the report.
    let mut decoded: Vec<Option<Result<Option<Event<'_>>, Reject>>> = items
        .iter()
        .map(|item| Some(decode_item(item, max_event_bytes)))
        .collect();
    let results: Vec<Option<Result<Outcome, Reject>>> = {
        let mut shards = shards
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        let mut results = Vec::with_capacity(items.len());
        let mut run_due = Vec::new();
        let mut run_due_items = Vec::new();
        // What was looked up ahead for each event (none for the first few of a run).
        let mut prepared: Vec<Option<crate::state::Prepared>> = vec![None; items.len()];
        let mut i = 0;
        while i < items.len() {
            // Sources hand over runs of one shard (a Kafka poll is mostly one partition):
            // look the shard up once per run.
            let name = items[i].shard;
            let run_end = items[i..]
                .iter()
                .position(|it| it.shard != name)
                .map_or(items.len(), |n| i + n);
            let shard = shards.shard_mut(name);
            for j in i..run_end {
                // Ask for the table entries of an event a few places ahead while this one is
                // applied: unit tables outgrow the caches and a batch's units are unrelated,
                // so without this nearly every new unit waits for memory.
                if j + PREFETCH_AHEAD < run_end {
                    if let Some(Ok(Some(event))) = &decoded[j + PREFETCH_AHEAD] {
                        prepared[j + PREFETCH_AHEAD] = shard.prepare(event);
                    }
                }
                let prepared = prepared[j].take();
                if let Some(offset) = items[j].offset {
                    if !shard.advance(offset) {
                        results.push(None);
                        continue;
                    }
                }
                // Applied in place: an event is ~150 bytes, and moving each one out of the
                // batch cost more than the copy is worth.
                let event = match &decoded[j] {
                    Some(Ok(Some(event))) => event,
                    Some(Ok(None)) => {
                        results.push(Some(Ok(Outcome::Ignored)));
                        continue;
                    }
                    _ => {
                        let reject = match decoded[j].take() {
                            Some(Err(reject)) => reject,
                            _ => unreachable!("checked above: a refused event"),
                        };
                        results.push(Some(Err(reject)));
                        continue;
                    }
                };
                let Some(cadence) = cadence else {
                    results.push(Some(shard.apply_prepared(event, prepared)));
                    continue;
                };
                let result = shard.apply_due(event, prepared, cadence, &mut run_due);
                run_due_items.resize(run_due.len(), j);
                results.push(Some(result));
            }
            // The other shards did not change during this run, so adding their totals now
            // gives the same snapshot as at the due event.
            for (mut snap, &j) in run_due.drain(..).zip(&run_due_items) {
                shards.merge_others(name, &mut snap);
                // This shard's totals are those at the due event, so its position is the one
                // just past that event, not the end of the run.
                if let Some(offset) = items[j].offset {
                    for (shard, next) in &mut snap.positions {
                        if shard.as_str() == name {
                            *next = offset + 1;
                        }
                    }
                }
                due.push(snap);
            }
            due_items.append(&mut run_due_items);
            i = run_end;
        }
        results
    };
    let report = BatchReport {
        results,
        due,
        due_items,
    };
    // One pass over the batch (most events are `applied`, the first outcome listed).
    let mut counts = [0u64; Outcome::ALL.len()];
    for r in &report.results {
        if let Some(Ok(o)) = r {
            if let Some(i) = Outcome::ALL.iter().position(|x| x == o) {
                counts[i] += 1;
            }
        }
    }
    for (outcome, n) in Outcome::ALL.into_iter().zip(counts) {
        metrics.count_outcome(source, outcome, n);
    }
    for (_, reject) in report.rejects() {
        metrics.count_reject(source, reject.reason);
    }
    report
}

//! The one path every source takes into the state: decode outside the lock, apply a whole batch
//! under one short lock, then count outcomes and rejects in metrics.

use std::sync::Mutex;

use crate::decode::decode_event;
use crate::event::{Event, Outcome, Reject};
use crate::metrics::{Metrics, Source};
use crate::state::Engine;

/// What happened to each event of a batch, in batch order.
#[derive(Debug, Default)]
pub struct BatchReport {
    /// One entry per input item.
    pub results: Vec<Result<Outcome, Reject>>,
}

impl BatchReport {
    /// How many events ended in `outcome`.
    pub fn count(&self, outcome: Outcome) -> u64 {
        self.results
            .iter()
            .filter(|r| matches!(r, Ok(o) if *o == outcome))
            .count() as u64
    }

    /// How many events were refused.
    pub fn n_rejected(&self) -> usize {
        self.results.iter().filter(|r| r.is_err()).count()
    }
}

/// Decode and apply `items` (each one encoded event) from `source`.
///
/// Never fails as a whole: every item gets its own result, so one bad event cannot stop a
/// batch or a consumer.
pub fn apply_batch<'a>(
    engine: &Mutex<Engine>,
    metrics: &Metrics,
    source: Source,
    items: impl IntoIterator<Item = &'a [u8]>,
    max_event_bytes: usize,
) -> BatchReport {
    let decoded: Vec<Result<Event<'a>, Reject>> = items
        .into_iter()
        .map(|bytes| decode_event(bytes, max_event_bytes))
        .collect();
    let results: Vec<Result<Outcome, Reject>> = {
        let mut engine = engine
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        decoded
            .into_iter()
            .map(|d| d.and_then(|event| engine.apply(&event)))
            .collect()
    };
    let report = BatchReport { results };
    for outcome in Outcome::ALL {
        metrics.count_outcome(source, outcome, report.count(outcome));
    }
    for r in &report.results {
        if let Err(reject) = r {
            metrics.count_reject(source, reject.reason);
        }
    }
    report
}

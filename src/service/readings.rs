//! Readings (summary and findings) shared by the readers (experiment documents, dashboard
//! pages, `/metrics`), so that concurrent reads of a busy experiment do not each repeat its
//! quadrature, nor its rules.
//!
//! A cached reading is reused when the experiment's totals are unchanged, or when it is
//! younger than [`MAX_AGE`] (then the reader sees totals at most that old, consistently: a
//! reading always carries the snapshot it was computed from). Under steady ingest this bounds
//! the quadrature to one run per experiment per `MAX_AGE`, whatever the read rate.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use crate::decide::evaluation::Reading;
use crate::state::ExperimentSnapshot;
use crate::summary::DEFAULT_LEVEL;

/// Oldest reading a reader may be served while its experiment keeps changing.
pub const MAX_AGE: Duration = Duration::from_secs(1);

struct Entry {
    reading: Arc<Reading>,
    at: Instant,
}

/// Latest reading per experiment id.
#[derive(Default)]
pub struct SummaryCache {
    entries: Mutex<HashMap<String, Entry>>,
}

impl SummaryCache {
    /// The reading of `snapshot` at the API's credible level, from the cache when allowed.
    /// Runs the quadrature and the rules (outside the cache's lock) only when needed.
    pub fn reading(&self, snapshot: ExperimentSnapshot) -> Arc<Reading> {
        let id = snapshot.def.id.clone();
        if let Some(hit) = self.lookup(&id, &snapshot) {
            return hit;
        }
        let reading = Arc::new(Reading::of(snapshot, DEFAULT_LEVEL));
        self.lock().insert(
            id,
            Entry {
                reading: Arc::clone(&reading),
                at: Instant::now(),
            },
        );
        reading
    }

    /// The cached reading of exactly `snapshot`'s totals, if there is one; never computes
    /// and never serves an older one. For background work (the fleet's verdicts), which
    /// must not make a stale reading look young to the readers.
    pub fn exact(&self, snapshot: &ExperimentSnapshot) -> Option<Arc<Reading>> {
        let entries = self.lock();
        let e = entries.get(&snapshot.def.id)?;
        (e.reading.summary.snapshot == *snapshot).then(|| Arc::clone(&e.reading))
    }

    fn lookup(&self, id: &str, snapshot: &ExperimentSnapshot) -> Option<Arc<Reading>> {
        let entries = self.lock();
        let e = entries.get(id)?;
        let cached = &e.reading.summary.snapshot;
        // A redefinition (new generation, new variants or metrics) never reuses a summary.
        let same_def = Arc::ptr_eq(&cached.def, &snapshot.def) || cached.def == snapshot.def;
        (same_def && (cached == snapshot || e.at.elapsed() < MAX_AGE))
            .then(|| Arc::clone(&e.reading))
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, HashMap<String, Entry>> {
        self.entries.lock().unwrap_or_else(|p| p.into_inner())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::state::Engine;

    use crate::service::test_checkout_copy as checkout_copy;

    fn snapshot_after(n_units: usize) -> ExperimentSnapshot {
        let defs = vec![checkout_copy()];
        let id = defs[0].id.clone();
        let variant = defs[0].variants[0].name.clone();
        let mut engine = Engine::new(defs);
        for i in 0..n_units {
            let unit = format!("u{i}");
            let event = crate::event::Event {
                experiment: id.as_str().into(),
                id: None,
                time: None,
                body: crate::event::EventBody::Exposure {
                    variant: variant.as_str().into(),
                    unit: unit.as_str().into(),
                },
            };
            engine.apply(&event).unwrap();
        }
        engine.experiment(&id).unwrap().snapshot()
    }

    #[test]
    fn unchanged_totals_reuse_and_changed_ones_recompute_once_stale() {
        let cache = SummaryCache::default();
        let first = cache.reading(snapshot_after(10));
        let again = cache.reading(snapshot_after(10));
        assert!(Arc::ptr_eq(&first, &again), "same totals: reused");
        // Changed totals within MAX_AGE: the recent summary is served (with its own totals).
        let young = cache.reading(snapshot_after(11));
        assert!(Arc::ptr_eq(&first, &young));
        assert_eq!(young.summary.snapshot.units.iter().sum::<u64>(), 10);
        // Once older than MAX_AGE, changed totals are summarised afresh.
        cache
            .lock()
            .get_mut(&first.summary.snapshot.def.id)
            .unwrap()
            .at -= MAX_AGE;
        let fresh = cache.reading(snapshot_after(11));
        assert!(!Arc::ptr_eq(&first, &fresh));
        assert_eq!(fresh.summary.snapshot.units.iter().sum::<u64>(), 11);
    }
}

//! Partial totals of one experiment from many input partitions, merged exactly and at
//! deterministic boundaries (docs/scaling-design.md, slice 1). Each partition sends cumulative
//! totals as of reference-time boundaries together with the input positions they reflect; the
//! merger keeps the newest per partition, so a partial delivered twice, late or out of order is
//! never counted twice, and a boundary is evaluated only once every partition has passed it.
//! Pure: the transport (a compacted Kafka topic) and the clock live in the edges.

use std::collections::BTreeMap;

use super::ExperimentSnapshot;
use crate::event::Micros;

/// Totals that add up across partitions (an experiment's per-arm totals, or a test's vector).
pub trait Tally: Clone + PartialEq {
    /// Add `other` (another partition's totals of the same experiment) to these.
    fn absorb(&mut self, other: &Self);
}

impl Tally for super::ExperimentSnapshot {
    fn absorb(&mut self, other: &Self) {
        self.merge(other);
    }
}

/// One partition's message about one experiment.
#[derive(Debug, Clone, PartialEq)]
pub struct Partial<T> {
    /// Input partition index (the same index in every co-partitioned input topic).
    pub partition: u32,
    /// Next offset of every input topic the partition's shard reads, in a fixed topic order.
    pub positions: Vec<i64>,
    /// Every record of the partition with a reference time before this is counted.
    pub watermark: Micros,
    /// Cumulative totals as of boundaries (ascending), one entry per boundary at which the
    /// totals changed; a boundary without an entry has the totals of the entry before it.
    pub as_of: Vec<(Micros, T)>,
}

/// What [`Merger::offer`] did with a partial.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Offered {
    /// Newer than what was held: taken.
    Taken,
    /// Not newer (a redelivery or an older message): ignored.
    Stale,
    /// Newer, with totals for a boundary the partition had passed that differ from the ones
    /// held: the partition was re-derived by a new holder whose idle declarations (or a
    /// record behind the watermark) placed records differently. Taken: its entries replace
    /// the held ones for every boundary not yet evaluated (evaluated ones stay decided).
    Revised,
    /// Positions ahead in one topic and behind in another, or a partition out of range: two
    /// writers for one partition, or a bug. Ignored and reported, never merged.
    Conflict,
}

#[derive(Debug, Clone)]
struct Held<T> {
    positions: Vec<i64>,
    watermark: Micros,
    as_of: BTreeMap<Micros, T>,
}

/// The owner's view of one experiment: the newest partial of every partition.
#[derive(Debug, Clone)]
pub struct Merger<T> {
    partitions: Vec<Option<Held<T>>>,
    /// Boundaries up to here were evaluated; entries before it are pruned.
    evaluated: Option<Micros>,
    empty: T,
}

/// Whether positions `a` are at or past `b` in every topic (`Some(true)`), at or before in
/// every topic (`Some(false)` unless equal), or neither (`None`).
fn compare(a: &[i64], b: &[i64]) -> Option<std::cmp::Ordering> {
    use std::cmp::Ordering::*;
    if a.len() != b.len() {
        return None;
    }
    let mut order = Equal;
    for (x, y) in a.iter().zip(b) {
        match (order, x.cmp(y)) {
            (_, Equal) => {}
            (Equal, o) => order = o,
            (o, p) if o == p => {}
            _ => return None,
        }
    }
    Some(order)
}

impl<T: Tally> Merger<T> {
    /// A merger over `n_partitions` input partitions; `empty` is the totals of no events.
    pub fn new(n_partitions: u32, empty: T) -> Merger<T> {
        Merger {
            partitions: vec![None; n_partitions as usize],
            evaluated: None,
            empty,
        }
    }

    /// Take `partial` if it is newer than what is held for its partition.
    pub fn offer(&mut self, partial: Partial<T>) -> Offered {
        let Some(slot) = self.partitions.get_mut(partial.partition as usize) else {
            return Offered::Conflict;
        };
        if let Some(held) = slot {
            match compare(&partial.positions, &held.positions) {
                None => return Offered::Conflict,
                Some(std::cmp::Ordering::Less) => return Offered::Stale,
                Some(std::cmp::Ordering::Equal) if partial.watermark <= held.watermark => {
                    return Offered::Stale
                }
                _ => {}
            }
        }
        // Totals as of a boundary the partition has passed are fixed by its log and its
        // holder's idle declarations; a new holder may declare differently.
        let revised = slot.as_ref().is_some_and(|held| {
            partial
                .as_of
                .iter()
                .any(|(b, t)| *b <= held.watermark && held.as_of.get(b).is_some_and(|old| old != t))
        });
        let held = slot.get_or_insert_with(|| Held {
            positions: Vec::new(),
            watermark: Micros::MIN,
            as_of: BTreeMap::new(),
        });
        held.positions = partial.positions;
        held.watermark = held.watermark.max(partial.watermark);
        // Entries older than the base kept at the last evaluation are not needed again.
        let base = held.as_of.keys().next().copied();
        for (b, t) in partial.as_of {
            if self.evaluated.is_none() || base.is_none_or(|base| b >= base) {
                if revised && self.evaluated.is_none_or(|e| b > e) {
                    held.as_of.insert(b, t);
                } else {
                    held.as_of.entry(b).or_insert(t);
                }
            }
        }
        if revised {
            Offered::Revised
        } else {
            Offered::Taken
        }
    }

    /// The boundaries that can be evaluated now, in order: after the last evaluated one, at or
    /// before every partition's watermark, and where some partition's totals changed. Empty
    /// while any partition has sent nothing.
    pub fn ready(&self) -> Vec<Micros> {
        let mut low = Micros::MAX;
        for p in &self.partitions {
            match p {
                None => return Vec::new(),
                Some(h) => low = low.min(h.watermark),
            }
        }
        let mut out: Vec<Micros> = self
            .partitions
            .iter()
            .flatten()
            .flat_map(|h| h.as_of.keys().copied())
            .filter(|b| *b <= low && self.evaluated.is_none_or(|e| *b > e))
            .collect();
        out.sort_unstable();
        out.dedup();
        out
    }

    /// The merged totals as of boundary `b` (every partition's latest entry at or before it).
    pub fn totals_at(&self, b: Micros) -> T {
        let mut total = self.empty.clone();
        for h in self.partitions.iter().flatten() {
            if let Some((_, t)) = h.as_of.range(..=b).next_back() {
                total.absorb(t);
            }
        }
        total
    }

    /// Record that boundaries up to `b` were evaluated, and drop entries nobody needs again
    /// (each partition keeps its latest entry at or before `b` as the base of later ones).
    pub fn evaluated(&mut self, b: Micros) {
        self.evaluated = Some(self.evaluated.map_or(b, |e| e.max(b)));
        for h in self.partitions.iter_mut().flatten() {
            let base = h.as_of.range(..=b).next_back().map(|(k, _)| *k);
            if let Some(base) = base {
                h.as_of = h.as_of.split_off(&base);
            }
        }
    }

    /// The smallest watermark over the partitions (`None` while any has sent nothing).
    pub fn low_watermark(&self) -> Option<Micros> {
        self.partitions
            .iter()
            .map(|p| p.as_ref().map(|h| h.watermark))
            .collect::<Option<Vec<_>>>()?
            .into_iter()
            .min()
    }

    /// The last evaluated boundary.
    pub fn last_evaluated(&self) -> Option<Micros> {
        self.evaluated
    }

    /// Totals of no events, as given at construction.
    pub fn empty(&self) -> &T {
        &self.empty
    }
}

/// One partition's side: totals as of every boundary it passes, from its records in log order.
/// `every` is the boundary spacing (µs of reference time).
#[derive(Debug, Clone)]
pub struct BoundaryLog<T> {
    every: Micros,
    watermark: Micros,
    current: T,
    /// Entries not yet acknowledged by the owner.
    pending: Vec<(Micros, T)>,
    /// The totals of the last entry recorded, to skip boundaries without change.
    last_entry: Option<T>,
}

impl<T: Tally> BoundaryLog<T> {
    /// A partition with no records yet.
    pub fn new(every: Micros, empty: T) -> BoundaryLog<T> {
        BoundaryLog {
            every: every.max(1),
            watermark: Micros::MIN,
            current: empty,
            pending: Vec::new(),
            last_entry: None,
        }
    }

    /// The boundary at or before `t`.
    fn floor(&self, t: Micros) -> Micros {
        t.div_euclid(self.every) * self.every
    }

    /// Advance the reference-time watermark to `t` (a record's time, or an idle partition's
    /// declared time): the totals so far are recorded as of the boundaries now passed.
    pub fn advance(&mut self, t: Micros) {
        if t <= self.watermark {
            return;
        }
        let before = std::mem::replace(&mut self.watermark, t);
        if before == Micros::MIN {
            return; // nothing was counted before the first record
        }
        // The totals hold from the first boundary after the previous watermark up to `t`:
        // one entry, keyed by that first boundary, covers every boundary passed now.
        let first_passed = self.floor(before) + self.every;
        if first_passed > t {
            return;
        }
        if self.last_entry.as_ref() != Some(&self.current) {
            self.pending.push((first_passed, self.current.clone()));
            self.last_entry = Some(self.current.clone());
        }
    }

    /// Apply one record: advance to its reference time first, then count it with `add`.
    pub fn record(&mut self, reference_time: Micros, add: impl FnOnce(&mut T)) {
        self.advance(reference_time);
        add(&mut self.current);
    }

    /// The partial to publish now.
    pub fn partial(&self, partition: u32, positions: Vec<i64>) -> Partial<T> {
        Partial {
            partition,
            positions,
            watermark: self.watermark,
            as_of: self.pending.clone(),
        }
    }

    /// The owner evaluated boundaries up to `b`: entries before the latest one at or before
    /// `b` are no longer needed.
    pub fn acknowledge(&mut self, b: Micros) {
        if let Some(i) = self.pending.iter().rposition(|(k, _)| *k <= b) {
            self.pending.drain(..i);
        }
    }
}

/// Most boundary entries one experiment keeps in a shard while no owner acknowledges them
/// (an owner acknowledges every evaluation, so this is reached only when no instance owns the
/// experiment for a long time); the oldest are dropped first and counted.
pub const MAX_PENDING: usize = 4096;

/// One experiment's entries in a shard's [`ShardBoundaries`].
#[derive(Debug, Clone, PartialEq)]
pub struct ExperimentEntries {
    /// (first boundary passed, totals as of it and every later boundary up to the next
    /// entry), oldest first, not yet acknowledged by the owner.
    pub pending: Vec<(Micros, ExperimentSnapshot)>,
    /// Whether entries were added or dropped since the last [`ShardBoundaries::take_changed`].
    changed: bool,
}

/// One co-partitioned shard's side for all its experiments: the totals of every experiment as
/// of each boundary (multiple of `every`) of reference time that the shard's records pass, in
/// the order the shard applies them. The shard calls [`ShardBoundaries::advance`] with each
/// record's reference time before applying the record, so the totals recorded for boundary
/// `b` are exactly those of the records before the first one at or after `b`.
#[derive(Debug, Clone)]
pub struct ShardBoundaries {
    every: Micros,
    watermark: Micros,
    logs: BTreeMap<String, ExperimentEntries>,
    /// Totals of each experiment's last entry (kept when its pending entries are pruned),
    /// to skip boundaries without change.
    last: BTreeMap<String, ExperimentSnapshot>,
    /// Entries dropped at [`MAX_PENDING`].
    dropped: u64,
}

impl ShardBoundaries {
    /// A shard with no records yet; boundaries every `every` µs of reference time.
    pub fn new(every: Micros) -> ShardBoundaries {
        ShardBoundaries {
            every: every.max(1),
            watermark: Micros::MIN,
            logs: BTreeMap::new(),
            last: BTreeMap::new(),
            dropped: 0,
        }
    }

    /// The boundary spacing (µs).
    pub fn every(&self) -> Micros {
        self.every
    }

    /// The reference-time watermark: every record before it has been applied.
    pub fn watermark(&self) -> Option<Micros> {
        (self.watermark != Micros::MIN).then_some(self.watermark)
    }

    /// Entries dropped at [`MAX_PENDING`] since start.
    pub fn dropped(&self) -> u64 {
        self.dropped
    }

    /// Whether advancing to `t` passes a boundary (then [`Self::advance`] needs the totals).
    #[inline]
    pub fn passes(&self, t: Micros) -> bool {
        t > self.watermark
            && self.watermark != Micros::MIN
            && self.watermark.div_euclid(self.every) != t.div_euclid(self.every)
    }

    /// Advance the watermark to `t` (a record's reference time, before the record is applied,
    /// or an idle shard's declared time). When boundaries are passed, `totals` gives every
    /// experiment's current totals, recorded as of the first boundary passed (they hold for
    /// every boundary up to `t`); an experiment whose totals did not change since its last
    /// entry gets none. Returns whether a boundary was passed.
    pub fn advance<I>(&mut self, t: Micros, totals: impl FnOnce() -> I) -> bool
    where
        I: IntoIterator<Item = ExperimentSnapshot>,
    {
        if t <= self.watermark {
            return false;
        }
        let passes = self.passes(t);
        let before = std::mem::replace(&mut self.watermark, t);
        if !passes {
            return false;
        }
        let first_passed = (before.div_euclid(self.every) + 1) * self.every;
        for snap in totals() {
            if snap.is_empty() {
                continue;
            }
            let id = snap.def.state_key();
            if self.last.get(&id) == Some(&snap) {
                continue;
            }
            let log = self.logs.entry(id.clone()).or_insert(ExperimentEntries {
                pending: Vec::new(),
                changed: false,
            });
            log.pending.push((first_passed, snap.clone()));
            log.changed = true;
            if log.pending.len() > MAX_PENDING {
                log.pending.remove(0);
                self.dropped += 1;
            }
            self.last.insert(id, snap);
        }
        true
    }

    /// The pending entries of experiment `id` (its state key).
    pub fn entries(&self, id: &str) -> &[(Micros, ExperimentSnapshot)] {
        self.logs.get(id).map_or(&[], |l| &l.pending)
    }

    /// Every experiment with entries, by state key.
    pub fn experiments(&self) -> impl Iterator<Item = (&str, &[(Micros, ExperimentSnapshot)])> {
        self.logs
            .iter()
            .map(|(k, l)| (k.as_str(), l.pending.as_slice()))
    }

    /// The experiments whose entries changed since the last call (to publish), clearing the
    /// marks.
    pub fn take_changed(&mut self) -> Vec<String> {
        let mut out = Vec::new();
        for (k, l) in &mut self.logs {
            if std::mem::take(&mut l.changed) {
                out.push(k.clone());
            }
        }
        out
    }

    /// Mark every experiment changed (a publication failed: send everything again).
    pub fn mark_all_changed(&mut self) {
        for l in self.logs.values_mut() {
            l.changed = true;
        }
    }

    /// The owner of experiment `id` evaluated boundaries up to `b`: entries before the latest
    /// one at or before `b` are no longer needed (that one stays, as the base of later
    /// boundaries).
    pub fn acknowledge(&mut self, id: &str, b: Micros) {
        if let Some(log) = self.logs.get_mut(id) {
            if let Some(i) = log.pending.iter().rposition(|(k, _)| *k <= b) {
                if i > 0 {
                    log.pending.drain(..i);
                    log.changed = true;
                }
            }
        }
    }

    /// Restore from an image: the watermark and every experiment's pending entries.
    pub fn restore(
        &mut self,
        watermark: Option<Micros>,
        logs: Vec<(String, Vec<(Micros, ExperimentSnapshot)>)>,
    ) {
        self.watermark = watermark.unwrap_or(Micros::MIN);
        for (id, pending) in logs {
            if let Some((_, last)) = pending.last() {
                self.last.insert(id.clone(), last.clone());
            }
            self.logs.insert(
                id,
                ExperimentEntries {
                    pending,
                    changed: true,
                },
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[derive(Debug, Clone, PartialEq, Default)]
    struct Counts(Vec<u64>);

    impl Tally for Counts {
        fn absorb(&mut self, other: &Self) {
            for (a, b) in self.0.iter_mut().zip(&other.0) {
                *a += b;
            }
        }
    }

    const EVERY: Micros = 10;

    /// Records of one partition: (reference time, arm); times ascending like a log.
    fn partition_log() -> impl Strategy<Value = Vec<(Micros, usize)>> {
        prop::collection::vec((0i64..6, 0usize..2), 0..30).prop_map(|steps| {
            let mut t = 0;
            steps
                .into_iter()
                .map(|(dt, arm)| {
                    t += dt;
                    (t, arm)
                })
                .collect()
        })
    }

    /// The totals as of `b` computed directly from the logs: records with time before `b`.
    fn direct(logs: &[Vec<(Micros, usize)>], b: Micros) -> Counts {
        let mut c = Counts(vec![0, 0]);
        for log in logs {
            for (t, arm) in log {
                if *t < b {
                    c.0[*arm] += 1;
                }
            }
        }
        c
    }

    /// Every partial each partition would publish after each record, then a final one with
    /// the partition declared idle up to `end`.
    fn partials_of(logs: &[Vec<(Micros, usize)>], end: Micros) -> Vec<Vec<Partial<Counts>>> {
        logs.iter()
            .enumerate()
            .map(|(p, log)| {
                let mut side = BoundaryLog::new(EVERY, Counts(vec![0, 0]));
                let mut out = Vec::new();
                for (i, (t, arm)) in log.iter().enumerate() {
                    side.record(*t, |c| c.0[*arm] += 1);
                    out.push(side.partial(p as u32, vec![i as i64 + 1]));
                }
                side.advance(end);
                out.push(side.partial(p as u32, vec![log.len() as i64]));
                out
            })
            .collect()
    }

    const CASES: u32 = 256;

    /// A one-metric experiment whose snapshots stand for a partition's counts per arm.
    fn ferry_snapshot(units: [u64; 2]) -> ExperimentSnapshot {
        use crate::experiment::{ExperimentDef, MetricDef, MetricKind, Prior, VariantDef};
        let def = ExperimentDef {
            id: "harbour-boarding".into(),
            generation: 0,
            control: 0,
            variants: ["queue", "tap"]
                .iter()
                .map(|n| VariantDef {
                    name: (*n).into(),
                    weight: 0.5,
                })
                .collect(),
            metrics: vec![MetricDef {
                name: "boarded".into(),
                kind: MetricKind::Conversion,
                prior: Prior::Beta {
                    alpha: 1.0,
                    beta: 1.0,
                },
                variant_priors: vec![None, None],
                rules: Default::default(),
            }],
            rules: Default::default(),
        };
        let mut s = super::super::ExperimentState::new(std::sync::Arc::new(def)).snapshot();
        s.units = units.to_vec();
        s.outcomes.0[0] = units.iter().sum();
        s
    }

    proptest! {
        #![proptest_config(ProptestConfig {
            // Failure seeds beside this file (`*.proptest-regressions`), kept in git.
            failure_persistence: Some(Box::new(
                proptest::test_runner::FileFailurePersistence::SourceParallel("proptest-regressions"),
            )),
            ..ProptestConfig::with_cases(CASES)
        })]

        /// Whatever order partials arrive in, and however often each is delivered, the owner
        /// evaluates the same boundaries with the totals the logs define.
        #[test]
        fn any_interleaving_and_redelivery_gives_the_totals_of_the_logs(
            logs in prop::collection::vec(partition_log(), 1..4),
            order in prop::collection::vec(0usize..1000, 0..400),
        ) {
            let end = 200;
            let per_partition = partials_of(&logs, end);
            let mut all: Vec<Partial<Counts>> = per_partition.iter().flatten().cloned().collect();
            // Shuffle by the given order and deliver some messages again.
            let mut delivered = Vec::new();
            for (i, k) in order.iter().enumerate() {
                if !all.is_empty() {
                    let j = k % all.len();
                    if i % 3 == 0 {
                        delivered.push(all[j].clone());
                    } else {
                        delivered.push(all.swap_remove(j));
                    }
                }
            }
            delivered.extend(all);
            // Each partition's last partial is what survives compaction: deliver it last.
            let mut merger = Merger::new(logs.len() as u32, Counts(vec![0, 0]));
            let mut evaluated = Vec::new();
            for p in delivered.into_iter().chain(per_partition.iter().map(|v| v.last().unwrap().clone())) {
                let offered = merger.offer(p);
                prop_assert!(offered == Offered::Taken || offered == Offered::Stale, "{:?}", offered);
                for b in merger.ready() {
                    evaluated.push((b, merger.totals_at(b)));
                    merger.evaluated(b);
                }
            }
            // Every evaluation equals the direct count, in increasing boundary order.
            for w in evaluated.windows(2) {
                prop_assert!(w[0].0 < w[1].0);
            }
            for (b, totals) in &evaluated {
                prop_assert_eq!(totals, &direct(&logs, *b));
            }
            if logs.iter().any(|l| !l.is_empty()) {
                prop_assert!(!evaluated.is_empty());
                prop_assert_eq!(&evaluated.last().unwrap().1, &direct(&logs, Micros::MAX));
            }
            // And the final boundary's totals are all records.
            let last = merger.totals_at(end);
            prop_assert_eq!(last, direct(&logs, Micros::MAX));
        }


        /// A shard's boundary entries, advanced before each record as the ingest path does
        /// and acknowledged as an owner would, merge to the totals of the records before each
        /// boundary, in boundary order.
        #[test]
        fn shard_entries_merge_to_the_totals_of_the_logs(
            logs in prop::collection::vec(partition_log(), 1..4),
            ack_every in 1usize..6,
        ) {
            let end = 200;
            let mut merger = Merger::new(logs.len() as u32, ferry_snapshot([0, 0]));
            let mut sides: Vec<(ShardBoundaries, [u64; 2])> =
                logs.iter().map(|_| (ShardBoundaries::new(EVERY), [0, 0])).collect();
            let key = ferry_snapshot([0, 0]).def.state_key();
            let mut evaluated = Vec::new();
            let longest = logs.iter().map(Vec::len).max().unwrap_or(0);
            // Partitions advance in turns; each publishes after every record.
            for i in 0..=longest {
                for (p, log) in logs.iter().enumerate() {
                    let (side, counts) = &mut sides[p];
                    let now = *counts;
                    match log.get(i) {
                        Some(&(t, arm)) => {
                            side.advance(t, || vec![ferry_snapshot(now)]);
                            counts[arm] += 1;
                        }
                        // Then idle up to `end`.
                        None if i == log.len() => {
                            side.advance(end, || vec![ferry_snapshot(now)]);
                        }
                        None => continue,
                    }
                    if let Some(w) = side.watermark() {
                        merger.offer(Partial {
                            partition: p as u32,
                            positions: vec![i as i64 + 1],
                            watermark: w,
                            as_of: side.entries(&key).to_vec(),
                        });
                    }
                }
                for b in merger.ready() {
                    let totals = merger.totals_at(b);
                    evaluated.push((b, totals.units.clone()));
                    merger.evaluated(b);
                    if evaluated.len() % ack_every == 0 {
                        for (side, _) in &mut sides {
                            side.acknowledge(&key, b);
                        }
                    }
                }
            }
            for w in evaluated.windows(2) {
                prop_assert!(w[0].0 < w[1].0);
            }
            for (b, units) in &evaluated {
                prop_assert_eq!(units, &direct(&logs, *b).0);
            }
        }
    }

    #[test]
    fn a_boundary_waits_for_every_partition() {
        let mut m = Merger::new(2, Counts(vec![0]));
        let mut a = BoundaryLog::new(EVERY, Counts(vec![0]));
        a.record(3, |c| c.0[0] += 1);
        a.record(12, |c| c.0[0] += 1);
        assert_eq!(m.offer(a.partial(0, vec![2])), Offered::Taken);
        assert!(m.ready().is_empty(), "partition 1 has sent nothing");
        let mut b = BoundaryLog::new(EVERY, Counts(vec![0]));
        b.record(5, |c| c.0[0] += 1);
        assert_eq!(m.offer(b.partial(1, vec![1])), Offered::Taken);
        assert!(m.ready().is_empty(), "partition 1 has not passed 10");
        b.advance(10); // idle partition declares its time
        assert_eq!(m.offer(b.partial(1, vec![1])), Offered::Taken);
        assert_eq!(m.ready(), vec![10]);
        assert_eq!(m.totals_at(10), Counts(vec![2]));
    }

    #[test]
    fn redelivered_and_older_partials_are_stale_and_crossed_positions_conflict() {
        let mut m = Merger::new(1, Counts(vec![0]));
        let mut a = BoundaryLog::new(EVERY, Counts(vec![0]));
        a.record(1, |c| c.0[0] += 1);
        let first = a.partial(0, vec![1, 5]);
        a.record(11, |c| c.0[0] += 1);
        let second = a.partial(0, vec![2, 5]);
        assert_eq!(m.offer(second.clone()), Offered::Taken);
        assert_eq!(m.offer(second), Offered::Stale);
        assert_eq!(m.offer(first), Offered::Stale);
        let crossed = a.partial(0, vec![3, 4]);
        assert_eq!(m.offer(crossed), Offered::Conflict);
        assert_eq!(m.offer(a.partial(9, vec![3, 5])), Offered::Conflict);
    }

    #[test]
    fn a_re_derived_partition_revises_the_boundaries_not_yet_evaluated() {
        let mut m = Merger::new(1, Counts(vec![0]));
        let old = Partial {
            partition: 0,
            positions: vec![4],
            watermark: 35,
            as_of: vec![
                (10, Counts(vec![1])),
                (20, Counts(vec![2])),
                (30, Counts(vec![3])),
            ],
        };
        assert_eq!(m.offer(old), Offered::Taken);
        m.evaluated(10);
        // A new holder counted a record one boundary later than the old one did.
        let new = Partial {
            partition: 0,
            positions: vec![5],
            watermark: 36,
            as_of: vec![
                (10, Counts(vec![1])),
                (20, Counts(vec![1])),
                (30, Counts(vec![3])),
            ],
        };
        assert_eq!(m.offer(new), Offered::Revised);
        assert_eq!(m.totals_at(20), Counts(vec![1]));
        assert_eq!(m.totals_at(10), Counts(vec![1]));
    }
}

//! The one path every source takes into the state: decode outside the lock, apply a whole batch
//! under one short lock, then count outcomes and rejects in metrics.

use std::sync::Mutex;

use super::metrics::{Metrics, Source};
use crate::decode::decode_event;
use crate::event::{Event, Outcome, Reject};
use crate::mapping::Mapping;
use crate::state::cadence::Cadence;
use crate::state::shards::{Release, Shard, Shards};
use crate::state::skew::TimeBounds;
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
    /// The input topic, for a shard that covers one partition of several co-partitioned
    /// topics (its offsets are kept per topic, and outcomes may wait for the assignments);
    /// `None` for every other shard.
    pub topic: Option<&'a str>,
    /// The time the event's time is checked against (`state::skew`), recorded where the
    /// event entered a log so that replay sees the same: the Kafka record's timestamp, the
    /// HTTP receive time kept in the write-ahead log, a replay line's reference column.
    /// `None`: not checked (counted as unchecked).
    pub reference: Option<crate::event::Micros>,
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
    /// Outcomes held earlier (in this batch or before) and decided during this batch, with
    /// why they were decided now and what deciding them did.
    pub released: Vec<(Release, Result<Outcome, Reject>)>,
    /// Events whose time was beyond the source's bounds: refused ones also have their
    /// reject in `results`; clamped ones were applied at their reference time.
    pub skewed: Vec<super::clock::Skewed>,
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
/// are a function of the event order alone. Event times are checked against the default
/// [`TimeBounds`]; see [`apply_batch_checked`].
pub fn apply_batch_due(
    shards: &Mutex<Shards>,
    metrics: &Metrics,
    source: Source,
    items: &[Item<'_>],
    max_event_bytes: usize,
    cadence: Option<&Cadence>,
) -> BatchReport {
    apply_batch_checked(
        shards,
        metrics,
        source,
        items,
        max_event_bytes,
        cadence,
        &TimeBounds::default(),
    )
}

/// [`apply_batch_due`] with the source's own event-time `bounds`: an event whose time is
/// beyond them around its item's reference is refused (`time_ahead`, `time_behind`) or
/// clamped to the reference before it reaches the state, so the experiment's counts,
/// clock, cadence and duration only ever see times that passed.
pub fn apply_batch_checked(
    shards: &Mutex<Shards>,
    metrics: &Metrics,
    source: Source,
    items: &[Item<'_>],
    max_event_bytes: usize,
    cadence: Option<&Cadence>,
    bounds: &TimeBounds,
) -> BatchReport {
    let mut due = Vec::new();
    let mut due_items = Vec::new();
    let mut released = Vec::new();
    // `Option` so that a refused event's reason can be taken out for the report.
    let mut decoded: Vec<Option<Result<Option<Event<'_>>, Reject>>> = items
        .iter()
        .map(|item| Some(decode_item(item, max_event_bytes)))
        .collect();
    let skewed = super::clock::check_batch(bounds, |i| items[i].reference, &mut decoded);
    let results: Vec<Option<Result<Outcome, Reject>>> = {
        let mut shards = shards
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        let mut results = Vec::with_capacity(items.len());
        let mut run_due = Vec::new();
        let mut run_due_items = Vec::new();
        let lateness = shards.lateness();
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
                    let fresh = match items[j].topic {
                        Some(topic) => shard.advance_stream(topic, offset),
                        None => shard.advance(offset),
                    };
                    if !fresh {
                        results.push(None);
                        continue;
                    }
                }
                // A co-partitioned shard deciding across instances records its totals as of
                // each reference-time boundary this record passes, before applying it; the
                // reference of every record counts (refused ones too: the log has them).
                if let (Some(_), Some(reference)) = (items[j].topic, items[j].reference) {
                    shard.pass_reference(reference);
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
                if items[j].topic.is_some() {
                    let assignments = items[j].mapping.is_some_and(Mapping::names_exposures);
                    // Decided at boundaries by the experiment's owner, not by event here.
                    let cadence = cadence.filter(|_| shard.boundaries().is_none());
                    let result = apply_co_partitioned(
                        shard,
                        event,
                        assignments,
                        lateness,
                        cadence,
                        &mut run_due,
                        &mut released,
                    );
                    run_due_items.resize(run_due.len(), j);
                    results.push(Some(result));
                    continue;
                }
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
    // Counted only for items applied now: a redelivery was counted when first applied.
    let (checked, skewed) = super::clock::record(
        &metrics.clock,
        source,
        |i| items[i].reference,
        &decoded,
        skewed,
        |i| results[i].is_some(),
    );
    metrics.count_clock(source, checked, &skewed);
    let report = BatchReport {
        results,
        due,
        due_items,
        released,
        skewed,
    };
    // One pass over the batch (most events are `applied`, the first outcome listed).
    let mut counts = [0u64; Outcome::ALL.len()];
    let decided = report.released.iter().map(|(_, r)| r);
    for o in report
        .results
        .iter()
        .flatten()
        .chain(decided.clone())
        .flatten()
    {
        if let Some(i) = Outcome::ALL.iter().position(|x| x == o) {
            counts[i] += 1;
        }
    }
    for (outcome, n) in Outcome::ALL.into_iter().zip(counts) {
        metrics.count_outcome(source, outcome, n);
    }
    for reject in report
        .rejects()
        .map(|(_, r)| r)
        .chain(decided.filter_map(|r| r.as_ref().err()))
    {
        metrics.count_reject(source, reject.reason);
    }
    count_mapped(metrics, items, &report);
    count_released(metrics, &report.released);
    report
}

/// Count the events of mapped sources by the source's name (one label lookup per run of one
/// source and outcome, not per event).
fn count_mapped(metrics: &Metrics, items: &[Item<'_>], report: &BatchReport) {
    let mut run: Option<(&str, &str, u64)> = None;
    let flush = |run: Option<(&str, &str, u64)>| {
        if let Some((name, outcome, n)) = run {
            metrics
                .mapped_events
                .with_label_values(&[name, outcome])
                .inc_by(n);
        }
    };
    for (item, r) in items.iter().zip(&report.results) {
        let (Some(m), Some(r)) = (item.mapping, r) else {
            continue;
        };
        let outcome = match r {
            Ok(o) => o.as_str(),
            Err(_) => "rejected",
        };
        match &mut run {
            Some((name, o, n)) if *name == m.name.as_str() && *o == outcome => *n += 1,
            _ => {
                flush(run.take());
                run = Some((m.name.as_str(), outcome, 1));
            }
        }
    }
    flush(run);
}

/// Count held outcomes decided in this batch, and log those the lateness bound decided (what
/// was decided for them, never silently).
fn count_released(metrics: &Metrics, released: &[(Release, Result<Outcome, Reject>)]) {
    let mut late: std::collections::BTreeMap<&str, u64> = Default::default();
    for (why, r) in released {
        let label = match why {
            Release::Watermark => "watermark",
            Release::Lateness => "lateness",
        };
        metrics.held_decided.with_label_values(&[label]).inc();
        if *why == Release::Lateness {
            let what = match r {
                Ok(o) => o.as_str(),
                Err(reject) => reject.reason.as_str(),
            };
            *late.entry(what).or_default() += 1;
        }
    }
    if !late.is_empty() {
        tracing::warn!(
            decided = ?late,
            "outcomes held for their assignments were decided past the lateness bound, on the exposures read so far (the assignment stream lags the other topics by more than the bound)"
        );
    }
}

/// Apply `event`, read on a co-partitioned topic, to `shard`: an assignment-stream event
/// moves the watermark; an outcome naming no experiment whose second the watermark has not
/// passed is held; then every held outcome that can be decided now is applied, earliest
/// first, into `released`.
fn apply_co_partitioned(
    shard: &mut Shard,
    event: &Event<'_>,
    assignments: bool,
    lateness: crate::event::Micros,
    cadence: Option<&Cadence>,
    due: &mut Vec<ExperimentSnapshot>,
    released: &mut Vec<(Release, Result<Outcome, Reject>)>,
) -> Result<Outcome, Reject> {
    let apply =
        |shard: &mut Shard, event: &Event<'_>, due: &mut Vec<ExperimentSnapshot>| match cadence {
            Some(c) => shard.apply_due(event, None, c, due),
            None => shard.apply(event),
        };
    let result = match (assignments, event.time) {
        (false, Some(time)) if event.attributed() => {
            shard.note_outcome_time(time);
            if shard.must_hold(time) {
                shard.hold(event.clone().into_owned());
                Ok(Outcome::Held)
            } else {
                apply(shard, event, due)
            }
        }
        _ => {
            let r = apply(shard, event, due);
            if let (true, Some(time)) = (assignments, event.time) {
                shard.note_assignment_time(time);
            }
            r
        }
    };
    for (held, why) in shard.take_releasable(lateness) {
        let r = apply(shard, &held, due);
        released.push((why, r));
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::mapping::{FieldSource, TimeFormat};
    use crate::state::shards::ShardId;

    fn mapping(exposures: bool) -> Mapping {
        let p = |s: &str| FieldSource::Path(s.into());
        let c = |s: &str| FieldSource::Constant(s.into());
        let (name, event, experiment, variant, names, metrics) = if exposures {
            let (x, v) = (c("crumb-checkout-copy"), p("arm"));
            (
                "till-assignments",
                c("assigned"),
                x,
                v,
                vec!["assigned".into()],
                vec![],
            )
        } else {
            let m = vec![("buy".into(), "purchase".into())];
            (
                "till-sales",
                p("k"),
                FieldSource::Absent,
                FieldSource::Absent,
                vec![],
                m,
            )
        };
        let fields = vec![
            p("u"),
            p("t"),
            event,
            experiment,
            variant,
            FieldSource::Absent,
            FieldSource::Absent,
            FieldSource::Absent,
        ];
        Mapping::new(name, fields, TimeFormat::EpochSeconds, names, metrics).unwrap()
    }

    #[test]
    fn outcomes_read_before_their_assignments_wait_for_the_watermark_or_the_bound() {
        let shards = Mutex::new(Shards::new([crate::service::test_checkout_copy()]));
        shards.lock().unwrap().set_lateness(300_000_000);
        let metrics = Metrics::new();
        let (assign, sales) = (mapping(true), mapping(false));
        let shard = ShardId::co_partitioned(0);
        let item = |topic: &'static str, offset: i64, bytes: &'static str| Item {
            shard: shard.as_str(),
            offset: Some(offset),
            bytes: bytes.as_bytes(),
            mapping: Some(if topic == "assign" { &assign } else { &sales }),
            topic: Some(topic),
            reference: None,
        };
        let run = |items: &[Item<'_>]| apply_batch(&shards, &metrics, Source::Kafka, items, 4096);
        let r = run(&[
            item("sales", 0, r#"{"u":"a","t":1000,"k":"buy"}"#),
            item("sales", 1, r#"{"u":"b","t":1000,"k":"buy"}"#),
            item("sales", 2, r#"{"u":"a","t":1000,"k":"browse"}"#),
            item("assign", 0, r#"{"u":"a","t":900,"arm":"control"}"#),
        ]);
        let outcomes: Vec<_> = r.results.iter().map(|r| r.clone().unwrap()).collect();
        assert_eq!(
            outcomes,
            vec![
                Ok(Outcome::Held),
                Ok(Outcome::Held),
                Ok(Outcome::Ignored),
                Ok(Outcome::Applied)
            ]
        );
        assert!(
            r.released.is_empty(),
            "the watermark (900 s) is before both"
        );
        // `b` is exposed after its purchase: decided as before_exposure, not counted.
        let r = run(&[
            item("sales", 1, r#"{"u":"b","t":1000,"k":"buy"}"#),
            item("assign", 1, r#"{"u":"b","t":1500,"arm":"short-copy"}"#),
        ]);
        assert!(
            r.results[0].is_none(),
            "offset 1 of `sales` was applied already"
        );
        assert_eq!(
            r.released,
            vec![
                (Release::Watermark, Ok(Outcome::Applied)),
                (Release::Watermark, Ok(Outcome::BeforeExposure))
            ]
        );
        // The assignments stall at 1 500 s; sales run on past the five-minute bound.
        let r = run(&[
            item("sales", 3, r#"{"u":"c","t":2000,"k":"buy"}"#),
            item("sales", 4, r#"{"u":"a","t":2400,"k":"buy"}"#),
        ]);
        assert_eq!(r.count(Outcome::Held), 2);
        assert_eq!(
            r.released,
            vec![(Release::Lateness, Ok(Outcome::Unexposed))]
        );
        let shards = shards.lock().unwrap();
        let s = shards.shard(shard.as_str()).unwrap();
        assert_eq!(s.n_held(), 1);
        assert_eq!(s.stream_offset("sales"), Some(5));
        assert_eq!(s.stream_offset("assign"), Some(2));
        let e = s
            .engine()
            .experiment("crumb-checkout-copy")
            .unwrap()
            .snapshot();
        let crate::state::MetricTotals::Conversion(v) = &e.metrics[0] else {
            panic!("purchase is a conversion metric")
        };
        assert_eq!((v[0].successes, v[1].successes), (1, 0));
        let ignored = metrics
            .mapped_events
            .with_label_values(&["till-sales", "ignored"])
            .get();
        assert_eq!(ignored, 1);
    }
}

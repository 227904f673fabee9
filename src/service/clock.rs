//! Clock health: every decoded event time checked against its reference (`state::skew`)
//! before the batch takes the shards' lock, and what the checks found, per source — refused
//! and clamped events by direction, the largest skew seen — for the API, the dashboard and
//! `/metrics`. Skewed events are logged with their skew, at most once per interval per source.

use std::sync::Mutex;
use std::time::{Duration, Instant};

use super::source::Source;
use crate::event::{Event, Micros, Reject, RejectReason};
use crate::state::skew::{Direction, OnSkew, TimeBounds, Verdict};

/// Sources in reporting order.
pub const SOURCES: [Source; 3] = [Source::Http, Source::Kafka, Source::Simulator];

/// At most one log line per source per interval; the lines in between are counted in the next.
const LOG_EVERY: Duration = Duration::from_secs(10);

/// What the checks found for one source since the process started.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct SourceClock {
    /// Timed events checked against a reference.
    pub checked: u64,
    /// Timed events that came without a reference (not checked; see docs/events.md).
    pub unchecked: u64,
    /// Refused events, by direction (indexed like `Direction::ALL`).
    pub refused: [u64; 2],
    /// Clamped events, by direction.
    pub clamped: [u64; 2],
    /// Largest skew beyond the bounds seen, by direction (µs; 0 = none).
    pub largest: [Micros; 2],
    /// Largest `|time − reference|` among all checked events, by direction (µs), within
    /// bounds or not: how far the clocks of this source drift.
    pub largest_seen: [Micros; 2],
}

impl SourceClock {
    /// Share of checked events refused or clamped for skew (0 with none checked).
    pub fn skewed_share(&self) -> f64 {
        if self.checked == 0 {
            0.0
        } else {
            (self.refused.iter().sum::<u64>() + self.clamped.iter().sum::<u64>()) as f64
                / self.checked as f64
        }
    }
}

#[derive(Debug, Default)]
struct Inner {
    sources: [SourceClock; 3],
    /// When each source last logged a skewed event, and how many it skipped since.
    logged: [(Option<Instant>, u64); 3],
}

/// Clock health of one process, shared by the ingest path (writer) and readers.
#[derive(Debug, Default)]
pub struct ClockHealth {
    inner: Mutex<Inner>,
}

fn slot(source: Source) -> usize {
    match source {
        Source::Http => 0,
        Source::Kafka => 1,
        Source::Simulator => 2,
    }
}

fn dir_slot(d: Direction) -> usize {
    match d {
        Direction::Ahead => 0,
        Direction::Behind => 1,
    }
}

impl ClockHealth {
    /// Every source's findings, in [`SOURCES`] order.
    pub fn snapshot(&self) -> Vec<(Source, SourceClock)> {
        let inner = self.inner.lock().unwrap_or_else(|p| p.into_inner());
        SOURCES
            .iter()
            .map(|&s| (s, inner.sources[slot(s)]))
            .collect()
    }

    /// One source's findings.
    pub fn of(&self, source: Source) -> SourceClock {
        let inner = self.inner.lock().unwrap_or_else(|p| p.into_inner());
        inner.sources[slot(source)]
    }
}

/// One event the check refused or clamped.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Skewed {
    /// Index of the item in its batch.
    pub index: usize,
    /// Which way its clock is off.
    pub direction: Direction,
    /// How far (µs).
    pub skew: Micros,
    /// Whether it was clamped (applied at the reference) rather than refused.
    pub clamped: bool,
}

/// Check the time of each decoded event of a batch against its item's reference
/// (`reference(i)` for the batch's item `i`). Beyond
/// `bounds`, an event is refused (its decode result becomes a `time_ahead` / `time_behind`
/// reject, which the ingest path counts, reports and dead-letters like any other) or, with
/// [`OnSkew::Clamp`], given the reference as its time. Events without a time, or whose item
/// has no reference, pass unchanged. Changes only `decoded`: [`record`] counts the findings
/// once the batch is applied. Allocates only for skewed events.
pub fn check_batch(
    bounds: &TimeBounds,
    reference: impl Fn(usize) -> Option<Micros>,
    decoded: &mut [Option<Result<Option<Event<'_>>, Reject>>],
) -> Vec<Skewed> {
    let mut skewed = Vec::new();
    for (i, d) in decoded.iter_mut().enumerate() {
        let Some(reference) = reference(i) else {
            continue;
        };
        let Some(Ok(Some(event))) = d else { continue };
        let Some(time) = event.time else { continue };
        let Verdict::Skewed { direction, skew } = bounds.check(time, reference) else {
            continue;
        };
        let clamped = bounds.on_skew == OnSkew::Clamp;
        if clamped {
            event.time = Some(reference);
        } else {
            let (reason, limit) = match direction {
                Direction::Ahead => (RejectReason::TimeAhead, bounds.max_ahead),
                Direction::Behind => (RejectReason::TimeBehind, bounds.max_behind),
            };
            *d = Some(Err(Reject::new(
                reason,
                format!(
                    "time is {} {} its reference time (the limit is {}): the sender's clock is off",
                    human(skew),
                    match direction {
                        Direction::Ahead => "ahead of",
                        Direction::Behind => "behind",
                    },
                    human(limit)
                ),
            )));
        }
        skewed.push(Skewed {
            index: i,
            direction,
            skew,
            clamped,
        });
    }
    skewed
}

/// Count what [`check_batch`] found, for the items `counted` says were applied now (an item
/// applied before — a redelivery after a seek — was counted then), log the skewed ones
/// (rate-limited), and return how many were checked and the skewed ones counted.
pub fn record<T>(
    health: &ClockHealth,
    source: Source,
    reference: impl Fn(usize) -> Option<Micros>,
    decoded: &[Option<Result<Option<Event<'_>>, T>>],
    mut skewed: Vec<Skewed>,
    counted: impl Fn(usize) -> bool,
) -> (u64, Vec<Skewed>) {
    skewed.retain(|x| counted(x.index));
    let mut n_checked = 0u64;
    let mut n_unchecked = 0u64;
    let mut largest_seen = [0 as Micros; 2];
    // Events still decoded passed (or were clamped to a zero offset); the refused ones are
    // rejects now and are counted from `skewed`.
    for (i, d) in decoded.iter().enumerate() {
        let Some(Ok(Some(event))) = d else { continue };
        let Some(time) = event.time else { continue };
        if !counted(i) {
            continue;
        }
        match reference(i) {
            None => n_unchecked += 1,
            Some(reference) => {
                n_checked += 1;
                let diff = time.saturating_sub(reference);
                let k = usize::from(diff < 0);
                largest_seen[k] = largest_seen[k].max(diff.saturating_abs());
            }
        }
    }
    for x in &skewed {
        if !x.clamped {
            n_checked += 1;
        }
        let k = dir_slot(x.direction);
        largest_seen[k] = largest_seen[k].max(x.skew);
    }
    if n_checked == 0 && n_unchecked == 0 {
        return (0, skewed);
    }
    let mut inner = health.inner.lock().unwrap_or_else(|p| p.into_inner());
    let s = slot(source);
    let tally = &mut inner.sources[s];
    tally.checked += n_checked;
    tally.unchecked += n_unchecked;
    for (kept, seen) in tally.largest_seen.iter_mut().zip(largest_seen) {
        *kept = (*kept).max(seen);
    }
    for x in &skewed {
        let k = dir_slot(x.direction);
        if x.clamped {
            tally.clamped[k] += 1;
        } else {
            tally.refused[k] += 1;
        }
        tally.largest[k] = tally.largest[k].max(x.skew);
    }
    if let Some(first) = skewed.first() {
        let (last, skipped) = &mut inner.logged[s];
        let now = Instant::now();
        if last.is_none_or(|l| now.duration_since(l) >= LOG_EVERY) {
            tracing::warn!(
                source = source.as_str(),
                direction = first.direction.as_str(),
                skew_secs = first.skew as f64 / 1e6,
                action = if first.clamped { "clamped" } else { "refused" },
                in_batch = skewed.len(),
                not_logged_before = *skipped,
                "event time far from its reference time: a sender's clock is off"
            );
            *last = Some(now);
            *skipped = 0;
        } else {
            *skipped += skewed.len() as u64;
        }
    }
    (n_checked, skewed)
}

/// A duration for a person: seconds, hours or years, whichever reads best.
fn human(us: Micros) -> String {
    let s = us as f64 / 1e6;
    if s < 3_600.0 {
        format!("{s:.0} s")
    } else if s < 86_400.0 * 2.0 {
        format!("{:.1} h", s / 3_600.0)
    } else if s < 86_400.0 * 730.0 {
        format!("{:.1} days", s / 86_400.0)
    } else {
        format!("{:.0} years", s / (86_400.0 * 365.25))
    }
}

/// One source's findings as JSON (the API's clock-health document and `replay --json`).
pub fn source_json(c: &SourceClock) -> serde_json::Value {
    let secs = |us: Micros| us as f64 / 1e6;
    serde_json::json!({
        "checked": c.checked,
        "unchecked": c.unchecked,
        "refused": {"ahead": c.refused[0], "behind": c.refused[1]},
        "clamped": {"ahead": c.clamped[0], "behind": c.clamped[1]},
        "skewed_share": c.skewed_share(),
        "largest_skew_seconds": {"ahead": secs(c.largest[0]), "behind": secs(c.largest[1])},
        "largest_offset_seconds": {"ahead": secs(c.largest_seen[0]), "behind": secs(c.largest_seen[1])},
    })
}

/// The clock-health document of the API: each source's findings and bounds.
pub fn document(health: &ClockHealth, bounds: impl Fn(Source) -> TimeBounds) -> serde_json::Value {
    let sources: Vec<serde_json::Value> = health
        .snapshot()
        .into_iter()
        .map(|(source, c)| {
            let b = bounds(source);
            let mut doc = source_json(&c);
            if let serde_json::Value::Object(m) = &mut doc {
                m.insert("source".into(), source.as_str().into());
                m.insert(
                    "bounds".into(),
                    serde_json::json!({
                        "max_ahead_seconds": b.max_ahead as f64 / 1e6,
                        "max_behind_seconds": b.max_behind as f64 / 1e6,
                        "on_skew": b.on_skew.as_str(),
                    }),
                );
            }
            doc
        })
        .collect();
    serde_json::json!({ "sources": sources })
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::borrow::Cow;

    use crate::event::EventBody;

    const H: Micros = 3_600 * 1_000_000;

    fn exposure(time: Option<Micros>) -> Event<'static> {
        Event {
            experiment: Cow::Borrowed("fern-onboarding"),
            id: None,
            time,
            body: EventBody::Exposure {
                variant: Cow::Borrowed("control"),
                unit: Cow::Borrowed("u1"),
            },
        }
    }

    #[test]
    fn refused_clamped_and_unchecked_events_are_each_counted() {
        let now = 1_800_000_000 * 1_000_000;
        let references = [Some(now), Some(now), Some(now), None, Some(now)];
        let reference = |i: usize| references[i];
        let times = [
            Some(now - H),
            Some(now + 3 * H),
            Some(now - 400 * 24 * H),
            Some(now),
            None,
        ];
        let decode = || -> Vec<Option<Result<Option<Event<'static>>, Reject>>> {
            times.iter().map(|&t| Some(Ok(Some(exposure(t))))).collect()
        };
        let health = ClockHealth::default();
        let mut decoded = decode();
        let found = check_batch(&TimeBounds::default(), reference, &mut decoded);
        let (checked, skewed) = record(&health, Source::Http, reference, &decoded, found, |_| true);
        assert_eq!(checked, 3);
        assert_eq!(
            skewed
                .iter()
                .map(|s| (s.index, s.direction))
                .collect::<Vec<_>>(),
            vec![(1, Direction::Ahead), (2, Direction::Behind)]
        );
        assert!(matches!(&decoded[0], Some(Ok(Some(_)))));
        assert!(matches!(&decoded[1], Some(Err(r)) if r.reason == RejectReason::TimeAhead));
        assert!(matches!(&decoded[2], Some(Err(r)) if r.reason == RejectReason::TimeBehind));
        let c = health.of(Source::Http);
        assert_eq!(
            (c.checked, c.unchecked, c.refused, c.clamped),
            (3, 1, [1, 1], [0, 0])
        );
        assert_eq!(c.largest, [3 * H, 400 * 24 * H]);
        assert!((c.skewed_share() - 2.0 / 3.0).abs() < 1e-12);

        // Clamped: applied at the reference, counted as clamped.
        let clamp = TimeBounds {
            on_skew: OnSkew::Clamp,
            ..TimeBounds::default()
        };
        let mut decoded = decode();
        let found = check_batch(&clamp, reference, &mut decoded);
        // Item 2 was applied before (a redelivery): not counted again.
        let (checked, skewed) = record(&health, Source::Kafka, reference, &decoded, found, |i| {
            i != 2
        });
        assert_eq!(checked, 2);
        assert!(skewed.iter().all(|s| s.clamped));
        for i in [1, 2] {
            assert!(matches!(&decoded[i], Some(Ok(Some(e))) if e.time == Some(now)));
        }
        assert_eq!(health.of(Source::Kafka).clamped, [1, 0]);
    }
}

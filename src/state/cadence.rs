//! When an experiment is due for evaluation, decided by the events themselves (their own time
//! and their count): the cadence, and each experiment's clock in it, advanced for every valid
//! event on the ingest path. No wall clock is read.

use crate::event::Micros;

/// How often experiments are evaluated: every `every` of event time, or once `every_events`
/// valid events reached the experiment since its last evaluation, whichever comes first.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Cadence {
    /// Event-time interval (µs).
    pub every: Micros,
    /// Event-count interval.
    pub every_events: u64,
}

impl Cadence {
    /// A cadence of `every` (µs of event time) or `every_events` events.
    pub fn new(every: Micros, every_events: u64) -> Cadence {
        Cadence {
            every: every.max(1),
            every_events: every_events.max(1),
        }
    }
}

/// One experiment's position in its cadence. Copy-sized and allocation-free, because it is
/// advanced for every valid event on the ingest path.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Clock {
    /// Event time of the last evaluation (or of the first timed event, which starts the clock).
    last: Option<Micros>,
    /// Latest event time seen. Event times can arrive out of order; the clock follows the
    /// largest, so hold-downs and durations never run backwards.
    latest: Option<Micros>,
    /// Valid events since the last evaluation.
    events: u64,
}

impl Clock {
    /// Count one valid event with time `time`; `true` when the experiment is due now, in which
    /// case the clock restarts from this event.
    #[inline]
    pub fn tick(&mut self, cadence: &Cadence, time: Option<Micros>) -> bool {
        self.tick_many(cadence, 1, time)
    }

    /// Count `n` valid events at once, the latest at `time` (aggregated simulation steps in
    /// `plan`); due at most once per call.
    #[inline]
    pub fn tick_many(&mut self, cadence: &Cadence, n: u64, time: Option<Micros>) -> bool {
        self.events += n;
        if let Some(t) = time {
            self.latest = Some(self.latest.map_or(t, |l| l.max(t)));
        }
        let by_time = match (self.last, self.latest) {
            (Some(last), Some(now)) => now - last >= cadence.every,
            (None, Some(now)) => {
                self.last = Some(now);
                false
            }
            _ => false,
        };
        if by_time || self.events >= cadence.every_events {
            self.events = 0;
            self.last = self.latest;
            true
        } else {
            false
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const S: Micros = 1_000_000;

    #[test]
    fn due_by_event_time_or_by_count_whichever_first() {
        let c = Cadence::new(10 * S, 5);
        let mut clock = Clock::default();
        // The first timed event starts the clock.
        assert!(!clock.tick(&c, Some(100 * S)));
        assert!(!clock.tick(&c, Some(105 * S)));
        // Ten seconds of event time since the start.
        assert!(clock.tick(&c, Some(110 * S)));
        // Then five events within less time.
        for t in 111..115 {
            assert!(!clock.tick(&c, Some(t * S)), "{t}");
        }
        assert!(clock.tick(&c, Some(115 * S)));
    }

    #[test]
    fn late_events_do_not_move_the_clock_back() {
        let c = Cadence::new(10 * S, 1000);
        let mut clock = Clock::default();
        assert!(!clock.tick(&c, Some(100 * S)));
        assert!(!clock.tick(&c, Some(50 * S)));
        assert!(!clock.tick(&c, Some(109 * S)));
        assert!(clock.tick(&c, Some(110 * S)));
    }

    #[test]
    fn untimed_events_are_counted_only() {
        let c = Cadence::new(S, 3);
        let mut clock = Clock::default();
        assert!(!clock.tick(&c, None));
        assert!(!clock.tick(&c, None));
        assert!(clock.tick(&c, None));
        assert!(!clock.tick(&c, None));
    }
}

//! Event time against a reference the sender cannot set: how far a client's clock may be off
//! before its events are refused (or, where a source asks for it, clamped to the reference).
//!
//! The reference is recorded with the event where it enters a log — the Kafka record's
//! timestamp, the HTTP receive time written to the write-ahead log — so that `replay` checks
//! against the same value the live service did. Pure: the caller passes both times.

use crate::event::Micros;

/// Default tolerance ahead of the reference: five minutes. A receive time is always later
/// than the true event time, so any positive skew is the sender's clock running fast; clocks
/// kept by NTP are within milliseconds, unsynchronised phones drift by seconds to a few
/// minutes (common practice, from memory), and five minutes of event time cannot move a
/// cadence or a duration that matters (hours and days).
pub const DEFAULT_MAX_AHEAD: Micros = 5 * 60 * 1_000_000;

/// Default lateness: seven days behind the reference. Apps that queue events offline flush
/// them within days; a week covers that and a weekly batch job's re-sends, while an event
/// older than the shortest sensible experiment is far more likely a wrong clock (1970,
/// another year) than data (common practice, from memory).
pub const DEFAULT_MAX_BEHIND: Micros = 7 * 86_400 * 1_000_000;

/// What a source does with an event whose time is out of bounds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum OnSkew {
    /// Refuse it with `time_ahead` / `time_behind` (counted, logged, dead-lettered).
    #[default]
    Refuse,
    /// Apply it at the reference time instead of its own (counted and logged as clamped).
    Clamp,
}

impl OnSkew {
    /// Stable name (config value, metrics label).
    pub fn as_str(self) -> &'static str {
        match self {
            OnSkew::Refuse => "refuse",
            OnSkew::Clamp => "clamp",
        }
    }
}

/// Which way a clock is off.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Direction {
    /// The event's time is later than the reference.
    Ahead,
    /// The event's time is earlier than the reference.
    Behind,
}

impl Direction {
    /// Both directions, in reporting order.
    pub const ALL: [Direction; 2] = [Direction::Ahead, Direction::Behind];

    /// Stable name (metrics label, API field).
    pub fn as_str(self) -> &'static str {
        match self {
            Direction::Ahead => "ahead",
            Direction::Behind => "behind",
        }
    }
}

/// How far event time may stray from its reference, and what happens beyond.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TimeBounds {
    /// Largest accepted `time − reference` (µs).
    pub max_ahead: Micros,
    /// Largest accepted `reference − time` (µs).
    pub max_behind: Micros,
    /// What to do beyond either bound.
    pub on_skew: OnSkew,
}

impl Default for TimeBounds {
    fn default() -> Self {
        TimeBounds {
            max_ahead: DEFAULT_MAX_AHEAD,
            max_behind: DEFAULT_MAX_BEHIND,
            on_skew: OnSkew::Refuse,
        }
    }
}

/// The verdict on one event time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Verdict {
    /// Within bounds: applied at its own time.
    Within,
    /// Out of bounds: `skew` µs (always positive) in `direction`; the source's
    /// [`OnSkew`] says whether it is refused or clamped.
    Skewed {
        /// Which way.
        direction: Direction,
        /// How far from the reference (µs, > the bound).
        skew: Micros,
    },
}

impl TimeBounds {
    /// Check `time` against `reference`. Saturating, so that no pair of representable times
    /// (year 1 to 9999) can overflow.
    #[inline]
    pub fn check(&self, time: Micros, reference: Micros) -> Verdict {
        let diff = time.saturating_sub(reference);
        if diff > self.max_ahead {
            Verdict::Skewed {
                direction: Direction::Ahead,
                skew: diff,
            }
        } else if diff < 0 && diff.saturating_neg() > self.max_behind {
            Verdict::Skewed {
                direction: Direction::Behind,
                skew: diff.saturating_neg(),
            }
        } else {
            Verdict::Within
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const S: Micros = 1_000_000;
    /// 9999-12-31T23:59:59Z and 0001-01-01T00:00:00Z in µs (Python
    /// `datetime(9999,12,31,23,59,59,tzinfo=timezone.utc).timestamp()` and the same for year 1).
    const YEAR_9999: Micros = 253_402_300_799 * S;
    const YEAR_1: Micros = -62_135_596_800 * S;

    #[test]
    fn within_bounds_on_both_sides_and_at_the_bounds() {
        let b = TimeBounds::default();
        let now = 1_800_000_000 * S;
        assert_eq!(b.check(now, now), Verdict::Within);
        assert_eq!(b.check(now + DEFAULT_MAX_AHEAD, now), Verdict::Within);
        assert_eq!(b.check(now - DEFAULT_MAX_BEHIND, now), Verdict::Within);
        assert_eq!(
            b.check(now + DEFAULT_MAX_AHEAD + 1, now),
            Verdict::Skewed {
                direction: Direction::Ahead,
                skew: DEFAULT_MAX_AHEAD + 1
            }
        );
        assert_eq!(
            b.check(now - DEFAULT_MAX_BEHIND - 1, now),
            Verdict::Skewed {
                direction: Direction::Behind,
                skew: DEFAULT_MAX_BEHIND + 1
            }
        );
    }

    #[test]
    fn the_extremes_of_rfc_3339_do_not_overflow() {
        let b = TimeBounds::default();
        let now = 1_800_000_000 * S;
        assert!(matches!(
            b.check(YEAR_9999, now),
            Verdict::Skewed {
                direction: Direction::Ahead,
                ..
            }
        ));
        assert!(matches!(
            b.check(YEAR_1, now),
            Verdict::Skewed {
                direction: Direction::Behind,
                ..
            }
        ));
        assert!(matches!(
            b.check(i64::MIN, i64::MAX),
            Verdict::Skewed {
                direction: Direction::Behind,
                skew: i64::MAX
            }
        ));
        assert!(matches!(
            b.check(i64::MAX, i64::MIN),
            Verdict::Skewed {
                direction: Direction::Ahead,
                skew: i64::MAX
            }
        ));
    }
}

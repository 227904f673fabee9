//! Which experiments a unit is in, per shard: the index that attributes an outcome naming no
//! experiment in O(experiments the unit is in), however many experiments run.
//!
//! One open-addressing multimap for the whole shard, keyed by the unit's hash (the same
//! `key_hash` the experiments' unit tables use): each entry is one (unit, experiment)
//! membership with the second of the unit's first exposure. A unit's memberships sit on the
//! probe path from its home slot, so a lookup reads them and stops at the first empty slot.
//! Hand-written for the same reason as `units::UnitTable`: a general map would store the
//! memberships of a unit in a heap vector per unit, several times the 16 bytes per entry here.
//! The variant and converted flags stay in each experiment's unit table, which is where the
//! exposure and conversion rules already live.

/// Seconds since the Unix epoch of a first exposure (enough until 2106; earlier times clamp to
/// 0). One-second resolution: an outcome in the same second as the exposure counts.
pub type ExposureSecs = u32;

/// The second holding `micros` (floor), as stored.
pub fn exposure_secs(micros: i64) -> ExposureSecs {
    micros.div_euclid(1_000_000).clamp(0, i64::from(u32::MAX)) as ExposureSecs
}

/// One membership: unit hash (0 = empty slot), experiment position in its engine, first second.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
#[repr(C)]
struct Entry {
    unit: u64,
    experiment: u32,
    secs: ExposureSecs,
}

/// The memberships of a shard's units.
#[derive(Debug, Clone, Default)]
pub struct Members {
    entries: Vec<Entry>,
    len: usize,
}

/// Growth keeps the load at or below 3/4, where linear probing's lookups (which always scan to
/// an empty slot here) stay short.
const MAX_LOAD_NUM: usize = 3;
const MAX_LOAD_DEN: usize = 4;

/// The hash as stored: 0 marks an empty slot, so the (one in 2⁶⁴) unit hashing to 0 moves to 1.
#[inline]
fn stored(unit: u64) -> u64 {
    unit.max(1)
}

impl Members {
    /// Number of memberships.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether no unit is in any experiment.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Heap bytes held (for the memory figure of benches/targets.rs).
    pub fn heap_bytes(&self) -> usize {
        self.entries.capacity() * std::mem::size_of::<Entry>()
    }

    #[inline]
    fn home(&self, unit: u64) -> usize {
        // The low bits pick the slot; the experiments' tables do the same with their own size,
        // which does not matter: these tables never share a layout.
        (unit as usize) & (self.entries.len() - 1)
    }

    /// Record that `unit` was first exposed in `experiment` at second `secs`. The caller
    /// records each (unit, experiment) once: at the exposure the experiment applied.
    pub fn insert(&mut self, unit: u64, experiment: u32, secs: ExposureSecs) {
        if (self.len + 1) * MAX_LOAD_DEN > self.entries.len() * MAX_LOAD_NUM {
            self.grow();
        }
        let unit = stored(unit);
        let mask = self.entries.len() - 1;
        let mut i = self.home(unit);
        while self.entries[i].unit != 0 {
            i = (i + 1) & mask;
        }
        self.entries[i] = Entry {
            unit,
            experiment,
            secs,
        };
        self.len += 1;
    }

    fn grow(&mut self) {
        let size = (self.entries.len() * 2).max(16);
        let old = std::mem::replace(&mut self.entries, vec![Entry::default(); size]);
        self.len = 0;
        for e in old.into_iter().filter(|e| e.unit != 0) {
            self.insert(e.unit, e.experiment, e.secs);
        }
    }

    /// Call `f(experiment, secs)` for each membership of `unit`.
    #[inline]
    pub fn for_each(&self, unit: u64, mut f: impl FnMut(u32, ExposureSecs)) {
        if self.entries.is_empty() {
            return;
        }
        let unit = stored(unit);
        let mask = self.entries.len() - 1;
        let mut i = self.home(unit);
        loop {
            let e = self.entries[i];
            if e.unit == 0 {
                return;
            }
            if e.unit == unit {
                f(e.experiment, e.secs);
            }
            i = (i + 1) & mask;
        }
    }

    /// The second of `unit`'s first exposure in `experiment`, if it is a member.
    pub fn exposed_at(&self, unit: u64, experiment: u32) -> Option<ExposureSecs> {
        let mut found = None;
        self.for_each(unit, |x, secs| {
            if x == experiment {
                found = Some(secs);
            }
        });
        found
    }

    /// Start loading `unit`'s home slot (see `units::UnitTable::prefetch`).
    #[inline]
    pub fn prefetch(&self, unit: u64) {
        if !self.entries.is_empty() {
            let at: *const Entry = &self.entries[self.home(stored(unit))];
            super::units::prefetch_ptr(at.cast());
        }
    }

    /// Every membership as (unit, experiment, secs), in table order (for images and rebuilds).
    pub fn iter(&self) -> impl Iterator<Item = (u64, u32, ExposureSecs)> + '_ {
        self.entries
            .iter()
            .filter(|e| e.unit != 0)
            .map(|e| (e.unit, e.experiment, e.secs))
    }

    /// Keep only the memberships for which `keep(experiment)` returns the experiment's new
    /// position (experiments removed or renumbered; rare, so a rebuild is fine).
    pub fn retain_map(&mut self, mut keep: impl FnMut(u32) -> Option<u32>) {
        let old = std::mem::take(&mut self.entries);
        self.len = 0;
        for e in old.into_iter().filter(|e| e.unit != 0) {
            if let Some(x) = keep(e.experiment) {
                self.insert(e.unit, x, e.secs);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_unit_finds_exactly_its_memberships() {
        let mut m = Members::default();
        // Units whose hashes share their low bits land on each other's probe paths.
        for unit in 0..5_000u64 {
            let h = unit << 32 | 7;
            for x in 0..(unit % 4 + 1) as u32 {
                m.insert(h, x * 10, unit as u32 + x);
            }
        }
        for unit in 0..5_000u64 {
            let h = unit << 32 | 7;
            let mut got = Vec::new();
            m.for_each(h, |x, s| got.push((x, s)));
            got.sort();
            let want: Vec<_> = (0..(unit % 4 + 1) as u32)
                .map(|x| (x * 10, unit as u32 + x))
                .collect();
            assert_eq!(got, want, "unit {unit}");
        }
        assert_eq!(
            m.len(),
            (0..5_000u64).map(|u| u % 4 + 1).sum::<u64>() as usize
        );
        assert_eq!(m.exposed_at(3 << 32 | 7, 30), Some(6));
        assert_eq!(m.exposed_at(3 << 32 | 7, 40), None);
        let mut none = 0;
        m.for_each(99_999, |_, _| none += 1);
        assert_eq!(none, 0);
    }

    #[test]
    fn removing_an_experiment_renumbers_the_rest() {
        let mut m = Members::default();
        m.insert(11, 0, 5);
        m.insert(11, 1, 6);
        m.insert(12, 2, 7);
        m.retain_map(|x| match x {
            0 => None,
            x => Some(x - 1),
        });
        assert_eq!(m.len(), 2);
        assert_eq!(m.exposed_at(11, 0), Some(6));
        assert_eq!(m.exposed_at(12, 1), Some(7));
    }

    #[test]
    fn seconds_floor_and_clamp() {
        assert_eq!(exposure_secs(1_773_480_413_999_999), 1_773_480_413);
        assert_eq!(exposure_secs(-5), 0);
        assert_eq!(exposure_secs(i64::MAX), u32::MAX);
    }
}

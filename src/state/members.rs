//! Which experiments a unit is in, per shard: the index that attributes an outcome naming no
//! experiment in O(experiments the unit is in), however many experiments run.
//!
//! One open-addressing multimap for the whole shard, keyed by the unit's hash (the same
//! `key_hash` the experiments' unit tables use, kept whole: two units share memberships only
//! if their 64-bit hashes are equal, the exactness argument of docs/events.md): each entry is
//! one (unit, experiment) membership with the second of the unit's first exposure.
//! Hand-written for the same reason as `units::UnitTable`: a general map would store the
//! memberships of a unit in a heap vector per unit, several times the 16 bytes per entry here.
//! The variant and converted flags stay in each experiment's unit table, which is where the
//! exposure and conversion rules already live.
//!
//! Layout: Robin Hood linear probing over any capacity (multiply-shift home positions, as in
//! `UnitTable`), so the entries along a probe run are ordered by home position and a unit's
//! memberships sit together after those of units homed earlier. A lookup stops at the first
//! entry homed after its own, which keeps lookups short at a high load; that load is what
//! keeps the index within 24 bytes per membership: large tables grow by 1.25× at 85%, so
//! their load stays between 68% and 85% (18.8–23.5 bytes per membership).

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

/// Largest share of entries in use before the table grows. Robin Hood ordering lets a lookup
/// stop early, so probe runs stay a few entries long even here (mean displacement about 3).
const MAX_LOAD_NUM: usize = 17;
const MAX_LOAD_DEN: usize = 20;

/// Tables below this many entries (1 MiB) double when they grow, for fewer rehashes while a
/// shard fills; larger ones grow by a quarter, which keeps them within the memory budget.
const SMALL_TABLE: usize = 1 << 16;

/// The hash as stored: 0 marks an empty slot, so the (one in 2⁶⁴) unit hashing to 0 moves to 1.
#[inline]
fn stored(unit: u64) -> u64 {
    unit.max(1)
}

/// Home position of `unit` in a table of `cap` entries: Fibonacci multiplication (a bijection,
/// so distinct hashes stay distinct) spreads keys that are not uniform, then multiply-shift
/// maps the product onto `0..cap`, monotonically, which is what keeps a rehash in order.
#[inline]
fn home(unit: u64, cap: usize) -> usize {
    let mixed = unit.wrapping_mul(0x9e37_79b9_7f4a_7c15);
    ((u128::from(mixed) * cap as u128) >> 64) as usize
}

/// Capacity that holds `n` memberships at the maximum load.
fn capacity_for(n: usize) -> usize {
    (n * MAX_LOAD_DEN).div_ceil(MAX_LOAD_NUM).max(16)
}

/// The entries of `old` run by run, each in slot order, starting after an empty slot so that
/// no run is split where it wraps past the end: placed again in this order, every unit's
/// memberships keep the order they were inserted in (what `for_each` reports).
fn in_run_order(old: &[Entry]) -> impl Iterator<Item = Entry> + '_ {
    let start = old.iter().position(|e| e.unit == 0).unwrap_or(0);
    old[start..]
        .iter()
        .chain(&old[..start])
        .copied()
        .filter(|e| e.unit != 0)
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

    /// How far slot `i` (holding `unit`) sits from `unit`'s home.
    #[inline]
    fn displacement(&self, i: usize, unit: u64) -> usize {
        let cap = self.entries.len();
        let h = home(unit, cap);
        if i >= h {
            i - h
        } else {
            i + cap - h
        }
    }

    /// Record that `unit` was first exposed in `experiment` at second `secs`. The caller
    /// records each (unit, experiment) once: at the exposure the experiment applied.
    pub fn insert(&mut self, unit: u64, experiment: u32, secs: ExposureSecs) {
        if (self.len + 1) * MAX_LOAD_DEN > self.entries.len() * MAX_LOAD_NUM {
            self.grow();
        }
        self.place(Entry {
            unit: stored(unit),
            experiment,
            secs,
        });
        self.len += 1;
    }

    /// Put `new` after every entry homed at or before its home, shifting the rest of the run
    /// one slot along (which keeps the run ordered by home). The table has a free slot.
    fn place(&mut self, new: Entry) {
        let cap = self.entries.len();
        let mut i = home(new.unit, cap);
        let mut dist = 0;
        loop {
            let e = self.entries[i];
            if e.unit == 0 {
                self.entries[i] = new;
                return;
            }
            if e.unit != new.unit && self.displacement(i, e.unit) < dist {
                break;
            }
            i += 1;
            if i == cap {
                i = 0;
            }
            dist += 1;
        }
        let mut carry = new;
        loop {
            let e = std::mem::replace(&mut self.entries[i], carry);
            if e.unit == 0 {
                return;
            }
            carry = e;
            i += 1;
            if i == cap {
                i = 0;
            }
        }
    }

    fn grow(&mut self) {
        let cap = self.entries.len();
        let step = if cap < SMALL_TABLE { cap } else { cap / 4 };
        self.rehash((cap + step).max(capacity_for(self.len + 1)));
    }

    /// Make room for `n` more memberships without growing on the way (restores), with an
    /// eighth more so that the first exposures after a restart do not grow it at once.
    pub fn reserve(&mut self, n: usize) {
        let want = self.len + n;
        if capacity_for(want) > self.entries.len() {
            self.rehash(capacity_for(want + want / 8));
        }
    }

    fn rehash(&mut self, new_cap: usize) {
        let old = std::mem::replace(&mut self.entries, vec![Entry::default(); new_cap]);
        // In home order: each entry lands at or just after the previous one, so the rebuild
        // streams through memory.
        for e in in_run_order(&old) {
            self.place(e);
        }
    }

    /// Call `f(experiment, secs)` for each membership of `unit`.
    #[inline]
    pub fn for_each(&self, unit: u64, mut f: impl FnMut(u32, ExposureSecs)) {
        let cap = self.entries.len();
        if cap == 0 {
            return;
        }
        let unit = stored(unit);
        let mut i = home(unit, cap);
        let mut dist = 0;
        loop {
            let e = self.entries[i];
            if e.unit == unit {
                f(e.experiment, e.secs);
            } else if e.unit == 0 || self.displacement(i, e.unit) < dist {
                // Empty, or homed after `unit`: none of its memberships can follow.
                return;
            }
            i += 1;
            if i == cap {
                i = 0;
            }
            dist += 1;
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
        let cap = self.entries.len();
        if cap != 0 {
            let at: *const Entry = &self.entries[home(stored(unit), cap)];
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
    /// position (experiments removed or renumbered; rare, so a rebuild is fine). A pass that
    /// would change nothing leaves the table as it is.
    pub fn retain_map(&mut self, mut keep: impl FnMut(u32) -> Option<u32>) {
        if self.iter().all(|(_, x, _)| keep(x) == Some(x)) {
            return;
        }
        let old = std::mem::take(&mut self.entries);
        let n = old
            .iter()
            .filter(|e| e.unit != 0 && keep(e.experiment).is_some())
            .count();
        self.len = 0;
        if n == 0 {
            return;
        }
        self.entries = vec![Entry::default(); capacity_for(n + n / 8)];
        for e in in_run_order(&old) {
            if let Some(experiment) = keep(e.experiment) {
                self.place(Entry { experiment, ..e });
                self.len += 1;
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
    fn agrees_with_a_map_of_vectors_at_every_size() {
        // Reference: std's BTreeMap from unit to its memberships in insertion order, fed the
        // same insertions (keys from a fixed xorshift sequence; every third unit's hash shares
        // its high bits with others', so homes collide and runs wrap past the table's end).
        let mut m = Members::default();
        let mut reference: std::collections::BTreeMap<u64, Vec<(u32, u32)>> = Default::default();
        let mut x: u64 = 0x2545_f491_4f6c_dd1d;
        let mut units = Vec::new();
        for i in 0..200_000u32 {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            let unit = match i % 3 {
                0 => x | 0xffff_ffff_0000_0000,
                1 => x & 0xff,
                _ => x,
            };
            let unit = stored(unit);
            let (experiment, secs) = (i % 1_000, i);
            let v = reference.entry(unit).or_default();
            if v.iter().any(|(e, _)| *e == experiment) {
                continue;
            }
            v.push((experiment, secs));
            m.insert(unit, experiment, secs);
            units.push(unit);
            if i % 997 == 0 {
                for &u in units.iter().rev().take(50) {
                    let mut got = Vec::new();
                    m.for_each(u, |e, s| got.push((e, s)));
                    assert_eq!(&got, &reference[&u], "unit {u:#x} after {i} insertions");
                }
            }
        }
        assert_eq!(m.len(), reference.values().map(Vec::len).sum::<usize>());
        for (u, want) in &reference {
            let mut got = Vec::new();
            m.for_each(*u, |e, s| got.push((e, s)));
            assert_eq!(&got, want, "unit {u:#x}");
        }
        let mut all: Vec<_> = m.iter().collect();
        all.sort_unstable();
        let mut want: Vec<_> = reference
            .iter()
            .flat_map(|(u, v)| v.iter().map(|&(e, s)| (*u, e, s)))
            .collect();
        want.sort_unstable();
        assert_eq!(all, want);
        let mut none = 0;
        m.for_each(0x1234_5678_9abc_def1, |_, _| none += 1);
        assert_eq!(none, 0);
    }

    #[test]
    fn large_indexes_stay_within_24_bytes_per_membership() {
        // The budget of target 8 in docs/performance.md, checked at every size past the
        // tables that double (the bench measures it at 10 M with the counting allocator).
        let mut m = Members::default();
        let mut worst = 0.0f64;
        for i in 0..3_000_000u64 {
            m.insert(i.wrapping_mul(0xd6e8_feb8_6659_fd93), (i % 4) as u32, 0);
            if m.heap_bytes() > SMALL_TABLE * std::mem::size_of::<Entry>() {
                worst = worst.max(m.heap_bytes() as f64 / m.len() as f64);
            }
        }
        assert!(
            worst > 18.0 && worst <= 24.0,
            "{worst} bytes per membership"
        );
        assert_eq!(std::mem::size_of::<Entry>(), 16);
    }

    #[test]
    fn reserve_and_retain_keep_every_membership() {
        let mut m = Members::default();
        m.reserve(10_000);
        let bytes = m.heap_bytes();
        for u in 1..=10_000u64 {
            m.insert(u, (u % 3) as u32, u as u32);
        }
        assert_eq!(m.heap_bytes(), bytes, "reserved room needs no growth");
        // Keeping every experiment where it is changes nothing, not even the layout.
        let before: Vec<_> = m.iter().collect();
        m.retain_map(Some);
        assert_eq!(m.iter().collect::<Vec<_>>(), before);
        m.retain_map(|x| (x != 1).then_some(x));
        assert_eq!(m.len(), 10_000 - 3_334);
        for u in 1..=10_000u64 {
            let want = (u % 3 != 1).then_some(u as u32);
            assert_eq!(m.exposed_at(u, (u % 3) as u32), want, "unit {u}");
        }
        m.retain_map(|_| None);
        assert!(m.is_empty());
        assert_eq!(m.heap_bytes(), 0);
    }

    #[test]
    fn seconds_floor_and_clamp() {
        assert_eq!(exposure_secs(1_773_480_413_999_999), 1_773_480_413);
        assert_eq!(exposure_secs(-5), 0);
        assert_eq!(exposure_secs(i64::MAX), u32::MAX);
    }
}

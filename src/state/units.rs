//! Exact per-unit bookkeeping: which variant a unit was first exposed to, and which conversion
//! metrics it has already converted on.
//!
//! A unit is stored as a 64-bit hash of its id (xxh3, fixed seed so it is stable across restarts
//! and versions) mapped to a 32-bit slot. The hash is not a sketch: a count changes only if two
//! distinct units of one experiment collide, which for n units has probability about n²/2⁶⁵
//! (≈ 3e-6 at ten million units). Keeping the hash instead of the id bounds memory per unit no
//! matter how long the ids are.

use std::hash::{BuildHasherDefault, Hasher};

/// Hash of a unit id (or an event id) as stored in the tables.
pub fn key_hash(id: &str) -> u64 {
    xxhash_rust::xxh3::xxh3_64(id.as_bytes())
}

/// The keys are already uniformly distributed hashes, so hashing them again would only cost time.
#[derive(Default, Clone, Copy)]
pub struct PassThroughHasher(u64);

impl Hasher for PassThroughHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        // Only u64 keys are stored; fold anything else so the hasher stays total.
        for &b in bytes {
            self.0 = self.0.rotate_left(8) ^ u64::from(b);
        }
    }
    fn write_u64(&mut self, n: u64) {
        self.0 = n;
    }
}

/// Build hasher for tables keyed by `key_hash` values.
pub type PassThrough = BuildHasherDefault<PassThroughHasher>;

/// Bits of a slot that hold the variant index (64 variants at most).
const VARIANT_BITS: u32 = 6;
const VARIANT_MASK: u32 = (1 << VARIANT_BITS) - 1;
/// First bit of the conversion flags.
const FLAG_SHIFT: u32 = 8;

/// One unit's state packed in 32 bits: variant index in bits 0..6, one "has converted" flag per
/// conversion metric in bits 8..32 (hence `MAX_CONVERSION_METRICS` = 24).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct UnitSlot(u32);

impl UnitSlot {
    /// A freshly exposed unit.
    pub fn new(variant_idx: usize) -> UnitSlot {
        debug_assert!(variant_idx <= VARIANT_MASK as usize);
        UnitSlot(variant_idx as u32 & VARIANT_MASK)
    }

    /// The variant the unit was first exposed to.
    pub fn variant(self) -> usize {
        (self.0 & VARIANT_MASK) as usize
    }

    /// Whether the unit has converted on conversion metric number `bit`.
    pub fn converted(self, bit: u8) -> bool {
        self.0 & (1 << (FLAG_SHIFT + u32::from(bit))) != 0
    }

    /// The packed representation (for persistence).
    pub fn raw(self) -> u32 {
        self.0
    }

    /// A slot from its packed representation.
    pub fn from_raw(raw: u32) -> UnitSlot {
        UnitSlot(raw)
    }

    /// The slot with conversion `bit` set.
    pub fn with_converted(self, bit: u8) -> UnitSlot {
        UnitSlot(self.0 | (1 << (FLAG_SHIFT + u32::from(bit))))
    }
}

/// Bit of a stored slot that marks the entry as occupied. Bits 6 and 7 of a `UnitSlot` are
/// never used (variant in 0..6, flags from 8), so the mark costs no space and a key may take
/// any 64-bit value.
const OCCUPIED: u32 = 1 << VARIANT_BITS;

/// Largest share of entries in use before the table grows (Robin Hood probing stays short
/// at this load: about three probes for a hit, fewer for a miss thanks to early exit).
const MAX_LOAD_NUM: usize = 4;
const MAX_LOAD_DEN: usize = 5;

/// Tables below this many entries double when they grow; larger ones grow by 1.5×.
const SMALL_TABLE: usize = 1 << 17;

/// One table entry: 12 bytes, no padding (`packed(4)` keeps the u64 key at 4-byte alignment).
#[derive(Clone, Copy, Default)]
#[repr(C, packed(4))]
struct Entry {
    key: u64,
    /// `UnitSlot` raw value with `OCCUPIED` set; 0 for an empty entry.
    slot: u32,
}

/// All tracked units of one experiment: an open-addressing hash table of 12-byte entries.
///
/// Written by hand because the memory budget (≤ 24 bytes per unit, at every size) is below what
/// a general-purpose map can give: `std`'s map pads a (u64, u32) entry to 16 bytes, adds a
/// control byte and doubles on growth, so right after growing it holds ~39 bytes per unit.
/// Here entries are 12 bytes, a large table grows by 1.5× at 80% load (so its load never
/// drops below 53%, i.e. ≤ 22.5 bytes per unit; tables under 2¹⁷ entries double, for speed,
/// and hold at most ~1.5 MiB), positions use the
/// multiply-shift range reduction (any capacity, not only powers of two), and Robin Hood
/// linear probing keeps probe sequences short at that load. Units are never removed, so no
/// deletion logic is needed.
#[derive(Clone, Default)]
pub struct UnitTable {
    entries: Vec<Entry>,
    len: usize,
}

impl std::fmt::Debug for UnitTable {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("UnitTable")
            .field("len", &self.len)
            .field("capacity", &self.entries.len())
            .finish()
    }
}

impl UnitTable {
    /// Home position of `key` in a table of `cap` entries: Fibonacci multiplication spreads
    /// keys that are not uniform (small integers in tests, say), then Lemire's multiply-shift
    /// maps the 64-bit product onto `0..cap`.
    #[inline]
    fn home(key: u64, cap: usize) -> usize {
        let mixed = key.wrapping_mul(0x9e37_79b9_7f4a_7c15);
        ((u128::from(mixed) * cap as u128) >> 64) as usize
    }

    /// How far entry `i` (holding `key`) sits from its home position.
    #[inline]
    fn displacement(&self, i: usize, key: u64) -> usize {
        let cap = self.entries.len();
        let home = Self::home(key, cap);
        if i >= home {
            i - home
        } else {
            i + cap - home
        }
    }

    /// Index of `hash`'s entry, if present.
    #[inline]
    fn find(&self, hash: u64) -> Option<usize> {
        let cap = self.entries.len();
        if cap == 0 {
            return None;
        }
        let mut i = Self::home(hash, cap);
        let mut dist = 0;
        loop {
            let e = self.entries[i];
            if e.slot == 0 {
                return None;
            }
            let key = e.key;
            if key == hash {
                return Some(i);
            }
            // Robin Hood invariant: had `hash` been stored, it would sit before any entry
            // that is closer to its own home than we are to ours.
            if self.displacement(i, key) < dist {
                return None;
            }
            i += 1;
            if i == cap {
                i = 0;
            }
            dist += 1;
        }
    }

    /// The slot of unit `hash`, if it was ever exposed.
    #[inline]
    pub fn get(&self, hash: u64) -> Option<UnitSlot> {
        self.find(hash)
            .map(|i| UnitSlot(self.entries[i].slot & !OCCUPIED))
    }

    /// The slot of unit `hash`; if it was never exposed, store `slot` for it and return
    /// `None`. One probe sequence instead of a lookup followed by an insertion.
    #[inline]
    pub fn get_or_insert(&mut self, hash: u64, slot: UnitSlot) -> Option<UnitSlot> {
        if (self.len + 1) * MAX_LOAD_DEN > self.entries.len() * MAX_LOAD_NUM {
            if let Some(found) = self.get(hash) {
                return Some(found);
            }
            self.grow();
        }
        let cap = self.entries.len();
        let mut i = Self::home(hash, cap);
        let mut dist = 0;
        loop {
            let e = self.entries[i];
            if e.slot == 0 {
                break;
            }
            let key = e.key;
            if key == hash {
                return Some(UnitSlot(e.slot & !OCCUPIED));
            }
            if self.displacement(i, key) < dist {
                break;
            }
            i += 1;
            if i == cap {
                i = 0;
            }
            dist += 1;
        }
        // `i` is where the new entry belongs; shift the rest of the run along.
        let mut carry = Entry {
            key: hash,
            slot: slot.0 | OCCUPIED,
        };
        loop {
            let e = std::mem::replace(&mut self.entries[i], carry);
            if e.slot == 0 {
                break;
            }
            carry = e;
            i += 1;
            if i == cap {
                i = 0;
            }
        }
        self.len += 1;
        None
    }

    /// Set conversion `bit` of unit `hash`; the unit's slot before, or `None` (and no
    /// change) if the unit was never exposed.
    #[inline]
    pub fn mark_converted(&mut self, hash: u64, bit: u8) -> Option<UnitSlot> {
        let i = self.find(hash)?;
        let before = UnitSlot(self.entries[i].slot & !OCCUPIED);
        self.entries[i].slot = before.with_converted(bit).0 | OCCUPIED;
        Some(before)
    }

    /// Store `slot` for unit `hash`.
    pub fn set(&mut self, hash: u64, slot: UnitSlot) {
        if let Some(i) = self.find(hash) {
            self.entries[i].slot = slot.0 | OCCUPIED;
            return;
        }
        if (self.len + 1) * MAX_LOAD_DEN > self.entries.len() * MAX_LOAD_NUM {
            self.grow();
        }
        self.insert_new(Entry {
            key: hash,
            slot: slot.0 | OCCUPIED,
        });
        self.len += 1;
    }

    /// Place an entry whose key is known to be absent, with Robin Hood displacement.
    fn insert_new(&mut self, mut carry: Entry) {
        let cap = self.entries.len();
        let mut i = Self::home(carry.key, cap);
        let mut dist = 0;
        loop {
            let e = self.entries[i];
            if e.slot == 0 {
                self.entries[i] = carry;
                return;
            }
            let d = self.displacement(i, e.key);
            if d < dist {
                self.entries[i] = carry;
                carry = e;
                dist = d;
            }
            i += 1;
            if i == cap {
                i = 0;
            }
            dist += 1;
        }
    }

    /// Capacity for `n` units at the maximum load.
    fn capacity_for(n: usize) -> usize {
        (n * MAX_LOAD_DEN).div_ceil(MAX_LOAD_NUM).max(8)
    }

    fn grow(&mut self) {
        let cap = self.entries.len();
        // Small tables double (fewer rehashes while an experiment starts; at most 1.5 MiB
        // each), large ones grow by half, which keeps them within the memory budget.
        let factor = if cap < SMALL_TABLE { cap } else { cap / 2 };
        let new_cap = (cap + factor).max(Self::capacity_for(self.len + 1));
        self.rehash(new_cap);
    }

    fn rehash(&mut self, new_cap: usize) {
        let old = std::mem::replace(&mut self.entries, vec![Entry::default(); new_cap]);
        for e in old {
            if e.slot != 0 {
                self.insert_new(e);
            }
        }
    }

    /// Every tracked unit, in no particular order.
    pub fn iter(&self) -> impl Iterator<Item = (u64, UnitSlot)> + '_ {
        self.entries
            .iter()
            .filter(|e| e.slot != 0)
            .map(|e| (e.key, UnitSlot(e.slot & !OCCUPIED)))
    }

    /// A table with room for `n` units.
    pub fn with_capacity(n: usize) -> UnitTable {
        UnitTable {
            entries: vec![Entry::default(); if n == 0 { 0 } else { Self::capacity_for(n) }],
            len: 0,
        }
    }

    /// Number of tracked units.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether no unit is tracked.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Hint the CPU to load the entry where `hash` would start probing, so that a lookup a
    /// few events later finds it in cache. The tables are far larger than the caches, and
    /// without this each new unit costs a cache miss or two in a row.
    #[inline]
    pub fn prefetch(&self, hash: u64) {
        let cap = self.entries.len();
        if cap == 0 {
            return;
        }
        let home = Self::home(hash, cap);
        let at: *const Entry = &self.entries[home];
        prefetch_ptr(at.cast());
        // Probes run a few entries past home; fetch the next line too when they cross it.
        let end = (home + 3).min(cap - 1);
        let last: *const Entry = &self.entries[end];
        if (last as usize) / 64 != (at as usize) / 64 {
            prefetch_ptr(last.cast());
        }
    }

    /// Heap bytes held by the table.
    pub fn heap_bytes(&self) -> usize {
        self.entries.capacity() * std::mem::size_of::<Entry>()
    }
}

/// A set of 64-bit hashes (the ids of applied events), in the same compact table.
#[derive(Clone, Default, Debug)]
pub struct IdSet(UnitTable);

impl IdSet {
    /// Whether `hash` is in the set.
    #[inline]
    pub fn contains(&self, hash: u64) -> bool {
        self.0.find(hash).is_some()
    }

    /// Add `hash`.
    pub fn insert(&mut self, hash: u64) {
        self.0.set(hash, UnitSlot(0));
    }

    /// A set with room for `n` hashes.
    pub fn with_capacity(n: usize) -> IdSet {
        IdSet(UnitTable::with_capacity(n))
    }

    /// Every hash, in no particular order.
    pub fn iter(&self) -> impl Iterator<Item = u64> + '_ {
        self.0.iter().map(|(k, _)| k)
    }

    /// Number of hashes.
    pub fn len(&self) -> usize {
        self.0.len()
    }

    /// Whether the set is empty.
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    /// See [`UnitTable::prefetch`].
    #[inline]
    pub fn prefetch(&self, hash: u64) {
        self.0.prefetch(hash);
    }

    /// Heap bytes held by the set.
    pub fn heap_bytes(&self) -> usize {
        self.0.heap_bytes()
    }
}

#[inline]
pub(super) fn prefetch_ptr(ptr: *const i8) {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: a prefetch is only a hint; it never faults, whatever the address.
    unsafe {
        std::arch::x86_64::_mm_prefetch(ptr, std::arch::x86_64::_MM_HINT_T0);
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = ptr;
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slot_keeps_variant_and_flags_apart() {
        let slot = UnitSlot::new(63).with_converted(0).with_converted(23);
        assert_eq!(slot.variant(), 63);
        assert!(slot.converted(0));
        assert!(slot.converted(23));
        assert!(!slot.converted(1));
        assert_eq!(UnitSlot::new(5).variant(), 5);
    }

    #[test]
    fn key_hash_is_stable_across_runs() {
        // Pinned so that persisted state stays valid across versions: changing the hash
        // function would silently split every unit in two after an upgrade.
        assert_eq!(key_hash("unit-1"), key_hash("unit-1"));
        assert_ne!(key_hash("unit-1"), key_hash("unit-2"));
        assert_eq!(key_hash(""), 0x2d06_8005_38d3_94c2);
    }

    #[test]
    fn entries_are_twelve_bytes() {
        assert_eq!(std::mem::size_of::<Entry>(), 12);
    }

    #[test]
    fn table_agrees_with_std_map_and_stays_within_budget() {
        // Reference: std's HashMap, fed the same operations (keys from a fixed xorshift
        // sequence, with many repeats and updates).
        let mut table = UnitTable::default();
        let mut reference = std::collections::HashMap::new();
        let mut x: u64 = 0x9e37_79b9_7f4a_7c15;
        for i in 0..400_000u64 {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            // Every fourth key repeats an earlier one; key 0 and u64::MAX are valid keys.
            let key = match i % 4 {
                0 => x % 50_000,
                _ => x,
            };
            let key = if i == 7 {
                0
            } else if i == 11 {
                u64::MAX
            } else {
                key
            };
            let slot = UnitSlot::new((i % 64) as usize).with_converted((i % 24) as u8);
            assert_eq!(table.get(key), reference.get(&key).copied());
            table.set(key, slot);
            reference.insert(key, slot);
            if table.heap_bytes() > SMALL_TABLE * 12 {
                assert!(
                    table.heap_bytes() as f64 / table.len() as f64 <= 24.0,
                    "{} bytes for {} units",
                    table.heap_bytes(),
                    table.len()
                );
            }
        }
        assert_eq!(table.len(), reference.len());
        let mut from_table: Vec<_> = table.iter().map(|(k, s)| (k, s.raw())).collect();
        let mut from_ref: Vec<_> = reference.iter().map(|(k, s)| (*k, s.raw())).collect();
        from_table.sort_unstable();
        from_ref.sort_unstable();
        assert_eq!(from_table, from_ref);
        for (k, s) in &reference {
            assert_eq!(table.get(*k), Some(*s));
        }
        assert_eq!(table.get(0xdead_beef_0000_0001), None);
    }

    #[test]
    fn single_probe_operations_agree_with_std_map() {
        let mut table = UnitTable::default();
        let mut reference: std::collections::HashMap<u64, UnitSlot> = Default::default();
        let mut x: u64 = 0x2545_f491_4f6c_dd1d;
        for i in 0..100_000u64 {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            let key = if i % 3 == 0 { x % 20_000 } else { x };
            if i % 5 == 0 {
                let bit = (i % 24) as u8;
                let expected = reference.get(&key).copied();
                assert_eq!(table.mark_converted(key, bit), expected);
                if let Some(s) = expected {
                    reference.insert(key, s.with_converted(bit));
                }
            } else {
                let slot = UnitSlot::new((i % 64) as usize);
                let expected = reference.get(&key).copied();
                assert_eq!(table.get_or_insert(key, slot), expected);
                reference.entry(key).or_insert(slot);
            }
        }
        assert_eq!(table.len(), reference.len());
        for (k, s) in &reference {
            assert_eq!(table.get(*k), Some(*s));
        }
    }

    #[test]
    fn with_capacity_needs_no_growth() {
        let mut table = UnitTable::with_capacity(10_000);
        let bytes = table.heap_bytes();
        for k in 0..10_000u64 {
            table.set(k.wrapping_mul(0x9e37_79b9_7f4a_7c15), UnitSlot::new(1));
        }
        assert_eq!(table.heap_bytes(), bytes);
        assert_eq!(table.len(), 10_000);
    }
}

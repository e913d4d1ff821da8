//! The table `dedupe` keeps of the rows it has seen: each row key (a 128-bit hash of the key
//! fields) with the row that stands for it, in one flat array probed linearly.
//!
//! A general hash map spends, per row, a hash of the already well-mixed key, a probe of a
//! control array and a second probe of the entries; on a million distinct keys both probes
//! miss the cache. Here the key's own high bits choose the slot (scaled to the table's size,
//! which need not be a power of two) and a slot holds the key and the row together, so a
//! lookup usually touches one cache line. A slot is 20 bytes while rows fit in 32 bits (24
//! beyond). Sized from the expected row count when known for at most 80% full;
//! it doubles past 90%.

/// The load a table is sized for, keys per slot. Linear probing stays short below
/// this load (by Knuth's estimates for linear probing, from memory: about 3 slots to find a
/// key and 13 to find a free one at the very end of a full table, a few cache lines of 20-byte
/// slots; fewer while it fills). 0.8 rather than 0.7 keeps a plan of ten steps on 5,000,000
/// rows under 256 MiB (DEVELOPERS.md, "Where fused plans stand"), at no cost measured there.
const MAX_LOAD: f64 = 0.8;

/// The load at which a table doubles: above [`MAX_LOAD`], so that a table sized from an
/// estimate of its rows (a file still being read) takes up to an eighth more rows than the
/// estimate before it doubles (and, while it does, holds both tables).
const GROW_AT: f64 = 0.9;

/// A row number as a slot holds it.
trait RowNo: Copy + Eq {
    /// The value of a slot that holds no key.
    const EMPTY: Self;
    /// `row` as held, if it fits (and is not [`Self::EMPTY`]).
    fn held(row: u64) -> Option<Self>;
    fn row(self) -> u64;
}

impl RowNo for u32 {
    const EMPTY: u32 = u32::MAX;
    fn held(row: u64) -> Option<u32> {
        u32::try_from(row).ok().filter(|&r| r != u32::MAX)
    }
    fn row(self) -> u64 {
        u64::from(self)
    }
}

impl RowNo for u64 {
    const EMPTY: u64 = u64::MAX;
    fn held(row: u64) -> Option<u64> {
        (row != u64::MAX).then_some(row)
    }
    fn row(self) -> u64 {
        self
    }
}

/// A key (as four 32-bit words, so that the slot's alignment is the row's) and its row.
#[derive(Clone, Copy)]
struct Slot<R> {
    key: [u32; 4],
    row: R,
}

fn words(key: u128) -> [u32; 4] {
    [
        key as u32,
        (key >> 32) as u32,
        (key >> 64) as u32,
        (key >> 96) as u32,
    ]
}

struct Table<R> {
    slots: Vec<Slot<R>>,
    len: usize,
}

impl<R: RowNo> Table<R> {
    fn with_slots(n: usize) -> Self {
        Table {
            slots: vec![
                Slot {
                    key: [0; 4],
                    row: R::EMPTY,
                };
                n.max(8)
            ],
            len: 0,
        }
    }

    /// The slot holding `key`, or the free slot where it would go.
    fn slot_of(&self, key: u128) -> usize {
        let n = self.slots.len();
        // The high 64 bits scaled to the table's size (multiply and keep the high half).
        let mut i = ((u128::from((key >> 64) as u64) * n as u128) >> 64) as usize;
        let want = words(key);
        loop {
            let s = &self.slots[i];
            if s.row == R::EMPTY || s.key == want {
                return i;
            }
            i += 1;
            if i == n {
                i = 0;
            }
        }
    }

    fn get(&self, key: u128) -> Option<u64> {
        let s = &self.slots[self.slot_of(key)];
        (s.row != R::EMPTY).then(|| s.row.row())
    }

    /// Puts `row` (already known to fit) for `key`; with `replace`, over a row recorded
    /// before. Returns the row recorded for `key` afterwards.
    fn put(&mut self, key: u128, row: R, replace: bool) -> u64 {
        let i = self.slot_of(key);
        if self.slots[i].row != R::EMPTY {
            if replace {
                self.slots[i].row = row;
            }
            return self.slots[i].row.row();
        }
        self.slots[i] = Slot {
            key: words(key),
            row,
        };
        self.len += 1;
        if self.len as f64 > self.slots.len() as f64 * GROW_AT {
            let mut bigger = Table::with_slots(self.slots.len() * 2);
            for s in self.slots.iter().filter(|s| s.row != R::EMPTY) {
                let j = bigger.slot_of(key_of(s.key));
                bigger.slots[j] = *s;
            }
            bigger.len = self.len;
            *self = bigger;
        }
        row.row()
    }

    fn entries(&self) -> impl Iterator<Item = (u128, u64)> + '_ {
        self.slots
            .iter()
            .filter(|s| s.row != R::EMPTY)
            .map(|s| (key_of(s.key), s.row.row()))
    }
}

fn key_of(w: [u32; 4]) -> u128 {
    u128::from(w[0])
        | (u128::from(w[1]) << 32)
        | (u128::from(w[2]) << 64)
        | (u128::from(w[3]) << 96)
}

/// Row keys and the row chosen for each.
pub(crate) struct KeySet(Rows);

enum Rows {
    /// Every row recorded so far fits in 32 bits.
    Narrow(Table<u32>),
    Wide(Table<u64>),
}

fn slots_for(rows: u64) -> usize {
    ((rows as f64 / MAX_LOAD).ceil() as usize).clamp(64, 1 << 40)
}

impl Default for KeySet {
    fn default() -> Self {
        KeySet::with_expected(0)
    }
}

impl KeySet {
    /// A table that holds `rows` keys without growing.
    pub(crate) fn with_expected(rows: u64) -> Self {
        KeySet(Rows::Narrow(Table::with_slots(slots_for(rows))))
    }

    /// Grows (once, up front) so that `rows` keys fit without growing again.
    pub(crate) fn expect(&mut self, rows: u64) {
        let (len, n) = match &self.0 {
            Rows::Narrow(t) => (t.len, t.slots.len()),
            Rows::Wide(t) => (t.len, t.slots.len()),
        };
        if len == 0 && rows as f64 > n as f64 * MAX_LOAD {
            *self = KeySet::with_expected(rows);
        }
    }

    #[cfg(test)]
    fn n_slots(&self) -> usize {
        match &self.0 {
            Rows::Narrow(t) => t.slots.len(),
            Rows::Wide(t) => t.slots.len(),
        }
    }

    #[cfg(test)]
    pub(crate) fn len(&self) -> usize {
        match &self.0 {
            Rows::Narrow(t) => t.len,
            Rows::Wide(t) => t.len,
        }
    }

    /// The row recorded for `key`, if any.
    pub(crate) fn get(&self, key: u128) -> Option<u64> {
        match &self.0 {
            Rows::Narrow(t) => t.get(key),
            Rows::Wide(t) => t.get(key),
        }
    }

    /// The row recorded for `key`; `row` is recorded (and returned) when there is none.
    pub(crate) fn first_or_insert(&mut self, key: u128, row: u64) -> u64 {
        self.put(key, row, false)
    }

    /// Records `row` for `key`, replacing a row recorded before.
    pub(crate) fn insert(&mut self, key: u128, row: u64) {
        self.put(key, row, true);
    }

    fn put(&mut self, key: u128, row: u64, replace: bool) -> u64 {
        if let Rows::Narrow(t) = &mut self.0 {
            if let Some(r) = u32::held(row) {
                return t.put(key, r, replace);
            }
            // A row past 32 bits: the same keys in slots with room for it.
            let mut wide = Table::with_slots(t.slots.len());
            for (k, r) in t.entries() {
                wide.put(k, r, false);
            }
            self.0 = Rows::Wide(wide);
        }
        match &mut self.0 {
            Rows::Wide(t) => t.put(key, u64::held(row).unwrap_or(u64::MAX - 1), replace),
            // Widened just above.
            Rows::Narrow(_) => row,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use std::collections::HashMap;

    /// A table sized for an estimate takes an eighth more keys before it doubles, and doubles
    /// past 90% full.
    #[test]
    fn a_table_sized_from_an_estimate_takes_more_before_it_doubles() {
        let mut set = KeySet::with_expected(8_000);
        let slots = set.n_slots();
        assert_eq!(slots, 10_000);
        let key = |i: u64| u128::from(i).wrapping_mul(0x9e37_79b9_7f4a_7c15_f39c_c060_5ced_c835);
        for i in 0..9_000 {
            set.insert(key(i), i);
        }
        assert_eq!(
            set.n_slots(),
            slots,
            "9,000 keys fit in a table sized for 8,000"
        );
        set.insert(key(9_000), 9_000);
        assert_eq!(set.n_slots(), 2 * slots, "past 90% full it doubles");
        assert!((0..9_001).all(|i| set.get(key(i)) == Some(i)));
    }

    proptest! {
        /// Law: the table answers as the standard library's map does, for keys that share
        /// high bits (so probes run past each other and wrap), through growth, and across
        /// the change to wide rows.
        #[test]
        fn answers_as_a_map(
            ops in prop::collection::vec((0u8..3, 0u64..256, 0u64..6, any::<bool>()), 0..600),
            expected in 0u64..100,
        ) {
            let mut ours = KeySet::with_expected(expected);
            let mut theirs: HashMap<u128, u64> = HashMap::new();
            for (i, (what, high, low, big)) in ops.iter().enumerate() {
                // Keys that differ only in their low bits land on neighbouring slots; the
                // top byte spreads them over the whole table, its last slot included.
                let key = (u128::from(*high) << 120) | u128::from(*low);
                let row = if *big { (1u64 << 33) + i as u64 } else { i as u64 };
                match what {
                    0 => prop_assert_eq!(
                        ours.first_or_insert(key, row),
                        *theirs.entry(key).or_insert(row)
                    ),
                    1 => {
                        ours.insert(key, row);
                        theirs.insert(key, row);
                    }
                    _ => prop_assert_eq!(ours.get(key), theirs.get(&key).copied()),
                }
                prop_assert_eq!(ours.len(), theirs.len());
            }
            for (k, v) in &theirs {
                prop_assert_eq!(ours.get(*k), Some(*v));
            }
        }
    }

    #[test]
    fn a_slot_is_twenty_bytes_while_rows_fit_in_32_bits() {
        assert_eq!(std::mem::size_of::<Slot<u32>>(), 20);
        assert_eq!(std::mem::size_of::<Slot<u64>>(), 24);
    }
}

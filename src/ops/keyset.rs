//! The table `dedupe` keeps of the rows it has seen: each row key (a 128-bit hash of the key
//! fields) with the row that stands for it, in one flat array probed linearly.
//!
//! A general hash map spends, per row, a hash of the already well-mixed key, a probe of a
//! control array and a second probe of the entries; on a million distinct keys both probes
//! miss the cache. Here the key's own low bits choose the slot and a slot holds the key and
//! the row together, so a lookup usually touches one cache line. Sized from the expected row
//! count when known, doubled when 70% full.

/// A slot's row when it holds no key (no table has 2⁶⁴ − 1 rows).
const EMPTY: u64 = u64::MAX;

/// A key and its row in 24 bytes (a `u128` field would align the slot to 32).
#[derive(Clone, Copy)]
struct Slot {
    lo: u64,
    hi: u64,
    row: u64,
}

impl Slot {
    fn key(&self) -> u128 {
        u128::from(self.lo) | (u128::from(self.hi) << 64)
    }
}

const FREE: Slot = Slot {
    lo: 0,
    hi: 0,
    row: EMPTY,
};

/// Slots per key kept at most: beyond, the table doubles. Linear probing stays short below
/// this load (about 2 probes to find a key, 6 to find a free slot, mostly in one cache line).
const MAX_LOAD: f64 = 0.7;

/// Row keys and the row chosen for each.
pub(crate) struct KeySet {
    slots: Vec<Slot>,
    len: usize,
}

impl Default for KeySet {
    fn default() -> Self {
        KeySet::with_expected(0)
    }
}

impl KeySet {
    /// A table that holds `rows` keys without growing.
    pub(crate) fn with_expected(rows: u64) -> Self {
        let want = ((rows as f64 / MAX_LOAD).ceil() as usize).clamp(64, 1 << 40);
        KeySet {
            slots: vec![FREE; want.next_power_of_two()],
            len: 0,
        }
    }

    /// Grows (once, up front) so that `rows` keys fit without growing again.
    pub(crate) fn expect(&mut self, rows: u64) {
        if self.len == 0 && rows as f64 > self.slots.len() as f64 * MAX_LOAD {
            *self = KeySet::with_expected(rows);
        }
    }

    #[cfg(test)]
    pub(crate) fn len(&self) -> usize {
        self.len
    }

    fn slot_of(&self, key: u128) -> usize {
        let mask = self.slots.len() - 1;
        let mut i = (key as usize) & mask;
        loop {
            let s = &self.slots[i];
            if s.row == EMPTY || s.key() == key {
                return i;
            }
            i = (i + 1) & mask;
        }
    }

    /// The row recorded for `key`, if any.
    pub(crate) fn get(&self, key: u128) -> Option<u64> {
        let s = &self.slots[self.slot_of(key)];
        (s.row != EMPTY).then_some(s.row)
    }

    /// The row recorded for `key`; `row` is recorded (and returned) when there is none.
    pub(crate) fn first_or_insert(&mut self, key: u128, row: u64) -> u64 {
        let i = self.slot_of(key);
        if self.slots[i].row != EMPTY {
            return self.slots[i].row;
        }
        self.put(i, key, row);
        row
    }

    /// Records `row` for `key`, replacing a row recorded before.
    pub(crate) fn insert(&mut self, key: u128, row: u64) {
        let i = self.slot_of(key);
        if self.slots[i].row != EMPTY {
            self.slots[i].row = row;
        } else {
            self.put(i, key, row);
        }
    }

    fn put(&mut self, i: usize, key: u128, row: u64) {
        debug_assert!(row != EMPTY);
        self.slots[i] = Slot {
            lo: key as u64,
            hi: (key >> 64) as u64,
            row,
        };
        self.len += 1;
        if self.len as f64 > self.slots.len() as f64 * MAX_LOAD {
            let doubled = vec![FREE; self.slots.len() * 2];
            let old = std::mem::replace(&mut self.slots, doubled);
            for s in old.into_iter().filter(|s| s.row != EMPTY) {
                let j = self.slot_of(s.key());
                self.slots[j] = s;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;
    use std::collections::HashMap;

    proptest! {
        /// Law: the table answers as the standard library's map does, for keys that share
        /// low bits (so probes run past each other) and through growth.
        #[test]
        fn answers_as_a_map(
            ops in prop::collection::vec((0u8..3, 0u64..40, 0u64..6), 0..600),
            expected in 0u64..100,
        ) {
            let mut ours = KeySet::with_expected(expected);
            let mut theirs: HashMap<u128, u64> = HashMap::new();
            for (i, (what, low, high)) in ops.iter().enumerate() {
                // Keys that differ only in their high bits land on the same slot.
                let key = u128::from(*low) | (u128::from(*high) << 100);
                let row = i as u64;
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
}

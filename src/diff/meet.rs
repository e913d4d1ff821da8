//! The two sides of a diff's first pass meeting by row fingerprint while both are read, so that
//! each side keeps the bytes of only the rows that may have no equal on the other side (those
//! its second pass can ask for) and gives every other decoded frame back to be decoded into
//! again, instead of keeping both versions whole.
//!
//! Each side publishes its rows' fingerprints in batches. A fingerprint the other side has
//! published and not yet met is met (both rows have an equal); any other waits in a shared
//! table until a row of the other side meets it. A side decides about its waiting rows once
//! the other side has read past where their equals would be if the rows kept their order
//! (proportionally to both row counts, with [`SLACK`] rows to spare): those still waiting are
//! copied out (and no longer wait), the others dropped, and the frames before them given
//! back. A side more than [`LEAD`] rows ahead of the other (proportionally) waits for it, so
//! that the table stays small (in the processor's cache) and few frames are held; a side that
//! has ended, well or not, is waited for no longer, and two sides cannot both be ahead. When a
//! side has copied more than its budget (versions in another order), both stop meeting and
//! keep the rest of their versions whole. The
//! second pass checks that what was kept holds every row it needs, and reads the object again
//! when not (rows sharing a key, say), so the meeting only decides what is kept, never what a
//! diff says.

use std::collections::{HashMap, VecDeque};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Condvar, Mutex, MutexGuard};

use crate::hash::AsIsBuild;

/// Rows to spare past the proportional position before a side's rows are decided: equals
/// moved by about this many rows (rows inserted or removed before them) are still met.
pub const SLACK: u64 = 2048;

/// How far (in its own rows, proportionally) a side may read ahead of the other before it waits.
pub const LEAD: u64 = 1024;

/// How many rows a side reads between two meetings.
pub const EVERY: usize = 1024;

/// What share of the bytes a diff may keep (both versions whole) a side may spend on copied
/// rows: past it both sides stop meeting and keep the rest of their versions whole (versions in
/// another order, where few rows meet in time).
pub const COPY_SHARE: u64 = 32;

/// Per fingerprint, how many rows wait for an equal: side 0's as a positive count, side 1's as
/// a negative one (a small entry keeps the table in the cache).
type Table = HashMap<u64, i32, AsIsBuild>;

/// The meeting place of the two sides (0 and 1) of one first pass.
#[derive(Debug)]
pub struct Meet {
    open: Mutex<Table>,
    /// Signalled whenever a side publishes or ends.
    moved: Condvar,
    /// Per side: how many of its rows it has published, how many it has, and whether it has
    /// ended (all published, or stopped by an error).
    published: [AtomicU64; 2],
    rows: [u64; 2],
    ended: [AtomicBool; 2],
    /// How many bytes of copied rows a side may hold.
    budget: usize,
    /// Set when a side spent its budget: neither side meets any more.
    given_up: AtomicBool,
}

/// One side's count in a table entry.
fn unit(side: usize) -> i32 {
    if side == 0 {
        1
    } else {
        -1
    }
}

impl Meet {
    /// A meeting of sides of `rows_a` and `rows_b` rows, each of which may copy up to
    /// `budget` bytes of rows.
    pub fn new(rows_a: u64, rows_b: u64, budget: usize) -> Meet {
        Meet {
            budget,
            open: Mutex::new(Table::default()),
            moved: Condvar::new(),
            published: [AtomicU64::new(0), AtomicU64::new(0)],
            rows: [rows_a, rows_b],
            ended: [AtomicBool::new(false), AtomicBool::new(false)],
            given_up: AtomicBool::new(false),
        }
    }

    /// Whether the sides stopped meeting (a side spent its budget): each keeps the rest of its
    /// version whole.
    pub fn given_up(&self) -> bool {
        self.given_up.load(Ordering::Acquire)
    }

    /// Stops the meeting for both sides: the rows still waiting are kept (copied, or in the
    /// pieces not given back), the table is emptied, and a side waiting for the other goes on.
    pub fn give_up(&self) {
        let mut open = self.table();
        self.given_up.store(true, Ordering::Release);
        *open = Table::default();
        self.moved.notify_all();
    }

    /// How many bytes of copied rows a side may hold before it keeps the rest whole.
    pub fn budget(&self) -> usize {
        self.budget
    }

    fn table(&self) -> MutexGuard<'_, Table> {
        // A side that panicked leaves a table still worth reading: entries are whole.
        self.open.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Publishes `batch`, (fingerprint, row) of `side`'s rows up to row `read` (exclusive):
    /// each meets a waiting row of the other side with its fingerprint, or waits itself, and
    /// is then pushed onto `waiting`. Then waits while this side is more than [`LEAD`] rows
    /// ahead of the other, unless the other has ended.
    pub fn publish(
        &self,
        side: usize,
        batch: &[(u64, u64)],
        read: u64,
        waiting: &mut VecDeque<(u64, u64)>,
    ) {
        let mine = unit(side);
        let mut open = self.table();
        for &(fp, row) in batch {
            let count = open.entry(fp).or_insert(0);
            if *count != 0 && count.signum() != mine {
                // Met: one row of the other side waits no longer.
                *count -= count.signum();
                if *count == 0 {
                    open.remove(&fp);
                }
            } else {
                *count = count.saturating_add(mine);
                waiting.push_back((fp, row));
            }
        }
        self.published[side].store(read, Ordering::Release);
        self.moved.notify_all();
        while self.ahead(side) > LEAD
            && !self.ended[1 - side].load(Ordering::Acquire)
            && !self.given_up()
        {
            open = self.moved.wait(open).unwrap_or_else(|p| p.into_inner());
        }
    }

    /// How many rows `side` has published past the other side's proportional position.
    fn ahead(&self, side: usize) -> u64 {
        self.published[side]
            .load(Ordering::Acquire)
            .saturating_sub(self.other_at(side))
    }

    /// How far the other side has published, in `side`'s rows (proportionally to both row
    /// counts).
    fn other_at(&self, side: usize) -> u64 {
        let other = 1 - side;
        let seen = self.published[other].load(Ordering::Acquire);
        (u128::from(seen) * u128::from(self.rows[side]) / u128::from(self.rows[other].max(1)))
            as u64
    }

    /// Marks `side` ended (every row published, or stopped): the other side no longer waits for
    /// it.
    pub fn end(&self, side: usize) {
        let _open = self.table();
        self.ended[side].store(true, Ordering::Release);
        self.moved.notify_all();
    }

    /// The rows of `side` before which the other side has read past every equal that kept its
    /// place (all of them once the other side has published all of its rows).
    pub fn covered(&self, side: usize) -> u64 {
        let other = 1 - side;
        if self.published[other].load(Ordering::Acquire) >= self.rows[other] {
            return self.rows[side];
        }
        self.other_at(side).saturating_sub(SLACK)
    }

    /// Of `rows` ((fingerprint, row) of `side`, ascending, each pushed onto `waiting` by
    /// [`Self::publish`]), those still waiting for an equal; they wait no longer (an equal
    /// that comes later then waits on the other side), so the table holds only rows not yet
    /// decided. Of rows with one fingerprint, as many as still wait are returned, the first.
    pub fn still_waiting(&self, side: usize, rows: impl Iterator<Item = (u64, u64)>) -> Vec<u64> {
        let mine = unit(side);
        let mut open = self.table();
        rows.filter(|(fp, _)| {
            let Some(count) = open.get_mut(fp).filter(|c| c.signum() == mine) else {
                return false;
            };
            *count -= mine;
            if *count == 0 {
                open.remove(fp);
            }
            true
        })
        .map(|(_, row)| row)
        .collect()
    }
}

/// Ends a side of a [`Meet`] when dropped: however its pass stops, the other does not wait for
/// it.
pub struct Ends<'m>(pub &'m Meet, pub usize);

impl Drop for Ends<'_> {
    fn drop(&mut self) {
        self.0.end(self.1);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// Publishes both sides in batches (interleaved as `turns` says), then decides every row:
    /// returns each side's rows still waiting at the end.
    fn meet_all(a: &[u64], b: &[u64], turns: &[bool], batch: usize) -> [Vec<u64>; 2] {
        let meet = Meet::new(a.len() as u64, b.len() as u64, 0);
        // One thread publishes both sides here: neither may wait for the other.
        meet.end(0);
        meet.end(1);
        let sides = [a, b];
        let mut at = [0usize; 2];
        let mut waiting = [VecDeque::new(), VecDeque::new()];
        let mut turn = turns.iter().cycle();
        while at[0] < a.len() || at[1] < b.len() {
            let s = match turn.next() {
                Some(&t) if at[usize::from(t)] < sides[usize::from(t)].len() => usize::from(t),
                _ if at[0] < a.len() => 0,
                _ => 1,
            };
            let end = (at[s] + batch).min(sides[s].len());
            let rows: Vec<(u64, u64)> = (at[s]..end).map(|r| (sides[s][r], r as u64)).collect();
            meet.publish(s, &rows, end as u64, &mut waiting[s]);
            at[s] = end;
        }
        assert_eq!(meet.covered(0), a.len() as u64);
        assert_eq!(meet.covered(1), b.len() as u64);
        [0, 1].map(|s| meet.still_waiting(s, waiting[s].drain(..)))
    }

    proptest! {
        /// Whatever the interleaving and the batches, the rows still waiting at the end are
        /// the multiset difference of the fingerprints: of a value one side holds `m` times
        /// and the other `t` times, `m - t` of its rows when `m > t`, else none.
        #[test]
        fn the_rows_left_waiting_are_those_without_an_equal(
            a in proptest::collection::vec(0u64..30, 0..200),
            b in proptest::collection::vec(0u64..30, 0..200),
            turns in proptest::collection::vec(any::<bool>(), 1..8),
            batch in 1usize..40,
        ) {
            let [wa, wb] = meet_all(&a, &b, &turns, batch);
            let count = |v: &[u64], x: u64| v.iter().filter(|&&y| y == x).count();
            for (side, mine, theirs, left) in [(0, &a, &b, &wa), (1, &b, &a, &wb)] {
                for x in 0u64..30 {
                    let rows_left = left.iter().filter(|&&r| mine[r as usize] == x).count();
                    prop_assert_eq!(
                        rows_left,
                        count(mine, x).saturating_sub(count(theirs, x)),
                        "side {} value {}", side, x
                    );
                }
            }
        }
    }

    /// A side is covered in proportion to how far the other has read, less the slack.
    #[test]
    fn a_side_is_covered_as_far_as_the_other_has_read() {
        let meet = Meet::new(100_000, 50_000, 0);
        // Published from one thread: neither side may wait for the other.
        meet.end(0);
        meet.end(1);
        let mut waiting = VecDeque::new();
        assert_eq!(meet.covered(0), 0);
        meet.publish(1, &[], 25_000, &mut waiting);
        assert_eq!(meet.covered(0), 50_000 - SLACK);
        meet.publish(0, &[], 100_000, &mut waiting);
        assert_eq!(meet.covered(1), 50_000);
    }

    /// A side that reads faster waits for the other: whenever its publishing returns, it is at
    /// most [`LEAD`] rows ahead, until the other ends; a side that stops early (its pass
    /// failed) lets the other run to its end.
    #[test]
    fn a_side_ahead_waits_and_one_that_stops_is_not_waited_for() {
        for stop_at in [None, Some(30_000u64)] {
            let meet = Meet::new(200_000, 100_000, 0);
            let worst = std::thread::scope(|s| {
                let fast = s.spawn(|| {
                    let _ends = Ends(&meet, 0);
                    let mut waiting = VecDeque::new();
                    let mut worst = 0;
                    for read in (4096..=200_000u64).step_by(4096) {
                        meet.publish(0, &[], read, &mut waiting);
                        if !meet.ended[1].load(Ordering::Acquire) {
                            worst = worst.max(meet.ahead(0));
                        }
                    }
                    worst
                });
                {
                    let _ends = Ends(&meet, 1);
                    let mut waiting = VecDeque::new();
                    for read in (1024..=100_000u64).step_by(1024) {
                        if stop_at.is_some_and(|s| read > s) {
                            break;
                        }
                        std::thread::sleep(std::time::Duration::from_micros(50));
                        meet.publish(1, &[], read, &mut waiting);
                    }
                }
                fast.join().expect("the fast side ends")
            });
            assert!(worst <= LEAD, "{stop_at:?}: {worst} rows ahead");
        }
    }
}

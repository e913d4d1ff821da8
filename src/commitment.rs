//! Salted cell commitments: the hash tree over a version's cells that proves, after some cells
//! are erased, that every other cell is what it was when the commitment was made.
//!
//! The construction (DEVELOPERS.md, "Cell commitments", gives the security argument):
//!
//! - **Leaves.** Cell `i` (row-major, `i = row * n_cols + col`, data rows only) is committed to as
//!   `BLAKE3(0x00 || salt_i || value_i)`, with a 32-byte salt of its own. The salt makes the leaf
//!   useless for confirming a guessed value (a name, an e-mail address) once the salt is gone:
//!   the salted-leaf idea of selective-disclosure credentials (IETF SD-JWT draft and ISO/IEC
//!   18013-5 mobile driving licences salt each disclosed claim in the same way).
//! - **The tree.** The leaves are hashed in the shape of RFC 6962, section 2.1 (Certificate
//!   Transparency's Merkle Tree Hash: split at the largest power of two below the count, inner
//!   nodes `H(0x01 || left || right)`), with BLAKE3 in place of SHA-256. The root is bound to the
//!   header and the shape in the [`Commitment::root`].
//! - **Salts.** Salts come from a GGM tree (Goldreich, Goldwasser and Micali, "How to construct
//!   random functions", J. ACM 1986): a random 32-byte seed, each node's two children the two
//!   halves of a 64-byte keyed BLAKE3 output over the node's seed, [`DEPTH`] levels, the leaf at position
//!   `i` the salt of cell `i`. Erasing cells *punctures* the tree (the puncturable PRF of Boneh and
//!   Waters, and of Kiayias et al. and Sahai and Waters, 2013): the seed is replaced by the seeds
//!   of the subtrees that cover every other cell, so the erased cells' salts can no longer be
//!   derived from what is kept, while every remaining salt still can. A store thus keeps 32
//!   bytes per version instead of 32 per cell, and erasing k cells leaves at most about
//!   `k * DEPTH` seeds.
//!
//! Everything here is pure computation over bytes: no store, no clock.

use std::collections::BTreeMap;

/// Levels of the salt tree: salts exist for cells `0..2^DEPTH` (about 2.8e14 cells).
pub const DEPTH: u32 = 48;

const SALT_CONTEXT: &str = "sluice 2026 cell-salt tree v1";
const ROOT_CONTEXT: &str = "sluice 2026 cell commitment v1";

/// 32 bytes: a seed, a salt or a hash.
pub type Bytes32 = [u8; 32];

/// One node of the salt tree that is kept: its depth (0 is the root), the position of its
/// subtree among those of its depth, and its seed.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SeedNode {
    pub depth: u32,
    pub index: u64,
    pub seed: Bytes32,
}

impl SeedNode {
    /// The cells under this node: `lo..hi`.
    fn range(&self) -> (u64, u64) {
        let width = 1u64 << (DEPTH - self.depth);
        (self.index * width, self.index * width + width)
    }
}

/// The key of the salt tree's steps: derived once from its context string.
fn salt_key() -> &'static Bytes32 {
    static KEY: std::sync::OnceLock<Bytes32> = std::sync::OnceLock::new();
    KEY.get_or_init(|| blake3::derive_key(SALT_CONTEXT, b""))
}

/// The two children of a node's seed: 64 bytes of keyed BLAKE3 output over it.
fn children(seed: &Bytes32) -> (Bytes32, Bytes32) {
    let mut h = blake3::Hasher::new_keyed(salt_key());
    h.update(seed);
    let mut out = [0u8; 64];
    h.finalize_xof().fill(&mut out);
    let mut l = [0u8; 32];
    let mut r = [0u8; 32];
    l.copy_from_slice(&out[..32]);
    r.copy_from_slice(&out[32..]);
    (l, r)
}

fn child(seed: &Bytes32, bit: u64) -> Bytes32 {
    let (l, r) = children(seed);
    if bit == 0 {
        l
    } else {
        r
    }
}

/// The salts a store still holds for one version: the seeds of disjoint subtrees, in order.
/// A fresh version's is the root seed alone.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Salts {
    pub nodes: Vec<SeedNode>,
}

impl Salts {
    /// A fresh tree from a random seed.
    pub fn fresh(seed: Bytes32) -> Salts {
        Salts {
            nodes: vec![SeedNode {
                depth: 0,
                index: 0,
                seed,
            }],
        }
    }

    /// The salt of cell `i`, or `None` when it was erased.
    pub fn salt(&self, i: u64) -> Option<Bytes32> {
        let at = self.nodes.partition_point(|n| n.range().1 <= i);
        let node = self.nodes.get(at)?;
        let (lo, _) = node.range();
        if i < lo {
            return None;
        }
        let mut seed = node.seed;
        let height = DEPTH - node.depth;
        let off = i - lo;
        for level in (0..height).rev() {
            seed = child(&seed, (off >> level) & 1);
        }
        Some(seed)
    }

    /// The salts kept after cells `erased` (sorted, distinct) lose theirs: each kept node that
    /// covers an erased cell is replaced by the children that do not, level by level (a loop
    /// over an explicit list, no recursion).
    pub fn puncture(&self, erased: &[u64]) -> Salts {
        let covers = |lo: u64, hi: u64| {
            let at = erased.partition_point(|&e| e < lo);
            erased.get(at).is_some_and(|&e| e < hi)
        };
        let mut out = Vec::new();
        for node in &self.nodes {
            let mut todo = vec![node.clone()];
            while let Some(n) = todo.pop() {
                let (lo, hi) = n.range();
                if !covers(lo, hi) {
                    out.push(n);
                } else if n.depth < DEPTH {
                    let (l, r) = children(&n.seed);
                    // Right first so that the left child is taken next: `out` stays in order.
                    todo.push(SeedNode {
                        depth: n.depth + 1,
                        index: n.index * 2 + 1,
                        seed: r,
                    });
                    todo.push(SeedNode {
                        depth: n.depth + 1,
                        index: n.index * 2,
                        seed: l,
                    });
                }
            }
        }
        Salts { nodes: out }
    }

    /// The salts of cells `0..n` in order (`None` for erased ones), each derived once, with
    /// the path down the tree (and both children of each node on it) kept between neighbours:
    /// about one salt-tree step per cell.
    pub fn stream(&self, n: u64) -> SaltStream {
        SaltStream {
            salts: self.clone(),
            next: 0,
            n,
            node: usize::MAX,
            path: Vec::new(),
            kids: Vec::new(),
        }
    }

    /// Serialized as kept in the store: per node u32 depth, u64 index, seed (little-endian).
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut out = Vec::with_capacity(self.nodes.len() * 44);
        for n in &self.nodes {
            out.extend_from_slice(&n.depth.to_le_bytes());
            out.extend_from_slice(&n.index.to_le_bytes());
            out.extend_from_slice(&n.seed);
        }
        out
    }

    /// Reads [`Salts::to_bytes`] back; `None` when malformed (a length that is not a multiple of
    /// 44, a depth beyond the tree, nodes out of order or overlapping).
    pub fn from_bytes(b: &[u8]) -> Option<Salts> {
        if !b.len().is_multiple_of(44) {
            return None;
        }
        let mut nodes = Vec::with_capacity(b.len() / 44);
        let mut end = 0u64;
        for c in b.chunks_exact(44) {
            let depth = u32::from_le_bytes(c[..4].try_into().ok()?);
            let index = u64::from_le_bytes(c[4..12].try_into().ok()?);
            if depth > DEPTH || index >= (1u64 << depth) {
                return None;
            }
            let mut seed = [0u8; 32];
            seed.copy_from_slice(&c[12..]);
            let n = SeedNode { depth, index, seed };
            let (lo, hi) = n.range();
            if lo < end {
                return None;
            }
            end = hi;
            nodes.push(n);
        }
        Some(Salts { nodes })
    }
}

/// The salts of consecutive cells (see [`Salts::stream`]).
pub struct SaltStream {
    salts: Salts,
    next: u64,
    n: u64,
    /// Which node the path is in, and the seeds from it down to the last cell's salt.
    node: usize,
    path: Vec<Bytes32>,
    /// Both children of each seed on the path, so that stepping to a sibling costs no hash.
    kids: Vec<(Bytes32, Bytes32)>,
}

impl Iterator for SaltStream {
    type Item = Option<Bytes32>;

    fn next(&mut self) -> Option<Option<Bytes32>> {
        if self.next >= self.n {
            return None;
        }
        let i = self.next;
        self.next += 1;
        let nodes = &self.salts.nodes;
        let at = nodes.partition_point(|n| n.range().1 <= i);
        let Some(node) = nodes.get(at) else {
            return Some(None);
        };
        let (lo, _) = node.range();
        if i < lo {
            return Some(None);
        }
        let height = (DEPTH - node.depth) as usize;
        let off = i - lo;
        // The levels to derive again: all of them in a new node, else those below the highest
        // bit that changed since the previous cell.
        let from = if at != self.node || off == 0 || self.path.len() != height + 1 {
            self.node = at;
            self.path.clear();
            self.kids.clear();
            self.path.push(node.seed);
            0
        } else {
            let changed = off ^ (off - 1);
            let top = 63 - changed.leading_zeros() as usize;
            self.path.truncate(height - top);
            self.kids.truncate(height - top);
            height - top - 1
        };
        for level in from..height {
            let bit = (off >> (height - 1 - level)) & 1;
            // The seed at `from` is unchanged: its children are known already.
            if self.kids.len() <= level {
                let pair = children(&self.path[level]);
                self.kids.push(pair);
            }
            let pair = self.kids[level];
            self.path.push(if bit == 0 { pair.0 } else { pair.1 });
        }
        Some(Some(self.path[height]))
    }
}

/// A cell's leaf: `BLAKE3(0x00 || salt || value)`.
pub fn leaf(salt: &Bytes32, value: &[u8]) -> Bytes32 {
    // One-shot hashing of a short input costs less than a streaming hasher's set-up.
    let mut buf = [0u8; 97];
    if value.len() <= 64 {
        buf[1..33].copy_from_slice(salt);
        buf[33..33 + value.len()].copy_from_slice(value);
        return *blake3::hash(&buf[..33 + value.len()]).as_bytes();
    }
    let mut h = blake3::Hasher::new();
    h.update(&[0]);
    h.update(salt);
    h.update(value);
    *h.finalize().as_bytes()
}

fn node(l: &Bytes32, r: &Bytes32) -> Bytes32 {
    let mut buf = [1u8; 65];
    buf[1..33].copy_from_slice(l);
    buf[33..].copy_from_slice(r);
    *blake3::hash(&buf).as_bytes()
}

/// The RFC 6962 tree hash computed as leaves arrive: a stack of complete subtrees (at most 64),
/// merged right to left at the end, which gives the same shape as splitting at the largest
/// power of two.
#[derive(Default)]
pub struct TreeHasher {
    stack: Vec<(u64, Bytes32)>,
    n: u64,
}

impl TreeHasher {
    pub fn push(&mut self, leaf: Bytes32) {
        self.n += 1;
        let mut cur = (1u64, leaf);
        while let Some(&(size, left)) = self.stack.last() {
            if size != cur.0 {
                break;
            }
            self.stack.pop();
            cur = (size * 2, node(&left, &cur.1));
        }
        self.stack.push(cur);
    }

    pub fn count(&self) -> u64 {
        self.n
    }

    /// The tree hash; of no leaves, `BLAKE3()` of nothing (RFC 6962: the hash of the empty string).
    pub fn finish(mut self) -> Bytes32 {
        let Some((_, mut acc)) = self.stack.pop() else {
            return *blake3::hash(b"").as_bytes();
        };
        while let Some((_, left)) = self.stack.pop() {
            acc = node(&left, &acc);
        }
        acc
    }
}

/// What a version's commitment states: its shape, the header, and the tree of its cells.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Commitment {
    pub n_rows: u64,
    pub n_cols: u64,
    pub tree: Bytes32,
}

impl Commitment {
    /// The root recorded for the version: `BLAKE3` in derive-key mode over the header (each
    /// name with its length), the shape and the tree hash.
    pub fn root(&self, header: &[String]) -> Bytes32 {
        let mut h = blake3::Hasher::new_derive_key(ROOT_CONTEXT);
        h.update(&(header.len() as u64).to_le_bytes());
        for name in header {
            h.update(&(name.len() as u64).to_le_bytes());
            h.update(name.as_bytes());
        }
        h.update(&self.n_rows.to_le_bytes());
        h.update(&self.n_cols.to_le_bytes());
        h.update(&self.tree);
        *h.finalize().as_bytes()
    }
}

/// Builds a commitment from cells given row by row: each cell's leaf from its salt and value,
/// or, for an erased cell, the leaf kept in its place (`kept`, by cell position).
pub struct Committer {
    n_cols: u64,
    salts: SaltStream,
    kept: BTreeMap<u64, Bytes32>,
    tree: TreeHasher,
    rows: u64,
    /// The first cell with neither a salt nor a kept leaf (a store that lost what it needs).
    pub missing: Option<u64>,
}

impl Committer {
    /// `n_rows` bounds the salts derived; `kept` the leaves of erased cells.
    pub fn new(salts: &Salts, n_rows: u64, n_cols: u64, kept: BTreeMap<u64, Bytes32>) -> Self {
        Committer {
            n_cols,
            salts: salts.stream(n_rows.saturating_mul(n_cols)),
            kept,
            tree: TreeHasher::default(),
            rows: 0,
            missing: None,
        }
    }

    /// One row's cells; a short row's missing cells are committed to as empty.
    pub fn row<'v>(&mut self, cells: impl IntoIterator<Item = &'v [u8]>) {
        let mut it = cells.into_iter();
        for c in 0..self.n_cols {
            let value = it.next().unwrap_or(&b""[..]);
            let i = self.rows * self.n_cols + c;
            let salt = self.salts.next().flatten();
            let leaf_hash = match (self.kept.get(&i), salt) {
                (Some(l), _) => *l,
                (None, Some(s)) => leaf(&s, value),
                (None, None) => {
                    self.missing.get_or_insert(i);
                    [0u8; 32]
                }
            };
            self.tree.push(leaf_hash);
        }
        self.rows += 1;
    }

    pub fn finish(self) -> Commitment {
        Commitment {
            n_rows: self.rows,
            n_cols: self.n_cols,
            tree: self.tree.finish(),
        }
    }
}

/// A fresh random seed from the operating system.
pub fn random_seed() -> std::io::Result<Bytes32> {
    let mut s = [0u8; 32];
    getrandom::getrandom(&mut s).map_err(|e| std::io::Error::other(e.to_string()))?;
    Ok(s)
}

pub fn hex(b: &Bytes32) -> String {
    b.iter().map(|x| format!("{x:02x}")).collect()
}

pub fn from_hex(s: &str) -> Option<Bytes32> {
    if s.len() != 64 || !s.is_ascii() {
        return None;
    }
    let mut out = [0u8; 32];
    for (i, o) in out.iter_mut().enumerate() {
        *o = u8::from_str_radix(&s[i * 2..i * 2 + 2], 16).ok()?;
    }
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// RFC 6962, section 2.1, written out as the RFC states it (recursive; the test's inputs
    /// are small), over any hash of byte strings.
    fn mth(h: &dyn Fn(&[u8]) -> Bytes32, d: &[Vec<u8>]) -> Bytes32 {
        match d.len() {
            0 => h(b""),
            1 => h(&[&[0u8][..], &d[0]].concat()),
            n => {
                let mut k = 1;
                while k * 2 < n {
                    k *= 2;
                }
                let l = mth(h, &d[..k]);
                let r = mth(h, &d[k..]);
                h(&[&[1u8][..], &l, &r].concat())
            }
        }
    }

    fn blake(b: &[u8]) -> Bytes32 {
        *blake3::hash(b).as_bytes()
    }

    fn cells(n: usize) -> Vec<Vec<u8>> {
        (0..n).map(|i| format!("cell {i}").into_bytes()).collect()
    }

    /// The streaming tree equals the RFC's recursive definition for every count up to 70.
    #[test]
    fn tree_shape_is_rfc_6962() {
        for n in 0..70 {
            let salts = Salts::fresh([7; 32]);
            let data: Vec<Vec<u8>> = cells(n)
                .iter()
                .enumerate()
                .map(|(i, v)| [&salts.salt(i as u64).unwrap()[..], v].concat())
                .collect();
            let mut t = TreeHasher::default();
            for d in &data {
                t.push(blake(&[&[0u8][..], d].concat()));
            }
            assert_eq!(t.finish(), mth(&blake, &data), "{n} leaves");
        }
    }

    /// The same stack, over SHA-256 leaves and nodes, gives the root of RFC 6962's reference
    /// test tree: the eight leaves of Certificate Transparency's merkle tree tests ("", 00, 10,
    /// 2021, 3031, 40414243, 5051525354555657, 606162...6f), root 5dc9da79...4328 (from memory
    /// of that project's test file; the recursive definition above agrees with it).
    #[test]
    fn rfc_6962_reference_root_over_sha256() {
        use sha2::Digest;
        let sha = |b: &[u8]| -> Bytes32 { sha2::Sha256::digest(b).into() };
        let leaves: Vec<Vec<u8>> = [
            "",
            "00",
            "10",
            "2021",
            "3031",
            "40414243",
            "5051525354555657",
            "606162636465666768696a6b6c6d6e6f",
        ]
        .iter()
        .map(|h| {
            (0..h.len() / 2)
                .map(|i| u8::from_str_radix(&h[i * 2..i * 2 + 2], 16).unwrap())
                .collect()
        })
        .collect();
        assert_eq!(
            hex(&mth(&sha, &leaves)),
            "5dc9da79a70659a9ad559cb701ded9a2ab9d823aad2f4960cfe370eff4604328"
        );
        // And the empty tree is SHA-256 of the empty string (a published constant).
        assert_eq!(
            hex(&mth(&sha, &[])),
            "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
        );
    }

    fn commit(salts: &Salts, rows: &[Vec<Vec<u8>>], kept: BTreeMap<u64, Bytes32>) -> Commitment {
        let n_cols = rows.first().map_or(0, |r| r.len()) as u64;
        let mut c = Committer::new(salts, rows.len() as u64, n_cols, kept);
        for r in rows {
            c.row(r.iter().map(|v| v.as_slice()));
        }
        assert_eq!(c.missing, None);
        c.finish()
    }

    proptest! {
        /// Streaming salts equal salts derived one by one, before and after puncturing.
        #[test]
        fn stream_equals_single(n in 0u64..300, erased in proptest::collection::btree_set(0u64..300, 0..12)) {
            let fresh = Salts::fresh([3; 32]);
            let erased: Vec<u64> = erased.into_iter().collect();
            let punct = fresh.puncture(&erased);
            for s in [&fresh, &punct] {
                let got: Vec<Option<Bytes32>> = s.stream(n).collect();
                let want: Vec<Option<Bytes32>> = (0..n).map(|i| s.salt(i)).collect();
                prop_assert_eq!(got, want);
            }
            for i in 0..300u64 {
                let is_erased = erased.binary_search(&i).is_ok();
                prop_assert_eq!(punct.salt(i).is_none(), is_erased);
                if !is_erased {
                    prop_assert_eq!(punct.salt(i), fresh.salt(i));
                }
            }
            // No kept node is an ancestor of an erased cell, and no seed kept equals an erased salt.
            for n in &punct.nodes {
                let (lo, hi) = n.range();
                prop_assert!(!erased.iter().any(|&e| lo <= e && e < hi));
            }
            prop_assert_eq!(Salts::from_bytes(&punct.to_bytes()), Some(punct.clone()));
        }

        /// The law of erasure: with the erased cells' values gone and their leaves kept, the
        /// rest commits to the same root; change any remaining cell and it does not.
        #[test]
        fn rest_proves_root(n_rows in 1usize..20, n_cols in 1usize..5, pick in proptest::collection::vec(any::<prop::sample::Index>(), 1..6), tamper in any::<prop::sample::Index>()) {
            let rows: Vec<Vec<Vec<u8>>> = (0..n_rows).map(|r| (0..n_cols).map(|c| format!("r{r}c{c}").into_bytes()).collect()).collect();
            let salts = Salts::fresh([9; 32]);
            let none = BTreeMap::new();
            let before = commit(&salts, &rows, none);
            let total = n_rows * n_cols;
            let mut erased: Vec<u64> = pick.iter().map(|p| p.index(total) as u64).collect();
            erased.sort_unstable();
            erased.dedup();
            let kept: BTreeMap<u64, Bytes32> = erased.iter().map(|&i| (i, leaf(&salts.salt(i).unwrap(), &rows[i as usize / n_cols][i as usize % n_cols]))).collect();
            let punct = salts.puncture(&erased);
            let mut blanked = rows.clone();
            for &i in &erased {
                blanked[i as usize / n_cols][i as usize % n_cols] = Vec::new();
            }
            prop_assert_eq!(&commit(&punct, &blanked, kept.clone()), &before);
            let t = tamper.index(total);
            if erased.binary_search(&(t as u64)).is_err() {
                let mut bad = blanked.clone();
                bad[t / n_cols][t % n_cols].push(b'!');
                prop_assert_ne!(&commit(&punct, &bad, kept), &before);
            }
        }
    }

    /// A guessed value cannot be confirmed from what is kept: the leaf of an erased cell with
    /// any salt derivable from the punctured tree differs from the kept leaf, even for the
    /// right guess (the real salt is not derivable).
    #[test]
    fn guess_not_confirmable() {
        let salts = Salts::fresh([5; 32]);
        let secret = b"ada.gilford@example.org";
        let real = leaf(&salts.salt(10).unwrap(), secret);
        let punct = salts.puncture(&[10]);
        assert_eq!(punct.salt(10), None);
        for i in 0..64u64 {
            if let Some(s) = punct.salt(i) {
                assert_ne!(leaf(&s, secret), real);
            }
        }
        for n in &punct.nodes {
            assert_ne!(leaf(&n.seed, secret), real);
        }
    }
}

//! Content hashes. Every object in a store is named by the BLAKE3 hash of its bytes; this module
//! owns the hex form of those names and the streaming hash used on every intake path, so that
//! the official test vectors can be checked against the exact code ingest runs.

use std::fmt;
use std::io::{self, Read};
use std::str::FromStr;

/// The size of the buffer used for streaming reads throughout sluice (intake, cat, verify).
pub const STREAM_BUF: usize = 1 << 20;

/// A BLAKE3 hash (32 bytes), shown as 64 lowercase hex digits.
#[derive(Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct Hash([u8; 32]);

impl Hash {
    pub fn from_bytes(b: [u8; 32]) -> Self {
        Hash(b)
    }

    pub fn as_bytes(&self) -> &[u8; 32] {
        &self.0
    }

    pub fn of(data: &[u8]) -> Self {
        Hash(*blake3::hash(data).as_bytes())
    }

    pub fn hex(&self) -> String {
        let mut s = String::with_capacity(64);
        for b in self.0 {
            s.push(char::from(HEX[(b >> 4) as usize]));
            s.push(char::from(HEX[(b & 15) as usize]));
        }
        s
    }

    /// The first `n` hex digits, for display.
    pub fn short(&self, n: usize) -> String {
        let mut h = self.hex();
        h.truncate(n);
        h
    }
}

const HEX: &[u8; 16] = b"0123456789abcdef";

impl fmt::Display for Hash {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.hex())
    }
}

impl fmt::Debug for Hash {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Hash({})", self.short(12))
    }
}

impl FromStr for Hash {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        let b = s.as_bytes();
        if b.len() != 64 {
            return Err(format!("expected 64 hex digits, found {}", b.len()));
        }
        let mut out = [0u8; 32];
        for (i, pair) in b.chunks(2).enumerate() {
            let hi =
                hex_val(pair[0]).ok_or_else(|| format!("not a hex digit: {}", pair[0] as char))?;
            let lo =
                hex_val(pair[1]).ok_or_else(|| format!("not a hex digit: {}", pair[1] as char))?;
            out[i] = hi << 4 | lo;
        }
        Ok(Hash(out))
    }
}

fn hex_val(c: u8) -> Option<u8> {
    match c {
        b'0'..=b'9' => Some(c - b'0'),
        b'a'..=b'f' => Some(c - b'a' + 10),
        b'A'..=b'F' => Some(c - b'A' + 10),
        _ => None,
    }
}

/// Calls `f` with everything `r` yields, in [`STREAM_BUF`]-sized pieces, and returns the byte
/// count. Read errors go through `read_err`, so callers can say which file failed.
pub fn for_each_piece<E>(
    mut r: impl Read,
    read_err: impl Fn(io::Error) -> E,
    mut f: impl FnMut(&[u8]) -> Result<(), E>,
) -> Result<u64, E> {
    let mut buf = vec![0u8; STREAM_BUF];
    let mut n_bytes = 0u64;
    loop {
        let n = match r.read(&mut buf) {
            Ok(0) => return Ok(n_bytes),
            Ok(n) => n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(read_err(e)),
        };
        f(&buf[..n])?;
        n_bytes += n as u64;
    }
}

/// Hashes everything `r` yields and returns the hash and the byte count. This is the same
/// incremental hasher the object writer feeds.
pub fn hash_reader(r: impl Read) -> io::Result<(Hash, u64)> {
    let mut hasher = blake3::Hasher::new();
    let n_bytes = for_each_piece(
        r,
        |e| e,
        |piece| {
            hasher.update(piece);
            Ok(())
        },
    )?;
    Ok((Hash(*hasher.finalize().as_bytes()), n_bytes))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hex_round_trip() {
        let h = Hash::of(b"abc");
        assert_eq!(h.hex().parse::<Hash>().unwrap(), h);
        assert!("xyz".parse::<Hash>().is_err());
    }
}

/// A hasher for keys that are already uniform 64-bit hashes (XXH3 of values, row
/// fingerprints): a table of them uses their bits as they are, with nothing hashed again.
#[derive(Debug, Default, Clone, Copy)]
pub struct AsIs(u64);

impl std::hash::Hasher for AsIs {
    fn finish(&self) -> u64 {
        self.0
    }

    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = self.0.rotate_left(8) ^ u64::from(b);
        }
    }

    fn write_u64(&mut self, n: u64) {
        self.0 = n;
    }
}

/// What a set or map keyed by such hashes is built with ([`AsIs`]).
pub type AsIsBuild = std::hash::BuildHasherDefault<AsIs>;

//! The streaming hash paths checked against the official BLAKE3 test vectors
//! (BLAKE3 team, `test_vectors/test_vectors.json`; input byte i is i mod 251), and the law that
//! ingest then cat gives back the same bytes, named by their BLAKE3 hash.

use std::io::Read;

use proptest::prelude::*;
use sluice::hash::{hash_reader, Hash};
use sluice::intake::{ingest, IngestOptions, IngestOutcome};
use sluice::model::Agent;
use sluice::store::Store;

/// (input length, expected hash) from the official vectors.
const VECTORS: &[(usize, &str)] = &[
    (
        0,
        "af1349b9f5f9a1a6a0404dea36dcc9499bcb25c9adc112b7cc9a93cae41f3262",
    ),
    (
        1023,
        "10108970eeda3eb932baac1428c7a2163b0e924c9a9e25b35bba72b28f70bd11",
    ),
    (
        1024,
        "42214739f095a406f3fc83deb889744ac00df831c10daa55189b5d121c855af7",
    ),
    (
        1025,
        "d00278ae47eb27b34faecf67b4fe263f82d5412916c1ffd97c8cb7fb814b8444",
    ),
];

fn vector_input(len: usize) -> Vec<u8> {
    (0..len).map(|i| (i % 251) as u8).collect()
}

/// A reader that hands out its data in pieces of a fixed size, to move buffer boundaries.
struct Pieces {
    data: Vec<u8>,
    at: usize,
    piece: usize,
}

impl Read for Pieces {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.piece.min(buf.len()).min(self.data.len() - self.at);
        buf[..n].copy_from_slice(&self.data[self.at..self.at + n]);
        self.at += n;
        Ok(n)
    }
}

#[test]
fn official_vectors_through_hash_reader_and_the_object_writer() {
    let dir = tempfile::tempdir().unwrap();
    let agent = Agent::new("t", None, "option");
    let store = Store::init_recorded(dir.path(), &agent).unwrap();
    for &(len, expected) in VECTORS {
        let data = vector_input(len);
        for piece in [1usize, 7, 512, 1023, 1024, 1025, 1 << 20] {
            let (h, n) = hash_reader(Pieces {
                data: data.clone(),
                at: 0,
                piece,
            })
            .unwrap();
            assert_eq!(
                (h.hex().as_str(), n as usize),
                (expected, len),
                "hash_reader, pieces of {piece}"
            );
            // The object writer is what intake's reading thread feeds, one piece per write.
            let mut w = store.objects.writer().unwrap();
            for chunk in data.chunks(piece) {
                w.write(chunk).unwrap();
            }
            let (h, n) = w.finish().unwrap();
            assert_eq!(
                (h.hex().as_str(), n as usize),
                (expected, len),
                "object writer, pieces of {piece}"
            );
            // Reading it back checks the hash again.
            assert_eq!(store.objects.read_all(&h).unwrap(), data);
        }
    }
}

#[test]
fn ingest_records_the_blake3_of_the_bytes_across_piece_boundaries() {
    // A file just over intake's 1 MiB piece size, so that records straddle the boundary.
    let mut text = String::from("n,label\n");
    let mut i = 0u64;
    while text.len() < (1 << 20) + 4096 {
        text.push_str(&format!("{i},\"row {i}, with a comma\"\n"));
        i += 1;
    }
    let dir = tempfile::tempdir().unwrap();
    let agent = Agent::new("t", None, "option");
    let mut store = Store::init_recorded(dir.path(), &agent).unwrap();
    let path = dir.path().join("big.csv");
    std::fs::write(&path, &text).unwrap();
    let out = ingest(&mut store, &path, &options("big", agent)).unwrap();
    let IngestOutcome::Recorded { version, .. } = out else {
        panic!("expected a new version")
    };
    assert_eq!(
        version.hash,
        blake3::hash(text.as_bytes()).to_hex().to_string()
    );
    assert_eq!(version.n_rows, i);
}

fn options(name: &str, agent: Agent) -> IngestOptions {
    IngestOptions {
        dataset: name.into(),
        key: None,
        reason: None,
        delimiter: None,
        has_header: true,
        encoding: None,
        null_tokens: vec![],
        agent,
    }
}

fn csvish() -> impl Strategy<Value = Vec<u8>> {
    // Bytes drawn mostly from what delimited text is made of, including quotes, both line
    // breaks, delimiters and multi-byte UTF-8, so that many inputs are accepted and some not.
    let atom = prop_oneof![
        8 => prop::sample::select(vec![b'a', b'b', b'1', b'2', b' ']).prop_map(|b| vec![b]),
        3 => Just(vec![b',']),
        2 => Just(vec![b'\n']),
        1 => Just(vec![b'\r', b'\n']),
        1 => Just(vec![b'\r']),
        2 => Just(vec![b'"']),
        1 => Just(vec![b';']),
        1 => Just("é".as_bytes().to_vec()),
        1 => Just(vec![0xff]),
    ];
    prop::collection::vec(atom, 1..200).prop_map(|v| v.concat())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 96, ..ProptestConfig::default() })]

    // Law: whatever ingest accepts, cat returns byte for byte, under the name BLAKE3 gives it;
    // whatever it refuses leaves no version behind.
    #[test]
    fn ingest_then_cat_gives_the_same_bytes(data in csvish()) {
        let dir = tempfile::tempdir().unwrap();
        let agent = Agent::new("t", None, "option");
        let mut store = Store::init_recorded(dir.path(), &agent).unwrap();
        let path = dir.path().join("in.csv");
        std::fs::write(&path, &data).unwrap();
        match ingest(&mut store, &path, &options("prop", agent)) {
            Ok(IngestOutcome::Recorded { version, .. }) => {
                prop_assert_eq!(&version.hash, &blake3::hash(&data).to_hex().to_string());
                let h: Hash = version.hash.parse().unwrap();
                let mut out = Vec::new();
                store.objects.copy_to(&h, &mut out, std::path::Path::new("copy")).unwrap();
                prop_assert_eq!(out, data);
            }
            Ok(IngestOutcome::Unchanged { .. }) => prop_assert!(false, "a new dataset cannot be unchanged"),
            Err(_) => {
                prop_assert!(store.lineage.all_versions().unwrap().is_empty());
                let (objects, _) = store.objects.backend().list().unwrap();
                prop_assert!(objects.is_empty(), "a refused intake left objects behind");
            }
        }
    }
}

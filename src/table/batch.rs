//! A batch of parsed records, owned, so that one thread can parse and another consume. Field
//! bytes and field ends of many records sit in two flat buffers that are reused from batch to
//! batch, so moving records between threads costs one copy and no allocation per record.

use super::parse::RawRecord;

#[derive(Debug, Clone, Copy)]
struct Meta {
    byte: u64,
    line: u64,
    index: u64,
    fields_end: usize,
    ends_end: usize,
}

#[derive(Debug, Default)]
pub struct RecordBatch {
    fields: Vec<u8>,
    ends: Vec<usize>,
    meta: Vec<Meta>,
}

impl RecordBatch {
    pub fn new() -> Self {
        RecordBatch::default()
    }

    pub fn clear(&mut self) {
        self.fields.clear();
        self.ends.clear();
        self.meta.clear();
    }

    pub fn len(&self) -> usize {
        self.meta.len()
    }

    pub fn is_empty(&self) -> bool {
        self.meta.is_empty()
    }

    /// Bytes of field data held.
    pub fn n_bytes(&self) -> usize {
        self.fields.len()
    }

    pub fn push(&mut self, r: &RawRecord<'_>) {
        self.fields.extend_from_slice(r.fields);
        self.ends.extend_from_slice(r.ends);
        self.meta.push(Meta {
            byte: r.byte,
            line: r.line,
            index: r.index,
            fields_end: self.fields.len(),
            ends_end: self.ends.len(),
        });
    }

    /// Calls `f` with each record in order, as it was parsed.
    pub fn for_each<E>(&self, mut f: impl FnMut(RawRecord<'_>) -> Result<(), E>) -> Result<(), E> {
        let (mut fs, mut es) = (0usize, 0usize);
        for m in &self.meta {
            f(RawRecord {
                fields: &self.fields[fs..m.fields_end],
                ends: &self.ends[es..m.ends_end],
                byte: m.byte,
                line: m.line,
                index: m.index,
            })?;
            fs = m.fields_end;
            es = m.ends_end;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::table::parse::Parser;

    #[test]
    fn records_come_back_as_parsed() {
        let data = b"a,b\n\"x,1\",y\nlast,z";
        let mut direct = Vec::new();
        let mut batch = RecordBatch::new();
        let mut p = Parser::new(b',', 0);
        let mut cb = |r: RawRecord<'_>| -> Result<(), ()> {
            direct.push((
                r.iter().map(|f| f.to_vec()).collect::<Vec<_>>(),
                r.byte,
                r.line,
                r.index,
            ));
            batch.push(&r);
            Ok(())
        };
        p.feed(data, &mut cb).unwrap();
        p.finish(&mut cb).unwrap().unwrap();
        let mut replayed = Vec::new();
        batch
            .for_each(|r| -> Result<(), ()> {
                replayed.push((
                    r.iter().map(|f| f.to_vec()).collect::<Vec<_>>(),
                    r.byte,
                    r.line,
                    r.index,
                ));
                Ok(())
            })
            .unwrap();
        assert_eq!(direct, replayed);
        assert_eq!(batch.len(), 3);
    }
}

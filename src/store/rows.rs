//! Opening a stored version's rows for the one reader in the read layer
//! ([`crate::table::stored`]): the store finds the bytes, the reader checks and parses them.

use crate::error::{Error, ErrorKind, Result};
use crate::hash::Hash;
use crate::model::Version;
use crate::store::objects::Objects;
use crate::table::stored::{self, Source};
use crate::table::RawRecord;

impl Objects {
    /// Calls `f` with every data row of `v` (0-based row and record) in order, re-hashing its
    /// object as it is read; a mismatch is an error after the last row.
    pub fn each_row(
        &self,
        v: &Version,
        f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
    ) -> Result<()> {
        self.each_row_doing(v, "reading", f)
    }

    /// [`Objects::each_row`] with what the progress bar says is being done ("comparing").
    pub fn each_row_doing(
        &self,
        v: &Version,
        doing: &str,
        f: impl FnMut(u64, RawRecord<'_>) -> Result<()>,
    ) -> Result<()> {
        let hash: Hash = v
            .hash
            .parse()
            .map_err(|e: String| Error::from(ErrorKind::Inconsistent(e)))?;
        let label = v.label();
        // An erased version's bytes are its erased form, checked against that form's name.
        let (bytes, form) = self.open_raw(&hash)?;
        let form = form.hex();
        let source = Source {
            doing,
            hash: &form,
            ..Source::version(v, &label)
        };
        stored::each_row(bytes, &source, f)
    }
}

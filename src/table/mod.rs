//! Reading tables: how delimited text is detected ([`dialect`]), decoded and parsed
//! ([`stream`], [`parse`]), profiled ([`profile`]) and indexed by row ([`rowindex`]). Nothing
//! here touches the store; intake and the operations build on these pieces.

pub mod batch;
pub mod dialect;
pub mod parse;
pub mod profile;
pub mod rowindex;
pub mod stored;
pub mod stream;
pub mod write;

pub use parse::RawRecord;
pub use stream::{for_each_record, ReadSettings, RecordStream};

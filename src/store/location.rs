//! Where a shared store's parts live: `sluice-store/location.json`, with the PostgreSQL
//! connection string of its lineage database (`lineage`, never a password), the bucket that
//! holds its objects (`objects`), the size bound of the local read cache (`cache_bytes`), and,
//! in a working copy borrowed in part, the objects left in the shared store it came from
//! (`left_in`). A store without the file keeps everything in its folder.

use std::fs;
use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};

/// The file's name inside the store folder.
pub const LOCATION_FILE: &str = "location.json";

#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct Location {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub lineage: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub objects: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cache_bytes: Option<u64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub left_in: Option<LeftIn>,
}

/// What a working copy borrowed in part (`sluice borrow --dataset NAME`) did not copy: the
/// bytes and row indexes of the versions outside the named datasets and everything they are
/// made from, which stay readable in the shared store only.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
pub struct LeftIn {
    /// The shared store's lineage, as `describe` names it.
    pub shared_store: String,
    /// The datasets asked for.
    pub datasets: Vec<String>,
    /// The objects not copied (BLAKE3 hex), sorted.
    pub objects: Vec<String>,
}

impl Location {
    /// Reads `store_dir/location.json`; the default (everything local) when there is none.
    pub fn read(store_dir: &Path) -> Result<Location> {
        let path = store_dir.join(LOCATION_FILE);
        match fs::read(&path) {
            Ok(bytes) => serde_json::from_slice(&bytes).map_err(|e| {
                ErrorKind::Usage(format!(
                    "{}: not a store location file ({e}); it holds a JSON object with the optional keys \"lineage\", \"objects\", \"cache_bytes\" and \"left_in\"",
                    path.display()
                ))
                .into()
            }),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(Location::default()),
            Err(e) => Err(Error::io(&path, e)),
        }
    }

    /// Writes `store_dir/location.json` (replacing it whole).
    pub fn write(&self, store_dir: &Path) -> Result<()> {
        let path = store_dir.join(LOCATION_FILE);
        let tmp = store_dir.join(format!("{LOCATION_FILE}.new"));
        let mut text = serde_json::to_string_pretty(self)
            .map_err(|e| Error::from(ErrorKind::Internal(e.to_string())))?;
        text.push('\n');
        fs::write(&tmp, text).map_err(|e| Error::io(&tmp, e))?;
        fs::rename(&tmp, &path).map_err(|e| Error::io(&path, e))
    }
}

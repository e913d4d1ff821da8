//! Where a shared store's parts live: `sluice-store/location.json`, with the PostgreSQL
//! connection string of its lineage database (`lineage`, never a password), the bucket that
//! holds its objects (`objects`) and the size bound of the local read cache (`cache_bytes`).
//! A store without the file keeps both in its folder.

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
}

impl Location {
    /// Reads `store_dir/location.json`; the default (everything local) when there is none.
    pub fn read(store_dir: &Path) -> Result<Location> {
        let path = store_dir.join(LOCATION_FILE);
        match fs::read(&path) {
            Ok(bytes) => serde_json::from_slice(&bytes).map_err(|e| {
                ErrorKind::Usage(format!(
                    "{}: not a store location file ({e}); it holds a JSON object with the optional keys \"lineage\", \"objects\" and \"cache_bytes\"",
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

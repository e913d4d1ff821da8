//! Where a store keeps what is not in its own folder: `sluice-store/location.json`, with the
//! lineage database's server (a PostgreSQL connection string, never a password), the bucket
//! that holds the objects and the size of the local read cache. No file means everything local.

use std::fs;
use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};

/// The file's name inside the store folder.
pub const LOCATION_FILE: &str = "location.json";

/// The store's places; `None` means the local default.
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
    /// Reads `store_dir/location.json`; the default (all local) when there is none.
    pub fn read(store_dir: &Path) -> Result<Location> {
        let p = store_dir.join(LOCATION_FILE);
        let text = match fs::read_to_string(&p) {
            Ok(t) => t,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Location::default()),
            Err(e) => return Err(Error::io(&p, e)),
        };
        serde_json::from_str(&text).map_err(|e| {
            ErrorKind::Usage(format!(
                "{} is not a store location file ({e}); it holds a JSON object with the optional keys \"lineage\", \"objects\" and \"cache_bytes\"",
                p.display()
            ))
            .into()
        })
    }

    /// Writes `store_dir/location.json` (a temporary file renamed into place).
    pub fn write(&self, store_dir: &Path) -> Result<()> {
        let p = store_dir.join(LOCATION_FILE);
        let tmp = store_dir.join(format!("{LOCATION_FILE}.part"));
        let mut text = serde_json::to_string_pretty(self).map_err(|e| {
            Error::from(ErrorKind::Internal(format!(
                "cannot encode the location: {e}"
            )))
        })?;
        text.push('\n');
        fs::write(&tmp, text).map_err(|e| Error::io(&tmp, e))?;
        fs::rename(&tmp, &p).map_err(|e| Error::io(&p, e))
    }
}

//! The store directory on disk.
//!
//! ```text
//! store/
//!   routes.toml                       which version answers which request
//!   features.toml                     where each model's features come from (optional)
//!   tables/sites.csv                  tables it names (anywhere; paths are relative to the store)
//!   charge-minutes/                   one directory per model, named as its contract
//!     1.0.0.wasm                      one artifact per version, named by its semver
//!     1.0.0.wasm.vouch                a voucher's word for it (optional)
//!     1.1.0.wasm
//!   overstay-risk/
//!     2.0.0.wasm
//!   .paddock/                         state the host writes: code cache, usage ledger
//! ```
//!
//! Entries whose names start with `.` are never read as models. Other files
//! are ignored, except `*.wasm` files, which must sit one level down and be
//! named by a semver version.

use std::path::{Path, PathBuf};

use semver::Version;

/// The routes file's name inside a store.
pub const ROUTES_FILE: &str = "routes.toml";

/// The features file's name inside a store: where each model's features
/// come from ([`crate::features::Plan`]).
pub const FEATURES_FILE: &str = "features.toml";

/// The directory inside a store where the host keeps its state.
pub const STATE_DIR: &str = ".paddock";

/// One `.wasm` file found in the store.
#[derive(Clone, Debug)]
pub(crate) struct Found {
    /// Its path.
    pub path: PathBuf,
    /// Its path relative to the store, for reports.
    pub rel: PathBuf,
    /// The model and version its place names, or why it names none.
    pub identity: Result<(String, Version), PlaceError>,
}

/// Why a file's place in the store names no model and version.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[non_exhaustive]
pub enum PlaceError {
    /// The model's directory cannot be listed.
    #[error("cannot read the model directory: {0}")]
    UnreadableDirectory(String),
    /// The file's name is not a semver version and `.wasm`.
    #[error("the file name `{file}` is not `<semver>.wasm` ({reason})")]
    NotSemver {
        /// The file name.
        file: String,
        /// What semver said.
        reason: String,
    },
    /// A `.wasm` file at the top of the store.
    #[error("artifacts go in a directory named after their model: `<model>/<version>.wasm`")]
    NotInModelDirectory,
}

/// Lists every artifact file in the store, sorted by path.
///
/// # Errors
/// The I/O error of the store directory itself; unreadable model
/// directories become [`Found`] entries with the reason.
pub(crate) fn scan(store: &Path) -> std::io::Result<Vec<Found>> {
    let mut found = Vec::new();
    for entry in std::fs::read_dir(store)? {
        let Ok(entry) = entry else { continue };
        let name = entry.file_name().to_string_lossy().into_owned();
        let path = entry.path();
        if name.starts_with('.') {
            continue;
        }
        if path.is_dir() {
            let model = name;
            let files = match std::fs::read_dir(&path) {
                Ok(files) => files,
                Err(e) => {
                    found.push(Found {
                        rel: PathBuf::from(&model),
                        path,
                        identity: Err(PlaceError::UnreadableDirectory(e.to_string())),
                    });
                    continue;
                }
            };
            for file in files.flatten() {
                let file_name = file.file_name().to_string_lossy().into_owned();
                let Some(stem) = file_name.strip_suffix(".wasm") else { continue };
                if file_name.starts_with('.') {
                    continue;
                }
                let identity = Version::parse(stem)
                    .map(|v| (model.clone(), v))
                    .map_err(|e| PlaceError::NotSemver { file: file_name.clone(), reason: e.to_string() });
                found.push(Found { path: file.path(), rel: Path::new(&model).join(&file_name), identity });
            }
        } else if name.ends_with(".wasm") {
            found.push(Found { path, rel: PathBuf::from(&name), identity: Err(PlaceError::NotInModelDirectory) });
        }
    }
    found.sort_by(|a, b| a.rel.cmp(&b.rel));
    Ok(found)
}

/// The path of a version's artifact inside a store.
pub fn artifact_path(store: &Path, model: &str, version: &Version) -> PathBuf {
    store.join(model).join(format!("{version}.wasm"))
}

//! Run folders: a manifest that pins what a run's records depend on (tool version,
//! model file and hash, rubric and template hashes, options, seed, shard), the
//! results files, and the lock a writer holds. Input: a folder. Output: the manifest,
//! the finished records, a lock and an appender. Readers never write: reading a run
//! folder opens nothing for writing, so a read-only folder can be read and reported.
//! Never rewrites or reorders a finished record.

pub mod latest;
pub mod cost;
mod lock;
mod results;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

pub use lock::RunLock;
pub use results::{
    parse_lines, read_lines, read_records, warn_torn, Appender, Line, Loaded, TornTail,
    INPUT_FIELD, KEY_FIELD,
};

/// Name of the manifest file inside a run folder.
pub const MANIFEST: &str = "manifest.json";

/// What a run's records depend on; two runs with equal manifests produce equal
/// records for equal inputs. The answers themselves are not pinned: each record
/// carries the hash of the inputs it was computed from, so adding answers to a file
/// resumes the same run and computes only the new ones.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    /// What kind of run: `grade` or `compare`.
    pub kind: String,
    /// assize version that started the run.
    pub tool_version: String,
    /// Judge model file as given.
    pub model_path: String,
    /// SHA-256 of the judge model file.
    pub model_sha256: String,
    /// SHA-256 of the rubric file (empty for runs without one).
    pub rubric_sha256: String,
    /// SHA-256 of the form templates.
    pub templates_sha256: String,
    /// Options that change results, as `key=value` strings in a fixed order.
    pub options: Vec<String>,
    /// Seed of every random draw.
    pub seed: u64,
    /// The rubric's TOML text, so read-only commands can take the rubric from the run.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub rubric_toml: Option<String>,
    /// Input files by role (`answers`, `rubric`, `anchors`) as given on the command
    /// line; informative only (shards on different machines see different paths).
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub inputs: BTreeMap<String, String>,
    /// The share of the work this folder holds, `K/N`; absent for a whole run.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shard: Option<String>,
}

impl Manifest {
    /// What differs between two manifests, ignoring the informative `inputs`; empty
    /// when a folder made with `self` can be resumed with `other`.
    pub fn differences(&self, other: &Manifest) -> Vec<String> {
        let show = |s: &Option<String>| s.clone().unwrap_or_else(|| "whole run".into());
        let checks = [
            ("kind", self.kind.clone(), other.kind.clone()),
            (
                "assize",
                self.tool_version.clone(),
                other.tool_version.clone(),
            ),
            ("seed", self.seed.to_string(), other.seed.to_string()),
            ("shard", show(&self.shard), show(&other.shard)),
        ];
        let mut d: Vec<String> = checks
            .into_iter()
            .filter(|(_, a, b)| a != b)
            .map(|(what, a, b)| format!("{what} `{a}` vs `{b}`"))
            .collect();
        if self.model_sha256 != other.model_sha256 {
            d.push(format!(
                "model `{}` vs `{}` (different files)",
                self.model_path, other.model_path
            ));
        }
        if self.rubric_sha256 != other.rubric_sha256 {
            d.push("rubric changed".into());
        }
        if self.templates_sha256 != other.templates_sha256 {
            d.push("form templates changed".into());
        }
        if self.options != other.options {
            d.push(format!("options {:?} vs {:?}", self.options, other.options));
        }
        d
    }

    /// The manifest without the parts that do not decide records (`inputs`), as
    /// JSON: what a default run-folder name is derived from.
    pub fn identity_json(&self) -> String {
        let mut m = self.clone();
        m.inputs.clear();
        serde_json::to_string(&m).expect("manifest serialises")
    }
}

/// Why a run folder could not be used.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// Reading or writing failed.
    #[error("cannot use run file `{path}`")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    /// The folder holds a run made with different inputs or options.
    #[error("run folder `{dir}` holds a different run ({difference})")]
    Mismatch { dir: PathBuf, difference: String },
    /// Finished lines cannot be parsed (not a torn last line).
    #[error("`{path}` has damaged records:\n{lines}")]
    Damaged { path: PathBuf, lines: String },
    /// Another process writes to the folder.
    #[error("run folder `{dir}` is being written by {holder}")]
    Locked { dir: PathBuf, holder: String },
    /// The folder cannot be written.
    #[error("run folder `{dir}` cannot be written (read-only)")]
    ReadOnly { dir: PathBuf },
    /// Finished records were computed from inputs that have changed since.
    #[error(
        "inputs of finished records in `{dir}` have changed since they were computed:\n{units}"
    )]
    Changed { dir: PathBuf, units: String },
    /// The disk is full.
    #[error("no space left on the disk holding `{path}`")]
    DiskFull { path: PathBuf },
}

/// The fix line for a store error, when one is known.
pub fn fix_for(err: &(dyn std::error::Error + 'static)) -> Option<String> {
    if let Some(e) = err.downcast_ref::<latest::LatestError>() {
        return latest::fix_for(e);
    }
    Some(match err.downcast_ref::<StoreError>()? {
        StoreError::Io { .. } => return None,
        StoreError::Mismatch { .. } => {
            "pass another `--run-dir`, or leave it out to get a folder named after the inputs"
                .into()
        }
        StoreError::Damaged { .. } => {
            "the file was edited or corrupted: restore it, or move it away to compute those records again".into()
        }
        StoreError::Locked { .. } => {
            "wait for that process to finish (or stop it), then run the same command again; give each parallel process its own `--shard`".into()
        }
        StoreError::ReadOnly { .. } => {
            "make the folder writable, or copy it somewhere writable and pass that as `--run-dir`".into()
        }
        StoreError::Changed { .. } => {
            "restore those inputs, or pass a new `--run-dir` to compute everything with the changed ones".into()
        }
        StoreError::DiskFull { .. } => {
            "free space on that disk, then run the same command again: finished records are kept".into()
        }
    })
}

/// Wrap an I/O error on `path`, naming a full disk or a read-only folder as such.
pub(crate) fn io(path: &Path) -> impl FnOnce(std::io::Error) -> StoreError + '_ {
    move |source| match source.raw_os_error() {
        Some(libc::ENOSPC) => StoreError::DiskFull {
            path: path.to_path_buf(),
        },
        Some(libc::EROFS | libc::EACCES) => StoreError::ReadOnly {
            dir: path.parent().unwrap_or(path).to_path_buf(),
        },
        _ => StoreError::Io {
            path: path.to_path_buf(),
            source,
        },
    }
}

/// Wrap an I/O error met while reading `path`.
pub(crate) fn rio(path: &Path) -> impl FnOnce(std::io::Error) -> StoreError + '_ {
    move |source| StoreError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// Read a run folder's manifest; `None` when the folder has none yet. Never writes.
pub fn read_manifest(dir: &Path) -> Result<Option<Manifest>, StoreError> {
    let path = dir.join(MANIFEST);
    let text = match std::fs::read_to_string(&path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(rio(&path)(e)),
    };
    serde_json::from_str(&text)
        .map(Some)
        .map_err(|e| StoreError::Damaged {
            path: path.clone(),
            lines: format!("line {}: {e}", e.line()),
        })
}

/// Check that `dir` holds no run or one made with `manifest`. Never writes.
pub fn check_manifest(dir: &Path, manifest: &Manifest) -> Result<bool, StoreError> {
    match read_manifest(dir)? {
        None => Ok(false),
        Some(old) => {
            let d = old.differences(manifest);
            if d.is_empty() {
                Ok(true)
            } else {
                Err(StoreError::Mismatch {
                    dir: dir.to_path_buf(),
                    difference: d.join("; "),
                })
            }
        }
    }
}

/// Write a file through a temporary sibling, a sync and a rename.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), StoreError> {
    write_atomic_via(&path.with_extension("tmp"), path, bytes)
}

/// [`write_atomic`] through a given temporary file (in the same folder as `path`).
pub fn write_atomic_via(tmp: &Path, path: &Path, bytes: &[u8]) -> Result<(), StoreError> {
    use std::io::Write as _;
    let mut f = std::fs::File::create(tmp).map_err(io(tmp))?;
    f.write_all(bytes).map_err(io(tmp))?;
    f.sync_all().map_err(io(tmp))?;
    std::fs::rename(tmp, path).map_err(io(path))
}

#[cfg(test)]
mod tests;

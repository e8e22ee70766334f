//! Run folders: a manifest that pins what a run depends on (tool version, model
//! file and hash, rubric and template hashes, options, seed) and an append-only
//! JSONL results file flushed after every record. Input: a folder and a manifest.
//! Output: the records already finished, and a writer for new ones. Never rewrites
//! or reorders a finished record; a torn last line (a killed process) is dropped and
//! redone.

use std::collections::HashSet;
use std::fs::{File, OpenOptions};
use std::io::{BufRead, BufReader, Write};
use std::path::{Path, PathBuf};

use serde::{de::DeserializeOwned, Deserialize, Serialize};

/// Name of the manifest file inside a run folder.
pub const MANIFEST: &str = "manifest.json";

/// What a run depends on; two runs with equal manifests produce equal results.
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
    /// SHA-256 of the answers file.
    pub answers_sha256: String,
    /// SHA-256 of the rubric file (empty for runs without one).
    pub rubric_sha256: String,
    /// SHA-256 of the form templates.
    pub templates_sha256: String,
    /// Options that change results, as `key=value` strings in a fixed order.
    pub options: Vec<String>,
    /// Seed of every random draw.
    pub seed: u64,
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
    /// A finished line cannot be parsed (not the torn last line).
    #[error("`{path}` line {line} is damaged: {reason}")]
    Damaged {
        path: PathBuf,
        line: usize,
        reason: String,
    },
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> StoreError + '_ {
    move |source| StoreError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// An opened run folder.
pub struct RunDir {
    /// The folder.
    pub dir: PathBuf,
    /// Its manifest.
    pub manifest: Manifest,
}

impl RunDir {
    /// Open `dir` for `manifest`: create it, or resume it when its manifest is equal;
    /// a folder holding a different run is an error naming what differs.
    pub fn open(dir: &Path, manifest: Manifest) -> Result<Self, StoreError> {
        std::fs::create_dir_all(dir).map_err(io(dir))?;
        let mpath = dir.join(MANIFEST);
        if mpath.exists() {
            let text = std::fs::read_to_string(&mpath).map_err(io(&mpath))?;
            let old: Manifest = serde_json::from_str(&text).map_err(|e| StoreError::Damaged {
                path: mpath.clone(),
                line: e.line(),
                reason: e.to_string(),
            })?;
            if old != manifest {
                return Err(StoreError::Mismatch {
                    dir: dir.to_path_buf(),
                    difference: describe_difference(&old, &manifest),
                });
            }
        } else {
            let text = serde_json::to_string_pretty(&manifest).expect("manifest serialises");
            write_atomic(&mpath, text.as_bytes())?;
        }
        Ok(RunDir {
            dir: dir.to_path_buf(),
            manifest,
        })
    }

    /// Path of a results file inside the run.
    pub fn file(&self, name: &str) -> PathBuf {
        self.dir.join(name)
    }
}

fn describe_difference(old: &Manifest, new: &Manifest) -> String {
    let mut d = Vec::new();
    if old.kind != new.kind {
        d.push(format!("kind `{}` vs `{}`", old.kind, new.kind));
    }
    if old.model_sha256 != new.model_sha256 {
        d.push(format!(
            "model `{}` vs `{}`",
            old.model_path, new.model_path
        ));
    }
    if old.answers_sha256 != new.answers_sha256 {
        d.push("answers file changed".into());
    }
    if old.rubric_sha256 != new.rubric_sha256 {
        d.push("rubric changed".into());
    }
    if old.templates_sha256 != new.templates_sha256 {
        d.push("form templates changed".into());
    }
    if old.options != new.options {
        d.push(format!("options {:?} vs {:?}", old.options, new.options));
    }
    if old.seed != new.seed {
        d.push(format!("seed {} vs {}", old.seed, new.seed));
    }
    if old.tool_version != new.tool_version {
        d.push(format!(
            "assize {} vs {}",
            old.tool_version, new.tool_version
        ));
    }
    d.join("; ")
}

/// Write a file through a temporary sibling and a rename.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), StoreError> {
    let tmp = path.with_extension("tmp");
    std::fs::write(&tmp, bytes).map_err(io(&tmp))?;
    std::fs::rename(&tmp, path).map_err(io(path))
}

/// Read the finished records of a JSONL results file. A torn last line (no final
/// newline, unparsable) is cut off so it is redone; damage elsewhere is an error.
pub fn read_records<T: DeserializeOwned>(path: &Path) -> Result<Vec<T>, StoreError> {
    if !path.exists() {
        return Ok(Vec::new());
    }
    let text = std::fs::read_to_string(path).map_err(io(path))?;
    let complete_len = text.rfind('\n').map_or(0, |i| i + 1);
    if complete_len < text.len() {
        // The process died mid-write: drop the partial line.
        let f = OpenOptions::new()
            .write(true)
            .open(path)
            .map_err(io(path))?;
        f.set_len(complete_len as u64).map_err(io(path))?;
    }
    let mut out = Vec::new();
    for (i, line) in BufReader::new(&text.as_bytes()[..complete_len])
        .lines()
        .enumerate()
    {
        let line = line.map_err(io(path))?;
        if line.trim().is_empty() {
            continue;
        }
        out.push(
            serde_json::from_str(&line).map_err(|e| StoreError::Damaged {
                path: path.to_path_buf(),
                line: i + 1,
                reason: e.to_string(),
            })?,
        );
    }
    Ok(out)
}

/// Appends records to a JSONL file, one line each, flushed and synced per record.
pub struct Appender {
    path: PathBuf,
    file: File,
}

impl Appender {
    /// Open for appending (creating the file).
    pub fn open(path: &Path) -> Result<Self, StoreError> {
        let file = OpenOptions::new()
            .create(true)
            .append(true)
            .open(path)
            .map_err(io(path))?;
        Ok(Appender {
            path: path.to_path_buf(),
            file,
        })
    }

    /// Append one record as a single line and flush it to disk.
    pub fn append<T: Serialize>(&mut self, record: &T) -> Result<(), StoreError> {
        let mut line = serde_json::to_string(record).expect("records serialise");
        line.push('\n');
        self.file
            .write_all(line.as_bytes())
            .map_err(io(&self.path))?;
        self.file.sync_data().map_err(io(&self.path))
    }
}

/// Keys of finished records, for skipping them on resume.
pub fn done_keys<T>(records: &[T], key: impl Fn(&T) -> String) -> HashSet<String> {
    records.iter().map(key).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn manifest(seed: u64) -> Manifest {
        Manifest {
            kind: "grade".into(),
            tool_version: "0".into(),
            model_path: "m.gguf".into(),
            model_sha256: "aa".into(),
            answers_sha256: "bb".into(),
            rubric_sha256: "cc".into(),
            templates_sha256: "dd".into(),
            options: vec!["reasoning=none".into()],
            seed,
        }
    }

    #[test]
    fn torn_last_line_is_dropped_and_earlier_records_kept() {
        let dir = tempfile::tempdir().expect("tmp");
        let p = dir.path().join("r.jsonl");
        std::fs::write(&p, "{\"a\":1}\n{\"a\":2}\n{\"a\":").expect("write");
        let recs: Vec<serde_json::Value> = read_records(&p).expect("read");
        assert_eq!(recs.len(), 2);
        let mut app = Appender::open(&p).expect("open");
        app.append(&serde_json::json!({"a": 3})).expect("append");
        let recs: Vec<serde_json::Value> = read_records(&p).expect("read");
        assert_eq!(recs.len(), 3);
        assert_eq!(recs[2]["a"], 3);
    }

    #[test]
    fn different_manifest_is_refused_naming_the_difference() {
        let dir = tempfile::tempdir().expect("tmp");
        RunDir::open(dir.path(), manifest(1)).expect("create");
        RunDir::open(dir.path(), manifest(1)).expect("resume");
        let err = RunDir::open(dir.path(), manifest(2))
            .err()
            .expect("mismatch");
        assert!(err.to_string().contains("seed 1 vs 2"), "{err}");
    }
}

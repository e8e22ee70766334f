//! Merge: join the shard folders of one run into a single run folder. Input: shard
//! folders written with `--shard K/N`. Output: a new folder whose manifest is the
//! shards' (without the shard) and whose results files hold every shard's lines
//! byte for byte, ordered by record key. Refuses, by name, shards whose manifests
//! differ, a missing or repeated shard index, and a record present in two shards.
//! Never changes the shard folders.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::store::{self, Appender, Manifest, RunLock, StoreError};

/// Why shards cannot be merged.
#[derive(Debug, thiserror::Error)]
pub enum MergeError {
    /// A shard folder cannot be read.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// A folder has no manifest or was not written as a shard.
    #[error("`{dir}` is not a shard folder ({why})")]
    NotShard { dir: PathBuf, why: String },
    /// Two shards were made with different manifests.
    #[error("shard `{dir}` was made differently from `{first}`: {difference}")]
    Differs {
        dir: PathBuf,
        first: PathBuf,
        difference: String,
    },
    /// Shard indices missing or repeated.
    #[error("the shards do not cover the run exactly once:\n{problems}")]
    Coverage { problems: String },
    /// A record is in two shards.
    #[error("records appear in more than one shard:\n{records}")]
    Overlap { records: String },
    /// A line has no record key (written by an older assize).
    #[error("`{path}` line {line} has no record key; it cannot be merged")]
    NoKey { path: PathBuf, line: usize },
    /// A file that every shard writes alike differs between shards.
    #[error("`{name}` differs between `{first}` and `{dir}`")]
    FileDiffers {
        name: String,
        first: PathBuf,
        dir: PathBuf,
    },
    /// The target folder already holds a run.
    #[error("`{dir}` already holds a run")]
    TargetUsed { dir: PathBuf },
}

/// What a merge wrote.
#[derive(Debug, Serialize)]
pub struct MergeReport {
    /// The merged run folder.
    pub run_dir: String,
    /// Shards joined.
    pub shards: usize,
    /// Lines per results file.
    pub records: BTreeMap<String, usize>,
}

/// Join `parts` into the new run folder `into`.
pub fn merge(
    into: &Path,
    parts: &[PathBuf],
    kinds: &[(&str, &str)],
) -> Result<MergeReport, MergeError> {
    let manifest = check_manifests(parts)?;
    if store::read_manifest(into)?.is_some() {
        return Err(MergeError::TargetUsed {
            dir: into.to_path_buf(),
        });
    }
    let (results, others) = files_by_kind(parts)?;
    let mut merged = BTreeMap::new();
    for name in &results {
        merged.insert(name.clone(), join_results(parts, name)?);
    }
    let lock = RunLock::acquire(into)?;
    for name in &others {
        let bytes = match name.as_str() {
            store::cost::COST_FILE => joined_costs(parts)?,
            _ => same_everywhere(parts, name)?,
        };
        if let Some(bytes) = bytes {
            store::write_atomic(&into.join(name), &bytes)?;
        }
    }
    let mut counts = BTreeMap::new();
    for (name, lines) in merged {
        let mut app = Appender::open(&lock, &name)?;
        for text in lines.values() {
            app.append_raw(text)?;
        }
        counts.insert(name, lines.len());
    }
    let text = serde_json::to_string_pretty(&manifest).expect("manifest serialises");
    store::write_atomic(&into.join(store::MANIFEST), text.as_bytes())?;
    for (file, kind) in kinds {
        if counts.contains_key(*file) {
            super::record_latest(&lock, kind);
        }
    }
    Ok(MergeReport {
        run_dir: into.display().to_string(),
        shards: parts.len(),
        records: counts,
    })
}

/// The shards' common manifest (shard removed), after checking they agree and
/// cover `0..N` once each.
fn check_manifests(parts: &[PathBuf]) -> Result<Manifest, MergeError> {
    let mut first: Option<(PathBuf, Manifest)> = None;
    let mut seen: BTreeMap<usize, Vec<PathBuf>> = BTreeMap::new();
    let mut count = 0;
    for dir in parts {
        let m = store::read_manifest(dir)?.ok_or_else(|| MergeError::NotShard {
            dir: dir.clone(),
            why: "no manifest".into(),
        })?;
        let shard = m
            .shard
            .as_deref()
            .and_then(|s| super::Shard::parse_with(s, |_| None).ok())
            .ok_or_else(|| MergeError::NotShard {
                dir: dir.clone(),
                why: "its manifest names no shard; it was run without `--shard`".into(),
            })?;
        let mut whole = m.clone();
        whole.shard = None;
        match &first {
            None => {
                count = shard.count;
                first = Some((dir.clone(), whole));
            }
            Some((fdir, fm)) => {
                let mut d = fm.differences(&whole);
                if shard.count != count {
                    d.push(format!("split into {} vs {count} shards", shard.count));
                }
                if !d.is_empty() {
                    return Err(MergeError::Differs {
                        dir: dir.clone(),
                        first: fdir.clone(),
                        difference: d.join("; "),
                    });
                }
            }
        }
        seen.entry(shard.index).or_default().push(dir.clone());
    }
    let mut problems = Vec::new();
    for i in 0..count {
        match seen.get(&i).map(Vec::as_slice) {
            None | Some([]) => problems.push(format!("shard {i}/{count} is missing")),
            Some([_]) => {}
            Some(dirs) => problems.push(format!(
                "shard {i}/{count} is given {} times: {}",
                dirs.len(),
                dirs.iter()
                    .map(|d| format!("`{}`", d.display()))
                    .collect::<Vec<_>>()
                    .join(", ")
            )),
        }
    }
    if !problems.is_empty() {
        return Err(MergeError::Coverage {
            problems: crate::data::list(&problems),
        });
    }
    Ok(first.expect("at least one shard").1)
}

/// Results files (`*.jsonl`) and other files (except manifest and lock) found in
/// any shard.
fn files_by_kind(parts: &[PathBuf]) -> Result<(BTreeSet<String>, BTreeSet<String>), MergeError> {
    let mut results = BTreeSet::new();
    let mut others = BTreeSet::new();
    for dir in parts {
        let entries = std::fs::read_dir(dir).map_err(store::rio(dir))?;
        for e in entries {
            let e = e.map_err(store::rio(dir))?;
            let name = e.file_name().to_string_lossy().into_owned();
            if !e.path().is_file()
                || name == store::MANIFEST
                || name == "lock"
                || name.ends_with(".tmp")
            {
                continue;
            }
            if name.ends_with(".jsonl") {
                results.insert(name);
            } else {
                others.insert(name);
            }
        }
    }
    Ok((results, others))
}

/// Every shard's lines of one results file by key; a key in two shards is refused.
fn join_results(parts: &[PathBuf], name: &str) -> Result<BTreeMap<String, String>, MergeError> {
    let mut lines: BTreeMap<String, String> = BTreeMap::new();
    let mut owner: BTreeMap<String, &Path> = BTreeMap::new();
    let mut overlaps = Vec::new();
    for dir in parts {
        let path = dir.join(name);
        let loaded = store::read_lines(&path)?;
        store::warn_torn(&path, loaded.torn.as_ref());
        for l in loaded.lines {
            let key = l.key().ok_or_else(|| MergeError::NoKey {
                path: path.clone(),
                line: l.number,
            })?;
            if let Some(other) = owner.get(key) {
                overlaps.push(format!(
                    "`{key}` in `{}` and `{}`",
                    other.display(),
                    dir.display()
                ));
                continue;
            }
            owner.insert(key.to_string(), dir);
            lines.insert(key.to_string(), l.text);
        }
    }
    if overlaps.is_empty() {
        Ok(lines)
    } else {
        Err(MergeError::Overlap {
            records: crate::data::list(&overlaps),
        })
    }
}

/// Every shard's grading cost entries in one log, shard by shard, so the merged run
/// records what all its shards cost.
fn joined_costs(parts: &[PathBuf]) -> Result<Option<Vec<u8>>, MergeError> {
    let mut log = store::cost::CostLog::default();
    for dir in parts {
        if let Some(l) = store::cost::read_cost(dir)? {
            log.sessions.extend(l.sessions);
        }
    }
    Ok(Some(
        serde_json::to_string_pretty(&log)
            .expect("cost log serialises")
            .into_bytes(),
    ))
}

/// The bytes of a file every shard that has it holds alike (a cache such as
/// judge-written steps); an error when two shards differ.
fn same_everywhere(parts: &[PathBuf], name: &str) -> Result<Option<Vec<u8>>, MergeError> {
    let mut found: Option<(PathBuf, Vec<u8>)> = None;
    for dir in parts {
        let path = dir.join(name);
        let Ok(bytes) = std::fs::read(&path) else {
            continue;
        };
        match &found {
            None => found = Some((dir.clone(), bytes)),
            Some((first, b)) if *b != bytes => {
                return Err(MergeError::FileDiffers {
                    name: name.to_string(),
                    first: first.clone(),
                    dir: dir.clone(),
                })
            }
            Some(_) => {}
        }
    }
    Ok(found.map(|(_, b)| b))
}

/// The fix line for a merge error, when one is known.
pub fn fix_for(err: &(dyn std::error::Error + 'static)) -> Option<String> {
    Some(match err.downcast_ref::<MergeError>()? {
        MergeError::Store(_) => return None,
        MergeError::NotShard { .. } => "pass only folders written with `--shard K/N`".into(),
        MergeError::Differs { .. } => {
            "run every shard with the same model, rubric, templates, options and seed".into()
        }
        MergeError::Coverage { .. } => {
            "run the missing shards (or drop the repeated folders), then merge again".into()
        }
        MergeError::Overlap { .. } => {
            "each shard folder must come from a different `--shard K/N` of the same run".into()
        }
        MergeError::NoKey { .. } => "grade that shard again with this version of assize".into(),
        MergeError::FileDiffers { .. } => {
            "the shards disagree on a shared file; delete it in all shards and run them again"
                .into()
        }
        MergeError::TargetUsed { .. } => "merge into a new, empty folder".into(),
    })
}

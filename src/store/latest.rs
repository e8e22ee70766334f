//! Store stage, the latest run of a kind: a pointer file `latest-KIND` (for example
//! `runs/latest-grade`) beside the run folders, holding the name of the run folder
//! whose writer last finished a pass over all its units. Input: a held run lock (to
//! record) or a run folder argument (to resolve). Output: the pointer file, or the
//! run folder `latest` stands for. Only a writer holding its run folder's lock
//! records, through a temporary file renamed into place, so a reader sees the old
//! pointer or the new one, never half of one; resolving never writes.

use std::path::{Component, Path, PathBuf};

use super::{RunLock, StoreError, MANIFEST};

/// The value that names the latest run of a kind in the default runs folder.
pub const LATEST: &str = "latest";

/// The pointer file's name for a kind of run (`latest-grade`, `latest-compare`).
pub fn pointer_name(kind: &str) -> String {
    format!("{LATEST}-{kind}")
}

/// The folder run folders sit in: the pointer goes there.
fn runs_folder(run_dir: &Path) -> PathBuf {
    match run_dir.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// Record the locked run folder as the latest run of `kind` in the folder beside it.
pub fn record(lock: &RunLock, kind: &str) -> Result<(), StoreError> {
    let dir = lock.dir();
    let Some(name) = dir.file_name() else {
        return Ok(());
    };
    let folder = runs_folder(dir);
    let path = folder.join(pointer_name(kind));
    // A name of its own per process: writers of other run folders hold other locks
    // and may record at the same moment; the last rename wins.
    let tmp = folder.join(format!(".{}.{}.tmp", pointer_name(kind), std::process::id()));
    let text = format!("{}\n", name.to_string_lossy());
    super::write_atomic_via(&tmp, &path, text.as_bytes())
}

/// Why `latest` names no run.
#[derive(Debug, thiserror::Error)]
pub enum LatestError {
    /// No writer has finished a run of this kind in that folder.
    #[error("no {kind} run has finished in `{folder}` yet (`{pointer}` does not exist)")]
    NoPointer {
        kind: String,
        folder: PathBuf,
        pointer: PathBuf,
    },
    /// The pointer names something that is not a run folder there.
    #[error("`{pointer}` names `{name}`, which is not a run folder in `{folder}`")]
    Dangling {
        pointer: PathBuf,
        name: String,
        folder: PathBuf,
    },
    /// The pointer could not be read.
    #[error("cannot read `{pointer}`")]
    Read {
        pointer: PathBuf,
        #[source]
        source: std::io::Error,
    },
}

/// The pointer file a run-folder argument means, if it means one: `latest` (in
/// `runs`), `DIR/latest`, or `DIR/latest-KIND` itself. An existing run folder named
/// `latest` is itself.
pub fn pointer_for(value: &Path, kind: &str) -> Option<PathBuf> {
    if value.join(MANIFEST).exists() {
        return None;
    }
    let name = value.file_name()?.to_str()?;
    let folder = match value.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ if name == LATEST => PathBuf::from("runs"),
        _ => PathBuf::from("."),
    };
    if name == LATEST || name == pointer_name(kind) {
        Some(folder.join(pointer_name(kind)))
    } else {
        None
    }
}

/// The run folder a pointer file names. Reads only.
pub fn read_pointer(pointer: &Path, kind: &str) -> Result<PathBuf, LatestError> {
    let folder = runs_folder(pointer);
    let text = match std::fs::read_to_string(pointer) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            return Err(LatestError::NoPointer {
                kind: kind.to_string(),
                folder,
                pointer: pointer.to_path_buf(),
            })
        }
        Err(source) => {
            return Err(LatestError::Read {
                pointer: pointer.to_path_buf(),
                source,
            })
        }
    };
    let name = text.trim();
    let mut parts = Path::new(name).components();
    let one_name = matches!(
        (parts.next(), parts.next()),
        (Some(Component::Normal(_)), None)
    );
    let dir = folder.join(name);
    if !one_name || !dir.join(MANIFEST).is_file() {
        return Err(LatestError::Dangling {
            pointer: pointer.to_path_buf(),
            name: name.to_string(),
            folder,
        });
    }
    Ok(dir)
}

/// What to do about a `latest` that names no run.
pub fn fix_for(e: &LatestError) -> Option<String> {
    Some(match e {
        LatestError::NoPointer { .. } => "pass the run folder itself, or finish a run there first: the pointer is written when a run (not a shard) ends with every item done, and by `assize merge`".into(),
        LatestError::Dangling { .. } => "pass the run folder itself; the next run that finishes there rewrites the pointer".into(),
        LatestError::Read { .. } => return None,
    })
}

//! The jobs layer: the one resumable run loop that `grade`, `compare`, `injection`
//! and other judge runs share. Stage: between the command line and the judge/store.
//! Input: a run folder, its manifest, and the units of work a command supplies (what
//! one unit is, which records it produces, and a hash of the inputs that decide
//! them). Output: every record of those units, computed now or found in the folder.
//! It owns the manifest check, the lock, the done set, the shard filter, progress,
//! appending, the failure list and the latest-run pointer. It never holds the lock or writes when nothing is
//! left to compute, and it never rewrites or reorders a finished record.
//!
//! ```text
//! let job = Job::open(spec, units)?;      // reads only; locks when work remains
//! if job.remaining() > 0 { load the judge }
//! let done = job.run(|unit| compute(unit), Record::key)?;
//! ```

pub mod merge;
mod progress;
pub mod shard;

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::{de::DeserializeOwned, Serialize};
use sha2::{Digest, Sha256};

pub use progress::Progress;
pub use shard::Shard;

use crate::store::{self, Appender, Manifest, RunLock, StoreError};

/// One unit of work: computed as a whole, skipped as a whole when all its records
/// are in the folder.
#[derive(Debug, Clone)]
pub struct Unit<U> {
    /// Identity of the unit: what shards are chosen by and messages name.
    pub key: String,
    /// Hash of everything in the inputs that decides this unit's records (see
    /// [`input_hash`]); a finished record whose unit now hashes differently is an error.
    pub input: String,
    /// Keys of the records the unit produces.
    pub records: Vec<String>,
    /// What the command needs to compute it.
    pub data: U,
}

/// Where and how a job runs.
#[derive(Debug, Clone)]
pub struct JobSpec {
    /// Run folder.
    pub dir: PathBuf,
    /// What the records depend on; its `shard` is set from `shard`.
    pub manifest: Manifest,
    /// Results file name inside the folder.
    pub results: &'static str,
    /// Progress label (`grading`, `comparing`).
    pub what: &'static str,
    /// No progress or messages on stderr.
    pub quiet: bool,
    /// Take only this share of the units.
    pub shard: Option<Shard>,
    /// Pause inside every appended line (fault tests only).
    pub slow_append: Option<Duration>,
    /// Kind of run (`grade`, `compare`) to record as the latest of its kind beside the
    /// run folder when a pass ends with every unit done; never recorded for a shard.
    pub latest: Option<&'static str>,
}

/// A unit that could not be computed; the rest of the job went on.
#[derive(Debug, Clone, Serialize)]
pub struct Failed {
    /// Unit key.
    pub unit: String,
    /// Why, with its causes.
    pub error: String,
}

/// What a finished job holds.
#[derive(Debug)]
pub struct Outcome<R> {
    /// Every record of the job's units (after the shard filter) in file order.
    pub records: Vec<R>,
    /// Records computed by this invocation (the rest were found in the folder).
    pub computed: usize,
    /// Units that failed this time.
    pub failed: Vec<Failed>,
}

/// An opened job: manifest checked, done set read, lock held when work remains.
pub struct Job<U> {
    spec: JobSpec,
    units: Vec<Unit<U>>,
    todo: Vec<usize>,
    /// Keys of records already in the folder (a unit may be partly done).
    done: HashSet<String>,
    lock: Option<RunLock>,
}

/// SHA-256 of a unit's deciding inputs, serialised as JSON; what [`Unit::input`] holds.
pub fn input_hash<T: Serialize + ?Sized>(inputs: &T) -> String {
    let json = serde_json::to_vec(inputs).expect("inputs serialise");
    format!("{:x}", Sha256::digest(&json))[..16].to_string()
}

impl<U> Job<U> {
    /// Open the job: check the folder's manifest, read what is done (never writing),
    /// keep this shard's units, and lock the folder when any remain.
    pub fn open(mut spec: JobSpec, units: Vec<Unit<U>>) -> Result<Self, StoreError> {
        spec.manifest.shard = spec.shard.map(|s| s.to_string());
        let units: Vec<Unit<U>> = match spec.shard {
            Some(s) => units.into_iter().filter(|u| s.takes(&u.key)).collect(),
            None => units,
        };
        let has_manifest = store::check_manifest(&spec.dir, &spec.manifest)?;
        let mut job = Job {
            todo: Vec::new(),
            done: HashSet::new(),
            lock: None,
            spec,
            units,
        };
        (job.todo, job.done) = job.pending()?;
        if job.todo.is_empty() {
            return Ok(job);
        }
        let lock = RunLock::acquire(&job.spec.dir)?;
        check_free_space(&job.spec.dir)?;
        if !has_manifest && !store::check_manifest(&job.spec.dir, &job.spec.manifest)? {
            let text =
                serde_json::to_string_pretty(&job.spec.manifest).expect("manifest serialises");
            store::write_atomic(&job.spec.dir.join(store::MANIFEST), text.as_bytes())?;
        }
        job.lock = Some(lock);
        // Another writer may have finished units between the first read and the lock.
        (job.todo, job.done) = job.pending()?;
        Ok(job)
    }

    /// Pause inside every appended line: a fault-test hook that widens the window
    /// in which a kill leaves a torn line.
    pub fn slow_appends(mut self, pause: Duration) -> Self {
        self.spec.slow_append = Some(pause);
        self
    }

    /// Units left to compute.
    pub fn remaining(&self) -> usize {
        self.todo.len()
    }

    /// Units of the job (after the shard filter).
    pub fn total(&self) -> usize {
        self.units.len()
    }

    /// The run folder.
    pub fn dir(&self) -> &Path {
        &self.spec.dir
    }

    /// Save a file beside the results (a cache the units need, such as judge-written
    /// steps). Only a job with work left holds the lock and may write.
    pub fn save(&self, name: &str, bytes: &[u8]) -> Result<(), StoreError> {
        let lock = self
            .lock
            .as_ref()
            .expect("only a job with work left saves files");
        store::write_atomic(&lock.dir().join(name), bytes)
    }

    /// Indices of units with a record missing, and the keys already stored; an
    /// error names units whose inputs changed since their records were computed.
    fn pending(&self) -> Result<(Vec<usize>, HashSet<String>), StoreError> {
        let path = self.spec.dir.join(self.spec.results);
        let loaded = store::read_lines(&path)?;
        let mut stored: HashMap<&str, Option<&str>> = HashMap::new();
        for l in &loaded.lines {
            if let Some(k) = l.key() {
                stored.insert(k, l.input());
            }
        }
        let mut changed = Vec::new();
        let mut todo = Vec::new();
        for (i, u) in self.units.iter().enumerate() {
            let found: Vec<Option<&str>> = u
                .records
                .iter()
                .filter_map(|k| stored.get(k.as_str()).copied())
                .collect();
            if found.iter().any(|h| h.is_some_and(|h| h != u.input)) {
                changed.push(u.key.clone());
            } else if found.len() < u.records.len() {
                todo.push(i);
            }
        }
        if !changed.is_empty() {
            return Err(StoreError::Changed {
                dir: self.spec.dir.clone(),
                units: crate::data::list(&changed),
            });
        }
        let done = stored.keys().map(|k| k.to_string()).collect();
        Ok((todo, done))
    }

    /// Compute every remaining unit with `work`, appending each record as soon as it
    /// exists; a failing unit is listed and the rest go on. Returns all the job's
    /// records. `key` gives a record's key (as listed in [`Unit::records`]).
    pub fn run<R, F, K>(&self, mut work: F, key: K) -> Result<Outcome<R>, StoreError>
    where
        R: Serialize + DeserializeOwned,
        F: FnMut(&U) -> anyhow::Result<Vec<R>>,
        K: Fn(&R) -> String,
    {
        let mut computed = 0;
        let mut failed = Vec::new();
        if let Some(lock) = &self.lock {
            let mut app = Appender::open(lock, self.spec.results)?;
            app.slow_append = self.spec.slow_append;
            let mut bar = Progress::new(self.todo.len() as u64, self.spec.what, self.spec.quiet);
            for &i in &self.todo {
                let unit = &self.units[i];
                match work(&unit.data) {
                    Ok(records) => {
                        for r in records {
                            let k = key(&r);
                            if unit.records.contains(&k) && !self.done.contains(&k) {
                                app.append(&r, &k, &unit.input)?;
                                computed += 1;
                            }
                        }
                    }
                    Err(e) => {
                        let error = format!("{e:#}");
                        bar.note(&format!("warning: skipped `{}`: {error}", unit.key));
                        failed.push(Failed {
                            unit: unit.key.clone(),
                            error,
                        });
                    }
                }
                bar.inc();
            }
            bar.finish();
            if let (true, None, Some(kind)) = (failed.is_empty(), self.spec.shard, self.spec.latest) {
                record_latest(lock, kind);
            }
        }
        let records = self.collect(&key)?;
        Ok(Outcome {
            records,
            computed,
            failed,
        })
    }

    /// The job's records in file order, the first of any duplicated key.
    fn collect<R: DeserializeOwned>(
        &self,
        key: &impl Fn(&R) -> String,
    ) -> Result<Vec<R>, StoreError> {
        let path = self.spec.dir.join(self.spec.results);
        let wanted: HashSet<&str> = self
            .units
            .iter()
            .flat_map(|u| u.records.iter().map(String::as_str))
            .collect();
        let mut seen = HashSet::new();
        Ok(store::read_records::<R>(&path)?
            .into_iter()
            .filter(|r| {
                let k = key(r);
                wanted.contains(k.as_str()) && seen.insert(k)
            })
            .collect())
    }
}

/// Record a finished run as the latest of its kind; a pointer that cannot be written
/// is a warning, never a failure of the run it points to.
pub(crate) fn record_latest(lock: &RunLock, kind: &str) {
    if let Err(e) = store::latest::record(lock, kind) {
        eprintln!(
            "warning: `{}` is not recorded as the latest {kind} run: {e}\n  fix: make the folder above it writable, or name the run folder itself instead of `latest`",
            lock.dir().display()
        );
    }
}

/// Refuse to start when the disk holding `dir` has under 1 MiB free: the first
/// append would fail after the model had loaded.
fn check_free_space(dir: &Path) -> Result<(), StoreError> {
    use std::os::unix::ffi::OsStrExt as _;
    let c = std::ffi::CString::new(dir.as_os_str().as_bytes()).expect("paths hold no NUL");
    // SAFETY: `c` is a valid NUL-terminated path; `st` is written by statvfs.
    let mut st: libc::statvfs = unsafe { std::mem::zeroed() };
    if unsafe { libc::statvfs(c.as_ptr(), &mut st) } != 0 {
        return Ok(());
    }
    if (st.f_bavail as u64).saturating_mul(st.f_frsize as u64) < 1 << 20 {
        return Err(StoreError::DiskFull {
            path: dir.to_path_buf(),
        });
    }
    Ok(())
}

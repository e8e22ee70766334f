//! Results files: one JSON object per line, appended. Input: a file (reading) or a
//! held run lock (writing). Output: the finished lines, or an appender. Reading never
//! writes: a last record without its final newline counts when it parses; a torn
//! tail (a killed writer, a full disk, a cut inside a UTF-8 sequence) is left out
//! with a warning. Only a writer holding the lock repairs the tail, before appending.

use std::fs::{File, OpenOptions};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::{de::DeserializeOwned, Serialize};

use super::{io, rio, RunLock, StoreError};

/// Field the jobs layer adds to every line: the record's key.
pub const KEY_FIELD: &str = "_key";
/// Field the jobs layer adds to every line: hash of the inputs the record came from.
pub const INPUT_FIELD: &str = "_input";

/// One finished line of a results file.
#[derive(Debug, Clone)]
pub struct Line {
    /// 1-based line number.
    pub number: usize,
    /// The line as stored, without its newline.
    pub text: String,
    /// The parsed object.
    pub value: serde_json::Value,
}

impl Line {
    /// The record key stored with the line, when the jobs layer wrote it.
    pub fn key(&self) -> Option<&str> {
        self.value.get(KEY_FIELD)?.as_str()
    }

    /// The input hash stored with the line, when the jobs layer wrote it.
    pub fn input(&self) -> Option<&str> {
        self.value.get(INPUT_FIELD)?.as_str()
    }
}

/// An incomplete last line that reading left out.
#[derive(Debug, Clone, PartialEq)]
pub struct TornTail {
    /// Its line number.
    pub line: usize,
    /// Its length in bytes.
    pub bytes: usize,
}

/// The finished lines of a results file.
#[derive(Debug, Default)]
pub struct Loaded {
    /// Lines in file order.
    pub lines: Vec<Line>,
    /// The torn tail left out, if any.
    pub torn: Option<TornTail>,
}

/// Where the complete part of a file ends: after the last newline, or at the end
/// when the unterminated last line is a whole JSON object.
fn complete_len(bytes: &[u8]) -> usize {
    let after_newline = bytes.iter().rposition(|&b| b == b'\n').map_or(0, |i| i + 1);
    let tail = &bytes[after_newline..];
    if tail.iter().all(u8::is_ascii_whitespace) || parse_object(tail).is_some() {
        bytes.len()
    } else {
        after_newline
    }
}

fn parse_object(bytes: &[u8]) -> Option<serde_json::Value> {
    serde_json::from_slice::<serde_json::Value>(bytes)
        .ok()
        .filter(serde_json::Value::is_object)
}

/// Parse a results file's bytes; never touches the file.
pub fn parse_lines(path: &Path, bytes: &[u8]) -> Result<Loaded, StoreError> {
    let end = complete_len(bytes);
    let mut loaded = Loaded::default();
    let mut damaged = Vec::new();
    let mut number = 0;
    for raw in bytes[..end].split(|&b| b == b'\n') {
        number += 1;
        if raw.iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        let text = match std::str::from_utf8(raw) {
            Ok(t) => t,
            Err(e) => {
                damaged.push(format!(
                    "line {number}: invalid UTF-8 at byte {}",
                    e.valid_up_to()
                ));
                continue;
            }
        };
        match serde_json::from_str::<serde_json::Value>(text) {
            Ok(value) if value.is_object() => loaded.lines.push(Line {
                number,
                text: text.to_string(),
                value,
            }),
            Ok(_) => damaged.push(format!("line {number}: not a JSON object")),
            Err(e) => damaged.push(format!("line {number}: {e}")),
        }
    }
    if end < bytes.len() {
        loaded.torn = Some(TornTail {
            line: bytes[..end].iter().filter(|&&b| b == b'\n').count() + 1,
            bytes: bytes.len() - end,
        });
    }
    if damaged.is_empty() {
        Ok(loaded)
    } else {
        Err(StoreError::Damaged {
            path: path.to_path_buf(),
            lines: crate::data::list(&damaged),
        })
    }
}

/// Read the finished lines of a results file (none when it does not exist). Opens
/// the file for reading only.
pub fn read_lines(path: &Path) -> Result<Loaded, StoreError> {
    let bytes = match std::fs::read(path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Loaded::default()),
        Err(e) => return Err(rio(path)(e)),
    };
    parse_lines(path, &bytes)
}

/// Read the finished records of a results file as `T`, warning on stderr about a
/// torn tail. Opens the file for reading only.
pub fn read_records<T: DeserializeOwned>(path: &Path) -> Result<Vec<T>, StoreError> {
    let loaded = read_lines(path)?;
    warn_torn(path, loaded.torn.as_ref());
    let mut out = Vec::with_capacity(loaded.lines.len());
    let mut damaged = Vec::new();
    for l in loaded.lines {
        match serde_json::from_value(l.value) {
            Ok(r) => out.push(r),
            Err(e) => damaged.push(format!("line {}: {e}", l.number)),
        }
    }
    if damaged.is_empty() {
        Ok(out)
    } else {
        Err(StoreError::Damaged {
            path: path.to_path_buf(),
            lines: crate::data::list(&damaged),
        })
    }
}

/// Tell stderr that a torn tail was left out.
pub fn warn_torn(path: &Path, torn: Option<&TornTail>) {
    if let Some(t) = torn {
        eprintln!(
            "warning: `{}` line {} is incomplete ({} bytes, a writer stopped mid-record); it is left out\n  fix: run the command that wrote it again to compute that record anew",
            path.display(),
            t.line,
            t.bytes
        );
    }
}

/// Appends lines to a results file, each flushed to disk before the next.
pub struct Appender {
    path: PathBuf,
    file: File,
    /// Pause in the middle of every line (fault tests: widens the window in which a
    /// kill leaves a torn line).
    pub slow_append: Option<Duration>,
}

impl Appender {
    /// Open `name` in the locked run folder for appending, creating it; a torn tail
    /// is cut off and a last record without its newline gets one.
    pub fn open(lock: &RunLock, name: &str) -> Result<Self, StoreError> {
        let path = lock.dir().join(name);
        let bytes = match std::fs::read(&path) {
            Ok(b) => b,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Vec::new(),
            Err(e) => return Err(rio(&path)(e)),
        };
        let mut file = OpenOptions::new()
            .create(true)
            .append(true)
            .open(&path)
            .map_err(io(&path))?;
        let end = complete_len(&bytes);
        if end < bytes.len() {
            file.set_len(end as u64).map_err(io(&path))?;
        }
        if end > 0 && bytes[end - 1] != b'\n' {
            file.write_all(b"\n").map_err(io(&path))?;
        }
        file.sync_data().map_err(io(&path))?;
        Ok(Appender {
            path,
            file,
            slow_append: None,
        })
    }

    /// Append one record as a single line with its key and input hash, and flush it.
    pub fn append<T: Serialize>(
        &mut self,
        record: &T,
        key: &str,
        input: &str,
    ) -> Result<(), StoreError> {
        let line = with_fields(record, key, input);
        let bytes = line.as_bytes();
        let half = match self.slow_append {
            Some(_) => bytes.len() / 2,
            None => bytes.len(),
        };
        self.write(&bytes[..half])?;
        if let Some(pause) = self.slow_append {
            std::thread::sleep(pause);
            self.write(&bytes[half..])?;
        }
        self.file.sync_data().map_err(io(&self.path))
    }

    /// Append a line exactly as given (merging finished lines).
    pub fn append_raw(&mut self, text: &str) -> Result<(), StoreError> {
        self.write(text.as_bytes())?;
        self.write(b"\n")?;
        self.file.sync_data().map_err(io(&self.path))
    }

    fn write(&mut self, bytes: &[u8]) -> Result<(), StoreError> {
        self.file.write_all(bytes).map_err(io(&self.path))?;
        self.file.flush().map_err(io(&self.path))
    }
}

/// A record's JSON object with the key and input hash added at the end, newline
/// terminated. The record's own field order is kept.
fn with_fields<T: Serialize>(record: &T, key: &str, input: &str) -> String {
    let body = serde_json::to_string(record).expect("records serialise");
    let open = body
        .strip_suffix('}')
        .filter(|b| b.starts_with('{'))
        .expect("records serialise as JSON objects");
    let sep = if open.len() > 1 { "," } else { "" };
    format!(
        "{open}{sep}\"{KEY_FIELD}\":{},\"{INPUT_FIELD}\":{}}}\n",
        serde_json::to_string(key).expect("a string serialises"),
        serde_json::to_string(input).expect("a string serialises")
    )
}

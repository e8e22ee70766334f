//! The run-folder lock: an OS advisory lock (`flock`) on `lock` inside the folder,
//! held by the one process that writes there. Input: a folder. Output: a guard that
//! releases the lock when dropped (or when the process dies). The file names its
//! holder (pid and host) for the error a second writer gets. Readers never take it.

use std::fs::{File, OpenOptions};
use std::io::{Read as _, Seek as _, Write as _};
use std::os::fd::AsRawFd as _;
use std::path::{Path, PathBuf};

use super::{io, StoreError};

/// Name of the lock file inside a run folder.
pub const LOCK_FILE: &str = "lock";

/// An exclusive hold on a run folder; released on drop.
#[derive(Debug)]
pub struct RunLock {
    dir: PathBuf,
    _file: File,
}

impl RunLock {
    /// Create `dir` if needed and lock it, or name the process that holds it.
    pub fn acquire(dir: &Path) -> Result<Self, StoreError> {
        std::fs::create_dir_all(dir).map_err(io(dir))?;
        let path = dir.join(LOCK_FILE);
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(io(&path))?;
        // SAFETY: flock on a file descriptor this function owns; no memory involved.
        if unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) } != 0 {
            let err = std::io::Error::last_os_error();
            if err.raw_os_error() != Some(libc::EWOULDBLOCK) {
                return Err(io(&path)(err));
            }
            let mut holder = String::new();
            let _ = file.read_to_string(&mut holder);
            let holder = holder.trim();
            return Err(StoreError::Locked {
                dir: dir.to_path_buf(),
                holder: if holder.is_empty() {
                    "another process".into()
                } else {
                    holder.to_string()
                },
            });
        }
        let me = format!("process {} on host `{}`\n", std::process::id(), hostname());
        file.set_len(0).map_err(io(&path))?;
        file.rewind().map_err(io(&path))?;
        file.write_all(me.as_bytes()).map_err(io(&path))?;
        file.sync_data().map_err(io(&path))?;
        Ok(RunLock {
            dir: dir.to_path_buf(),
            _file: file,
        })
    }

    /// The locked folder.
    pub fn dir(&self) -> &Path {
        &self.dir
    }
}

/// This machine's host name, or `unknown`.
fn hostname() -> String {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is valid for its length; gethostname writes at most that.
    let rc = unsafe { libc::gethostname(buf.as_mut_ptr().cast(), buf.len()) };
    if rc != 0 {
        return "unknown".into();
    }
    let end = buf.iter().position(|&b| b == 0).unwrap_or(buf.len());
    String::from_utf8_lossy(&buf[..end]).into_owned()
}

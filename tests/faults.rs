//! Fault tests with real processes: kill -9 during the write path (appends slowed
//! by the jobs layer's test hook), concurrent writers on one folder, a full disk
//! and a read-only folder (small tmpfs mounts when running as root; otherwise the
//! disk test is skipped with a message and the read-only test uses permissions),
//! and plain progress lines when stderr is not a terminal. Children are this test
//! binary re-run on the ignored `child_grader` test, driven by environment variables.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::Duration;

use assize::cli::grade::{finish_run, grade_run, open_job, prepare, GradeReport, ModelId};
use assize::judge::Backend;
use common::grading::{demo_answers, grade_args, varied_judge};

const DIR: &str = "ASSIZE_FAULT_DIR";
const ANSWERS: &str = "ASSIZE_FAULT_ANSWERS";
const SLOW_MS: &str = "ASSIZE_FAULT_SLOW_MS";
const LOUD: &str = "ASSIZE_FAULT_LOUD";

/// The child: grade `ANSWERS` into `DIR`, appends slowed by `SLOW_MS`; prints `OK n`
/// or `ERR message` on stdout. Does nothing when run without those variables.
#[test]
#[ignore = "run by the fault tests as a child process"]
fn child_grader() {
    let (Ok(dir), Ok(answers)) = (std::env::var(DIR), std::env::var(ANSWERS)) else {
        return;
    };
    let (dir, answers) = (PathBuf::from(dir), PathBuf::from(answers));
    let mut a = grade_args(&answers, &dir);
    a.output.quiet = std::env::var_os(LOUD).is_none();
    let slow = std::env::var(SLOW_MS).ok().and_then(|s| s.parse().ok()).unwrap_or(0);
    let judge = varied_judge(&answers);
    let result = prepare(&a).and_then(|p| {
        let job = open_job(&a, &p, &ModelId::of(&judge))?.slow_appends(Duration::from_millis(slow));
        finish_run(&a, &p, job, Some(&judge as &dyn Backend))
    });
    match result {
        Ok(r) => println!("\nRESULT OK {}", r.computed),
        Err(e) => println!("\nRESULT ERR {e:#}"),
    }
}

fn child(dir: &Path, answers: &Path, slow_ms: u64) -> Command {
    let mut c = Command::new(std::env::current_exe().expect("test binary"));
    c.args(["--exact", "child_grader", "--ignored", "--nocapture", "--test-threads=1"])
        .env(DIR, dir)
        .env(ANSWERS, answers)
        .env(SLOW_MS, slow_ms.to_string())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    c
}

fn child_result(o: &Output) -> String {
    let out = String::from_utf8_lossy(&o.stdout);
    out.lines()
        .find_map(|l| l.strip_prefix("RESULT "))
        .unwrap_or_else(|| panic!("child printed no result: {out}\n{}", String::from_utf8_lossy(&o.stderr)))
        .to_string()
}

fn one_process(answers: &Path, dir: &Path) -> GradeReport {
    let a = grade_args(answers, dir);
    grade_run(&a, &prepare(&a).expect("inputs"), &varied_judge(answers)).expect("grading")
}

fn sorted_lines(path: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_to_string(path).expect("results").lines().map(String::from).collect();
    v.sort();
    v
}

fn kill9(c: &mut Child) {
    // SAFETY: kill(2) on the pid of a child this test spawned and has not reaped.
    unsafe { libc::kill(c.id() as i32, libc::SIGKILL) };
    c.wait().expect("reap");
}

/// Kill -9 over and over while a record is half written (the test hook pauses in
/// the middle of every line), resume each time, and end with exactly the records of
/// an uninterrupted run: nothing lost, doubled or changed.
#[test]
fn kill_nine_during_appends_loses_and_doubles_nothing() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(tmp.path(), 40);
    let dir = tmp.path().join("run");
    let results = dir.join("grades.jsonl");
    let (mut torn_kills, mut cycles) = (0, 0);
    while torn_kills < 25 && cycles < 200 {
        cycles += 1;
        let lines_before = std::fs::read(&results).map_or(0, |b| b.iter().filter(|&&x| x == b'\n').count());
        let mut c = child(&dir, &answers, 40).spawn().expect("spawn");
        // Kill once a new record is complete and the next one is half written.
        let killed_torn = loop {
            if let Ok(Some(_)) = c.try_wait() {
                break false;
            }
            let b = std::fs::read(&results).unwrap_or_default();
            let lines = b.iter().filter(|&&x| x == b'\n').count();
            if lines > lines_before && b.last() != Some(&b'\n') {
                kill9(&mut c);
                let after = std::fs::read(&results).unwrap_or_default();
                break after.last() != Some(&b'\n');
            }
            std::thread::sleep(Duration::from_micros(500));
        };
        if killed_torn {
            torn_kills += 1;
        } else if c.try_wait().expect("status").is_some() {
            break;
        }
    }
    eprintln!("kill -9 soak: {torn_kills} kills left a half-written record, in {cycles} starts");
    assert!(torn_kills >= 20, "only {torn_kills} kills landed inside a write");
    let last = child(&dir, &answers, 0).output().expect("final run");
    assert!(child_result(&last).starts_with("OK"), "{}", child_result(&last));
    let whole = tmp.path().join("whole");
    one_process(&answers, &whole);
    let got = sorted_lines(&results);
    assert_eq!(got, sorted_lines(&whole.join("grades.jsonl")));
    assert_eq!(got.len(), 80);
}

/// Four writers started together on one folder: one holds the lock, the others are
/// refused naming it (or find the work done), and every record is written once.
#[test]
fn concurrent_writers_write_every_record_once() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(tmp.path(), 12);
    let dir = tmp.path().join("run");
    let children: Vec<Child> = (0..4).map(|_| child(&dir, &answers, 15).spawn().expect("spawn")).collect();
    let results: Vec<String> = children
        .into_iter()
        .map(|c| child_result(&c.wait_with_output().expect("child")))
        .collect();
    let computed: usize = results
        .iter()
        .filter_map(|r| r.strip_prefix("OK ").map(|n| n.parse::<usize>().expect("count")))
        .sum();
    assert_eq!(computed, 24, "{results:?}");
    for r in results.iter().filter(|r| r.starts_with("ERR")) {
        assert!(r.contains("is being written by process") && r.contains("on host"), "{r}");
    }
    let whole = tmp.path().join("whole");
    one_process(&answers, &whole);
    assert_eq!(sorted_lines(&dir.join("grades.jsonl")), sorted_lines(&whole.join("grades.jsonl")));
}

/// With stderr not a terminal, progress is a plain line per interval (here every
/// unit) with done / total, rate and time left, and a last line when finished.
#[test]
fn progress_off_a_terminal_is_plain_lines() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(tmp.path(), 4);
    let o = child(&tmp.path().join("run"), &answers, 0)
        .env(LOUD, "1")
        .env("ASSIZE_PROGRESS_EVERY", "0")
        .output()
        .expect("child");
    let err = String::from_utf8_lossy(&o.stderr);
    for k in 1..=4 {
        assert!(err.contains(&format!("grading: {k}/4 done, ")), "{err}");
    }
    assert!(err.contains("per minute") && err.contains("finished in"), "{err}");
}

/// A tmpfs of `size` mounted at `dir`, or `None` (with a message) when this
/// process cannot mount.
struct Tmpfs(PathBuf);

impl Tmpfs {
    fn mount(dir: &Path, size: &str) -> Option<Tmpfs> {
        // SAFETY: geteuid has no preconditions.
        if unsafe { libc::geteuid() } != 0 {
            eprintln!("skipped: mounting a tmpfs needs root; run the tests as root to exercise it");
            return None;
        }
        std::fs::create_dir_all(dir).expect("mkdir");
        let ok = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(dir)
            .status()
            .is_ok_and(|s| s.success());
        if !ok {
            eprintln!("skipped: `mount -t tmpfs` failed here (no mount permission in this container)");
            return None;
        }
        Some(Tmpfs(dir.to_path_buf()))
    }

    fn remount(&self, options: &str) {
        let s = Command::new("mount").args(["-o", &format!("remount,{options}")]).arg(&self.0).status().expect("mount");
        assert!(s.success());
    }

    fn read_only(&self) {
        self.remount("ro");
    }

    fn resize(&self, size: &str) {
        self.remount(&format!("size={size}"));
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(&self.0).status();
    }
}

/// A disk that fills mid-run: the error names the full disk with a fix, the records
/// written before stay readable, and once there is room the same command finishes
/// with the records of an uninterrupted run. A disk already nearly full is refused
/// before any work.
#[test]
fn full_disk_stops_cleanly_and_the_run_resumes() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(tmp.path(), 150);
    let Some(fs) = Tmpfs::mount(&tmp.path().join("disk"), "1100k") else {
        return;
    };
    // Long written assessments: 300 records of about 4.5 kB overflow the disk.
    let mut a = grade_args(&answers, &fs.0.join("run"));
    a.reasoning = true;
    let p = prepare(&a).expect("inputs");
    let judge = || {
        let mut j = varied_judge(&answers);
        j.assessment = "The answer states the fare and the validity. ".repeat(90);
        j
    };
    let filler = fs.0.join("filler");
    std::fs::write(&filler, vec![0u8; 200 * 1024]).expect("filler");
    let err = grade_run(&a, &p, &judge()).expect_err("refused up front");
    assert!(assize::cli::render_error(&err).contains("no space left"), "{err:#}");
    assert!(!fs.0.join("run/grades.jsonl").exists());
    std::fs::write(&filler, vec![0u8; 40 * 1024]).expect("filler");
    let err = grade_run(&a, &p, &judge()).expect_err("disk fills");
    let shown = assize::cli::render_error(&err);
    assert!(shown.contains("no space left on the disk holding"), "{shown}");
    assert!(shown.contains("fix: free space on that disk"), "{shown}");
    let results = fs.0.join("run/grades.jsonl");
    let kept: Vec<serde_json::Value> = assize::store::read_records(&results).expect("readable");
    assert!(!kept.is_empty() && kept.len() < 300, "{}", kept.len());
    fs.resize("8m");
    grade_run(&a, &p, &judge()).expect("resumed");
    let mut whole = grade_args(&answers, &tmp.path().join("whole"));
    whole.reasoning = true;
    grade_run(&whole, &prepare(&whole).expect("inputs"), &judge()).expect("one process");
    assert_eq!(sorted_lines(&results), sorted_lines(&tmp.path().join("whole/grades.jsonl")));
}

/// A finished run on a read-only folder is summarised and read (it used to fail
/// because `grade` opened the results for writing); with work left, the error says
/// the folder is read-only, with a fix, before any judge is needed.
#[test]
fn read_only_folder_is_summarised_and_refused_for_new_work() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(tmp.path(), 6);
    let more = tmp.path().join("more");
    std::fs::create_dir_all(&more).expect("mkdir");
    let more = demo_answers(&more, 8);
    let mount = Tmpfs::mount(&tmp.path().join("disk"), "4m");
    let base = mount.as_ref().map_or(tmp.path().join("plain"), |m| m.0.clone());
    let dir = base.join("run");
    let first = one_process(&answers, &dir);
    match &mount {
        Some(m) => m.read_only(),
        None => {
            use std::os::unix::fs::PermissionsExt as _;
            for p in [dir.join("grades.jsonl"), dir.join("manifest.json"), dir.join("lock"), dir.clone()] {
                let mode = if p.is_dir() { 0o555 } else { 0o444 };
                std::fs::set_permissions(&p, std::fs::Permissions::from_mode(mode)).expect("chmod");
            }
        }
    }
    let again = one_process(&answers, &dir);
    assert_eq!((again.computed, again.records), (0, first.records));
    let recs: Vec<assize::judge::GradeRecord> =
        assize::store::read_records(&dir.join("grades.jsonl")).expect("read-only read");
    assert_eq!(recs.len(), 12);
    let a = grade_args(&more, &dir);
    let err = grade_run(&a, &prepare(&a).expect("inputs"), &varied_judge(&more)).expect_err("work left");
    let shown = assize::cli::render_error(&err);
    assert!(shown.contains("cannot be written (read-only)"), "{shown}");
    assert!(shown.contains("fix: make the folder writable"), "{shown}");
}

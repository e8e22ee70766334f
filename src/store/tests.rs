//! Unit tests of run folders: reading never writes, torn tails, tail repair by the
//! writer, the lock, manifest differences.

use super::*;

fn manifest(seed: u64) -> Manifest {
    Manifest {
        kind: "grade".into(),
        tool_version: "0".into(),
        model_path: "m.gguf".into(),
        model_sha256: "aa".into(),
        rubric_sha256: "cc".into(),
        templates_sha256: "dd".into(),
        options: vec!["reasoning=none".into()],
        seed,
        rubric_toml: None,
        inputs: Default::default(),
        shard: None,
    }
}

fn file_with(bytes: &[u8]) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().expect("tmp");
    let p = dir.path().join("r.jsonl");
    std::fs::write(&p, bytes).expect("write");
    (dir, p)
}

fn values(p: &Path) -> Vec<serde_json::Value> {
    read_records(p).expect("read")
}

/// The file another tool wrote without a final newline: the last record counts and
/// reading leaves the file byte for byte as it was (it used to be cut off).
#[test]
fn last_record_without_newline_counts_and_the_file_is_untouched() {
    let bytes = b"{\"a\":1}\n{\"a\":2}\n{\"a\":3}";
    let (_d, p) = file_with(bytes);
    assert_eq!(values(&p).len(), 3);
    assert_eq!(std::fs::read(&p).expect("read"), bytes);
}

#[test]
fn torn_tail_is_left_out_and_the_file_is_untouched() {
    let bytes = b"{\"a\":1}\n{\"a\":2}\n{\"a\":";
    let (_d, p) = file_with(bytes);
    let loaded = read_lines(&p).expect("read");
    assert_eq!(loaded.lines.len(), 2);
    assert_eq!(loaded.torn, Some(TornTail { line: 3, bytes: 5 }));
    assert_eq!(std::fs::read(&p).expect("read"), bytes);
}

/// A cut inside a multi-byte UTF-8 character (a full disk while writing a
/// non-ASCII rationale) is a torn tail like any other, not an unreadable file.
#[test]
fn tail_cut_inside_a_utf8_sequence_is_dropped() {
    let mut bytes = "{\"r\":\"gut\"}\n{\"r\":\"gr\u{00fc}n\"}\n"
        .as_bytes()
        .to_vec();
    let cut = "{\"r\":\"gr\u{00fc}".as_bytes();
    bytes.extend_from_slice(&cut[..cut.len() - 1]);
    let (_d, p) = file_with(&bytes);
    let recs = values(&p);
    assert_eq!(recs.len(), 2);
    assert_eq!(recs[1]["r"], "gr\u{00fc}n");
}

#[test]
fn damaged_lines_inside_the_file_are_all_named() {
    let (_d, p) = file_with(b"{\"a\":1}\nnot json\n{\"a\":2}\n[1]\n{\"a\":3}\n");
    let err = read_lines(&p).expect_err("damaged");
    let msg = err.to_string();
    assert!(msg.contains("line 2") && msg.contains("line 4"), "{msg}");
    let (_d, p) = file_with(b"{\"a\":1}\n\xff\xfe\n");
    let msg = read_lines(&p).expect_err("invalid utf-8").to_string();
    assert!(msg.contains("line 2: invalid UTF-8"), "{msg}");
}

/// Only the writer, holding the lock, repairs: a torn tail is cut off, a whole last
/// record gets its newline, and appending then continues cleanly.
#[test]
fn writer_repairs_the_tail_before_appending() {
    for (start, kept) in [
        (&b"{\"a\":1}\n{\"a\":"[..], 1),
        (&b"{\"a\":1}\n{\"a\":2}"[..], 2),
    ] {
        let (d, p) = file_with(start);
        let lock = RunLock::acquire(d.path()).expect("lock");
        let mut app = Appender::open(&lock, "r.jsonl").expect("open");
        app.append(&serde_json::json!({"a": 9}), "k9", "h")
            .expect("append");
        let recs = values(&p);
        assert_eq!(recs.len(), kept + 1);
        assert_eq!(recs[kept]["a"], 9);
        assert_eq!(recs[kept][KEY_FIELD], "k9");
        assert!(std::fs::read(&p).expect("read").ends_with(b"}\n"));
    }
}

#[test]
fn second_writer_is_refused_naming_the_holder() {
    let d = tempfile::tempdir().expect("tmp");
    let held = RunLock::acquire(d.path()).expect("first lock");
    let err = RunLock::acquire(d.path()).expect_err("second lock");
    let msg = err.to_string();
    assert!(
        msg.contains(&format!("process {}", std::process::id())),
        "{msg}"
    );
    assert!(msg.contains("on host"), "{msg}");
    drop(held);
    RunLock::acquire(d.path()).expect("free again");
}

#[test]
fn different_manifest_is_refused_naming_the_difference() {
    let dir = tempfile::tempdir().expect("tmp");
    assert!(!check_manifest(dir.path(), &manifest(1)).expect("empty folder"));
    write_atomic(
        &dir.path().join(MANIFEST),
        serde_json::to_string(&manifest(1))
            .expect("json")
            .as_bytes(),
    )
    .expect("write");
    assert!(check_manifest(dir.path(), &manifest(1)).expect("same run"));
    let mut moved = manifest(1);
    moved
        .inputs
        .insert("answers".into(), "elsewhere.jsonl".into());
    assert!(check_manifest(dir.path(), &moved).expect("paths are informative"));
    let err = check_manifest(dir.path(), &manifest(2)).expect_err("mismatch");
    assert!(err.to_string().contains("seed `1` vs `2`"), "{err}");
}

/// Manifests written before the rubric text and inputs were recorded still load.
#[test]
fn older_manifest_still_reads() {
    let dir = tempfile::tempdir().expect("tmp");
    let old = r#"{"kind":"grade","tool_version":"0","model_path":"m","model_sha256":"aa",
        "answers_sha256":"bb","rubric_sha256":"cc","templates_sha256":"dd","options":[],"seed":7}"#;
    std::fs::write(dir.path().join(MANIFEST), old).expect("write");
    let m = read_manifest(dir.path()).expect("read").expect("present");
    assert_eq!(m.seed, 7);
    assert!(m.rubric_toml.is_none() && m.shard.is_none());
}

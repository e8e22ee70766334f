//! The jobs layer driven through `grade` with a scripted judge: shards and merge
//! against one process, runs keyed by record (added answers, changed answers), the
//! lock, and finished runs summarised without writing. Fault tests with separate
//! processes are in `tests/faults.rs`.

mod common;

use std::path::Path;

use assize::cli::grade::{grade_run, prepare};
use assize::jobs::merge::merge;
use assize::jobs::Shard;
use assize::store::RunLock;
use common::grading::{demo_answers, grade_args, varied_judge};

fn grade(answers: &Path, dir: &Path, shard: Option<Shard>) -> assize::cli::grade::GradeReport {
    let mut a = grade_args(answers, dir);
    a.shard = shard;
    let p = prepare(&a).expect("inputs");
    grade_run(&a, &p, &varied_judge(answers)).expect("grading")
}

fn sorted_lines(path: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_to_string(path)
        .expect("results")
        .lines()
        .map(str::to_string)
        .collect();
    v.sort();
    v
}

/// N shard processes plus merge give the records of one process, byte for byte,
/// and grading the merged folder computes nothing and prints the same summary. The
/// shards leave the latest-run pointer on the whole run; the merged run takes it.
#[test]
fn merged_shards_equal_one_process_bit_for_bit() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(tmp.path(), 30);
    let whole = grade(&answers, &tmp.path().join("whole"), None);
    let mut parts = Vec::new();
    let mut sizes = Vec::new();
    for i in 0..3 {
        let dir = tmp.path().join(format!("shard-{i}"));
        let r = grade(&answers, &dir, Some(Shard { index: i, count: 3 }));
        assert!(r.failed.is_empty());
        sizes.push(r.records);
        parts.push(dir);
    }
    assert_eq!(sizes.iter().sum::<usize>(), whole.records);
    assert!(sizes.iter().all(|&n| n > 0), "{sizes:?}");
    let merged = tmp.path().join("merged");
    let pointer = tmp.path().join("latest-grade");
    assert_eq!(std::fs::read_to_string(&pointer).expect("pointer"), "whole\n");
    merge(&merged, &parts, &[("grades.jsonl", "grade")]).expect("merge");
    assert_eq!(std::fs::read_to_string(&pointer).expect("pointer"), "merged\n");
    let cost = assize::store::cost::read_cost(&merged).expect("cost").expect("recorded");
    assert_eq!(cost.sessions.len(), 3, "one entry per shard");
    assert_eq!(cost.total().records as usize, whole.records);
    assert_eq!(
        sorted_lines(&merged.join("grades.jsonl")),
        sorted_lines(&tmp.path().join("whole/grades.jsonl"))
    );
    let again = grade(&answers, &merged, None);
    assert_eq!(again.computed, 0);
    assert_eq!(
        serde_json::to_string(&again.summary).expect("json"),
        serde_json::to_string(&whole.summary).expect("json")
    );
}

#[test]
fn merge_refuses_gaps_overlaps_and_different_runs_by_name() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(tmp.path(), 12);
    let dirs: Vec<_> = (0..3)
        .map(|i| {
            let d = tmp.path().join(format!("s{i}"));
            grade(&answers, &d, Some(Shard { index: i, count: 3 }));
            d
        })
        .collect();
    let err = merge(&tmp.path().join("m1"), &dirs[..2], &[]).expect_err("gap");
    assert!(err.to_string().contains("shard 2/3 is missing"), "{err}");
    let twice = [
        dirs[0].clone(),
        dirs[1].clone(),
        dirs[2].clone(),
        dirs[1].clone(),
    ];
    let err = merge(&tmp.path().join("m2"), &twice, &[]).expect_err("overlap");
    assert!(
        err.to_string().contains("shard 1/3 is given 2 times"),
        "{err}"
    );
    let mut other = grade_args(&answers, &tmp.path().join("odd"));
    other.seed = 8;
    other.shard = Some(Shard { index: 2, count: 3 });
    grade_run(
        &other,
        &prepare(&other).expect("inputs"),
        &varied_judge(&answers),
    )
    .expect("grading");
    let mixed = [dirs[0].clone(), dirs[1].clone(), tmp.path().join("odd")];
    let err = merge(&tmp.path().join("m3"), &mixed, &[]).expect_err("different seed");
    assert!(err.to_string().contains("seed `7` vs `8`"), "{err}");
    assert!(!tmp.path().join("m1").exists() && !tmp.path().join("m3").exists());
}

/// A run is keyed by what decides each record, not by the whole answers file:
/// appending answers resumes the same folder and grades only the new ones.
#[test]
fn added_answers_are_the_only_ones_graded() {
    let tmp = tempfile::tempdir().expect("tmp");
    let dir = tmp.path().join("run");
    let answers = demo_answers(tmp.path(), 4);
    assert_eq!(grade(&answers, &dir, None).computed, 8);
    let answers = demo_answers(tmp.path(), 6);
    let second = grade(&answers, &dir, None);
    assert_eq!(second.computed, 4, "two new answers, two criteria each");
    assert_eq!(second.records, 12);
}

#[test]
fn changed_answer_is_refused_naming_the_item() {
    let tmp = tempfile::tempdir().expect("tmp");
    let dir = tmp.path().join("run");
    let answers = demo_answers(tmp.path(), 4);
    grade(&answers, &dir, None);
    let text = std::fs::read_to_string(&answers).expect("read");
    std::fs::write(&answers, text.replacen("2.40", "2.45", 1)).expect("write");
    let a = grade_args(&answers, &dir);
    let err = grade_run(&a, &prepare(&a).expect("inputs"), &varied_judge(&answers))
        .expect_err("changed input");
    assert!(format!("{err:#}").contains("q01/assistant-v1"), "{err:#}");
}

#[test]
fn second_writer_is_refused_while_the_first_holds_the_folder() {
    let tmp = tempfile::tempdir().expect("tmp");
    let dir = tmp.path().join("run");
    let answers = demo_answers(tmp.path(), 4);
    let _held = RunLock::acquire(&dir).expect("first writer");
    let a = grade_args(&answers, &dir);
    let err =
        grade_run(&a, &prepare(&a).expect("inputs"), &varied_judge(&answers)).expect_err("locked");
    let msg = format!("{err:#}");
    assert!(msg.contains("is being written by process"), "{msg}");
    assert!(!dir.join("grades.jsonl").exists());
}

/// A finished run is summarised without the lock and without opening anything
/// for writing: no lock file appears, no file changes.
#[test]
fn finished_run_is_summarised_without_writing() {
    let tmp = tempfile::tempdir().expect("tmp");
    let dir = tmp.path().join("run");
    let answers = demo_answers(tmp.path(), 4);
    let first = grade(&answers, &dir, None);
    std::fs::remove_file(dir.join("lock")).expect("lock file");
    let before = std::fs::read(dir.join("grades.jsonl")).expect("read");
    let again = grade(&answers, &dir, None);
    assert_eq!(again.computed, 0);
    assert_eq!(again.records, first.records);
    assert!(!dir.join("lock").exists(), "a reader took the lock");
    assert_eq!(
        std::fs::read(dir.join("grades.jsonl")).expect("read"),
        before
    );
}

//! Error paths of the command line: every bad input is refused with exit code 2, one
//! message naming the file, line or option and a fix, and no judge loaded. "No judge
//! loaded" is shown by running with an empty models folder: a command that reached
//! the judge would fail on the missing judge instead. Input: the built binary and
//! small invented files. Output: pass or fail. Never needs a model file.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// The binary in the crate root with an empty models folder.
fn run_without_judges(args: &[&str], empty_models: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_assize"))
        .args(args)
        .current_dir(root())
        .env("ASSIZE_MODELS_DIR", empty_models)
        .output()
        .expect("binary runs")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// Exit code 2, the expected words, a fix, and nothing about a judge.
fn assert_refused_before_judge(o: &Output, expected: &[&str]) {
    let e = stderr(o);
    assert_eq!(o.status.code(), Some(2), "{e}");
    for w in expected {
        assert!(e.contains(w), "missing `{w}` in:\n{e}");
    }
    assert!(!e.contains("not fetched yet") && !e.contains("loading judge"), "{e}");
}

fn write(dir: &Path, name: &str, text: &str) -> String {
    let p = dir.join(name);
    std::fs::write(&p, text).expect("write");
    p.to_str().expect("utf-8").to_string()
}

const ANSWERS: &str = r#"{"question_id": "q1", "system": "a", "question": "Q?", "answer": "A."}
{"question_id": "q1", "system": "b", "question": "Q?", "answer": "B."}
"#;

/// Option values out of range are refused while the command line is parsed.
#[test]
fn out_of_range_options_are_refused_before_any_judge() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = write(tmp.path(), "a.jsonl", ANSWERS);
    let cases: [(&[&str], &str); 5] = [
        (&["grade", "--answers", &answers, "--max-answers", "0"], "--max-answers"),
        (&["grade", "--answers", &answers, "--low-mass", "2"], "from 0 to 1"),
        (&["grade", "--answers", &answers, "--threads", "100000"], "logical cores"),
        (&["compare", "--answers", &answers, "--max-questions", "0"], "at least 1"),
        (
            &["estimate", "--grades", "tests/fixtures/report/before", "--labels", "x.csv", "--label-share", "1.5"],
            "not a share",
        ),
    ];
    for (args, words) in cases {
        let o = run_without_judges(args, tmp.path());
        assert_refused_before_judge(&o, &[words]);
    }
}

/// `compare` checks its answers and systems before it loads the judge.
#[test]
fn compare_names_an_unknown_system_before_loading_the_judge() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = write(tmp.path(), "a.jsonl", ANSWERS);
    let o = run_without_judges(
        &["compare", "--answers", &answers, "--systems", "a,zz"],
        tmp.path(),
    );
    assert_refused_before_judge(&o, &["system `zz` has no answers", "a.jsonl", "fix: use some of: a, b"]);
}

/// Every bad line of a labels file comes in one message: an empty score, an
/// unknown criterion and an off-scale score, each with its line number.
#[test]
fn labels_problems_of_every_kind_are_reported_in_one_pass() {
    let tmp = tempfile::tempdir().expect("tmp");
    let labels = write(
        tmp.path(),
        "labels.csv",
        "question_id,system,criterion,rater,score\n\
         q01,assistant-v1,correctness,r1,\n\
         q01,assistant-v1,tone,r1,3\n\
         q01,assistant-v1,correctness,r2,9\n",
    );
    let o = run_without_judges(
        &["vet", "--grades", "tests/fixtures/report/before", "--labels", &labels],
        tmp.path(),
    );
    assert_refused_before_judge(
        &o,
        &[
            "labels.csv",
            "3 bad line(s)",
            "line 2: field `score` is empty",
            "line 3: unknown criterion `tone`",
            "line 4: score `9` is not on the scale of `correctness`",
            "fix:",
        ],
    );
}

/// Every problem of an answers file in one message, with the file, lines and a fix,
/// before any judge.
#[test]
fn answers_problems_are_reported_in_one_pass_before_the_judge() {
    let tmp = tempfile::tempdir().expect("tmp");
    let answers = write(
        tmp.path(),
        "bad.jsonl",
        "{\"question_id\": \"q1\", \"system\": \"a\", \"question\": \"Q?\"}\n[1]\n{\"question_id\": \"q1\", \"system\": \"a\", \"question\": \"Q?\", \"answer\": \"A\"}\n",
    );
    let o = run_without_judges(&["grade", "--answers", &answers], tmp.path());
    assert_refused_before_judge(&o, &["bad.jsonl", "line 1", "line 2", "fix:"]);
}

/// A rubric named on the command line that puts a run's criterion on another scale
/// is refused; without `--rubric` the run's own rubric is used.
#[test]
fn a_rubric_that_contradicts_the_run_is_refused() {
    let tmp = tempfile::tempdir().expect("tmp");
    let support = std::fs::read_to_string(root().join("judge-templates/rubrics/support.toml"))
        .expect("rubric");
    let seven = support.replacen("scale = \"1-5\"", "scale = \"1-7\"", 1).replacen(
        "\"5\" = \"Everything stated is right and the key facts of the reference are all there.\"",
        "\"5\" = \"x\"\n\"6\" = \"y\"\n\"7\" = \"z\"",
        1,
    );
    let rubric = write(tmp.path(), "seven.toml", &seven);
    let check = run_without_judges(&["rubric", "check", &rubric], tmp.path());
    assert!(check.status.success(), "a seven-point scale is valid: {}", stderr(&check));
    let args = ["estimate", "--grades", "tests/fixtures/report/before", "--labels", "tests/fixtures/report/labels.csv"];
    let mut named = args.to_vec();
    named.extend(["--rubric", &rubric]);
    let o = run_without_judges(&named, tmp.path());
    assert_refused_before_judge(&o, &["another scale", "fix: leave out `--rubric`"]);
    let o = run_without_judges(&args, tmp.path());
    assert!(o.status.success(), "{}", stderr(&o));
}

/// `-` reads the answers from standard input.
#[test]
fn answers_come_from_standard_input() {
    use std::io::Write;
    let mut child = Command::new(env!("CARGO_BIN_EXE_assize"))
        .args(["overlap", "--answers", "-", "--json"])
        .current_dir(root())
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("spawn");
    let text = "{\"question_id\": \"q1\", \"system\": \"a\", \"question\": \"Q?\", \"answer\": \"the cat sat\", \"reference\": \"the cat sat\"}\n";
    child
        .stdin
        .take()
        .expect("stdin")
        .write_all(text.as_bytes())
        .expect("write");
    let o = child.wait_with_output().expect("runs");
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("json");
    assert!(v.to_string().contains("\"a\""), "{v}");
}

/// Two TOML syntax errors (line 4: a key without `=`; line 11: an unclosed string) and
/// one semantic error (line 14: a 12-point scale): `rubric check` and `grade --rubric`
/// both list all three with their lines, before any judge.
const BROKEN_RUBRIC: &str = r#"name = "t"
[[criterion]]
key = "a"
question "Is it right?"
scale = "yes-no"
[criterion.points]
"yes" = "right"
"no" = "wrong"

[[criterion]]
key = "b
question = "Q"
title = "B"
scale = "1-12"
"#;

#[test]
fn every_rubric_problem_syntax_included_is_reported_in_one_pass() {
    let tmp = tempfile::tempdir().expect("tmp");
    let rubric = write(tmp.path(), "broken.toml", BROKEN_RUBRIC);
    let answers = write(tmp.path(), "a.jsonl", ANSWERS);
    let expected = [
        "broken.toml",
        "has 3 problem(s)",
        "line 4: TOML syntax",
        "line 11: TOML syntax",
        "line 14: criterion: unknown scale `1-12`",
        "fix:",
    ];
    for args in [
        vec!["rubric", "check", rubric.as_str()],
        vec!["grade", "--answers", answers.as_str(), "--rubric", rubric.as_str()],
    ] {
        let o = run_without_judges(&args, tmp.path());
        assert_refused_before_judge(&o, &expected);
    }
}

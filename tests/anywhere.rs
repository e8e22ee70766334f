//! The installed binary away from the source tree: a copy of `assize` run from a
//! temporary folder outside the repository, with only an answers file there and the
//! fetched default judge in the per-user data folder. Input: the built binary and the
//! real default judge. Output: pass or fail. Never touches the repository's files.

mod common;

use std::path::Path;
use std::process::{Command, Output};

/// A copy of the binary in `root/bin`, as `cargo install --root root` would place it,
/// started in `root/work` with a home and data folder of its own.
fn installed(root: &Path) -> Command {
    let bin = root.join("bin/assize");
    if !bin.exists() {
        std::fs::create_dir_all(root.join("bin")).expect("bin folder");
        std::fs::copy(env!("CARGO_BIN_EXE_assize"), &bin).expect("copy binary");
    }
    let work = root.join("work");
    std::fs::create_dir_all(&work).expect("work folder");
    let mut c = Command::new(bin);
    c.current_dir(work)
        .env_remove("ASSIZE_MODELS_DIR")
        .env("HOME", root.join("home"))
        .env("XDG_DATA_HOME", root.join("data"));
    c
}

/// Place the fetched default judge where `scripts/fetch-models` puts it by default.
fn fetch_default_judge(root: &Path) {
    let models = root.join("data/assize/models");
    std::fs::create_dir_all(&models).expect("models folder");
    let file = "qwen2.5-coder-1.5b-instruct-q4_k_m.gguf";
    std::os::unix::fs::symlink(common::real_model(file), models.join(file)).expect("link");
}

/// Running a freshly copied binary while another test thread forks can fail with
/// "text file busy": the forked child holds the copy's write handle until it execs.
/// That is a property of the test process, not of assize; wait and try again.
trait RunInstalled {
    fn run_installed(&mut self) -> Output;
}

impl RunInstalled for Command {
    fn run_installed(&mut self) -> Output {
        for _ in 0..50 {
            match self.output() {
                Err(e) if e.kind() == std::io::ErrorKind::ExecutableFileBusy => {
                    std::thread::sleep(std::time::Duration::from_millis(100));
                }
                other => return other.expect("runs"),
            }
        }
        panic!("the copied binary stayed busy for 5 s")
    }
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

const ANSWER: &str = r#"{"question_id": "q1", "system": "v1", "question": "How long is a tram single valid?", "answer": "A tram single is valid for 90 minutes from validation.", "context": "A tram single is valid for 90 minutes from validation.", "reference": "90 minutes from validation."}
"#;

/// `assize grade --answers FILE` with no rubric, form or model named: the bundled
/// `support` rubric and the built-in forms come from the binary, the default judge from
/// the data folder. One criterion keeps the test short.
#[test]
fn installed_binary_grades_from_a_folder_outside_the_repository() {
    let root = tempfile::tempdir().expect("tmp");
    fetch_default_judge(root.path());
    std::fs::create_dir_all(root.path().join("work")).expect("work folder");
    std::fs::write(root.path().join("work/answers.jsonl"), ANSWER).expect("answers");
    let o = installed(root.path())
        .args([
            "grade",
            "--answers",
            "answers.jsonl",
            "--criteria",
            "helpfulness",
        ])
        .args(["--csv", "grades.csv", "--json", "--quiet"])
        .run_installed();
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("one JSON document");
    assert_eq!(v["rubric"], "support");
    assert_eq!(v["records"], 1, "{v}");
    let mean = v["summary"][0]["mean"].as_f64().expect("a mean score");
    assert!((1.0..=5.0).contains(&mean), "{v}");
    let csv = std::fs::read_to_string(root.path().join("work/grades.csv")).expect("CSV export");
    let lines: Vec<&str> = csv.lines().collect();
    assert!(lines[0].starts_with("question_id,system,criterion,expected"), "{csv}");
    assert_eq!(lines.len(), 2, "{csv}");
    assert!(lines[1].starts_with("q1,v1,helpfulness,"), "{csv}");
    assert!(v["failed"].as_array().expect("list").is_empty(), "{v}");
}

/// Without the judge in any models folder, the message names the folders looked in
/// and how to fill them, and nothing is graded.
#[test]
fn missing_judge_names_the_folders_looked_in() {
    let root = tempfile::tempdir().expect("tmp");
    std::fs::create_dir_all(root.path().join("work")).expect("work folder");
    std::fs::write(root.path().join("work/answers.jsonl"), ANSWER).expect("answers");
    let o = installed(root.path())
        .args(["grade", "--answers", "answers.jsonl"])
        .run_installed();
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let e = stderr(&o);
    assert!(e.contains("judge `default` is not fetched yet"), "{e}");
    assert!(e.contains("data/assize/models"), "{e}");
    assert!(
        e.contains("fix: run `scripts/fetch-models --model default`"),
        "{e}"
    );
    assert!(
        !root.path().join("work/runs").exists(),
        "no run folder before a judge"
    );
}

/// Bundled rubrics are addressable by name from any folder, and listed.
#[test]
fn bundled_rubrics_work_by_name_outside_the_repository() {
    let root = tempfile::tempdir().expect("tmp");
    let o = installed(root.path())
        .args(["rubric", "check", "quick"])
        .run_installed();
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(String::from_utf8_lossy(&o.stdout).contains("rubric `quick` is valid"));
    let o = installed(root.path())
        .args(["rubric", "list", "--json"])
        .run_installed();
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("json");
    let names: Vec<&str> = v
        .as_array()
        .expect("list")
        .iter()
        .filter_map(|r| r["name"].as_str())
        .collect();
    assert_eq!(names, ["support", "quick"]);
    // `rubric print` gives the TOML a user can start their own rubric from.
    let o = installed(root.path())
        .args(["rubric", "print", "support"])
        .run_installed();
    assert!(o.status.success(), "{}", stderr(&o));
    std::fs::write(root.path().join("work/mine.toml"), &o.stdout).expect("write");
    let o = installed(root.path())
        .args(["rubric", "check", "mine.toml"])
        .run_installed();
    assert!(o.status.success(), "{}", stderr(&o));
}

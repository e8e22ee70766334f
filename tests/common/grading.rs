//! Builders for grading runs with a scripted judge: arguments, a judge whose
//! distribution differs per answer, answers files cut from the demo data. Never
//! loads a model.

use std::path::{Path, PathBuf};

use assize::cli::common::{ModelArgs, RubricArg};
use assize::cli::grade::GradeArgs;
use assize::cli::OutputArgs;
use assize::judge::scripted::ScriptedJudge;

/// The crate root.
pub fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Grading arguments on the quick rubric, quiet, JSON.
pub fn grade_args(answers: &Path, run_dir: &Path) -> GradeArgs {
    GradeArgs {
        answers: answers.to_path_buf(),
        rubric: RubricArg {
            path: Some(root().join("judge-templates/rubrics/quick.toml")),
        },
        criteria: vec![],
        model: ModelArgs {
            model: "scripted".into(),
            threads: 1,
            context: None,
        },
        reasoning: false,
        generate_steps: false,
        reasoning_tokens: 32,
        anchors: None,
        anchor_count: 3,
        low_mass: 0.5,
        screen: assize::guard::ScreenMode::Flag,
        ask: Default::default(),
        judges: vec![],
        seed: 7,
        run_dir: Some(run_dir.to_path_buf()),
        shard: None,
        limit: None,
        no_prefix_reuse: false,
        templates: None,
        csv: None,
        output: OutputArgs {
            json: true,
            quiet: true,
        },
    }
}

/// The first `n` lines of the demo answers, written to `dir/answers.jsonl`.
pub fn demo_answers(dir: &Path, n: usize) -> PathBuf {
    let text =
        std::fs::read_to_string(root().join("demo-data/answers.jsonl")).expect("demo answers");
    let lines: Vec<&str> = text.lines().take(n).collect();
    let p = dir.join("answers.jsonl");
    std::fs::write(&p, lines.join("\n") + "\n").expect("write answers");
    p
}

/// A judge whose five-point distribution depends on the answer text, so every
/// record differs.
pub fn varied_judge(answers: &Path) -> ScriptedJudge {
    let text = std::fs::read_to_string(answers).expect("answers");
    let rules = text
        .lines()
        .enumerate()
        .map(|(i, line)| {
            let v: serde_json::Value = serde_json::from_str(line).expect("json line");
            let answer = v["answer"].as_str().expect("answer").to_string();
            let peak = (i % 5) as f64;
            let lp = (0..5)
                .map(|k| -0.3 - (k as f64 - peak).abs() * 0.7 - i as f64 * 1e-3)
                .collect();
            (answer, lp)
        })
        .collect();
    ScriptedJudge {
        rules,
        ..Default::default()
    }
}

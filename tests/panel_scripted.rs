//! Orchestration tests of `grade --judges` (several judges in turn into one panel
//! folder) with scripted judges standing in for the models: the panel folder
//! resumes member by member, a judge is loaded only for a member with work left, and
//! `vet` reads the panel folder directly. The real-model tests are in
//! `tests/real_judge.rs`; these do not replace them.

mod common;

use std::cell::RefCell;
use std::path::{Path, PathBuf};

use assize::cli::evidence::PanelArgs;
use assize::cli::grade::GradeArgs;
use assize::cli::grade_panel::{grade_panel, PanelGradeReport};
use assize::cli::vet::{vet_run, VetArgs};
use assize::judge::scripted::ScriptedJudge;
use assize::judge::Backend;

use common::grading::{demo_answers, grade_args, root};

/// Two stand-in model files (their bytes only decide the manifests' hashes).
fn model_files(dir: &Path) -> Vec<String> {
    ["alpha.gguf", "beta.gguf"]
        .iter()
        .map(|n| {
            let p = dir.join(n);
            std::fs::write(&p, n.as_bytes()).expect("model file");
            p.display().to_string()
        })
        .collect()
}

/// Member `beta` is sure of a 4 on correctness; `alpha` is uniform.
fn scripted_for(model: &str) -> ScriptedJudge {
    let rules = if model.ends_with("beta.gguf") {
        vec![("Criterion: Correctness".into(), vec![-9.0, -9.0, -9.0, 0.0, -9.0])]
    } else {
        vec![]
    };
    ScriptedJudge {
        rules,
        ..Default::default()
    }
}

fn panel_args(answers: &Path, panel: &Path, models: &[String], limit: usize) -> GradeArgs {
    let mut a = grade_args(answers, panel);
    a.rubric.path = Some(root().join("judge-templates/rubrics/support.toml"));
    a.judges = models.to_vec();
    a.limit = Some(limit);
    a
}

fn run(args: &GradeArgs, loaded: &RefCell<Vec<String>>) -> PanelGradeReport {
    grade_panel(args, &mut |a: &GradeArgs| {
        loaded.borrow_mut().push(a.model.model.clone());
        Ok(Box::new(scripted_for(&a.model.model)) as Box<dyn Backend>)
    })
    .expect("panel run")
}

/// Labels of the demo restricted to the first ten questions.
fn labels(dir: &Path) -> PathBuf {
    let text = std::fs::read_to_string(root().join("demo-data/labels.csv")).expect("labels");
    let keep: Vec<&str> = text
        .lines()
        .enumerate()
        .filter(|(i, l)| *i == 0 || l.split(',').next().is_some_and(|q| q <= "q10"))
        .map(|(_, l)| l)
        .collect();
    let p = dir.join("labels.csv");
    std::fs::write(&p, keep.join("\n") + "\n").expect("write labels");
    p
}

/// A panel run stopped after the first answers resumes member by member: the second
/// run grades only the new answers with each judge, a third loads no judge at all,
/// and each member's folder records what its grading cost.
#[test]
fn panel_folder_resumes_per_member_and_loads_judges_only_for_work_left() {
    let dir = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(dir.path(), 30);
    let models = model_files(dir.path());
    let panel = dir.path().join("panel");
    let loaded = RefCell::new(Vec::new());
    let first = run(&panel_args(&answers, &panel, &models, 15), &loaded);
    assert_eq!(first.members.len(), 2);
    assert_eq!(first.members[0].name, "alpha");
    let per_member = first.members[0].grading.computed;
    assert!(per_member > 0);
    let second = run(&panel_args(&answers, &panel, &models, 30), &loaded);
    for m in &second.members {
        assert_eq!(m.grading.computed, m.grading.records - per_member, "{}", m.name);
        let recorded = m.recorded.expect("cost recorded");
        assert_eq!(recorded.records as usize, m.grading.records);
    }
    assert_eq!(loaded.borrow().len(), 4, "each judge loaded once per run with work");
    let third = run(&panel_args(&answers, &panel, &models, 30), &loaded);
    assert!(third.members.iter().all(|m| m.grading.computed == 0 && m.this_run.is_none()));
    assert_eq!(loaded.borrow().len(), 4, "no judge loaded when nothing is left");
    let mut reordered = models.clone();
    reordered.reverse();
    let err = grade_panel(&panel_args(&answers, &panel, &reordered, 30), &mut |_: &GradeArgs| {
        panic!("no judge may load for a refused panel folder")
    })
    .err()
    .expect("another member list is refused");
    assert!(format!("{err:#}").contains("holds the judges"), "{err:#}");
}

/// `vet` takes the panel folder as `--grades` (first member primary, the others its
/// panel) and as `--panel` beside the primary member's folder, with the same result.
#[test]
fn vet_reads_a_panel_folder_directly() {
    let dir = tempfile::tempdir().expect("tmp");
    let answers = demo_answers(dir.path(), 30);
    let models = model_files(dir.path());
    let panel = dir.path().join("panel");
    run(&panel_args(&answers, &panel, &models, 30), &RefCell::new(Vec::new()));
    let vet = |grades: PathBuf, panel_arg: Vec<String>| {
        vet_run(&VetArgs {
            grades,
            labels: labels(dir.path()),
            rubric: assize::cli::common::RubricArg { path: None },
            variant: vec![],
            baselines: None,
            pairs: vec![],
            preferences: None,
            min_kappa: None,
            resamples: 50,
            seed: 7,
            csv: None,
            panel: PanelArgs {
                panel: panel_arg,
                folds: 5,
            },
            calibrate: false,
            save_calibration: None,
            output: assize::cli::OutputArgs {
                json: true,
                quiet: true,
            },
        })
        .expect("vet")
    };
    let whole = vet(panel.clone(), vec![]);
    let members = &whole.panel.as_ref().expect("a panel").members;
    assert_eq!(members, &vec!["judge".to_string(), "beta".to_string()]);
    let costs: Vec<(String, bool)> = whole
        .grading_cost
        .members
        .iter()
        .map(|m| (m.name.clone(), m.cost.is_some_and(|c| c.records > 0)))
        .collect();
    assert_eq!(costs, vec![("judge".into(), true), ("beta".into(), true)]);
    assert!(whole.grading_cost.total.is_some());
    let side = vet(panel.join("alpha"), vec![panel.display().to_string()]);
    assert_eq!(
        serde_json::to_value(&side.variant_choice).expect("json"),
        serde_json::to_value(&whole.variant_choice).expect("json")
    );
}

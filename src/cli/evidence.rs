//! Shared by `vet`, `estimate` and `calibrate`: the judges' evidence on one answer
//! set. Reads the primary grading run and any panel members' runs (records and
//! manifests), combines them into the panel's records, scores reference overlap when
//! an answers file is given, and builds the feature tables calibration reads. Never
//! runs a model and never changes a run folder.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use clap::Args;

use super::errors::usage;
use super::grade_panel::read_panel_folder;
use crate::calibrate::{FeatureTable, Source, SourceFingerprint};
use crate::data::read_answers;
use crate::judge::panel::{combine_grades, Panel, PanelMember};
use crate::judge::GradeRecord;
use crate::overlap::{score_pair, OverlapOptions};
use crate::store::cost::{read_cost, Cost};
use crate::store::{read_records, Manifest, MANIFEST};

/// Source name of the primary grading run (`--grades`) in panels and feature names.
pub const PRIMARY: &str = "judge";

/// Options naming the judges' runs beyond the primary one.
#[derive(Debug, Clone, Default, Args)]
pub struct PanelArgs {
    /// Another judge's grading run of the same answers, as `NAME=DIR`, or a panel folder of `grade --judges` (its members) (repeatable): shown on its own, averaged with the primary judge into a panel, and a calibration input
    #[arg(long, value_name = "NAME=DIR")]
    pub panel: Vec<String>,
    /// Cross-validation folds for calibrated variants (grouped by question)
    #[arg(long, value_name = "N", default_value_t = 5)]
    pub folds: usize,
}

/// One judge's grading run.
pub struct JudgeRun {
    /// Source name (`judge` for the primary run).
    pub name: String,
    /// Its records.
    pub records: Vec<GradeRecord>,
    /// What the run depended on.
    pub fingerprint: SourceFingerprint,
    /// What grading it cost, summed over its invocations; `None` when not recorded.
    pub cost: Option<Cost>,
}

/// Everything the judges and the references say about the answers.
pub struct Evidence {
    /// Primary run first, then panel members in the order given.
    pub runs: Vec<JudgeRun>,
    /// Overlap metric scores per item, when every answer has a reference.
    pub overlap: Vec<(String, BTreeMap<(String, String), f64>)>,
    /// Why overlap features were left out, when an answers file was given.
    pub overlap_note: Option<String>,
}

/// What one judge's grading run cost.
#[derive(Debug, Clone, serde::Serialize)]
pub struct MemberCost {
    /// Source name (`judge` for the `--grades` run).
    pub name: String,
    /// Grading time and tokens summed over the run's invocations; `None` when the
    /// run folder records none (made before costs were recorded).
    pub cost: Option<Cost>,
}

/// What the judges' grading cost, per run and together.
#[derive(Debug, Clone, serde::Serialize)]
pub struct GradingCosts {
    /// Per run, primary first.
    pub members: Vec<MemberCost>,
    /// The sum, when every run recorded its cost.
    pub total: Option<Cost>,
}

impl GradingCosts {
    /// One line per run and one for the sum, in plain words.
    pub fn text(&self) -> String {
        let line = |name: &str, c: &Option<Cost>| match c {
            Some(c) => format!(
                "  {name:<14} {:>8.1} s  {:>6} records  prompt tokens {:>9} computed, {:>9} reused  {:>7} generated\n",
                c.seconds, c.records, c.prompt_tokens_computed, c.prompt_tokens_reused, c.generated_tokens
            ),
            None => format!("  {name:<14} not recorded (the run folder predates cost records)\n"),
        };
        let mut s = String::from("grading cost (summed over each run's invocations):\n");
        for m in &self.members {
            s.push_str(&line(&m.name, &m.cost));
        }
        if self.members.len() > 1 {
            s.push_str(&line("all judges", &self.total));
        }
        s
    }
}

/// Reads a grading run folder: its records and manifest.
pub fn load_run(name: &str, dir: &Path) -> anyhow::Result<JudgeRun> {
    let grades = dir.join(super::grade::GRADES_FILE);
    let manifest_path = dir.join(MANIFEST);
    if !grades.exists() || !manifest_path.exists() {
        return Err(usage(
            format!(
                "`{}` is not a finished grading run (`{}` or `{MANIFEST}` is missing)",
                dir.display(),
                super::grade::GRADES_FILE
            ),
            "pass a run folder that `assize grade` printed",
        ));
    }
    let m: Manifest = serde_json::from_str(&std::fs::read_to_string(&manifest_path)?)?;
    Ok(JudgeRun {
        name: name.to_string(),
        cost: read_cost(dir)?.map(|c| c.total()),
        records: read_records(&grades)?,
        fingerprint: SourceFingerprint {
            name: name.to_string(),
            model_sha256: m.model_sha256,
            rubric_sha256: m.rubric_sha256,
            templates_sha256: m.templates_sha256,
            options: m.options,
        },
    })
}

/// `--grades` naming a panel folder (written by `grade --judges`): its first member
/// becomes the grading run and the folder joins `--panel`, so the other members form
/// the panel.
pub fn expand_panel_folder(grades: &mut PathBuf, panel: &mut PanelArgs) -> anyhow::Result<()> {
    let Some(members) = read_panel_folder(grades)? else {
        return Ok(());
    };
    let Some((_, first)) = members.first() else {
        return Err(usage(
            format!("panel folder `{}` lists no members", grades.display()),
            "run `assize grade --judges A,B` into it again",
        ));
    };
    panel.panel.push(grades.display().to_string());
    *grades = first.clone();
    Ok(())
}

/// The panel runs `--panel` names: each `NAME=DIR`, and each panel folder's members
/// except the one that is the primary run.
fn panel_members(primary: &Path, panel: &PanelArgs) -> anyhow::Result<Vec<(String, PathBuf)>> {
    let same = |a: &Path, b: &Path| match (a.canonicalize(), b.canonicalize()) {
        (Ok(x), Ok(y)) => x == y,
        _ => a == b,
    };
    let mut out = Vec::new();
    for p in &panel.panel {
        match (p.contains('='), read_panel_folder(Path::new(p))?) {
            (false, Some(members)) => out.extend(members.into_iter().filter(|(_, d)| !same(d, primary))),
            _ => out.push(name_dir(p, "panel")?),
        }
    }
    Ok(out)
}

/// Splits `NAME=DIR`.
pub fn name_dir(v: &str, flag: &str) -> anyhow::Result<(String, PathBuf)> {
    match v.split_once('=') {
        Some((n, d)) if !n.is_empty() && n != PRIMARY => Ok((n.to_string(), PathBuf::from(d))),
        _ => Err(usage(
            format!("`--{flag} {v}` is not `NAME=DIR` with a name other than `{PRIMARY}`, nor a panel folder of `grade --judges`"),
            format!("write it as e.g. `--{flag} small=runs/grade-abc`"),
        )),
    }
}

impl Evidence {
    /// Loads the primary run, the panel members' runs and, with `answers`, overlap scores.
    pub fn load(
        primary: &Path,
        panel: &PanelArgs,
        answers: Option<&Path>,
    ) -> anyhow::Result<Evidence> {
        let mut runs = vec![load_run(PRIMARY, primary)?];
        for (name, dir) in panel_members(primary, panel)? {
            if runs.iter().any(|r| r.name == name) {
                return Err(usage(
                    format!("panel member `{name}` is named twice"),
                    "give each member its own name",
                ));
            }
            runs.push(load_run(&name, &dir)?);
        }
        let (overlap, overlap_note) = match answers {
            Some(path) => overlap_scores(path)?,
            None => (Vec::new(), None),
        };
        Ok(Evidence {
            runs,
            overlap,
            overlap_note,
        })
    }

    /// The panel's records (mean of every run's distributions), when there is a panel.
    pub fn panel(&self) -> anyhow::Result<Option<Panel<GradeRecord>>> {
        if self.runs.len() < 2 {
            return Ok(None);
        }
        let members: Vec<PanelMember<GradeRecord>> = self
            .runs
            .iter()
            .map(|r| PanelMember {
                name: r.name.clone(),
                records: &r.records,
            })
            .collect();
        Ok(Some(combine_grades(&members)?))
    }

    /// Features from the primary run alone (`panel = false`) or from every run, plus overlap.
    pub fn table(&self, panel: bool) -> FeatureTable {
        let n = if panel { self.runs.len() } else { 1 };
        let sources: Vec<Source> = self.runs[..n]
            .iter()
            .map(|r| Source {
                name: r.name.clone(),
                records: &r.records,
            })
            .collect();
        FeatureTable::build(&sources, &self.overlap)
    }

    /// Fingerprints of the runs a table of [`Evidence::table`] is built from.
    pub fn fingerprints(&self, panel: bool) -> Vec<SourceFingerprint> {
        let n = if panel { self.runs.len() } else { 1 };
        self.runs[..n]
            .iter()
            .map(|r| r.fingerprint.clone())
            .collect()
    }

    /// What each run's grading cost, and the sum when every run recorded it.
    pub fn costs(&self) -> GradingCosts {
        let members: Vec<MemberCost> = self
            .runs
            .iter()
            .map(|r| MemberCost {
                name: r.name.clone(),
                cost: r.cost,
            })
            .collect();
        let total = members
            .iter()
            .map(|m| m.cost)
            .collect::<Option<Vec<Cost>>>()
            .map(|v| v.into_iter().fold(Cost::default(), Cost::add));
        GradingCosts { members, total }
    }

    /// Names of the overlap metrics used as features.
    pub fn overlap_names(&self) -> Vec<String> {
        self.overlap.iter().map(|o| o.0.clone()).collect()
    }
}

/// ROUGE-L, BLEU, chrF and token F1 of every answer against its reference; left out
/// (with a note) unless every answer has one, so no item loses its features.
fn overlap_scores(
    path: &Path,
) -> anyhow::Result<(
    Vec<(String, BTreeMap<(String, String), f64>)>,
    Option<String>,
)> {
    let answers = read_answers(path)?;
    let without = answers.iter().filter(|a| a.reference.is_none()).count();
    if without > 0 {
        let note = format!(
            "overlap features left out: {without} answer(s) in `{}` have no reference",
            path.display()
        );
        return Ok((Vec::new(), Some(note)));
    }
    let names = ["ROUGE-L", "BLEU", "chrF", "token F1"];
    let mut out: Vec<(String, BTreeMap<(String, String), f64>)> = names
        .iter()
        .map(|n| (n.to_string(), BTreeMap::new()))
        .collect();
    let opts = OverlapOptions::default();
    for a in &answers {
        let r = a.reference.as_deref().expect("checked above");
        let s = score_pair(&a.answer, &[r], &opts)?;
        for (slot, v) in out.iter_mut().zip([s.rougel_f, s.bleu, s.chrf, s.token_f1]) {
            slot.1.insert((a.question_id.clone(), a.system.clone()), v);
        }
    }
    Ok((out, None))
}

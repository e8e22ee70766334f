//! `assize grade --judges A,B,C`: grade one answer set with several judges in turn.
//! Each member's run is an ordinary resumable grading run in its own folder inside
//! the panel folder, listed in `panel.json` there so `vet`, `estimate`, `calibrate`
//! and `report` find the members. Every member's model file and run folder is
//! checked before the first judge loads; a judge loads only when its member has work
//! left, and is dropped before the next loads. Never combines grades itself: the
//! panel's scores are computed where the runs are read.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use serde::{Deserialize, Serialize};

use super::common::{default_run_dir, load_judge, ALIASES};
use super::errors::usage;
use super::grade::{finish_run, open_job, prepare, summary_text, GradeArgs, GradeReport, ModelId};
use super::print_json;
use crate::judge::Backend;
use crate::store::cost::{read_cost, Cost};

/// File in a panel folder naming its members.
pub const PANEL_FILE: &str = "panel.json";

/// One member of a panel folder.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PanelEntry {
    /// Member name (the judge's short name, or its file name without `.gguf`).
    pub name: String,
    /// The judge as given to `--judges`.
    pub model: String,
    /// Its run folder, relative to the panel folder.
    pub dir: String,
}

/// The content of `panel.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PanelFile {
    /// Members in the order given; the first is the panel's primary judge.
    pub members: Vec<PanelEntry>,
}

/// The members of a panel folder (name and run folder), or `None` when `dir` is
/// not one.
pub fn read_panel_folder(dir: &Path) -> anyhow::Result<Option<Vec<(String, PathBuf)>>> {
    let path = dir.join(PANEL_FILE);
    if !path.is_file() {
        return Ok(None);
    }
    let text = std::fs::read_to_string(&path)?;
    let file: PanelFile = serde_json::from_str(&text).map_err(|e| {
        usage(
            format!("`{}` is damaged: {e}", path.display()),
            "run the same `assize grade --judges` command again to rewrite it",
        )
    })?;
    Ok(Some(
        file.members
            .into_iter()
            .map(|m| (m.name, dir.join(m.dir)))
            .collect(),
    ))
}

/// What one member's grading did in this invocation.
#[derive(Debug, Serialize)]
pub struct MemberReport {
    /// Member name.
    pub name: String,
    /// What grading with this judge gave.
    pub grading: GradeReport,
    /// This invocation's grading time and tokens (`None` when nothing was left to grade).
    pub this_run: Option<Cost>,
    /// The member run's cost over all its invocations, as recorded in its folder.
    pub recorded: Option<Cost>,
}

/// What `assize grade --judges --json` prints.
#[derive(Debug, Serialize)]
pub struct PanelGradeReport {
    /// The panel folder (pass it to `vet --grades`).
    pub panel_dir: String,
    /// Per member, in order.
    pub members: Vec<MemberReport>,
}

/// The member name of a judge: its short name, else the file name without `.gguf`.
fn member_name(model: &str) -> String {
    if ALIASES.iter().any(|(a, _)| *a == model) {
        return model.to_string();
    }
    let stem = Path::new(model)
        .file_name()
        .map(|f| f.to_string_lossy().into_owned())
        .unwrap_or_else(|| model.to_string());
    stem.strip_suffix(".gguf").unwrap_or(&stem).to_string()
}

/// The members' names and judges, refusing a name given twice.
fn members(judges: &[String]) -> anyhow::Result<Vec<PanelEntry>> {
    let mut out: Vec<PanelEntry> = Vec::new();
    for j in judges {
        let name = member_name(j);
        if out.iter().any(|m| m.name == name) {
            return Err(usage(
                format!("judge `{j}` is given twice in `--judges` (as member `{name}`)"),
                "list each judge once",
            ));
        }
        out.push(PanelEntry {
            dir: name.clone(),
            name,
            model: j.clone(),
        });
    }
    Ok(out)
}

/// Writes `panel.json`, or checks that the folder's lists the same members.
fn claim_panel_folder(dir: &Path, file: &PanelFile) -> anyhow::Result<()> {
    let path = dir.join(PANEL_FILE);
    if path.is_file() {
        let old: PanelFile = serde_json::from_str(&std::fs::read_to_string(&path)?)?;
        if old != *file {
            let names = |f: &PanelFile| f.members.iter().map(|m| m.model.clone()).collect::<Vec<_>>().join(",");
            return Err(usage(
                format!(
                    "panel folder `{}` holds the judges `{}`, not `{}`",
                    dir.display(),
                    names(&old),
                    names(file)
                ),
                "give the same `--judges` in the same order, or another `--run-dir`",
            ));
        }
        return Ok(());
    }
    std::fs::create_dir_all(dir)?;
    crate::store::write_atomic(&path, serde_json::to_string_pretty(file)?.as_bytes())?;
    Ok(())
}

/// A loader of member judges: given the member's arguments, its judge.
pub type LoadJudge<'a> = dyn FnMut(&GradeArgs) -> anyhow::Result<Box<dyn Backend>> + 'a;

/// Grades with every member in turn: all model files and member folders are
/// checked before `load` is first called; `load` is called only for members with
/// work left, and each judge is dropped before the next loads.
pub fn grade_panel(args: &GradeArgs, load: &mut LoadJudge) -> anyhow::Result<PanelGradeReport> {
    if args.shard.is_some() || args.ask.ask_judge || args.csv.is_some() {
        return Err(usage(
            "`--judges` grades whole runs: it takes no `--shard`, `--ask-judge` or `--csv`",
            "grade each judge with its own `assize grade --model` for those, then pass the runs to `vet --panel NAME=DIR`",
        ));
    }
    let prepared = prepare(args)?;
    let entries = members(&args.judges)?;
    let mut member_args = Vec::new();
    for e in &entries {
        let mut a = args.clone();
        a.model.model = e.model.clone();
        a.judges.clear();
        let id = ModelId::resolve(&a.model)?;
        member_args.push((a, id));
    }
    let panel_dir = match &args.run_dir {
        Some(d) => d.clone(),
        None => {
            let ids: Vec<String> = member_args
                .iter()
                .map(|(a, id)| super::grade::manifest(a, &prepared, id).map(|m| m.identity_json()))
                .collect::<anyhow::Result<_>>()?;
            default_run_dir("panel", &ids.join("\n"))
        }
    };
    claim_panel_folder(&panel_dir, &PanelFile { members: entries.clone() })?;
    let mut jobs = Vec::new();
    for ((a, id), e) in member_args.iter_mut().zip(&entries) {
        a.run_dir = Some(panel_dir.join(&e.dir));
        jobs.push(open_job(a, &prepared, id)?);
    }
    let mut reports = Vec::new();
    for (((a, id), e), job) in member_args.iter().zip(&entries).zip(jobs) {
        if !args.output.quiet {
            eprintln!("panel member `{}` ({})", e.name, id.path);
        }
        let judge = match job.remaining() {
            0 => None,
            _ => Some(load(a)?),
        };
        let before = judge.as_ref().and_then(|j| j.counters());
        let started = std::time::Instant::now();
        let mut grading = finish_run(a, &prepared, job, judge.as_deref())?;
        grading.model = id.path.clone();
        let this_run = judge.as_ref().map(|j| {
            let (b, c) = (before.unwrap_or_default(), j.counters().unwrap_or_default());
            Cost {
                records: grading.computed as u64,
                seconds: started.elapsed().as_secs_f64(),
                prompt_tokens_computed: c.computed_tokens - b.computed_tokens,
                prompt_tokens_reused: c.reused_tokens - b.reused_tokens,
                generated_tokens: c.generated_tokens - b.generated_tokens,
            }
        });
        reports.push(MemberReport {
            name: e.name.clone(),
            recorded: read_cost(Path::new(&grading.run_dir))?.map(|c| c.total()),
            grading,
            this_run,
        });
    }
    Ok(PanelGradeReport {
        panel_dir: panel_dir.display().to_string(),
        members: reports,
    })
}

/// Run `assize grade --judges`.
pub fn run(args: GradeArgs) -> anyhow::Result<ExitCode> {
    let quiet = args.output.quiet;
    let report = grade_panel(&args, &mut |a: &GradeArgs| {
        let mut j = load_judge(&a.model, quiet)?;
        j.set_prefix_reuse(!a.no_prefix_reuse);
        Ok(Box::new(j) as Box<dyn Backend>)
    })?;
    let failed: usize = report.members.iter().map(|m| m.grading.failed.len()).sum();
    if args.output.json {
        print_json(&report)?;
    } else {
        print!("{}", panel_text(&report));
    }
    if failed > 0 {
        eprintln!(
            "error: {failed} answer(s) could not be graded (listed above); everything else is saved in `{}`",
            report.panel_dir
        );
        eprintln!("  fix: shorten those answers or raise `--max-context`, then run the same command again to finish");
        return Ok(ExitCode::from(2));
    }
    Ok(ExitCode::SUCCESS)
}

/// Each member's summary table, then what each cost.
fn panel_text(r: &PanelGradeReport) -> String {
    let mut s = String::new();
    for m in &r.members {
        s.push_str(&format!("== panel member `{}` ==\n", m.name));
        s.push_str(&summary_text(&m.grading));
        s.push('\n');
    }
    s.push_str("cost per member (this invocation; whole run as recorded):\n");
    for m in &r.members {
        let this = match &m.this_run {
            Some(c) => format!(
                "{} records in {:.1} s, prompt tokens {} computed, {} reused",
                c.records, c.seconds, c.prompt_tokens_computed, c.prompt_tokens_reused
            ),
            None => "nothing left to grade, judge not loaded".into(),
        };
        let all = match &m.recorded {
            Some(c) => format!("{:.1} s, {} records", c.seconds, c.records),
            None => "not recorded".into(),
        };
        s.push_str(&format!("  {:<14} {this}; whole run {all}\n", m.name));
    }
    s.push_str(&format!(
        "\nvet the panel: assize vet --grades {} --labels FILE (its first member is the primary judge, `judge`)\n",
        r.panel_dir
    ));
    s
}

//! Report stage: the data model of a report people read. Input: finished run folders'
//! records (one or more grading runs, the first being the baseline; optionally a
//! comparison run), human labels and preferences, the rubric and the answers, all
//! already loaded. Output: a `Report` (the `assize.report/2` JSON format), rendered by
//! one writer per format (`html`, `markdown`, `json`). Never reads or writes files,
//! never runs the model, and computes no statistic itself: it calls `judge`, `vet`,
//! `probes` and `stats`.

mod assemble;
mod cautions;
pub mod html;
pub mod json;
pub mod markdown;
mod svg;

pub use assemble::build;

use serde::Serialize;

use crate::data::{AnswerRecord, LabelRow, PreferenceRow};
use crate::judge::grade::SummaryRow;
use crate::judge::{GradeRecord, PairRecord, ProbeRecord};
use crate::probes::length::LengthProbe;
use crate::probes::ranking::Ranking;
use crate::probes::selfpref::SelfPreference;
use crate::rubric::Rubric;
use crate::stats::calibration::ReliabilityBin;
use crate::vet::RankingRule;

/// Name and version of the JSON format; bumped on any incompatible change.
pub const SCHEMA: &str = "assize.report/2";

/// A judged item counts as disputed when the judge's expected score and the human
/// consensus differ by at least this many scale points.
pub const DISPUTE_POINTS: f64 = 2.0;

/// Captured mass below this marks a pairwise verdict as unreliable (as in `assize compare`).
pub const PAIR_LOW_MASS: f64 = 0.5;

/// One grading run, loaded.
#[derive(Debug, Clone)]
pub struct RunInput {
    /// Display name (unique within the report).
    pub name: String,
    /// Run folder as given.
    pub dir: String,
    /// Judge model from the run's manifest (empty when unknown).
    pub model: String,
    /// The run's grade records.
    pub records: Vec<GradeRecord>,
}

/// One comparison run, loaded.
#[derive(Debug, Clone)]
pub struct CompareInput {
    /// Run folder as given.
    pub dir: String,
    /// Judge model from the run's manifest (empty when unknown).
    pub model: String,
    /// The run's pair records.
    pub records: Vec<PairRecord>,
    /// The run's slot probes (empty when it has none).
    pub probes: Vec<ProbeRecord>,
}

/// Everything a report is assembled from.
#[derive(Debug, Clone, Copy)]
pub struct Inputs<'a> {
    /// Grading runs; the first is the baseline ("before").
    pub runs: &'a [RunInput],
    /// A comparison run, if any.
    pub compare: Option<&'a CompareInput>,
    /// Human labels, if any.
    pub labels: Option<&'a [LabelRow]>,
    /// Human pairwise preferences, if any.
    pub preferences: Option<&'a [PreferenceRow]>,
    /// The rubric the runs were graded with.
    pub rubric: &'a Rubric,
    /// Answers (texts of flagged items, lengths for the length probe, authors for the
    /// self-preference probe), if any.
    pub answers: Option<&'a [AnswerRecord]>,
    /// `written_by` of the comparison judge's own answers; default: the stem of the
    /// comparison run's model file.
    pub judge_name: Option<&'a str>,
    /// Seed of every random draw.
    pub seed: u64,
    /// Bootstrap resamples per interval.
    pub resamples: usize,
    /// Further grade sets shown only in the per-item view: panel members, the panel
    /// mean, calibrated out-of-fold predictions.
    pub extra: &'a [GradeSet],
}

/// A set of grades shown beside the runs' in the per-item view.
#[derive(Debug, Clone)]
pub struct GradeSet {
    /// Display name.
    pub name: String,
    /// What the grades are.
    pub kind: SourceKind,
    /// The grades.
    pub records: Vec<GradeRecord>,
}

/// Where a grade in the per-item view comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SourceKind {
    /// A grading run given with `--grades`.
    Run,
    /// A panel member's grading run.
    PanelMember,
    /// The panel: mean of the members' distributions.
    Panel,
    /// Label-calibrated grades, each predicted by a model fitted without its question.
    Calibrated,
}

/// Why a report could not be assembled or rendered.
#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    /// No grading run was given.
    #[error("no grading run to report on")]
    NoRuns,
    /// A run holds no grade records.
    #[error("grading run `{run}` holds no grade records")]
    EmptyRun { run: String },
    /// A run graded a criterion the rubric does not have.
    #[error("grading run `{run}` has criterion `{criterion}`, which rubric `{rubric}` lacks")]
    UnknownCriterion {
        run: String,
        criterion: String,
        rubric: String,
    },
    /// A statistic failed.
    #[error("cannot compute {what}")]
    Stats {
        what: String,
        #[source]
        source: Box<dyn std::error::Error + Send + Sync>,
    },
    /// A template failed to render.
    #[error("cannot render the {format} report")]
    Render {
        format: &'static str,
        #[source]
        source: minijinja::Error,
    },
}

/// A report: what the HTML, Markdown and JSON writers show.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// Always [`SCHEMA`].
    pub schema: String,
    /// assize version that wrote the report.
    pub tool_version: String,
    /// When the report was written (UTC, RFC 3339); the only field that reads the clock.
    pub generated_at: String,
    /// Rubric name.
    pub rubric: String,
    /// Seed of every random draw.
    pub seed: u64,
    /// Bootstrap resamples per interval (vetting, deltas, ranking).
    pub resamples: usize,
    /// Criteria graded in any run, in rubric order.
    pub criteria: Vec<CriterionInfo>,
    /// Plain-words cautions, most serious kinds first.
    pub cautions: Vec<Caution>,
    /// Grading runs, baseline first.
    pub runs: Vec<RunSection>,
    /// Each later run against the baseline, per system and criterion.
    pub deltas: Vec<DeltaRow>,
    /// The comparison run, when given.
    pub pairwise: Option<PairwiseSection>,
    /// Items with low captured mass or a judge-human dispute, over all runs.
    pub flagged: Vec<FlaggedItem>,
    /// Every graded answer with every grade of every run and grade set, flagged or not.
    pub items: Vec<ItemView>,
    /// Judge variants (members, panel, calibrated) compared out of sample, with the
    /// chosen one per criterion; present when the report was asked for panels or calibration.
    pub variants: Option<VariantSection>,
}

/// The out-of-sample variant comparison as shown in the report.
#[derive(Debug, Clone, Serialize)]
pub struct VariantSection {
    /// Panel members (`judge` is the first grading run), empty without a panel.
    pub panel_members: Vec<String>,
    /// Every variant per criterion, the best one, and the nested cross-validation figure.
    pub choice: crate::vet::VariantChoice,
    /// Methods chosen for calibrated variants, and what was left out.
    pub notes: Vec<String>,
    /// What grading cost per judge run and together, as recorded in the run folders.
    pub grading_cost: crate::cli::evidence::GradingCosts,
}

/// A rubric criterion as shown.
#[derive(Debug, Clone, Serialize)]
pub struct CriterionInfo {
    /// Key.
    pub key: String,
    /// Title.
    pub title: String,
    /// Scale labels, lowest first.
    pub labels: Vec<String>,
    /// Numeric values of the labels.
    pub values: Vec<f64>,
}

/// What a caution is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum CautionKind {
    /// No human labels: the judge is not vetted at all.
    NoLabels,
    /// Trust verdict "no": humans agree with each other more than with the judge.
    BelowHumanCeiling,
    /// Trust verdict "cannot tell yet".
    CannotTellYet,
    /// Trust verdict "yes" resting on few items or a wide interval.
    ThinEvidence,
    /// Fewer labelled items than the sample-size advice asks for.
    SmallLabelledSample,
    /// Grades or verdicts where the judge put little probability on the offered labels.
    LowCapturedMass,
    /// Strong position bias in pairwise verdicts.
    PositionBias,
    /// The judge favours answers its own model wrote, beyond what humans see.
    SelfPreference,
    /// Neighbouring systems in the ranking have overlapping intervals.
    RankingOverlap,
    /// Criteria graded without human labels.
    Unvetted,
    /// Before/after runs cover different items, or no difference exceeds its interval.
    BeforeAfter,
}

/// One caution, in plain words.
#[derive(Debug, Clone, Serialize)]
pub struct Caution {
    /// What it is about.
    pub kind: CautionKind,
    /// The sentence shown to readers.
    pub message: String,
}

/// Mean distribution of the judge over the scale, for one system and criterion.
#[derive(Debug, Clone, Serialize)]
pub struct Distribution {
    /// System.
    pub system: String,
    /// Criterion key.
    pub criterion: String,
    /// Records averaged.
    pub n: usize,
    /// Mean probability of each scale label (same order as the criterion's labels).
    pub mean_probabilities: Vec<f64>,
}

/// One grading run as reported.
#[derive(Debug, Clone, Serialize)]
pub struct RunSection {
    /// Display name.
    pub name: String,
    /// `baseline` for the first run, `after` for later ones, `only` when there is one.
    pub role: String,
    /// Run folder as given.
    pub dir: String,
    /// Judge model from the manifest.
    pub model: String,
    /// Grade records.
    pub records: usize,
    /// Records flagged for low captured mass.
    pub low_mass: usize,
    /// Mean expected score with a 95% bootstrap interval per system and criterion.
    pub summary: Vec<SummaryRow>,
    /// Mean score distribution per system and criterion.
    pub distributions: Vec<Distribution>,
    /// Trust per vetted criterion (empty without labels).
    pub trust: Vec<TrustRow>,
    /// Criteria of this run that could not be vetted, with the reason.
    pub unvetted: Vec<Unvetted>,
    /// Why the run could not be vetted at all, when it could not.
    pub vet_note: Option<String>,
}

/// A criterion left out of vetting.
#[derive(Debug, Clone, Serialize)]
pub struct Unvetted {
    /// Criterion key.
    pub criterion: String,
    /// Why.
    pub reason: String,
}

/// The trust card of one criterion in one run, with what the charts need.
#[derive(Debug, Clone, Serialize)]
pub struct TrustRow {
    /// Criterion key.
    pub criterion: String,
    /// `yes`, `no` or `cannot tell yet`.
    pub verdict: String,
    /// The verdict's grounds in one sentence.
    pub reason: String,
    /// True when the verdict rests on too few items or too wide an interval.
    pub thin_evidence: bool,
    /// Items with both a judge grade and human labels.
    pub n_items: usize,
    /// Raters who scored the criterion.
    pub raters: usize,
    /// Judge against the human consensus, quadratic kappa.
    pub judge_kappa: Option<f64>,
    /// Typical rater against the other raters' consensus, quadratic kappa.
    pub human_kappa: Option<f64>,
    /// Judge minus typical rater, and its 95% percentile interval.
    pub gap: Option<Gap>,
    /// Labelled items the sample-size advice asks for.
    pub recommended_items: Option<usize>,
    /// Share of items where judge category and consensus agree exactly.
    pub exact: Option<f64>,
    /// Counts, rows = human consensus label, columns = judge label, in scale order.
    pub confusion: Vec<Vec<usize>>,
    /// Calibration of the judge's top label against the consensus.
    pub calibration: Option<Calibration>,
    /// Warnings of the trust card, each with what to do.
    pub warnings: Vec<String>,
}

/// An estimate with its interval.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Gap {
    /// Estimate.
    pub estimate: f64,
    /// Lower end.
    pub low: f64,
    /// Upper end.
    pub high: f64,
}

/// Calibration figures of one criterion.
#[derive(Debug, Clone, Serialize)]
pub struct Calibration {
    /// Items.
    pub n_items: usize,
    /// Share of items whose top label equals the consensus.
    pub accuracy: f64,
    /// Mean top probability.
    pub mean_confidence: f64,
    /// Expected calibration error, 10 equal-width bins (Guo et al. 2017).
    pub ece: f64,
    /// Non-empty reliability bins.
    pub bins: Vec<ReliabilityBin>,
}

/// A later run against the baseline for one system and criterion.
#[derive(Debug, Clone, Serialize)]
pub struct DeltaRow {
    /// System.
    pub system: String,
    /// Criterion key.
    pub criterion: String,
    /// Baseline run name.
    pub baseline: String,
    /// Later run name.
    pub run: String,
    /// Items graded in both runs (the bootstrap units).
    pub n_items: usize,
    /// Baseline mean expected score on those items.
    pub before: f64,
    /// Later run's mean on the same items.
    pub after: f64,
    /// After minus before.
    pub difference: f64,
    /// 95% paired bootstrap percentile interval of the difference (none under 2 items).
    pub ci: Option<(f64, f64)>,
    /// True when the interval excludes 0.
    pub beyond_ci: bool,
    /// The reading in plain words.
    pub reading: String,
}

/// The comparison run as reported.
#[derive(Debug, Clone, Serialize)]
pub struct PairwiseSection {
    /// Run folder as given.
    pub dir: String,
    /// Judge model from the manifest.
    pub model: String,
    /// Criterion compared on (`overall` or a key).
    pub criterion: String,
    /// Pairs judged in both orders.
    pub pairs: usize,
    /// Judged orders whose captured mass was below 0.5.
    pub low_mass: usize,
    /// Position bias over all pairs.
    pub position: Option<Position>,
    /// The verdict rule behind the ranking (chosen against human preferences when
    /// they overlap the pairs, else calibrated), with the judge's slot prior.
    pub rule: Option<RankingRule>,
    /// Bradley-Terry ranking of the rule's verdicts, when one can be made.
    pub ranking: Option<Ranking>,
    /// Why there is no ranking, when there is none.
    pub ranking_note: Option<String>,
    /// Length effect per pair of systems (needs the answers).
    pub length: Vec<LengthProbe>,
    /// Verdict rules against the human majority (needs preferences).
    pub human: Vec<HumanAgreement>,
    /// Self-preference of the judge (needs the answers with `written_by`; human
    /// preferences and labels sharpen it). The judge is named by its model file's stem.
    pub self_preference: Option<SelfPreference>,
    /// Pairs behind `human`.
    pub human_pairs: usize,
    /// Notes on parts left out.
    pub notes: Vec<String>,
}

/// Position bias, as shown.
#[derive(Debug, Clone, Serialize)]
pub struct Position {
    /// Pairs judged in both orders.
    pub n_pairs: usize,
    /// Share of pairs with the same winner in both orders.
    pub consistency: f64,
    /// Share of the 2n verdicts won by the answer shown first.
    pub first_slot_win_rate: f64,
    /// Wilson 95% interval of that share.
    pub first_slot_ci: (f64, f64),
    /// Exact sign test of the decisive verdicts against 0.5.
    pub p_value: Option<f64>,
    /// True when single-order verdicts should not be used.
    pub caution: bool,
    /// The finding in plain words.
    pub verdict_line: String,
}

/// One verdict rule against the human majority.
#[derive(Debug, Clone, Serialize)]
pub struct HumanAgreement {
    /// `single order`, `debiased` or `conservative`.
    pub method: String,
    /// Share of pairs matching the human majority.
    pub accuracy: f64,
    /// Its 95% bootstrap interval.
    pub accuracy_ci: Option<(f64, f64)>,
    /// Cohen's kappa over (first system wins, second wins, tie).
    pub kappa: Option<f64>,
}

/// A grade worth a human look.
#[derive(Debug, Clone, Serialize)]
pub struct FlaggedItem {
    /// Run name.
    pub run: String,
    /// Question id.
    pub question_id: String,
    /// System.
    pub system: String,
    /// Criterion key.
    pub criterion: String,
    /// `low_mass` and/or `disputed`.
    pub reasons: Vec<String>,
    /// Judge's expected score.
    pub expected: f64,
    /// Judge's most likely label.
    pub argmax: String,
    /// Probability the judge put on the scale labels.
    pub captured_mass: f64,
    /// Judge's distribution over the scale.
    pub probabilities: Vec<f64>,
    /// Human consensus label (lower median), when labelled.
    pub human_consensus: Option<String>,
    /// Every human score of the item, by rater.
    pub human_scores: Vec<HumanScore>,
    /// The judge's written assessment, when the run asked for one.
    pub rationale: Option<String>,
    /// Question text, when the answers were given.
    pub question: Option<String>,
    /// Answer text, when the answers were given.
    pub answer: Option<String>,
}

/// One answer with every grade it got.
#[derive(Debug, Clone, Serialize)]
pub struct ItemView {
    /// Question id.
    pub question_id: String,
    /// System.
    pub system: String,
    /// Question text, when the answers were given.
    pub question: Option<String>,
    /// Answer text, when the answers were given.
    pub answer: Option<String>,
    /// Sentences the screen finds addressing the grader (needs the answers; empty when clean).
    pub screen: Vec<crate::guard::Flag>,
    /// `low_mass`, `disputed` and `screened` when any grade or the screen says so.
    pub flags: Vec<String>,
    /// One entry per report criterion the answer was graded on, in `criteria` order.
    pub criteria: Vec<ItemCriterion>,
}

/// One criterion of one answer: every grade and the human scores.
#[derive(Debug, Clone, Serialize)]
pub struct ItemCriterion {
    /// Criterion key.
    pub criterion: String,
    /// Every human score of the item, by rater.
    pub human_scores: Vec<HumanScore>,
    /// Human consensus label (lower median), when labelled.
    pub human_consensus: Option<String>,
    /// Runs first (in `runs` order), then the further grade sets.
    pub grades: Vec<ItemGrade>,
}

/// One grade as the per-item view shows it.
#[derive(Debug, Clone, Serialize)]
pub struct ItemGrade {
    /// Run or grade-set name.
    pub source: String,
    /// What the source is.
    pub kind: SourceKind,
    /// Probability-weighted score.
    pub expected: f64,
    /// Most likely label.
    pub argmax: String,
    /// Probability of each scale label (same order as the criterion's labels).
    pub probabilities: Vec<f64>,
    /// Probability the judge put on the scale labels; `null` for calibrated grades,
    /// which are distributions over the scale by construction.
    pub captured_mass: Option<f64>,
    /// Captured mass was below the run's threshold.
    pub low_mass: bool,
    /// At least [`DISPUTE_POINTS`] from the human consensus.
    pub disputed: bool,
}

/// One human score.
#[derive(Debug, Clone, Serialize)]
pub struct HumanScore {
    /// Rater.
    pub rater: String,
    /// Score label.
    pub score: String,
}

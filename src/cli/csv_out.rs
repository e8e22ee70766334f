//! CSV exports for spreadsheets: every grade of a run folder, and the vetting table
//! (one row per criterion and variant, with the trust verdict). Input: records and
//! reports already computed. Output: a CSV file. Never computes a statistic.

use std::path::Path;

use anyhow::Context as _;

use crate::judge::GradeRecord;
use crate::vet::VetReport;

fn write_rows(path: &Path, header: &[&str], rows: Vec<Vec<String>>) -> anyhow::Result<()> {
    let mut w = csv::Writer::from_path(path)
        .with_context(|| format!("cannot write CSV `{}`", path.display()))?;
    w.write_record(header)?;
    for r in rows {
        w.write_record(&r)?;
    }
    w.flush()
        .with_context(|| format!("cannot write CSV `{}`", path.display()))?;
    Ok(())
}

fn opt(v: Option<f64>) -> String {
    v.filter(|x| x.is_finite())
        .map_or_else(String::new, |x| format!("{x}"))
}

/// One row per grade: the answer, the criterion, the scores and the judge's whole
/// distribution as `label=probability` pairs separated by spaces.
pub fn write_grades(path: &Path, records: &[GradeRecord]) -> anyhow::Result<()> {
    let rows = records
        .iter()
        .map(|r| {
            let dist: Vec<String> = r
                .labels
                .iter()
                .zip(&r.probabilities)
                .map(|(l, p)| format!("{l}={p:.6}"))
                .collect();
            vec![
                r.question_id.clone(),
                r.system.clone(),
                r.criterion.clone(),
                format!("{}", r.expected),
                r.argmax.clone(),
                format!("{}", r.spread),
                format!("{}", r.captured_mass),
                r.low_mass.to_string(),
                dist.join(" "),
            ]
        })
        .collect();
    let header = [
        "question_id",
        "system",
        "criterion",
        "expected",
        "argmax",
        "spread",
        "captured_mass",
        "low_mass",
        "distribution",
    ];
    write_rows(path, &header, rows)
}

/// One row per criterion and variant: agreement with the human consensus, and the
/// criterion's trust verdict on every row of that criterion.
pub fn write_vet(path: &Path, report: &VetReport) -> anyhow::Result<()> {
    let mut rows = Vec::new();
    for c in &report.criteria {
        for v in &c.variants {
            let k = v.categorical.as_ref();
            let ci = k.and_then(|k| k.kappa_quadratic_ci.percentile.as_ref());
            rows.push(vec![
                c.criterion.clone(),
                v.variant.clone(),
                v.n_items.to_string(),
                opt(k.and_then(|k| k.kappa_quadratic)),
                opt(ci.map(|i| i.lower)),
                opt(ci.map(|i| i.upper)),
                opt(v.correlation.spearman),
                opt(v.error.as_ref().map(|e| e.mae)),
                opt(c.ceiling.mean_kappa_quadratic),
                c.trust.verdict.as_str().to_string(),
                c.trust.thin_evidence.to_string(),
            ]);
        }
    }
    let header = [
        "criterion",
        "variant",
        "n_items",
        "kappa_quadratic",
        "kappa_ci_low",
        "kappa_ci_high",
        "spearman",
        "mae",
        "typical_rater_kappa_quadratic",
        "trust_verdict",
        "thin_evidence",
    ];
    write_rows(path, &header, rows)
}

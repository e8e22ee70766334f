//! Report stage, Markdown writer: a compact summary fit for a pull-request comment
//! (cautions first, a headline table per system and criterion, trust verdicts,
//! before/after differences, the pairwise ranking and a count of flagged items).
//! Input: a `Report`. Output: Markdown text. Never computes a number: it only formats
//! what the report holds, and never drops a caution.

use std::fmt::Write;

use super::{Report, RunSection};

/// How many flagged items the summary lists by name.
const FLAGGED_SHOWN: usize = 10;

fn num(v: f64, digits: usize) -> String {
    if v.is_finite() {
        format!("{v:.digits$}")
    } else {
        "n/a".into()
    }
}

/// Signed, with a value that rounds to zero written `+0.00`, never `-0.00`.
fn signed(v: f64) -> String {
    let s = format!("{v:+.2}");
    if s == "-0.00" {
        "+0.00".into()
    } else {
        s
    }
}

/// A probability as a whole percentage.
fn percent(v: f64) -> String {
    if v.is_finite() {
        format!("{:.0}%", v * 100.0)
    } else {
        "n/a".into()
    }
}

fn opt(v: Option<f64>, digits: usize) -> String {
    v.map_or_else(|| "n/a".into(), |x| num(x, digits))
}

/// Escape what would break a table cell or start markup.
fn cell(s: &str) -> String {
    s.replace('|', "\\|").replace('\n', " ")
}

fn scores_table(s: &mut String, r: &Report) {
    let multi = r.runs.len() > 1;
    let _ = writeln!(s, "### Scores\n\nMean expected score per system and criterion, with its 95% bootstrap interval over items; `n` items each.\n");
    let mut head = String::from("| system |");
    let mut rule = String::from("|---|");
    if multi {
        head.push_str(" run |");
        rule.push_str("---|");
    }
    for c in &r.criteria {
        let _ = write!(
            head,
            " {} ({}–{}) |",
            c.key,
            c.labels[0],
            c.labels[c.labels.len() - 1]
        );
        rule.push_str("---|");
    }
    let _ = writeln!(s, "{head}\n{rule}");
    let mut systems: Vec<&str> = r
        .runs
        .iter()
        .flat_map(|run| run.summary.iter().map(|x| x.system.as_str()))
        .collect();
    systems.sort();
    systems.dedup();
    for sys in systems {
        for run in &r.runs {
            let mut line = format!("| `{}` |", cell(sys));
            if multi {
                let _ = write!(line, " {} |", cell(&run.name));
            }
            for c in &r.criteria {
                match run
                    .summary
                    .iter()
                    .find(|x| x.system == sys && x.criterion == c.key)
                {
                    Some(x) => {
                        let _ = write!(
                            line,
                            " {} [{}, {}] n={} |",
                            num(x.mean, 2),
                            num(x.ci_low, 2),
                            num(x.ci_high, 2),
                            x.n
                        );
                    }
                    None => line.push_str(" – |"),
                }
            }
            let _ = writeln!(s, "{line}");
        }
    }
}

fn deltas_table(s: &mut String, r: &Report) {
    if r.deltas.is_empty() {
        return;
    }
    let _ = writeln!(
        s,
        "\n### Before and after\n\nLater run minus baseline on the items both graded; paired bootstrap over items, seed {}.\n\n| system | criterion | runs | before | after | difference [95% CI] | beyond CI? |\n|---|---|---|---|---|---|---|",
        r.seed
    );
    for d in &r.deltas {
        let ci = d.ci.map_or("no interval".to_string(), |(lo, hi)| {
            format!("[{}, {}]", num(lo, 2), num(hi, 2))
        });
        let _ = writeln!(
            s,
            "| `{}` | {} | {} → {} | {} | {} | {} {} | {} |",
            cell(&d.system),
            d.criterion,
            cell(&d.baseline),
            cell(&d.run),
            num(d.before, 2),
            num(d.after, 2),
            signed(d.difference),
            ci,
            if d.beyond_ci { "**yes**" } else { "no" }
        );
    }
}

fn trust_table(s: &mut String, r: &Report) {
    let vetted: Vec<&RunSection> = r.runs.iter().filter(|run| !run.trust.is_empty()).collect();
    if vetted.is_empty() {
        return;
    }
    let multi = r.runs.len() > 1;
    let _ = writeln!(s, "\n### Can the judge stand in for a human rater?\n");
    let _ = writeln!(
        s,
        "{}| criterion | verdict | judge κ | typical human κ | gap [95% CI] | labelled items |\n{}|---|---|---|---|---|---|",
        if multi { "| run " } else { "" },
        if multi { "|---" } else { "" }
    );
    for run in vetted {
        for t in &run.trust {
            let verdict = if t.thin_evidence {
                format!("**{}** (thin evidence)", t.verdict)
            } else {
                format!("**{}**", t.verdict)
            };
            let gap = t.gap.map_or("n/a".to_string(), |g| {
                format!(
                    "{} [{}, {}]",
                    signed(g.estimate),
                    num(g.low, 2),
                    num(g.high, 2)
                )
            });
            let _ = writeln!(
                s,
                "{}| {} | {} | {} | {} | {} | {} |",
                if multi {
                    format!("| {} ", cell(&run.name))
                } else {
                    String::new()
                },
                t.criterion,
                verdict,
                opt(t.judge_kappa, 2),
                opt(t.human_kappa, 2),
                gap,
                t.n_items
            );
        }
    }
}

fn pairwise(s: &mut String, r: &Report) {
    let Some(p) = &r.pairwise else { return };
    let _ = writeln!(
        s,
        "\n### Pairwise (`{}`, {} pairs, both orders)\n",
        p.criterion, p.pairs
    );
    if let Some(pos) = &p.position {
        let _ = writeln!(
            s,
            "Position: first-slot win rate {} [{}, {}], consistency {}; {}\n",
            num(pos.first_slot_win_rate, 2),
            num(pos.first_slot_ci.0, 2),
            num(pos.first_slot_ci.1, 2),
            num(pos.consistency, 2),
            pos.verdict_line
        );
    }
    if let Some(r) = &p.rule {
        let k = &r.calibration;
        let _ = writeln!(
            s,
            "Verdict rule: **{}** ({}). Judge's slot prior: first {}, second {}, tie {}{}; same winner in both orders {} raw, {} calibrated; first-shown answer wins {} raw, {} calibrated.\n",
            r.name,
            if r.chosen_against_humans {
                "chosen against the human preferences"
            } else {
                "default, no human preferences to choose with"
            },
            num(k.prior.first, 3),
            num(k.prior.second, 3),
            num(k.prior.tie, 3),
            if k.prior.tie_estimated { "" } else { " (tie prior left neutral)" },
            num(k.before.consistency, 2),
            num(k.after.consistency, 2),
            num(k.before.first_slot_rate, 2),
            num(k.after.first_slot_rate, 2)
        );
    }
    match (&p.ranking, &p.ranking_note) {
        (Some(k), _) => {
            if let Some(prior) = &k.prior {
                let _ = writeln!(s, "Note: {prior}.\n");
            }
            let _ = writeln!(
                s,
                "| system | chance of beating an average system (95% interval) | won of compared, ties half |\n|---|---|---|"
            );
            for row in &k.rows {
                let _ = writeln!(
                    s,
                    "| `{}` | {} ({} to {}) | {} of {} |",
                    cell(&row.system),
                    percent(row.beats_average),
                    percent(row.beats_average_low),
                    percent(row.beats_average_high),
                    row.wins as f64 + 0.5 * row.ties as f64,
                    row.comparisons()
                );
            }
        }
        (None, Some(note)) => {
            let _ = writeln!(s, "{note}");
        }
        (None, None) => {}
    }
    for h in &p.human {
        let _ = writeln!(
            s,
            "{}- {} verdicts match the human majority on {} of {} pairs",
            if std::ptr::eq(h, &p.human[0]) {
                "\n"
            } else {
                ""
            },
            h.method,
            num(h.accuracy * 100.0, 0) + "%",
            p.human_pairs
        );
    }
}

/// The self-preference probe of the comparison run, when it ran.
fn self_preference(s: &mut String, r: &Report) {
    let Some(sp) = r.pairwise.as_ref().and_then(|p| p.self_preference.as_ref()) else {
        return;
    };
    let _ = writeln!(
        s,
        "\nSelf-preference (`{}`): {}.",
        cell(&sp.judge_name),
        sp.summary
    );
    if let Some(pw) = &sp.pointwise {
        let _ = writeln!(
            s,
            "Against human labels, the judge's score minus the human consensus is {} on its own answers ({} grades) and {} on others ({}); compared at equal human scores, the difference is {} [{}, {}].",
            num(pw.own_mean_residual, 2),
            pw.n_own,
            num(pw.other_mean_residual, 2),
            pw.n_other,
            num(pw.difference, 2),
            num(pw.ci.0, 2),
            num(pw.ci.1, 2)
        );
    }
}

fn flagged(s: &mut String, r: &Report) {
    if r.flagged.is_empty() {
        return;
    }
    let low = r
        .flagged
        .iter()
        .filter(|f| f.reasons.iter().any(|x| x == "low_mass"))
        .count();
    let disputed = r
        .flagged
        .iter()
        .filter(|f| f.reasons.iter().any(|x| x == "disputed"))
        .count();
    let _ = writeln!(
        s,
        "\n### Flagged items\n\n{} flagged: {low} with low captured mass, {disputed} where judge and human consensus differ by 2 or more points.\n",
        r.flagged.len()
    );
    for f in r.flagged.iter().take(FLAGGED_SHOWN) {
        let humans = if f.human_scores.is_empty() {
            "no human labels".to_string()
        } else {
            format!(
                "humans {} ({})",
                f.human_consensus.as_deref().unwrap_or("n/a"),
                f.human_scores
                    .iter()
                    .map(|h| h.score.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        };
        let _ = writeln!(
            s,
            "- `{}/{}` {}{}: judge {} (mass {}), {}; {}",
            cell(&f.question_id),
            cell(&f.system),
            f.criterion,
            if r.runs.len() > 1 {
                format!(" in `{}`", cell(&f.run))
            } else {
                String::new()
            },
            num(f.expected, 2),
            num(f.captured_mass, 2),
            humans,
            f.reasons.join(", ").replace('_', " ")
        );
    }
    if r.flagged.len() > FLAGGED_SHOWN {
        let _ = writeln!(
            s,
            "- … and {} more (all are in the HTML and JSON reports)",
            r.flagged.len() - FLAGGED_SHOWN
        );
    }
}

/// The report as Markdown.
fn variants(s: &mut String, r: &Report) {
    let Some(v) = &r.variants else { return };
    let _ = writeln!(s, "\n### Variants compared out of sample\n\nQuadratic kappa with the human consensus on the same labelled items, 95% percentile interval; calibrated variants are cross-fitted (each item scored by a model fitted without its question).{}\n", if v.panel_members.is_empty() { String::new() } else { format!(" Panel: {}.", v.panel_members.join(", ")) });
    for c in &v.choice.criteria {
        let _ = writeln!(s, "**{}** ({} items)\n\n| variant | kappa_q [95% CI] | Spearman | MAE | how |\n|---|---|---|---|---|", c.criterion, c.items);
        for x in &c.variants {
            let ci = x
                .kappa_quadratic_ci
                .percentile
                .as_ref()
                .map_or(String::new(), |p| {
                    format!(" [{}, {}]", num(p.lower, 2), num(p.upper, 2))
                });
            let how = x
                .methods
                .as_deref()
                .map_or("as graded".to_string(), |m| format!("calibrated: {m}"));
            let _ = writeln!(
                s,
                "| {} | {}{ci} | {} | {} | {} |",
                cell(&x.variant),
                opt(x.kappa_quadratic, 2),
                opt(x.spearman, 2),
                num(x.mae, 2),
                cell(&how)
            );
        }
        let nested = c
            .nested_kappa_ci
            .percentile
            .as_ref()
            .map_or(String::new(), |p| {
                format!(" [{}, {}]", num(p.lower, 2), num(p.upper, 2))
            });
        let _ = writeln!(s, "\nBest on these items: `{}` (optimistic); picked on other folds, used on the held-out one: kappa {}{nested}.\n", c.best.as_deref().unwrap_or("none"), opt(c.nested_kappa_quadratic, 2));
    }
}

pub fn render(r: &Report) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "## assize report: rubric `{}`\n", r.rubric);
    for run in &r.runs {
        let role = match run.role.as_str() {
            "baseline" => "baseline",
            "after" => "after",
            _ => "graded",
        };
        let _ = writeln!(
            s,
            "- run `{}` ({role}): {} grades by judge `{}`",
            cell(&run.name),
            run.records,
            cell(&run.model)
        );
    }
    if let Some(p) = &r.pairwise {
        let _ = writeln!(
            s,
            "- comparison: {} pairs on `{}` by judge `{}`",
            p.pairs,
            p.criterion,
            cell(&p.model)
        );
    }
    if r.cautions.is_empty() {
        let _ = writeln!(s, "\nNo cautions apply.");
    } else {
        let _ = writeln!(s, "\n> [!WARNING]\n> **Read these first**");
        for c in &r.cautions {
            let _ = writeln!(s, "> - {}", c.message);
        }
    }
    s.push('\n');
    scores_table(&mut s, r);
    deltas_table(&mut s, r);
    trust_table(&mut s, r);
    pairwise(&mut s, r);
    self_preference(&mut s, r);
    variants(&mut s, r);
    flagged(&mut s, r);
    let _ = writeln!(
        s,
        "\n<sub>assize {} · schema `{}` · seed {} · {} resamples · {}</sub>",
        r.tool_version, r.schema, r.seed, r.resamples, r.generated_at
    );
    s
}

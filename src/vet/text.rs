//! Vetting stage, output side: a `VetReport` (and optionally a `PairVetReport`) as
//! plain text for a terminal: per criterion a side-by-side table of variants, the
//! primary variant in detail, the human ceiling, the trust card and calibration, then
//! the pairwise findings. Input: the reports. Output: one `String`. Never computes a
//! statistic and never hides a caution: every warning of a card is printed, and a
//! "yes" that rests on thin evidence says so in words.

use std::fmt::Write;

use super::agreement::IntervalPair;
use super::card::Verdict;
use super::{CriterionReport, PairVetReport, VetReport};
use crate::stats::bootstrap::BootstrapInterval;

fn num(v: Option<f64>) -> String {
    v.map_or_else(|| "n/a".into(), |x| format!("{x:.3}"))
}

fn ci(i: Option<&BootstrapInterval>) -> String {
    i.map_or_else(
        || "[n/a]".into(),
        |c| format!("[{:.3}, {:.3}]", c.lower, c.upper),
    )
}

fn both(p: &IntervalPair) -> String {
    format!(
        "percentile {}, BCa {}",
        ci(p.percentile.as_ref()),
        ci(p.bca.as_ref())
    )
}

/// The human-readable vetting report: tables, trust cards and plain-words cautions.
pub fn report_text(r: &VetReport, p: Option<&PairVetReport>) -> String {
    let mut s = String::new();
    let o = &r.options;
    let _ = writeln!(
        s,
        "vetting against human labels: rubric `{}`, {} resamples, seed {}, {:.0}% intervals, margin {:.2}",
        r.rubric,
        o.resamples,
        o.seed,
        o.level * 100.0,
        o.margin
    );
    let _ = writeln!(
        s,
        "\ntrust summary (primary variant `{}`; details per criterion below)",
        r.variants.first().map_or("", |v| v.name.as_str())
    );
    for c in &r.criteria {
        let thin = if c.trust.thin_evidence {
            " (thin evidence)"
        } else {
            ""
        };
        let _ = writeln!(
            s,
            "  {:<16} {}{thin}",
            c.criterion,
            c.trust.verdict.as_str()
        );
    }
    for c in &r.criteria {
        criterion(&mut s, c);
    }
    for k in &r.skipped {
        let _ = writeln!(s, "\nnot vetted: `{}` ({})", k.criterion, k.reason);
    }
    if let Some(p) = p {
        pairs(&mut s, p);
    }
    s
}

fn criterion(s: &mut String, c: &CriterionReport) {
    let _ = writeln!(
        s,
        "\n== {} (scale {}, {} labelled items, raters: {})",
        c.criterion,
        c.scale.join("/"),
        c.labelled_items,
        c.raters.join(", ")
    );
    card(s, c);
    let _ = writeln!(s, "\n  variants against the human consensus");
    let _ = writeln!(
        s,
        "  {:<24} {:>4}  {:>7} {:<18}  {:>8}  {:>6}",
        "variant", "n", "kappa_q", "95% CI", "spearman", "MAE"
    );
    for v in &c.variants {
        let kq = v.categorical.as_ref();
        let _ = writeln!(
            s,
            "  {:<24} {:>4}  {:>7} {:<18}  {:>8}  {:>6}",
            v.variant,
            v.n_items,
            num(kq.and_then(|k| k.kappa_quadratic)),
            kq.map_or("(baseline)".into(), |k| ci(k
                .kappa_quadratic_ci
                .percentile
                .as_ref())),
            num(v.correlation.spearman),
            num(v.error.as_ref().map(|e| e.mae)),
        );
    }
    if let Some(v) = c.variants.first() {
        let _ = writeln!(s, "\n  `{}` in detail ({} items)", v.variant, v.n_items);
        if let Some(k) = &v.categorical {
            let _ = writeln!(
                s,
                "    exact {:.3}, within one {:.3}",
                k.exact, k.within_one
            );
            let _ = writeln!(
                s,
                "    kappa unweighted {} {}, linear {}, quadratic {}",
                num(k.kappa_unweighted),
                ci(k.kappa_unweighted_ci.percentile.as_ref()),
                num(k.kappa_linear),
                num(k.kappa_quadratic)
            );
            let _ = writeln!(
                s,
                "    quadratic kappa intervals: {}",
                both(&k.kappa_quadratic_ci)
            );
            let _ = writeln!(
                s,
                "    alpha nominal {}, ordinal {}, interval {}; Gwet AC1 {}, AC2 (quadratic) {}",
                num(k.alpha_nominal),
                num(k.alpha_ordinal),
                num(k.alpha_interval),
                num(k.gwet_ac1),
                num(k.gwet_ac2_quadratic)
            );
            let per: Vec<String> = k
                .per_rater
                .iter()
                .map(|r| format!("{} {} (n {})", r.rater, num(r.kappa_quadratic), r.n_items))
                .collect();
            let _ = writeln!(
                s,
                "    quadratic kappa against each rater: {}",
                per.join(", ")
            );
            let _ = writeln!(s, "    confusion (rows human consensus, columns judge)");
            let _ = writeln!(
                s,
                "      {:>6} {}",
                "",
                c.scale
                    .iter()
                    .map(|l| format!("{l:>5}"))
                    .collect::<String>()
            );
            for (label, row) in c.scale.iter().zip(&k.confusion) {
                let _ = writeln!(
                    s,
                    "      {label:>6} {}",
                    row.iter().map(|x| format!("{x:>5}")).collect::<String>()
                );
            }
        }
        let cr = &v.correlation;
        let _ = writeln!(
            s,
            "    spearman {} ({}), kendall tau-b {}, pearson {}",
            num(cr.spearman),
            both(&cr.spearman_ci),
            num(cr.kendall_tau_b),
            num(cr.pearson)
        );
        if let Some(e) = &v.error {
            let lean = if e.mean_signed_bias > 0.0 {
                "more lenient"
            } else {
                "harsher"
            };
            let _ = writeln!(
                s,
                "    MAE {:.3} {}, bias {:+.3} (judge {lean} than humans on average)",
                e.mae,
                ci(e.mae_ci.percentile.as_ref()),
                e.mean_signed_bias
            );
        }
    }
    let h = &c.ceiling;
    let _ = writeln!(
        s,
        "\n  human ceiling (each rater against the consensus of the others)"
    );
    for r in &h.per_rater {
        let _ = writeln!(
            s,
            "    {:<16} kappa_q {}, spearman {} (n {})",
            r.rater,
            num(r.kappa_quadratic),
            num(r.spearman),
            r.n_items
        );
    }
    let _ = writeln!(
        s,
        "    typical rater (mean over raters, each on every item it labelled): kappa_q {}, spearman {}; ordinal alpha among raters {}",
        num(h.mean_kappa_quadratic),
        num(h.mean_spearman),
        num(h.alpha_ordinal)
    );
    if let Some(n) = &h.note {
        let _ = writeln!(s, "    note: {n}");
    }
    calibration(s, c);
    for n in c
        .variants
        .iter()
        .flat_map(|v| v.notes.iter().map(move |n| (v, n)))
    {
        let _ = writeln!(s, "  note: {}: {}", n.0.variant, n.1);
    }
    for n in &c.notes {
        let _ = writeln!(s, "  note: {n}");
    }
}

fn card(s: &mut String, c: &CriterionReport) {
    let t = &c.trust;
    let _ = writeln!(
        s,
        "  trust card for `{}`: can `{}` stand in for a rater? {}",
        c.criterion,
        t.variant,
        t.verdict.as_str().to_uppercase()
    );
    let _ = writeln!(
        s,
        "    on the {} items the judge graded: judge kappa_q {} vs typical rater {} (judge against the raters' own leave-one-out references: {})",
        t.n_items,
        num(t.judge_kappa_quadratic),
        num(t.human_kappa_quadratic),
        num(t.judge_kappa_matched)
    );
    let _ = writeln!(s, "    why: {}", t.reason);
    if let Some(a) = &t.advice {
        let _ = writeln!(s, "    sample: {}", a.message);
    }
    for w in &t.warnings {
        let _ = writeln!(s, "    warning: {w}");
    }
    if t.verdict == Verdict::Yes && t.thin_evidence {
        let _ = writeln!(
            s,
            "    caution: this yes rests on thin evidence; treat it as provisional until more items are labelled"
        );
    }
}

fn calibration(s: &mut String, c: &CriterionReport) {
    if c.calibration.is_empty() {
        return;
    }
    let _ = writeln!(
        s,
        "\n  calibration (top probability vs argmax = consensus; 10 bins)"
    );
    let _ = writeln!(
        s,
        "    {:<20} {:>5} {:>6} {:>9} {:>8} {:>6} {:>6} {:>8} {:>6} {:>14}",
        "variant",
        "acc",
        "conf",
        "ECE width",
        "ECE mass",
        "MCE",
        "Brier",
        "log loss",
        "T",
        "held-out ECE"
    );
    for k in &c.calibration {
        let (t, after) = k
            .temperature
            .as_ref()
            .map_or(("n/a".into(), "n/a".into()), |t| {
                let cv = &t.cross_validated;
                (
                    format!("{:.2}", t.fitted_on_all),
                    format!("{:.3} -> {:.3}", cv.ece_before, cv.ece_after),
                )
            });
        let _ = writeln!(
            s,
            "    {:<20} {:>5.3} {:>6.3} {:>9.3} {:>8.3} {:>6.3} {:>6.3} {:>8.3} {:>6} {:>14}",
            k.variant,
            k.accuracy,
            k.mean_confidence,
            k.ece_equal_width,
            k.ece_equal_mass,
            k.mce_equal_width,
            k.brier,
            k.log_loss,
            t,
            after
        );
        if let Some(n) = &k.note {
            let _ = writeln!(s, "      note: {n}");
        }
    }
    if let Some(k) = c.calibration.first() {
        let _ = writeln!(
            s,
            "    reliability of `{}` (confidence bin: items, accuracy, mean confidence)",
            k.variant
        );
        for b in &k.reliability {
            let _ = writeln!(
                s,
                "      ({:.1}, {:.1}]: {:>4}, {:.3}, {:.3}",
                b.lo, b.hi, b.count, b.accuracy, b.mean_confidence
            );
        }
    }
}

fn pairs(s: &mut String, p: &PairVetReport) {
    let _ = writeln!(
        s,
        "\n== pairwise verdicts against the human majority ({} compared pairs, {} judge{}, {} resamples, {:.0}% intervals)",
        p.human_pairs,
        p.judges,
        if p.judges == 1 { "" } else { "s (panel)" },
        p.resamples,
        p.level * 100.0
    );
    for c in &p.criteria {
        let _ = writeln!(
            s,
            "\n  `{}`: {} pairs judged in both orders ({} human ties); left out: {} judged in one order, {} without human preference{}",
            c.criterion,
            c.n_pairs,
            c.human_ties,
            c.one_order_only,
            c.without_human,
            if c.panel_incomplete > 0 {
                format!(", {} missing from a panel member", c.panel_incomplete)
            } else {
                String::new()
            }
        );
        let _ = writeln!(
            s,
            "    position (raw judge): {}",
            c.position_bias.verdict_line
        );
        slot_prior(s, c);
        let _ = writeln!(
            s,
            "    {:<24} {:>9} {:<18} {:>7} {:<18} {:>11} {:>10}",
            "rule", "agreement", "95% CI", "kappa", "95% CI", "consistency", "first slot"
        );
        for m in &c.methods {
            let (cons, first) = m
                .order
                .map_or(("order-free".to_string(), "-".to_string()), |o| {
                    (
                        format!("{:.2}", o.consistency),
                        format!("{:.2}", o.first_slot_rate),
                    )
                });
            let _ = writeln!(
                s,
                "    {:<24} {:>9.3} {:<18} {:>7} {:<18} {:>11} {:>10}{}",
                m.method,
                m.accuracy,
                ci(m.accuracy_ci.as_ref()),
                num(m.kappa),
                ci(m.kappa_ci.as_ref()),
                cons,
                first,
                if m.out_of_sample {
                    "  (tie band fitted, scored out of sample)"
                } else {
                    ""
                }
            );
        }
        for n in &c.notes {
            let _ = writeln!(s, "    note: {n}");
        }
        if let Some(ch) = &c.chosen {
            let _ = writeln!(
                s,
                "    chosen rule: {}{} (highest agreement, or within one standard error of it and listed earlier in the preference order)",
                ch.name,
                ch.tie_band.map_or(String::new(), |b| format!(", tie band {b:.3}"))
            );
            if let Some(m) = c.methods.iter().find(|m| m.rule == Some(ch.rule)) {
                let _ = writeln!(
                    s,
                    "    order effect: raw judge {:.2} same winner in both orders, first-shown answer wins {:.2}; chosen rule {}",
                    c.calibration.before.consistency,
                    c.calibration.before.first_slot_rate,
                    m.order.map_or("order-free (pointwise grades)".to_string(), |o| format!(
                        "{:.2} and {:.2}",
                        o.consistency, o.first_slot_rate
                    ))
                );
            }
            match ch.nested_accuracy {
                Some(a) => {
                    let picks: Vec<String> =
                        ch.picks.iter().map(|(r, n)| format!("{r} {n}x")).collect();
                    let _ = writeln!(
                        s,
                        "    choosing out of sample (rule picked on other questions, scored on held-out ones): agreement {a:.3} {}; picked {}",
                        ci(ch.nested_ci.as_ref()),
                        picks.join(", ")
                    );
                    let _ = writeln!(
                        s,
                        "    caution: the chosen rule's own row is the best of {} and so flatters it; expect the out-of-sample figure on new pairs",
                        c.methods.len()
                    );
                }
                None => {
                    let _ = writeln!(
                        s,
                        "    caution: pairs on one question only: the choice cannot be scored out of sample; its row flatters it"
                    );
                }
            }
        }
    }
}

fn slot_prior(s: &mut String, c: &super::PairCriterionReport) {
    let k = &c.calibration;
    let _ = writeln!(
        s,
        "    slot prior (Zhao et al. 2021 calibration, from {} pairs, {} identical-answer and {} content-free probes): first {:.3}, second {:.3}, tie {:.3}{}",
        k.prior.from_pairs,
        k.prior.from_identical,
        k.prior.from_content_free,
        k.prior.first,
        k.prior.second,
        k.prior.tie,
        if k.prior.tie_estimated { "" } else { " (tie prior not identified without content-free probes: left neutral)" }
    );
    let _ = writeln!(
        s,
        "    same winner in both orders: {:.2} raw, {:.2} calibrated; first-shown answer wins {:.2} raw, {:.2} calibrated",
        k.before.consistency, k.after.consistency, k.before.first_slot_rate, k.after.first_slot_rate
    );
}

/// The out-of-sample variant comparison and the chosen variant, per criterion.
pub fn choice_text(c: &super::VariantChoice) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "\nvariants compared on the same labelled items (quadratic kappa with the human consensus, percentile interval)"
    );
    let _ = writeln!(
        s,
        "calibrated variants are fitted on human labels: each item's figure comes from a model fitted without its question (cross-fitting), so it is out of sample"
    );
    for k in &c.criteria {
        let _ = writeln!(
            s,
            "\n`{}`: {} items, {} folds grouped by question",
            k.criterion, k.items, k.folds
        );
        let _ = writeln!(
            s,
            "  {:<28} {:>8} {:>18} {:>9} {:>6}  how",
            "variant", "kappa_q", "interval", "spearman", "MAE"
        );
        for v in &k.variants {
            let _ = writeln!(
                s,
                "  {:<28} {:>8} {:>18} {:>9} {:>6.2}  {}",
                v.variant,
                num(v.kappa_quadratic),
                ci(v.kappa_quadratic_ci.percentile.as_ref()),
                num(v.spearman),
                v.mae,
                v.methods
                    .as_deref()
                    .map_or("as graded".to_string(), |m| format!("calibrated: {m}"))
            );
        }
        let _ = writeln!(
            s,
            "  best on these items: {} (picked and scored on the same items, so its figure is optimistic)",
            k.best.as_deref().map_or("none".to_string(), |b| format!("`{b}`"))
        );
        let _ = writeln!(
            s,
            "  choose, then use (nested cross-validation: picked on the other folds, scored on the held-out one): kappa {} {}; picked per fold: {}",
            num(k.nested_kappa_quadratic),
            ci(k.nested_kappa_ci.percentile.as_ref()),
            k.chosen_per_fold.join(", ")
        );
    }
    for k in &c.skipped {
        let _ = writeln!(s, "\nnot compared: {k}");
    }
    s
}

//! Report stage, HTML writer: one self-contained page (inline CSS and inline SVG
//! charts, no scripts, no external assets, no network) that reads offline and prints.
//! Input: a `Report`. Output: HTML text rendered through the minijinja templates in
//! `templates/`. Never lets data text become markup: every template is HTML-escaped.

use minijinja::{context, AutoEscape, Environment, Value};
use serde::Serialize;

use super::svg::{self, ConfusionChart, ReliabilityChart};
use super::{Report, ReportError, TrustRow};

const PAGE: &str = include_str!("templates/report.html.j2");
const CHARTS: &str = include_str!("templates/charts.j2");
const STYLE: &str = include_str!("templates/style.css");

/// A trust card with its two charts.
#[derive(Debug, Serialize)]
struct Card<'a> {
    title: &'a str,
    trust: &'a TrustRow,
    confusion: ConfusionChart,
    reliability: Option<ReliabilityChart>,
}

/// `num(v, digits)`: fixed decimals, `n/a` for none or a non-finite number.
fn num(v: Option<f64>, digits: Option<usize>) -> String {
    match v {
        Some(x) if x.is_finite() => format!("{:.*}", digits.unwrap_or(2), x),
        _ => "n/a".into(),
    }
}

/// `signed(v, digits)`: like `num`, with an explicit sign.
fn signed(v: Option<f64>, digits: Option<usize>) -> String {
    match v {
        // A value that rounds to zero prints as +0.00, never -0.00.
        Some(x) if x.is_finite() => {
            let d = digits.unwrap_or(2);
            let shown = format!("{x:+.d$}");
            if shown
                .trim_start_matches(['-', '+'])
                .chars()
                .all(|c| c == '0' || c == '.')
            {
                shown.replacen('-', "+", 1)
            } else {
                shown
            }
        }
        _ => "n/a".into(),
    }
}

/// `prose`: a message written with Markdown-style backticks (cautions, verdict lines,
/// notes) as HTML: escaped first, then each `x` pair becomes <code>x</code>. Only for
/// the tool's own messages, never for answers or other data text.
fn prose(text: &str) -> Value {
    let escaped = minijinja::HtmlEscape(text).to_string();
    let mut out = String::with_capacity(escaped.len());
    for (i, part) in escaped.split('`').enumerate() {
        match i % 2 {
            1 => out.push_str(&format!("<code>{part}</code>")),
            _ => out.push_str(part),
        }
    }
    if escaped.matches('`').count() % 2 == 1 {
        // An unpaired backtick stays as written.
        return Value::from_safe_string(escaped);
    }
    Value::from_safe_string(out)
}

fn environment() -> Result<Environment<'static>, minijinja::Error> {
    let mut env = Environment::new();
    env.set_auto_escape_callback(|_| AutoEscape::Html);
    env.add_filter("num", num);
    env.add_filter("signed", signed);
    env.add_filter("prose", prose);
    env.add_template("charts.j2", CHARTS)?;
    env.add_template("report.html.j2", PAGE)?;
    Ok(env)
}

/// The report as one self-contained HTML page.
pub fn render(r: &Report) -> Result<String, ReportError> {
    let err = |source| ReportError::Render {
        format: "HTML",
        source,
    };
    let env = environment().map_err(err)?;
    let dist: Vec<_> = r.criteria.iter().map(|c| svg::dist_chart(r, c)).collect();
    let cards: Vec<Vec<Card>> = r
        .runs
        .iter()
        .enumerate()
        .map(|(i, run)| {
            run.trust
                .iter()
                .filter_map(|t| {
                    let c = r.criteria.iter().find(|c| c.key == t.criterion)?;
                    Some(Card {
                        title: &c.title,
                        trust: t,
                        confusion: svg::confusion_chart(i, t, c),
                        reliability: svg::reliability_chart(i, t, c),
                    })
                })
                .collect()
        })
        .collect();
    let pw = r.pairwise.as_ref();
    let ctx = context! {
        report => Value::from_serialize(r),
        css => Value::from_safe_string(STYLE.to_string()),
        dist => dist,
        cards => cards,
        position => pw.and_then(|p| p.position.as_ref()).map(svg::position_chart),
        ranking => pw.and_then(|p| p.ranking.as_ref()).map(svg::ranking_chart),
        deltas => (!r.deltas.is_empty()).then(|| svg::delta_chart(&r.deltas, r.runs.len())),
    };
    env.get_template("report.html.j2")
        .and_then(|t| t.render(ctx))
        .map_err(err)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn prose_turns_backtick_pairs_into_code_after_escaping() {
        assert_eq!(
            prose("systems `a<b>` and `c`").to_string(),
            "systems <code>a&lt;b&gt;</code> and <code>c</code>"
        );
        assert_eq!(prose("one ` tick").to_string(), "one ` tick");
    }

    #[test]
    fn number_filters_write_missing_values_as_n_a() {
        assert_eq!(num(None, None), "n/a");
        assert_eq!(num(Some(f64::NAN), Some(1)), "n/a");
        assert_eq!(num(Some(0.126), Some(2)), "0.13");
        assert_eq!(signed(Some(0.5), Some(1)), "+0.5");
        assert_eq!(signed(Some(-0.001), Some(2)), "+0.00");
        assert_eq!(signed(Some(-0.05), Some(2)), "-0.05");
    }

    #[test]
    fn templates_parse() {
        environment().expect("bundled templates are valid");
    }
}

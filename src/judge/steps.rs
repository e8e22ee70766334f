//! Evaluation steps written by the judge itself from a criterion's description, for
//! reasoning-first grading (the form-filling method of Liu et al. 2023 generates its
//! chain-of-thought steps once per criterion this way). Input: a criterion and a
//! backend. Output: a list of short steps. Never called per item: the caller caches
//! the steps in the run folder so every item sees the same ones.

use super::Backend;
use crate::engine::EngineError;
use crate::rubric::forms::Form;
use crate::rubric::Criterion;

/// Ask the judge for 3-5 evaluation steps for `criterion`; greedy, so repeatable.
pub fn generate_steps(
    backend: &dyn Backend,
    criterion: &Criterion,
) -> Result<Vec<String>, EngineError> {
    let points: Vec<String> = criterion
        .points
        .iter()
        .map(|(l, t)| format!("- {l}: {t}"))
        .collect();
    let form = Form {
        system: "You write short, concrete instructions for people who grade written answers.".into(),
        user: format!(
            "Write 3 to 5 numbered evaluation steps that a grader should follow, in order, to score an answer on this criterion. One short sentence per step.\n\nCriterion: {}\n{}\n\nScale:\n{}",
            criterion.title,
            criterion.question,
            points.join("\n")
        ),
        prefill: "1.".into(),
    };
    let text = backend.continue_form(
        &format!("steps for `{}`", criterion.key),
        &form,
        160,
        &["\n\n\n"],
        0,
    )?;
    Ok(parse_steps(&format!("1.{text}")))
}

/// Numbered lines (`1.`, `2)`) into step texts; at most five.
pub fn parse_steps(text: &str) -> Vec<String> {
    text.lines()
        .filter_map(|l| {
            let l = l.trim();
            let digits = l.chars().take_while(|c| c.is_ascii_digit()).count();
            if digits == 0 {
                return None;
            }
            let rest = l[digits..].trim_start_matches(['.', ')', ':']).trim();
            (!rest.is_empty()).then(|| rest.to_string())
        })
        .take(5)
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbered_lines_become_steps() {
        let s = parse_steps("1. Read the reference.\n2) Compare the facts.\nnoise\n3: Decide.\n");
        assert_eq!(
            s,
            vec!["Read the reference.", "Compare the facts.", "Decide."]
        );
    }
}

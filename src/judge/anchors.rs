//! Few-shot anchors: labelled examples shown in a grading form, taken from the human
//! labels. Input: answers, label rows, a rubric, a count and a seed. Output: for each
//! criterion a fixed, seeded list of examples; an item never sees an anchor from its
//! own question. Never reads files.

use std::collections::HashMap;

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::data::{AnswerRecord, LabelRow};
use crate::rubric::forms::Anchor;
use crate::rubric::Rubric;

/// The consensus of several ratings on an ordinal scale: the median scale position,
/// taking the lower middle position when the count is even (so the consensus is
/// always a label on the scale). `None` for no ratings.
pub fn consensus_index(positions: &[usize]) -> Option<usize> {
    if positions.is_empty() {
        return None;
    }
    let mut v = positions.to_vec();
    v.sort_unstable();
    Some(v[(v.len() - 1) / 2])
}

/// Anchors per criterion, in their fixed order.
#[derive(Debug, Clone, Default)]
pub struct AnchorPool {
    per_criterion: HashMap<String, Vec<(String, Anchor)>>,
    k: usize,
}

impl AnchorPool {
    /// Choose up to `k` anchors per criterion (plus one spare), covering as many
    /// different consensus labels as possible, in a seeded order.
    pub fn build(
        answers: &[AnswerRecord],
        labels: &[LabelRow],
        rubric: &Rubric,
        k: usize,
        seed: u64,
    ) -> Self {
        let mut per_criterion = HashMap::new();
        for c in &rubric.criteria {
            let mut ratings: HashMap<(&str, &str), Vec<usize>> = HashMap::new();
            for l in labels.iter().filter(|l| l.criterion == c.key) {
                if let Some(i) = c.scale.index_of(&l.score) {
                    ratings
                        .entry((l.question_id.as_str(), l.system.as_str()))
                        .or_default()
                        .push(i);
                }
            }
            let mut candidates: Vec<(&AnswerRecord, usize)> = answers
                .iter()
                .filter_map(|a| {
                    ratings
                        .get(&(a.question_id.as_str(), a.system.as_str()))
                        .and_then(|r| consensus_index(r))
                        .map(|i| (a, i))
                })
                .collect();
            candidates.sort_by_key(|x| x.0.item_id());
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            candidates.shuffle(&mut rng);
            let mut chosen: Vec<(&AnswerRecord, usize)> = Vec::new();
            // First pass: distinct labels; second pass: fill up.
            for pass in 0..2 {
                for cand in &candidates {
                    if chosen.len() > k {
                        break;
                    }
                    let dup_label = chosen.iter().any(|c| c.1 == cand.1);
                    let dup_item = chosen.iter().any(|c| std::ptr::eq(c.0, cand.0));
                    if !dup_item && (pass == 1 || !dup_label) {
                        chosen.push(*cand);
                    }
                }
            }
            let labels_of = c.scale.labels();
            per_criterion.insert(
                c.key.clone(),
                chosen
                    .into_iter()
                    .map(|(a, i)| {
                        (
                            a.question_id.clone(),
                            Anchor {
                                question: a.question.clone(),
                                answer: a.answer.clone(),
                                label: labels_of[i].clone(),
                            },
                        )
                    })
                    .collect(),
            );
        }
        AnchorPool { per_criterion, k }
    }

    /// The anchors shown when grading an answer to `question_id` on `criterion`.
    pub fn for_item(&self, criterion: &str, question_id: &str) -> Vec<Anchor> {
        self.per_criterion
            .get(criterion)
            .map(|v| {
                v.iter()
                    .filter(|(q, _)| q != question_id)
                    .take(self.k)
                    .map(|(_, a)| a.clone())
                    .collect()
            })
            .unwrap_or_default()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn consensus_is_the_lower_median_position() {
        assert_eq!(consensus_index(&[3, 1, 2]), Some(2));
        assert_eq!(consensus_index(&[4, 1]), Some(1));
        assert_eq!(consensus_index(&[]), None);
    }
}

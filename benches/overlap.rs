//! Benchmark, overlap stage: single-thread throughput of ROUGE-L, BLEU and the full
//! `score_pair` on invented 50-word answer pairs.
//!
//! Input: none (pairs are generated from a fixed word list and a fixed-seed
//! generator). Output: pairs per second per metric on stdout. Must never
//! read files or assert on time; numbers are compared as ratios between runs.

use std::hint::black_box;
use std::time::{Duration, Instant};

use assize::overlap::{
    indel_similarity, levenshtein_similarity, rouge, rouge_l_pair, score_pair, sentence_bleu,
    sentence_chrf, BleuOptions, ChrfOptions, OverlapOptions, RougeOptions,
};

/// Invented vocabulary for a made-up garden-club help desk.
#[rustfmt::skip]
const WORDS: &[&str] = &[
    "the", "a", "of", "to", "and", "in", "is", "it", "that", "for", "seed", "tray", "soil",
    "water", "compost", "sunlight", "shade", "tomato", "basil", "pot", "roots", "leaves",
    "weekly", "daily", "gently", "prune", "stem", "mulch", "frost", "spring", "autumn",
    "drainage", "fertiliser", "seedlings", "should", "be", "kept", "moist", "but", "not",
    "soaked", "until", "they", "sprout", "move", "outdoors", "after", "last", "warm", "nights",
    "wilting", "means", "too", "much", "little",
];

/// A tiny linear congruential generator so the bench needs no extra crate.
struct Lcg(u64);

impl Lcg {
    fn next(&mut self, n: usize) -> usize {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((self.0 >> 33) % n as u64) as usize
    }
}

/// 50-word answer and a reference that keeps about 70% of its words in place.
fn make_pairs(count: usize) -> Vec<(String, String)> {
    let mut rng = Lcg(42);
    (0..count)
        .map(|_| {
            let hyp: Vec<&str> = (0..50).map(|_| WORDS[rng.next(WORDS.len())]).collect();
            let refr: Vec<&str> = hyp
                .iter()
                .map(|&w| {
                    if rng.next(10) < 7 {
                        w
                    } else {
                        WORDS[rng.next(WORDS.len())]
                    }
                })
                .collect();
            (
                format!("{}.", hyp.join(" ")),
                format!("{}.", refr.join(" ")),
            )
        })
        .collect()
}

/// Runs `f` over all pairs repeatedly for at least `budget`, returns pairs/second.
fn measure(pairs: &[(String, String)], budget: Duration, mut f: impl FnMut(&str, &str)) -> f64 {
    for (h, r) in pairs.iter().take(20) {
        f(h, r); // warm-up
    }
    let start = Instant::now();
    let mut done = 0usize;
    while start.elapsed() < budget {
        for (h, r) in pairs {
            f(black_box(h), black_box(r));
        }
        done += pairs.len();
    }
    done as f64 / start.elapsed().as_secs_f64()
}

fn main() {
    let pairs = make_pairs(500);
    let budget = Duration::from_secs(2);
    let rouge_opts = RougeOptions::default();
    let bleu_opts = BleuOptions::sentence();
    let all_opts = OverlapOptions::default();
    println!(
        "overlap metrics, 1 thread, {} invented 50-word pairs",
        pairs.len()
    );
    let rl = measure(&pairs, budget, |h, r| {
        black_box(rouge_l_pair(h, r, &rouge_opts));
    });
    println!("rouge_l      {rl:>12.0} pairs/s");
    let stem_opts = RougeOptions {
        stem: true,
        ..rouge_opts
    };
    let rl_stem = measure(&pairs, budget, |h, r| {
        black_box(rouge_l_pair(h, r, &stem_opts));
    });
    println!("rouge_l+stem {rl_stem:>12.0} pairs/s");
    let bleu = measure(&pairs, budget, |h, r| {
        black_box(
            sentence_bleu(h, &[r], &bleu_opts)
                .map(|s| s.score)
                .unwrap_or(f64::NAN),
        );
    });
    println!("bleu         {bleu:>12.0} pairs/s");
    let all_rouge = measure(&pairs, budget, |h, r| {
        black_box(rouge(h, r, &rouge_opts));
    });
    println!("rouge (all 4) {all_rouge:>11.0} pairs/s");
    let chrf_opts = ChrfOptions::chrf_plus_plus();
    let chrf = measure(&pairs, budget, |h, r| {
        black_box(sentence_chrf(h, &[r], &chrf_opts).unwrap_or(f64::NAN));
    });
    println!("chrf++       {chrf:>12.0} pairs/s");
    let lev = measure(&pairs, budget, |h, r| {
        black_box(levenshtein_similarity(h, r));
    });
    println!("levenshtein  {lev:>12.0} pairs/s");
    let indel = measure(&pairs, budget, |h, r| {
        black_box(indel_similarity(h, r));
    });
    println!("indel        {indel:>12.0} pairs/s");
    let all = measure(&pairs, budget, |h, r| {
        black_box(
            score_pair(h, &[r], &all_opts)
                .map(|s| s.bleu)
                .unwrap_or(f64::NAN),
        );
    });
    println!("score_pair   {all:>12.0} pairs/s");
}

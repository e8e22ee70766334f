//! Probes stage: the judge's prior for each answer slot and for a tie, and pairwise
//! verdicts with that prior divided out (contextual calibration, Zhao et al. 2021,
//! "Calibrate Before Use"). Input: slot probabilities of pairs judged in both orders
//! and, optionally, of probes whose answers carry no content (both answers blank) or
//! the same content (one answer shown twice). Output: a `SlotPrior`, calibrated slot
//! probabilities, and consistency / first-slot rate before and after calibration.
//! Never reads human labels: the prior is estimated from the judge's own outputs, so
//! applying it to the pairs it came from scores nothing in sample.
//!
//! Model (Zhao et al. 2021 apply it to a content-free input; here both orders of each
//! pair give the same identification): the judge's probability for slot k is
//! proportional to `prior_k x content_k`. Swapping the answers swaps the content of the
//! two slots and keeps the prior, so for one pair
//! `ln(prior_1 / prior_2) = ((ln p1 + ln p1') - (ln p2 + ln p2')) / 2`
//! (unprimed: one order, primed: the other). One answer shown twice has equal content
//! in both slots, so `ln(prior_1 / prior_2) = ln p1 - ln p2`. The tie's content does
//! not cancel in either; only a content-free probe (whose calibrated output should be
//! uniform, Zhao et al. 2021) identifies the tie's prior. Without one the tie keeps
//! its ratio to the geometric mean of the two slots (neutral tie prior), and the
//! report says so. Units are averaged in log space (a geometric mean of the ratios),
//! so one saturated probability does not dominate.

use serde::Serialize;

pub use crate::judge::ProbeKind;
use crate::stats::pairwise::{position_bias, JudgedPair, SlotProbs};
use crate::stats::StatsError;

/// Probabilities are floored here before logs: a label the judge never emits would
/// otherwise give an infinite ratio.
const FLOOR: f64 = 1e-9;

/// The judge's prior over (first slot, second slot, tie), summing to 1.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct SlotPrior {
    /// Prior probability of the first-shown answer.
    pub first: f64,
    /// Prior probability of the second-shown answer.
    pub second: f64,
    /// Prior probability of a tie (neutral when `tie_estimated` is false).
    pub tie: f64,
    /// True when content-free probes identified the tie's prior; false: left neutral.
    pub tie_estimated: bool,
    /// Pairs judged in both orders that entered the estimate.
    pub from_pairs: usize,
    /// Identical-answer probes that entered the estimate.
    pub from_identical: usize,
    /// Content-free probes that entered the estimate.
    pub from_content_free: usize,
}

fn ln(p: f64) -> f64 {
    p.max(FLOOR).ln()
}

fn check(p: SlotProbs) -> Result<SlotProbs, StatsError> {
    let parts = [p.first, p.second, p.tie];
    if parts.iter().any(|v| !(v.is_finite() && *v >= 0.0)) || parts.iter().sum::<f64>() <= 0.0 {
        return Err(StatsError::OutOfRange {
            value: format!("({}, {}, {})", p.first, p.second, p.tie),
            allowed: "finite probabilities >= 0, not all 0".into(),
        });
    }
    Ok(p)
}

/// Estimates the slot prior from pairs judged in both orders (each element: the two
/// orders' slot probabilities) and from probes.
pub fn estimate_slot_prior(
    pairs: &[(SlotProbs, SlotProbs)],
    probes: &[(ProbeKind, SlotProbs)],
) -> Result<SlotPrior, StatsError> {
    let mut ratios = Vec::with_capacity(pairs.len() + probes.len());
    for &(o, s) in pairs {
        let (o, s) = (check(o)?, check(s)?);
        ratios.push(((ln(o.first) + ln(s.first)) - (ln(o.second) + ln(s.second))) / 2.0);
    }
    let mut ties = Vec::new();
    for &(kind, p) in probes {
        let p = check(p)?;
        ratios.push(ln(p.first) - ln(p.second));
        if kind == ProbeKind::ContentFree {
            ties.push(ln(p.tie) - (ln(p.first) + ln(p.second)) / 2.0);
        }
    }
    if ratios.is_empty() {
        return Err(StatsError::TooFew { needed: 1, got: 0 });
    }
    let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let r = mean(&ratios);
    let t = if ties.is_empty() { 0.0 } else { mean(&ties) };
    // softmax of (r/2, -r/2, t): slot log-priors centred on their geometric mean.
    let w = [(r / 2.0).exp(), (-r / 2.0).exp(), t.exp()];
    let z: f64 = w.iter().sum();
    Ok(SlotPrior {
        first: w[0] / z,
        second: w[1] / z,
        tie: w[2] / z,
        tie_estimated: !ties.is_empty(),
        from_pairs: pairs.len(),
        from_identical: probes
            .iter()
            .filter(|p| p.0 == ProbeKind::IdenticalAnswers)
            .count(),
        from_content_free: ties.len(),
    })
}

/// Divides the prior out of one order's probabilities and renormalises (Zhao et al.
/// 2021: `q = W p` with `W = diag(prior)^-1`, then normalised).
pub fn calibrate(p: SlotProbs, prior: &SlotPrior) -> SlotProbs {
    let q = [
        p.first.max(FLOOR) / prior.first,
        p.second.max(FLOOR) / prior.second,
        p.tie.max(FLOOR) / prior.tie,
    ];
    let z: f64 = q.iter().sum();
    SlotProbs {
        first: q[0] / z,
        second: q[1] / z,
        tie: q[2] / z,
    }
}

/// How much of the verdict is order, for one way of reading each order.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct OrderEffect {
    /// Share of pairs with the same winner in both orders.
    pub consistency: f64,
    /// Share of single-order verdicts won by the first-shown answer (ties count in the denominator).
    pub first_slot_rate: f64,
}

/// Consistency and first-slot rate of the raw and the calibrated verdicts.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SlotCalibration {
    /// The prior divided out.
    pub prior: SlotPrior,
    /// Raw judge.
    pub before: OrderEffect,
    /// After dividing the prior out of each order.
    pub after: OrderEffect,
}

/// Order effect of pairs read through `read` (identity: the raw or calibrated probabilities).
pub fn order_effect(
    pairs: &[(SlotProbs, SlotProbs)],
    read: impl Fn(SlotProbs) -> SlotProbs,
) -> Result<OrderEffect, StatsError> {
    let judged: Vec<JudgedPair> = pairs
        .iter()
        .map(|&(o, s)| JudgedPair {
            original: super::slot_winner(read(o), true),
            swapped: super::slot_winner(read(s), false),
            original_probs: None,
            swapped_probs: None,
        })
        .collect();
    let b = position_bias(&judged)?;
    Ok(OrderEffect {
        consistency: b.positional_consistency,
        first_slot_rate: b.first_slot_win_rate,
    })
}

/// Estimates the prior and measures consistency and first-slot rate before and after.
pub fn slot_calibration(
    pairs: &[(SlotProbs, SlotProbs)],
    probes: &[(ProbeKind, SlotProbs)],
) -> Result<SlotCalibration, StatsError> {
    let prior = estimate_slot_prior(pairs, probes)?;
    Ok(SlotCalibration {
        prior,
        before: order_effect(pairs, |p| p)?,
        after: order_effect(pairs, |p| calibrate(p, &prior))?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    fn normal(rng: &mut ChaCha8Rng) -> f64 {
        // Box-Muller (1958).
        let u: f64 = rng.random_range(f64::EPSILON..1.0);
        let v: f64 = rng.random();
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }

    fn softmax(l: [f64; 3]) -> SlotProbs {
        let w = l.map(f64::exp);
        let z: f64 = w.iter().sum();
        SlotProbs {
            first: w[0] / z,
            second: w[1] / z,
            tie: w[2] / z,
        }
    }

    /// A synthetic judge: log p(slot) = log prior(slot) + content(slot) + noise. Content
    /// of a pair: A's advantage `d` ~ N(0, signal) split over the two slots, tie content
    /// `-|d|` (a clear difference makes a tie unlikely); each order draws its own noise.
    /// Returns the pairs with the prior and, for reference, the same pairs without it.
    fn synthetic(
        prior: [f64; 3],
        signal: f64,
        noise: f64,
        n: usize,
        seed: u64,
    ) -> (Vec<(SlotProbs, SlotProbs)>, Vec<(SlotProbs, SlotProbs)>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let lp = prior.map(f64::ln);
        let (mut with, mut without) = (Vec::new(), Vec::new());
        for _ in 0..n {
            let d = signal * normal(&mut rng);
            let mut order = |first: f64, second: f64| {
                let c = [
                    first + noise * normal(&mut rng),
                    second + noise * normal(&mut rng),
                    -d.abs() + noise * normal(&mut rng),
                ];
                (
                    softmax([lp[0] + c[0], lp[1] + c[1], lp[2] + c[2]]),
                    softmax(c),
                )
            };
            let (o, o0) = order(d / 2.0, -d / 2.0);
            let (s, s0) = order(-d / 2.0, d / 2.0);
            with.push((o, s));
            without.push((o0, s0));
        }
        (with, without)
    }

    /// Calibration recovers a known slot prior (0.70, 0.10 first-to-second ratio 7) from
    /// the pairs alone, within 5% on the ratio over 400 pairs, and raises consistency
    /// from the raw judge's to what the content signal allows: the consistency of the
    /// same judge with no prior at all, within 0.03.
    #[test]
    fn calibration_recovers_a_known_prior_and_the_content_consistency() {
        let prior = [0.7, 0.1, 0.2];
        let (pairs, oracle) = synthetic(prior, 2.0, 0.5, 400, 11);
        let c = slot_calibration(&pairs, &[]).unwrap();
        let ratio = c.prior.first / c.prior.second;
        assert!((ratio / 7.0 - 1.0).abs() < 0.05, "ratio {ratio}");
        assert!(!c.prior.tie_estimated);
        let ceiling = order_effect(&oracle, |p| p).unwrap();
        assert!(c.before.consistency < 0.6, "{:?}", c.before);
        assert!(c.before.first_slot_rate > 0.7, "{:?}", c.before);
        assert!(
            (c.after.consistency - ceiling.consistency).abs() < 0.03,
            "after {:?}, ceiling {:?}",
            c.after,
            ceiling
        );
        assert!((c.after.first_slot_rate - ceiling.first_slot_rate).abs() < 0.05);
    }

    /// Content-free probes identify the whole prior, tie included (Zhao et al. 2021: the
    /// calibrated output of a content-free input is uniform). Probes drawn around a prior
    /// of (0.6, 0.1, 0.3) with noise recover every part within 0.03, and calibrating a
    /// noiseless probe gives the uniform distribution.
    #[test]
    fn content_free_probes_identify_the_tie_prior() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let lp = [0.6f64.ln(), 0.1f64.ln(), 0.3f64.ln()];
        let probes: Vec<(ProbeKind, SlotProbs)> = (0..200)
            .map(|_| {
                let l = lp.map(|v| v + 0.3 * normal(&mut rng));
                (ProbeKind::ContentFree, softmax(l))
            })
            .collect();
        let p = estimate_slot_prior(&[], &probes).unwrap();
        assert!(p.tie_estimated);
        for (got, want) in [(p.first, 0.6), (p.second, 0.1), (p.tie, 0.3)] {
            assert!((got - want).abs() < 0.03, "{p:?}");
        }
        let exact = estimate_slot_prior(&[], &[(ProbeKind::ContentFree, softmax(lp))]).unwrap();
        let q = calibrate(softmax(lp), &exact);
        for v in [q.first, q.second, q.tie] {
            assert!((v - 1.0 / 3.0).abs() < 1e-12);
        }
    }

    /// One pair in both orders, by hand: (0.8, 0.1, 0.1) and (0.5, 0.4, 0.1) give
    /// ln(prior1/prior2) = (ln 0.8 + ln 0.5 - ln 0.1 - ln 0.4)/2 = ln 10 / 2, so the
    /// prior ratio is sqrt(10); an identical-answer probe (0.5, 0.05, 0.45) adds ln 10.
    /// The mean of the two log-ratios is 0.75 ln 10: ratio 10^0.75. The tie stays
    /// neutral: prior tie / sqrt(prior1 prior2) = 1.
    #[test]
    fn slot_ratio_matches_hand_arithmetic() {
        let sp = |first, second, tie| SlotProbs { first, second, tie };
        let pairs = [(sp(0.8, 0.1, 0.1), sp(0.5, 0.4, 0.1))];
        let one = estimate_slot_prior(&pairs, &[]).unwrap();
        assert!((one.first / one.second - 10f64.sqrt()).abs() < 1e-12);
        assert!((one.tie / (one.first * one.second).sqrt() - 1.0).abs() < 1e-12);
        let both = estimate_slot_prior(
            &pairs,
            &[(ProbeKind::IdenticalAnswers, sp(0.5, 0.05, 0.45))],
        )
        .unwrap();
        assert!((both.first / both.second - 10f64.powf(0.75)).abs() < 1e-9);
        assert_eq!((both.from_pairs, both.from_identical), (1, 1));
        assert!(!both.tie_estimated);
        assert!(estimate_slot_prior(&[], &[]).is_err());
        assert!(estimate_slot_prior(&[(sp(f64::NAN, 0.1, 0.1), sp(0.5, 0.4, 0.1))], &[]).is_err());
    }
}

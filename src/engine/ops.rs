//! Engine stage, shared row operations of every model family: RMS norm, bias and
//! residual additions, rotary position embeddings and the gated feed-forward
//! activations. Input: f32 activation rows and small f32 weight vectors. Output: f32
//! rows. Never touches a weight matrix or the key/value cache, never allocates per
//! element, and never changes numerics between two calls with the same input.

/// Activation of the gated feed-forward block.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Activation {
    /// x·sigmoid(x) (Qwen2, Llama).
    Silu,
    /// GELU, tanh approximation (Gemma 3; Hendrycks & Gimpel 2016).
    GeluTanh,
}

/// Which dimensions of a head RoPE rotates together.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RopePairs {
    /// (2i, 2i+1), as in the original Llama layout (llama.cpp's "normal" RoPE).
    Adjacent,
    /// (i, i + d/2), as in GPT-NeoX (Qwen2, Qwen3, Gemma 3, Phi-3).
    Halves,
}

/// Lanes of the sum of squares in `rms_norm`: one AVX-512 register, two AVX2 ones.
const NORM_LANES: usize = 16;

/// RMS norm of each `w.len()`-wide row of `x` (Zhang & Sennrich 2019), as
/// candle's `rms_norm`: x / sqrt(mean(x²) + eps) · w. The sum of squares runs in
/// `NORM_LANES` independent lanes added in a fixed order, so the loop vectorises
/// under every family's `target_feature` and gives the same bits on all of them.
#[inline(always)]
pub(crate) fn rms_norm(x: &[f32], w: &[f32], eps: f32) -> Vec<f32> {
    let dim = w.len();
    let mut out = Vec::with_capacity(x.len());
    for row in x.chunks_exact(dim) {
        let mut lanes = [0f32; NORM_LANES];
        let chunks = row.chunks_exact(NORM_LANES);
        let tail = chunks.remainder();
        for c in chunks {
            for (l, v) in lanes.iter_mut().zip(c) {
                *l += v * v;
            }
        }
        let sum2 = lanes.iter().sum::<f32>() + tail.iter().map(|v| v * v).sum::<f32>();
        let scale = (sum2 / dim as f32 + eps).sqrt();
        out.extend(row.iter().zip(w).map(|(v, w)| v / scale * w));
    }
    out
}

pub(crate) fn add_bias(x: &mut [f32], bias: Option<&[f32]>) {
    if let Some(b) = bias {
        for row in x.chunks_exact_mut(b.len()) {
            row.iter_mut().zip(b).for_each(|(v, b)| *v += b);
        }
    }
}

pub(crate) fn add_into(x: &mut [f32], y: &[f32]) {
    x.iter_mut().zip(y).for_each(|(a, b)| *a += b);
}

/// Gated feed-forward activation. Branch-free and without library calls, so the
/// element loops that call it vectorise (a scalar `tanhf` per element cost about as
/// much as Gemma 3's matrix products on prompts).
#[inline]
pub(crate) fn activate(act: Activation, x: f32) -> f32 {
    match act {
        Activation::Silu => x / (1.0 + exp(-x)),
        // Hendrycks & Gimpel (2016), tanh approximation, written with
        // 0.5 (1 + tanh z) = 1 / (1 + e^(-2z)).
        Activation::GeluTanh => {
            let c = (2.0f32 / std::f32::consts::PI).sqrt();
            x / (1.0 + exp(-2.0 * c * (x + 0.044_715 * x * x * x)))
        }
    }
}

/// e^x in f32 within about 2 ulp (Moshier's Cephes `expf`, 1992: range reduction by
/// ln 2 in two parts, degree-6 polynomial), inputs clamped to [-87.3, 88.3] so that
/// 2^n stays a normal number (e^-87.3 ≈ 1.2e-38); 0.693_359_4 is Cephes' exact
/// 0.693359375 as f32 writes it. Inlined so loops vectorise.
#[inline]
pub(crate) fn exp(x: f32) -> f32 {
    let x = x.clamp(-87.3, 88.3);
    let n = (x * std::f32::consts::LOG2_E).round_ties_even();
    let r = x - n * 0.693_359_4 - n * -2.121_944_4e-4;
    let z = r * r;
    let p = ((((1.987_569_1e-4 * r + 1.398_199_9e-3) * r + 8.333_452e-3) * r + 4.166_579_6e-2) * r
        + 1.666_666_5e-1)
        * r
        + 0.5; // Cephes 5.0000001201e-1, which rounds to 0.5 in f32
    let y = p * z + r + 1.0;
    y * f32::from_bits(((n as i32 + 127) as u32) << 23)
}

/// Inverse frequencies of rotary embeddings (Su et al. 2021): base^(-2i/d).
pub(crate) fn rope_freqs(head_dim: usize, base: f32) -> Vec<f32> {
    (0..head_dim)
        .step_by(2)
        .map(|i| 1.0 / base.powf(i as f32 / head_dim as f32))
        .collect()
}

/// Cosines and sines of the rotary angles of `rows` consecutive positions from
/// `pos0`, computed once per forward pass and shared by every layer with the same
/// frequencies (angles in f32 as candle computes them).
pub(crate) struct RopeTable {
    freqs: Vec<f32>,
    cos: Vec<f32>,
    sin: Vec<f32>,
}

impl RopeTable {
    pub(crate) fn new(freqs: &[f32], pos0: usize, rows: usize) -> RopeTable {
        let n = rows * freqs.len();
        let (mut cos, mut sin) = (Vec::with_capacity(n), Vec::with_capacity(n));
        for r in 0..rows {
            let pos = (pos0 + r) as f32;
            for f in freqs {
                let angle = pos * f;
                cos.push(angle.cos());
                sin.push(angle.sin());
            }
        }
        RopeTable {
            freqs: freqs.to_vec(),
            cos,
            sin,
        }
    }

    /// Whether this table was built for `freqs`.
    pub(crate) fn serves(&self, freqs: &[f32]) -> bool {
        self.freqs == freqs
    }
}

/// Rotate every `d`-wide head of each `width`-wide row of `x` in place; row `r` sits
/// at the table's position `r`.
#[inline(always)]
pub(crate) fn rope(x: &mut [f32], width: usize, d: usize, table: &RopeTable, pairs: RopePairs) {
    let half = d / 2;
    assert_eq!(
        table.freqs.len(),
        half,
        "rotary table of another head width"
    );
    let rows = x.chunks_exact_mut(width);
    let angles = table
        .cos
        .chunks_exact(half)
        .zip(table.sin.chunks_exact(half));
    for (row, (cos, sin)) in rows.zip(angles) {
        for head in row.chunks_exact_mut(d) {
            match pairs {
                RopePairs::Adjacent => {
                    for (i, (c, s)) in cos.iter().zip(sin).enumerate() {
                        let (x0, x1) = (head[2 * i], head[2 * i + 1]);
                        head[2 * i] = x0 * c - x1 * s;
                        head[2 * i + 1] = x0 * s + x1 * c;
                    }
                }
                RopePairs::Halves => {
                    let (lo, hi) = head.split_at_mut(half);
                    for (((a, b), c), s) in lo.iter_mut().zip(hi).zip(cos).zip(sin) {
                        let (x0, x1) = (*a, *b);
                        *a = x0 * c - x1 * s;
                        *b = x0 * s + x1 * c;
                    }
                }
            }
        }
    }
}

/// Apply linear position scaling and per-frequency divisors to `freqs` in place, the way
/// llama.cpp's `ggml_rope_ext` forms its angles: `pos · scale · freq_i / factor_i`.
pub(crate) fn scale_rope_freqs(freqs: &mut [f32], scale: f32, factors: Option<&[f32]>) {
    for (i, f) in freqs.iter_mut().enumerate() {
        if scale != 1.0 {
            *f *= scale;
        }
        if let Some(div) = factors.and_then(|d| d.get(i)) {
            *f /= div;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Cephes `expf` (Moshier 1992) claims about 2 ulp; checked against the standard
    /// library's `exp` in f64 on a grid over the whole clamped range.
    #[test]
    fn exp_is_within_a_few_ulp_of_the_library_exp() {
        let mut worst = 0f64;
        for i in 0..=200_000 {
            let x = -87.0 + 175.0 * i as f32 / 200_000.0;
            let want = (x as f64).exp();
            worst = worst.max(((exp(x) as f64 - want) / want).abs());
        }
        assert!(
            worst < 4.0 * f32::EPSILON as f64,
            "max relative error {worst}"
        );
        assert_eq!(exp(0.0), 1.0);
        assert!(exp(-1000.0) < 1e-37 && exp(1000.0) > 1e38);
    }

    /// SiLU (Elfwing et al. 2018) and tanh-GELU (Hendrycks & Gimpel 2016) against their
    /// textbook formulas in f64 with the library `exp` / `tanh`. The bound grows with
    /// the exponent's size `a` (rounding the f32 argument moves e^a by ~ε·|a|), and an
    /// absolute floor covers x below about -9, where 1 + tanh z cancels to 0 in f64.
    #[test]
    fn activations_match_their_textbook_formulas() {
        let c = (2.0f64 / std::f64::consts::PI).sqrt();
        for i in 0..=4000 {
            let x = -20.0 + 40.0 * i as f32 / 4000.0;
            let xd = x as f64;
            let silu = xd / (1.0 + (-xd).exp());
            let gelu = 0.5 * xd * (1.0 + (c * (xd + 0.044_715 * xd.powi(3))).tanh());
            let z2 = 2.0 * c * (xd + 0.044_715 * xd.powi(3));
            for (got, want, a) in [
                (activate(Activation::Silu, x), silu, xd),
                (activate(Activation::GeluTanh, x), gelu, z2),
            ] {
                let tol = 4.0 * f32::EPSILON as f64 * (1.0 + a.abs()) * want.abs() + 1e-15;
                assert!((got as f64 - want).abs() <= tol, "x {x}: {got} vs {want}");
            }
        }
    }

    /// Position interpolation (Chen et al. 2023): with linear scaling factor `f`, the
    /// token at position `p` is rotated as an unscaled one at position `p / f`. Folding
    /// the factor into the frequencies must give that rotation, for factors above and
    /// below 1 and both pair layouts.
    #[test]
    fn scaled_frequencies_rotate_like_interpolated_positions() {
        let d = 64;
        let x: Vec<f32> = (0..2 * d)
            .map(|i| ((i * 37 % 11) as f32 - 5.0) / 7.0)
            .collect();
        for (factor, p) in [(2.0f32, 6usize), (4.0, 12), (0.5, 3)] {
            for pairs in [RopePairs::Halves, RopePairs::Adjacent] {
                let base = rope_freqs(d, 10_000.0);
                let mut scaled = base.clone();
                scale_rope_freqs(&mut scaled, 1.0 / factor, None);
                let (mut a, mut b) = (x.clone(), x.clone());
                rope(&mut a, 2 * d, d, &RopeTable::new(&scaled, p, 1), pairs);
                let q = (p as f32 / factor) as usize;
                rope(&mut b, 2 * d, d, &RopeTable::new(&base, q, 1), pairs);
                for (u, v) in a.iter().zip(&b) {
                    assert!((u - v).abs() < 1e-5, "factor {factor}: {u} vs {v}");
                }
            }
        }
    }

    /// llama.cpp's per-frequency divisors (`rope_freqs.weight`) divide each speed.
    #[test]
    fn frequency_divisors_divide_each_speed() {
        let mut f = vec![1.0, 0.5, 0.25];
        scale_rope_freqs(&mut f, 1.0, Some(&[1.0, 2.0, 8.0]));
        assert_eq!(f, vec![1.0, 0.25, 0.031_25]);
    }

    /// The lane-summed RMS norm against the textbook formula in f64 (Zhang & Sennrich
    /// 2019), on widths with and without a partial last group of lanes.
    #[test]
    fn rms_norm_matches_the_formula_in_f64() {
        for dim in [7, 16, 64, 1000] {
            let x: Vec<f32> = (0..3 * dim)
                .map(|i| ((i * 29 % 23) as f32 - 11.0) / 3.0)
                .collect();
            let w: Vec<f32> = (0..dim).map(|i| 0.5 + (i % 5) as f32 / 4.0).collect();
            let got = rms_norm(&x, &w, 1e-6);
            for (r, row) in x.chunks(dim).enumerate() {
                let ms = row.iter().map(|&v| (v as f64).powi(2)).sum::<f64>() / dim as f64;
                for (j, v) in row.iter().enumerate() {
                    let want = *v as f64 / (ms + 1e-6).sqrt() * w[j] as f64;
                    let g = got[r * dim + j] as f64;
                    assert!(
                        (g - want).abs() <= 1e-5 * (1.0 + want.abs()),
                        "{dim}: {g} vs {want}"
                    );
                }
            }
        }
    }

    /// A rotation by the table of positions `p..p+3` equals rotating each row alone
    /// by the angle `p·f` (the definition, Su et al. 2021), for both pair layouts.
    #[test]
    fn rope_table_rows_rotate_by_their_own_position() {
        let d = 8;
        let freqs = rope_freqs(d, 10_000.0);
        let x: Vec<f32> = (0..3 * 2 * d).map(|i| (i as f32 * 0.37).sin()).collect();
        for pairs in [RopePairs::Halves, RopePairs::Adjacent] {
            let mut all = x.clone();
            rope(&mut all, 2 * d, d, &RopeTable::new(&freqs, 5, 3), pairs);
            for r in 0..3 {
                let row = &x[r * 2 * d..(r + 1) * 2 * d];
                for (h, head) in row.chunks(d).enumerate() {
                    for i in 0..d / 2 {
                        let (a, b) = match pairs {
                            RopePairs::Adjacent => (2 * i, 2 * i + 1),
                            RopePairs::Halves => (i, i + d / 2),
                        };
                        let t = (5 + r) as f64 * freqs[i] as f64;
                        let (x0, x1) = (head[a] as f64, head[b] as f64);
                        let at = r * 2 * d + h * d;
                        assert!((all[at + a] as f64 - (x0 * t.cos() - x1 * t.sin())).abs() < 1e-5);
                        assert!((all[at + b] as f64 - (x0 * t.sin() + x1 * t.cos())).abs() < 1e-5);
                    }
                }
            }
        }
    }
}

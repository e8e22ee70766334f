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

/// RMS norm of each `w.len()`-wide row of `x` (Zhang & Sennrich 2019), as
/// candle's `rms_norm`: x / sqrt(mean(x²) + eps) · w.
pub(crate) fn rms_norm(x: &[f32], w: &[f32], eps: f32) -> Vec<f32> {
    let dim = w.len();
    let mut out = Vec::with_capacity(x.len());
    for row in x.chunks_exact(dim) {
        let sum2: f32 = row.iter().map(|v| v * v).sum();
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

/// Rotate every head of each `width`-wide row of `x` in place; row `r` sits at
/// position `pos0 + r`, angles in f32 as candle computes them.
pub(crate) fn rope(
    x: &mut [f32],
    width: usize,
    d: usize,
    pos0: usize,
    freqs: &[f32],
    pairs: RopePairs,
) {
    let half = d / 2;
    let (mut cos, mut sin) = (vec![0f32; half], vec![0f32; half]);
    for (r, row) in x.chunks_exact_mut(width).enumerate() {
        let pos = (pos0 + r) as f32;
        for i in 0..half {
            let angle = pos * freqs[i];
            cos[i] = angle.cos();
            sin[i] = angle.sin();
        }
        for head in row.chunks_exact_mut(d) {
            for i in 0..half {
                let (a, b) = match pairs {
                    RopePairs::Adjacent => (2 * i, 2 * i + 1),
                    RopePairs::Halves => (i, i + half),
                };
                let (x0, x1) = (head[a], head[b]);
                head[a] = x0 * cos[i] - x1 * sin[i];
                head[b] = x0 * sin[i] + x1 * cos[i];
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
                rope(&mut a, 2 * d, d, p, &scaled, pairs);
                let q = (p as f32 / factor) as usize;
                rope(&mut b, 2 * d, d, q, &base, pairs);
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
}

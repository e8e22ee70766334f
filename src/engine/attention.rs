//! Engine stage, attention of one decoder block: the key/value cache stored per key/value
//! head, appending a block's new keys and values to it, and causal grouped-query
//! attention over it with an optional sliding window. Input: rotated query, key and
//! value rows of one block. Output: the attention rows that feed the block's output
//! projection. Never reads weights, and never lets a row's result depend on the other
//! rows of the call, on how heads are split over threads, or on the thread count.

use super::kernels::{self, Kernels, KeyValues};
use super::linear::SharedOut;

/// Keys and values of the tokens seen so far; cloning forks it. One buffer per layer and
/// key/value head (index `layer * kv_heads + head`), so the rows one head attends to
/// lie back to back in memory.
#[derive(Clone, Debug)]
pub struct KvCache {
    k: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
    len: usize,
    kv_heads: usize,
    head_dim: usize,
}

impl KvCache {
    /// Tokens held.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether no token is held.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// Forget every token from position `len` on (no-op when `len >= self.len()`).
    pub fn truncate(&mut self, len: usize) {
        if len < self.len {
            for buf in self.k.iter_mut().chain(self.v.iter_mut()) {
                buf.truncate(len * self.head_dim);
            }
            self.len = len;
        }
    }
}

impl KvCache {
    /// An empty cache for `layers` blocks of `kv_heads` key/value heads of width
    /// `head_dim`.
    pub(crate) fn new(layers: usize, kv_heads: usize, head_dim: usize) -> Self {
        KvCache {
            k: vec![Vec::new(); layers * kv_heads],
            v: vec![Vec::new(); layers * kv_heads],
            len: 0,
            kv_heads,
            head_dim,
        }
    }

    /// Whether this cache was made for `layers` blocks of this head layout.
    pub(crate) fn fits(&self, layers: usize, kv_heads: usize, head_dim: usize) -> bool {
        self.k.len() == layers * kv_heads && self.kv_heads == kv_heads && self.head_dim == head_dim
    }

    /// Count `m` more tokens as held, once every block has appended them.
    pub(crate) fn advance(&mut self, m: usize) {
        self.len += m;
    }
}

/// Attention of block `layer` for `m` new rows of queries, keys and values `[q, k, v]`:
/// appends the keys and values (rows of `kv_heads × head_dim`) to the block's cache,
/// then attends the queries over every cached position the causal mask and the window
/// `window` let through.
pub(crate) fn attend_block(
    cache: &mut KvCache,
    layer: usize,
    [q, k, v]: [&[f32]; 3],
    shape: &AttnShape,
    m: usize,
    window: Option<usize>,
) -> Vec<f32> {
    let (d, kv_dim) = (shape.head_dim, shape.kv_heads * shape.head_dim);
    let heads = layer * shape.kv_heads..(layer + 1) * shape.kv_heads;
    for (rk, rv) in k.chunks_exact(kv_dim).zip(v.chunks_exact(kv_dim)) {
        for (g, (hk, hv)) in rk.chunks_exact(d).zip(rv.chunks_exact(d)).enumerate() {
            cache.k[heads.start + g].extend_from_slice(hk);
            cache.v[heads.start + g].extend_from_slice(hv);
        }
    }
    let pos0 = cache.len;
    attention(
        q,
        &cache.k[heads.clone()],
        &cache.v[heads],
        shape,
        pos0,
        m,
        window,
    )
}

/// Head layout of one attention call.
pub(crate) struct AttnShape {
    pub heads: usize,
    pub kv_heads: usize,
    pub head_dim: usize,
    pub scale: f32,
}

/// Causal scaled dot-product attention (Vaswani et al. 2017) of `m` query rows starting
/// at position `pos0` over the cached keys/values, with grouped key/value heads and an
/// optional sliding window of `w` tokens (the current one included, as llama.cpp and
/// the reference Python Gemma 3 implementation count it), on the kernels of
/// `kernels::attend`. Each head is computed by one worker in a fixed order, so results
/// do not depend on scheduling.
pub(crate) fn attention(
    q: &[f32],
    kc: &[Vec<f32>],
    vc: &[Vec<f32>],
    c: &AttnShape,
    pos0: usize,
    m: usize,
    window: Option<usize>,
) -> Vec<f32> {
    let (heads, d) = (c.heads, c.head_dim);
    let group = heads / c.kv_heads;
    let q_dim = heads * d;
    let mut out = vec![0f32; m * q_dim];
    let shared = SharedOut(out.as_mut_ptr());
    let scale = c.scale;
    let kernels = Kernels::for_rows();
    // Work units are (row, key/value head, part of its query heads): the heads that
    // share a key/value head read each key and value row once. A single row gets its
    // query heads split so that every thread has a unit. Each head's arithmetic is the
    // same whatever the split.
    let pool = candle_core::utils::barrier_pool();
    let threads = pool.n_workers() + 1;
    let per_row = c.kv_heads;
    let parts = if m * per_row >= threads {
        1
    } else {
        threads.div_ceil(m * per_row).min(group)
    };
    pool.execute_chunked(m * per_row * parts, |units| {
        let mut scores = Vec::new();
        for u in units {
            let (r, rest) = (u / (per_row * parts), u % (per_row * parts));
            let (g, part) = (rest / parts, rest % parts);
            let h0 = g * group + part * group / parts;
            let h1 = g * group + (part + 1) * group / parts;
            let p = pos0 + r;
            let lo = window.map_or(0, |w| (p + 1).saturating_sub(w));
            let span = (r * heads + h0) * d..(r * heads + h1) * d;
            // SAFETY: this unit owns heads h0..h1 of row r in `out`, which outlives the
            // pool call; no other unit touches that range.
            let o =
                unsafe { std::slice::from_raw_parts_mut(shared.ptr().add(span.start), span.len()) };
            let kv = KeyValues {
                keys: &kc[g],
                vals: &vc[g],
                stride: d,
                lo,
                p,
            };
            kernels::attend(kernels, &q[span], &kv, d, scale, o, &mut scores);
        }
    });
    debug_assert_eq!(out.len(), m * q_dim);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pseudo(n: usize, seed: u32) -> Vec<f32> {
        let mut s = seed.wrapping_mul(2_654_435_761) | 1;
        (0..n)
            .map(|_| {
                s ^= s << 13;
                s ^= s >> 17;
                s ^= s << 5;
                (s >> 8) as f32 / (1u32 << 24) as f32 * 2.0 - 1.0
            })
            .collect()
    }

    /// Scaled dot-product attention (Vaswani et al. 2017) straight from its definition,
    /// in f64: softmax(q·k / sqrt(d)) · v over the visible positions.
    fn textbook(q: &[f32], k: &[f32], v: &[f32], d: usize, lo: usize, p: usize) -> Vec<f64> {
        let s: Vec<f64> = (lo..=p)
            .map(|j| {
                (0..d)
                    .map(|i| q[i] as f64 * k[j * d + i] as f64)
                    .sum::<f64>()
                    / (d as f64).sqrt()
            })
            .collect();
        let max = s.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let w: Vec<f64> = s.iter().map(|x| (x - max).exp()).collect();
        let z: f64 = w.iter().sum();
        (0..d)
            .map(|i| {
                (lo..=p)
                    .zip(&w)
                    .map(|(j, w)| w / z * v[j * d + i] as f64)
                    .sum()
            })
            .collect()
    }

    /// Grouped-query attention with causal masking and a sliding window: every
    /// (row, head) equals the textbook formula within f32 rounding, and equals the
    /// same row computed alone bit for bit (so a prompt and a forked continuation see
    /// the same numbers however the heads are split over threads).
    #[test]
    fn attention_matches_the_definition_and_is_batch_invariant() {
        for (d, window) in [(64, None), (128, Some(5)), (80, None), (40, None)] {
            let (heads, kv_heads, pos0, m) = (6, 2, 9, 4);
            let n = pos0 + m;
            let shape = AttnShape {
                heads,
                kv_heads,
                head_dim: d,
                scale: 1.0 / (d as f32).sqrt(),
            };
            let q = pseudo(m * heads * d, 1);
            let kc: Vec<Vec<f32>> = (0..kv_heads)
                .map(|g| pseudo(n * d, 10 + g as u32))
                .collect();
            let vc: Vec<Vec<f32>> = (0..kv_heads)
                .map(|g| pseudo(n * d, 20 + g as u32))
                .collect();
            let all = attention(&q, &kc, &vc, &shape, pos0, m, window);
            for r in 0..m {
                let row = &q[r * heads * d..(r + 1) * heads * d];
                let alone = attention(row, &kc, &vc, &shape, pos0 + r, 1, window);
                let batch = &all[r * heads * d..(r + 1) * heads * d];
                let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                assert_eq!(bits(&alone), bits(batch), "d {d}, row {r}");
                let p = pos0 + r;
                let lo = window.map_or(0, |w| (p + 1).saturating_sub(w));
                for h in 0..heads {
                    let g = h / (heads / kv_heads);
                    let want = textbook(&row[h * d..(h + 1) * d], &kc[g], &vc[g], d, lo, p);
                    for (got, want) in batch[h * d..(h + 1) * d].iter().zip(&want) {
                        assert!((*got as f64 - want).abs() < 1e-5, "d {d} row {r} head {h}");
                    }
                }
            }
        }
    }
}

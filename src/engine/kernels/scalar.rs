//! Plain-Rust kernels: the reference every vector family is tested against, and the
//! path of processors without a vector family here. Input: one tile of a packed weight
//! (layouts in `mod.rs`) and the quantised activation rows, or one query group and the
//! cached keys and values. Output: f32 results. Same signatures and same arithmetic as
//! the vector kernels, one output column at a time: exact integer sums, then the float
//! steps as fused multiply-adds in the order a vector lane runs them, so every family
//! gives these bits. Never reads outside the tile or rows it is given.

use super::super::ops::{activate, Activation, RopePairs, RopeTable};
use super::{f16_at, softmax, Acts, KeyValues, Q4K_SB, Q5_PAIR, Q6K_SB, Q8_BLK, QK, TILE_N};

/// ggml's Q8_K rule for up to 256 values (see `quantise_block`): returns `d`, writes
/// the quants and the sums of each 16 of them.
pub(super) fn quantise(xs: &[f32], q: &mut [i8], sums: &mut [i32; 16]) -> f32 {
    let amax = xs.iter().fold(0f32, |a, v| a.max(v.abs()));
    if amax == 0.0 {
        return 0.0;
    }
    let iscale = 127.0 / amax;
    for (j, (q, &v)) in q.iter_mut().zip(xs).enumerate() {
        *q = (iscale * v).round_ties_even().clamp(-128.0, 127.0) as i8;
        sums[j / 16] += *q as i32;
    }
    1.0 / iscale
}

/// The bytes of one tile from `w`, `len` long.
///
/// # Safety
/// `w` is valid for `len` bytes for the returned lifetime.
unsafe fn tile<'a>(w: *const u8, len: usize) -> &'a [u8] {
    std::slice::from_raw_parts(w, len)
}

/// Σ over one nibble line of column `col`: low nibbles times `x[0..4]`, high nibbles
/// (each or'ed with the bits `top` gives for position `j` and half `h`) times
/// `x[4..8]`.
fn line_dot(line: &[u8], col: usize, x: &[i8], top: impl Fn(usize, usize) -> u8) -> i32 {
    (0..4)
        .map(|j| {
            let b = line[col * 4 + j];
            let lo = ((b & 0x0f) | top(j, 0)) as i32;
            let hi = ((b >> 4) | top(j, 1)) as i32;
            lo * x[j] as i32 + hi * x[j + 4] as i32
        })
        .sum()
}

/// Activation quants of row `r` (all super-blocks).
fn row_q(a: &Acts, r: usize) -> &[i8] {
    &a.q[r * a.kb * QK..(r + 1) * a.kb * QK]
}

/// Write `acc[i][c]` to column `c` of row `i` of `out` (row stride `n`).
///
/// # Safety
/// `out` is valid for writes of 16 columns in each of `R` rows of stride `n`.
unsafe fn store<const R: usize>(acc: &[[f32; TILE_N]; R], n: usize, out: *mut f32) {
    for (i, row) in acc.iter().enumerate() {
        std::ptr::copy_nonoverlapping(row.as_ptr(), out.add(i * n), TILE_N);
    }
}

/// Q4_K: `R` rows from `r0` against one tile.
///
/// # Safety
/// `w` is one Q4_K tile of `a.kb` super-blocks; rows `r0 .. r0 + R` exist in `a`;
/// `out` is valid for 16 columns in each of `R` rows of stride `n`.
pub(super) unsafe fn q4k<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let t = tile(w, a.kb * Q4K_SB);
    let mut acc = [[0f32; TILE_N]; R];
    for (i, acc) in acc.iter_mut().enumerate() {
        let (r, xq) = (r0 + i, row_q(a, r0 + i));
        for b in 0..a.kb {
            let sb = &t[b * Q4K_SB..(b + 1) * Q4K_SB];
            let dx = a.d[r * a.kb + b];
            for (col, acc) in acc.iter_mut().enumerate() {
                let mut sumi = 0i32;
                for sp in 0..4 {
                    let (mut ia, mut ib) = (0, 0);
                    for g in 0..4 {
                        let x = &xq[b * QK + sp * 64 + g * 8..];
                        let none = |_, _| 0;
                        ia += line_dot(&sb[(sp * 8 + g) * 64..], col, x, none);
                        ib += line_dot(&sb[(sp * 8 + 4 + g) * 64..], col, &x[32..], none);
                    }
                    let (sa, sbv) = (sb[2048 + sp * 32 + col], sb[2048 + sp * 32 + 16 + col]);
                    sumi += ia * sa as i32 + ib * sbv as i32;
                }
                let mut mins = 0i32;
                for p in 0..4 {
                    let s = a.sum32_pairs[(r * a.kb + b) * 4 + p];
                    let (lo, hi) = (s as i16 as i32, (s >> 16) as i16 as i32);
                    let mn = &sb[2176 + p * 32 + col * 2..];
                    mins += mn[0] as i32 * lo + mn[1] as i32 * hi;
                }
                let (d, dmin) = (f16_at(sb, 2304 + col * 2), f16_at(sb, 2336 + col * 2));
                *acc = (sumi as f32).mul_add(d * dx, *acc);
                *acc = (-(mins as f32)).mul_add(dmin * dx, *acc);
            }
        }
    }
    store(&acc, n, out);
}

/// Q6_K: `R` rows from `r0` against one tile.
///
/// # Safety
/// As `q4k`, for a Q6_K tile.
pub(super) unsafe fn q6k<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let t = tile(w, a.kb * Q6K_SB);
    let mut acc = [[0f32; TILE_N]; R];
    for (i, acc) in acc.iter_mut().enumerate() {
        let (r, xq) = (r0 + i, row_q(a, r0 + i));
        for b in 0..a.kb {
            let sb = &t[b * Q6K_SB..(b + 1) * Q6K_SB];
            let dx = a.d[r * a.kb + b];
            let corr = &a.corr16[(r * a.kb + b) * 16..];
            for (col, acc) in acc.iter_mut().enumerate() {
                let mut sumi = 0i32;
                for s in 0..8 {
                    let mut sub = [corr[2 * s], corr[2 * s + 1]];
                    for g in 0..4 {
                        let h = &sb[2048 + (s * 2 + g / 2) * 64 + col * 4..];
                        // Two top bits of value (j, half) at bit 4 (g % 2) + 2 half.
                        let top =
                            |j: usize, half: usize| ((h[j] >> (4 * (g % 2) + 2 * half)) & 3) << 4;
                        let x = &xq[b * QK + s * 32 + g * 8..];
                        sub[g / 2] += line_dot(&sb[(s * 4 + g) * 64..], col, x, top);
                    }
                    let sa = sb[3072 + s * 32 + col] as i8 as i32;
                    let sbv = sb[3072 + s * 32 + 16 + col] as i8 as i32;
                    sumi += sub[0] * sa + sub[1] * sbv;
                }
                let d = f32::from_le_bytes(sb[3328 + col * 4..][..4].try_into().expect("4"));
                *acc = (sumi as f32).mul_add(d * dx, *acc);
            }
        }
    }
    store(&acc, n, out);
}

/// Q5_0 (`pairs` 64-value units per row): `R` rows from `r0` against one tile.
///
/// # Safety
/// As `q4k`, for a Q5_0 tile of `pairs` units.
pub(super) unsafe fn q5<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    pairs: usize,
    n: usize,
    out: *mut f32,
) {
    let t = tile(w, pairs * Q5_PAIR);
    let mut acc = [[0f32; TILE_N]; R];
    for (i, acc) in acc.iter_mut().enumerate() {
        let (r, xq) = (r0 + i, row_q(a, r0 + i));
        for (col, acc) in acc.iter_mut().enumerate() {
            for b in 0..a.kb {
                let mut f = 0f32;
                for p in b * 4..pairs.min(b * 4 + 4) {
                    let unit = &t[p * Q5_PAIR..(p + 1) * Q5_PAIR];
                    for half in 0..2 {
                        let blk = 2 * p + half;
                        // Σ (q − 16) x = Σ q x − 16 Σ x; corr32 holds −128 Σ x.
                        let mut ia = a.corr32[r * a.kb * 8 + blk] / 8;
                        let h = &unit[512 + half * 64 + col * 4..];
                        for g in 0..4 {
                            let top = |j: usize, hh: usize| ((h[j] >> (2 * g + hh)) & 1) << 4;
                            let x = &xq[blk * 32 + g * 8..];
                            ia += line_dot(&unit[(half * 4 + g) * 64..], col, x, top);
                        }
                        f = (ia as f32).mul_add(f16_at(unit, 640 + half * 32 + col * 2), f);
                    }
                }
                *acc = f.mul_add(a.d[r * a.kb + b], *acc);
            }
        }
    }
    store(&acc, n, out);
}

/// Q8_0 (`nb` 32-value blocks per row): `R` rows from `r0` against one tile.
///
/// # Safety
/// As `q4k`, for a Q8_0 tile of `nb` blocks.
pub(super) unsafe fn q8_0<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    nb: usize,
    n: usize,
    out: *mut f32,
) {
    let t = tile(w, nb * Q8_BLK);
    let mut acc = [[0f32; TILE_N]; R];
    for (i, acc) in acc.iter_mut().enumerate() {
        let (r, xq) = (r0 + i, row_q(a, r0 + i));
        for (col, acc) in acc.iter_mut().enumerate() {
            for b in 0..a.kb {
                let mut f = 0f32;
                for j in b * 8..nb.min(b * 8 + 8) {
                    let blk = &t[j * Q8_BLK..(j + 1) * Q8_BLK];
                    // Quants are stored q + 128: Σ (q + 128) x − 128 Σ x = Σ q x.
                    let mut ia = a.corr32[r * a.kb * 8 + j];
                    for g in 0..8 {
                        for jj in 0..4 {
                            let wq = blk[g * 64 + col * 4 + jj] as i32;
                            ia += wq * xq[j * 32 + g * 4 + jj] as i32;
                        }
                    }
                    let d = f32::from_le_bytes(blk[512 + col * 4..][..4].try_into().expect("4"));
                    f = (ia as f32).mul_add(d, f);
                }
                *acc = f.mul_add(a.d[r * a.kb + b], *acc);
            }
        }
    }
    store(&acc, n, out);
}

/// Dot product with eight independent lanes (vectorises; fixed order, deterministic).
fn dot(a: &[f32], b: &[f32]) -> f32 {
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let tail: f32 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    let mut acc = [0f32; 8];
    for (x, y) in ca.zip(cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    acc.iter().sum::<f32>() + tail
}

/// `super::attend` for any head width, one head and one position at a time.
pub(super) fn attend(
    q: &[f32],
    kv: &KeyValues<'_>,
    d: usize,
    scale: f32,
    out: &mut [f32],
    scores: &mut Vec<f32>,
) {
    let (stride, lo, p) = (kv.stride, kv.lo, kv.p);
    let n = p + 1 - lo;
    scores.clear();
    for qh in q.chunks_exact(d) {
        scores.extend((lo..=p).map(|j| dot(qh, &kv.keys[j * stride..][..d]) * scale));
    }
    softmax(scores, n);
    out.fill(0.0);
    for (o, w) in out.chunks_exact_mut(d).zip(scores.chunks_exact(n)) {
        for (j, &wj) in (lo..=p).zip(w) {
            let v = &kv.vals[j * stride..][..d];
            o.iter_mut().zip(v).for_each(|(o, v)| *o += wj * v);
        }
    }
}

/// `super::gate`, inlined into each family's compiled copy.
#[inline(always)]
pub(super) fn gate(act: Activation, g: &mut [f32], u: &[f32]) {
    g.iter_mut()
        .zip(u)
        .for_each(|(g, u)| *g = activate(act, *g) * u);
}

/// RMS norm of each row: `ops::rms_norm`, inlined here and into each family's copy.
#[inline(always)]
pub(super) fn rms_norm(x: &[f32], w: &[f32], eps: f32) -> Vec<f32> {
    super::super::ops::rms_norm(x, w, eps)
}

/// Rotary embedding of each row: `ops::rope`, inlined here and into each family's copy.
#[inline(always)]
pub(super) fn rope(x: &mut [f32], width: usize, d: usize, table: &RopeTable, pairs: RopePairs) {
    super::super::ops::rope(x, width, d, table, pairs)
}

//! NEON kernels for 64-bit ARM (Apple Silicon, ARM servers): one 16-column tile as
//! four 4-column quarters of 128-bit registers. Int8 products with `sdot` where the
//! dot-product extension exists (`DOT = true`), otherwise with `smull` / `sadalp`
//! (widening multiplies, pairwise sums into i32); attention with 4 f32 lanes. Input
//! and output as `scalar.rs`, which the products equal bit for bit: weights enter as
//! signed bytes (Q8_0's stored `q + 128` turned back into `q`), every i16 partial sum
//! stays below 2^15, and the float steps are the same fused multiply-adds. Reached
//! only through a `Kernels` value for `Isa::Neon` or `Isa::NeonDot`; `sdot` is never
//! executed on a processor without the extension.

use super::{f16_at, softmax, Acts, KeyValues, ATTN_TILE, Q4K_SB, Q5_PAIR, Q6K_SB, Q8_BLK, QK};
use std::arch::aarch64::*;

/// `acc + Σ w x`, four i8 × i8 products per i32 lane. Without the dot-product
/// extension: widening products (each at most 128 · 127 in magnitude), pairs summed
/// in i16 (at most 32,512), then added pairwise into the i32 lanes.
///
/// # Safety
/// The caller runs with NEON, and with the dot-product extension when `DOT`.
#[inline(always)]
unsafe fn dot4<const DOT: bool>(mut acc: int32x4_t, w: int8x16_t, x: int8x16_t) -> int32x4_t {
    if DOT {
        // `vdotq_s32` is not yet stable in Rust; this is the same instruction.
        std::arch::asm!(
            "sdot {0:v}.4s, {1:v}.16b, {2:v}.16b",
            inout(vreg) acc,
            in(vreg) w,
            in(vreg) x,
            options(pure, nomem, nostack)
        );
        acc
    } else {
        let lo = vmull_s8(vget_low_s8(w), vget_low_s8(x));
        let hi = vmull_high_s8(w, x);
        vpadalq_s16(acc, vpaddq_s16(lo, hi))
    }
}

/// Broadcast 4 activation quants (one i32) to all lanes.
///
/// # Safety
/// `p` is valid for 4 bytes.
#[inline(always)]
unsafe fn bcast(p: *const i8) -> int8x16_t {
    vreinterpretq_s8_s32(vdupq_n_s32((p as *const i32).read_unaligned()))
}

/// The 16 bytes at `p` (one quarter of a tile line).
///
/// # Safety
/// `p` is valid for 16 bytes.
#[inline(always)]
unsafe fn load(p: *const u8) -> uint8x16_t {
    vld1q_u8(p)
}

/// The four lanes of one quarter, lane `c` from `f(c)`.
fn lanes<T: Copy + Default>(f: impl Fn(usize) -> T) -> [T; 4] {
    std::array::from_fn(f)
}

/// Activation quant pointers of rows `r0 .. r0 + R`.
fn rows<const R: usize>(a: &Acts, r0: usize) -> [*const i8; R] {
    std::array::from_fn(|i| a.q[(r0 + i) * a.kb * QK..].as_ptr())
}

/// Store the four 4-column quarters of each row's accumulators.
///
/// # Safety
/// `out` is valid for 16 columns in each of `R` rows of stride `n`.
#[inline(always)]
unsafe fn store<const R: usize>(acc: &[[float32x4_t; 4]; R], n: usize, out: *mut f32) {
    for (i, quarters) in acc.iter().enumerate() {
        for (qq, v) in quarters.iter().enumerate() {
            vst1q_f32(out.add(i * n + 4 * qq), *v);
        }
    }
}

/// Generates the public entry of one product kernel: the body compiled for NEON and
/// for NEON with the dot-product extension, chosen by `DOT`.
macro_rules! entry {
    ($(#[$doc:meta])* $name:ident => $body:ident ($($arg:ident: $ty:ty),*)) => {
        $(#[$doc])*
        ///
        /// # Safety
        /// The processor has NEON, and the dot-product extension when `DOT`; `w` is one
        /// tile of this format covering `a.kb` super-blocks; rows `r0 .. r0 + R` exist
        /// in `a`; `out` is valid for 16 columns in each of `R` rows of stride `n`.
        pub(super) unsafe fn $name<const R: usize, const DOT: bool>($($arg: $ty),*) {
            /// # Safety
            /// As the enclosing function.
            #[target_feature(enable = "neon")]
            unsafe fn plain<const R: usize>($($arg: $ty),*) {
                $body::<R, false>($($arg),*)
            }
            /// # Safety
            /// As the enclosing function.
            #[target_feature(enable = "neon,dotprod")]
            unsafe fn dot<const R: usize>($($arg: $ty),*) {
                $body::<R, true>($($arg),*)
            }
            if DOT {
                dot::<R>($($arg),*)
            } else {
                plain::<R>($($arg),*)
            }
        }
    };
}

entry!(
    /// Q4_K: `R` rows from `r0` against one tile.
    q4k => q4k_body(w: *const u8, a: &Acts, r0: usize, n: usize, out: *mut f32)
);
entry!(
    /// Q6_K: `R` rows from `r0` against one tile.
    q6k => q6k_body(w: *const u8, a: &Acts, r0: usize, n: usize, out: *mut f32)
);
entry!(
    /// Q5_0 (`pairs` 64-value units per row): `R` rows from `r0` against one tile.
    q5 => q5_body(w: *const u8, a: &Acts, r0: usize, pairs: usize, n: usize, out: *mut f32)
);
entry!(
    /// Q8_0 (`nb` 32-value blocks per row): `R` rows from `r0` against one tile.
    q8_0 => q8_0_body(w: *const u8, a: &Acts, r0: usize, nb: usize, n: usize, out: *mut f32)
);

/// Body of `q4k`.
///
/// # Safety
/// As `q4k`.
#[inline(always)]
unsafe fn q4k_body<const R: usize, const DOT: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let mask = vdupq_n_u8(0x0f);
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    let mut acc = [[vdupq_n_f32(0.0); 4]; R];
    for b in 0..kb {
        let sb = w.add(b * Q4K_SB);
        let tile = std::slice::from_raw_parts(sb, Q4K_SB);
        for qq in 0..4 {
            let c0 = qq * 16;
            let mut sumi = [vdupq_n_s32(0); R];
            for sp in 0..4 {
                let mut ia = [vdupq_n_s32(0); R];
                let mut ib = [vdupq_n_s32(0); R];
                for g in 0..4 {
                    let wa = load(sb.add((sp * 8 + g) * 64 + c0));
                    let wb = load(sb.add((sp * 8 + 4 + g) * 64 + c0));
                    let la = vreinterpretq_s8_u8(vandq_u8(wa, mask));
                    let ha = vreinterpretq_s8_u8(vshrq_n_u8::<4>(wa));
                    let lb = vreinterpretq_s8_u8(vandq_u8(wb, mask));
                    let hb = vreinterpretq_s8_u8(vshrq_n_u8::<4>(wb));
                    let off = b * QK + sp * 64 + g * 8;
                    for i in 0..R {
                        let x = xq[i].add(off);
                        ia[i] = dot4::<DOT>(dot4::<DOT>(ia[i], la, bcast(x)), ha, bcast(x.add(4)));
                        ib[i] = dot4::<DOT>(
                            dot4::<DOT>(ib[i], lb, bcast(x.add(32))),
                            hb,
                            bcast(x.add(36)),
                        );
                    }
                }
                let sa = lanes(|c| tile[2048 + sp * 32 + 4 * qq + c] as i32);
                let sbv = lanes(|c| tile[2048 + sp * 32 + 16 + 4 * qq + c] as i32);
                let (sa, sbv) = (vld1q_s32(sa.as_ptr()), vld1q_s32(sbv.as_ptr()));
                for i in 0..R {
                    let t = vaddq_s32(vmulq_s32(ia[i], sa), vmulq_s32(ib[i], sbv));
                    sumi[i] = vaddq_s32(sumi[i], t);
                }
            }
            let d = lanes(|c| f16_at(tile, 2304 + (4 * qq + c) * 2));
            let dmin = lanes(|c| f16_at(tile, 2336 + (4 * qq + c) * 2));
            let (d, dmin) = (vld1q_f32(d.as_ptr()), vld1q_f32(dmin.as_ptr()));
            for i in 0..R {
                let r = r0 + i;
                let mins = lanes(|c| {
                    (0..4)
                        .map(|p| {
                            let s = a.sum32_pairs[(r * kb + b) * 4 + p];
                            let mn = &tile[2176 + p * 32 + (4 * qq + c) * 2..];
                            mn[0] as i32 * (s as i16 as i32)
                                + mn[1] as i32 * ((s >> 16) as i16 as i32)
                        })
                        .sum::<i32>()
                });
                let dx = vdupq_n_f32(a.d[r * kb + b]);
                let f = vcvtq_f32_s32(sumi[i]);
                let v = vfmaq_f32(acc[i][qq], f, vmulq_f32(d, dx));
                let fm = vcvtq_f32_s32(vld1q_s32(mins.as_ptr()));
                acc[i][qq] = vfmsq_f32(v, fm, vmulq_f32(dmin, dx));
            }
        }
    }
    store(&acc, n, out);
}

/// Body of `q6k`.
///
/// # Safety
/// As `q6k`.
#[inline(always)]
unsafe fn q6k_body<const R: usize, const DOT: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let (mask, top) = (vdupq_n_u8(0x0f), vdupq_n_u8(0x30));
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    let mut acc = [[vdupq_n_f32(0.0); 4]; R];
    for b in 0..kb {
        let sb = w.add(b * Q6K_SB);
        let tile = std::slice::from_raw_parts(sb, Q6K_SB);
        for qq in 0..4 {
            let c0 = qq * 16;
            let mut sumi = [vdupq_n_s32(0); R];
            for s in 0..8 {
                let c =
                    |i: usize, sub: usize| vdupq_n_s32(a.corr16[((r0 + i) * kb + b) * 16 + sub]);
                let mut ia: [int32x4_t; R] = std::array::from_fn(|i| c(i, 2 * s));
                let mut ib: [int32x4_t; R] = std::array::from_fn(|i| c(i, 2 * s + 1));
                for gp in 0..2 {
                    let h = load(sb.add(2048 + (s * 2 + gp) * 64 + c0));
                    for gg in 0..2 {
                        let g = 2 * gp + gg;
                        let wv = load(sb.add((s * 4 + g) * 64 + c0));
                        // Top bits of the low and high values at bit 4 gg and 4 gg + 2.
                        let (tl, th) = if gg == 0 {
                            (vshlq_n_u8::<4>(h), vshlq_n_u8::<2>(h))
                        } else {
                            (h, vshrq_n_u8::<2>(h))
                        };
                        let lo = vorrq_u8(vandq_u8(wv, mask), vandq_u8(tl, top));
                        let hi = vorrq_u8(vshrq_n_u8::<4>(wv), vandq_u8(th, top));
                        let (lo, hi) = (vreinterpretq_s8_u8(lo), vreinterpretq_s8_u8(hi));
                        let off = b * QK + s * 32 + g * 8;
                        let dst = if gp == 0 { &mut ia } else { &mut ib };
                        for i in 0..R {
                            let x = xq[i].add(off);
                            dst[i] =
                                dot4::<DOT>(dot4::<DOT>(dst[i], lo, bcast(x)), hi, bcast(x.add(4)));
                        }
                    }
                }
                let sa = lanes(|c| tile[3072 + s * 32 + 4 * qq + c] as i8 as i32);
                let sbv = lanes(|c| tile[3072 + s * 32 + 16 + 4 * qq + c] as i8 as i32);
                let (sa, sbv) = (vld1q_s32(sa.as_ptr()), vld1q_s32(sbv.as_ptr()));
                for i in 0..R {
                    let t = vaddq_s32(vmulq_s32(ia[i], sa), vmulq_s32(ib[i], sbv));
                    sumi[i] = vaddq_s32(sumi[i], t);
                }
            }
            let d = vld1q_f32(sb.add(3328 + qq * 16) as *const f32);
            for i in 0..R {
                let dx = vdupq_n_f32(a.d[(r0 + i) * kb + b]);
                acc[i][qq] = vfmaq_f32(acc[i][qq], vcvtq_f32_s32(sumi[i]), vmulq_f32(d, dx));
            }
        }
    }
    store(&acc, n, out);
}

/// Body of `q5`.
///
/// # Safety
/// As `q5`.
#[inline(always)]
unsafe fn q5_body<const R: usize, const DOT: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    pairs: usize,
    n: usize,
    out: *mut f32,
) {
    let (mask, bit4) = (vdupq_n_u8(0x0f), vdupq_n_u8(0x10));
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    // Σ (q − 16) x = Σ q x − 16 Σ x, and corr32 holds −128 Σ x per block.
    let c = |i: usize, blk: usize| vdupq_n_s32(a.corr32[(r0 + i) * kb * 8 + blk] / 8);
    let mut acc = [[vdupq_n_f32(0.0); 4]; R];
    for b in 0..kb {
        for qq in 0..4 {
            let c0 = qq * 16;
            let mut f = [vdupq_n_f32(0.0); R];
            for p in b * 4..pairs.min(b * 4 + 4) {
                let unit = w.add(p * Q5_PAIR);
                let tile = std::slice::from_raw_parts(unit, Q5_PAIR);
                for half in 0..2 {
                    let blk = 2 * p + half;
                    let h = load(unit.add(512 + half * 64 + c0));
                    let mut ia: [int32x4_t; R] = std::array::from_fn(|i| c(i, blk));
                    for g in 0..4 {
                        let wv = load(unit.add((half * 4 + g) * 64 + c0));
                        // Fifth bit of value (g, hh) sits at bit 2 g + hh: move it to bit 4.
                        let fl = vandq_u8(vshlq_u8(h, vdupq_n_s8(4 - 2 * g as i8)), bit4);
                        let fh = vandq_u8(vshlq_u8(h, vdupq_n_s8(3 - 2 * g as i8)), bit4);
                        let lo = vreinterpretq_s8_u8(vorrq_u8(vandq_u8(wv, mask), fl));
                        let hi = vreinterpretq_s8_u8(vorrq_u8(vshrq_n_u8::<4>(wv), fh));
                        let off = blk * 32 + g * 8;
                        for i in 0..R {
                            let x = xq[i].add(off);
                            ia[i] =
                                dot4::<DOT>(dot4::<DOT>(ia[i], lo, bcast(x)), hi, bcast(x.add(4)));
                        }
                    }
                    let d = lanes(|col| f16_at(tile, 640 + half * 32 + (4 * qq + col) * 2));
                    let d = vld1q_f32(d.as_ptr());
                    for i in 0..R {
                        f[i] = vfmaq_f32(f[i], vcvtq_f32_s32(ia[i]), d);
                    }
                }
            }
            for i in 0..R {
                let dx = vdupq_n_f32(a.d[(r0 + i) * kb + b]);
                acc[i][qq] = vfmaq_f32(acc[i][qq], f[i], dx);
            }
        }
    }
    store(&acc, n, out);
}

/// Body of `q8_0`.
///
/// # Safety
/// As `q8_0`.
#[inline(always)]
unsafe fn q8_0_body<const R: usize, const DOT: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    nb: usize,
    n: usize,
    out: *mut f32,
) {
    let flip = vdupq_n_u8(0x80);
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    let mut acc = [[vdupq_n_f32(0.0); 4]; R];
    for b in 0..kb {
        for qq in 0..4 {
            let c0 = qq * 16;
            let mut f = [vdupq_n_f32(0.0); R];
            for j in b * 8..nb.min(b * 8 + 8) {
                let pa = w.add(j * Q8_BLK);
                let mut ia = [vdupq_n_s32(0); R];
                for g in 0..8 {
                    // Stored q + 128; the signed q is that byte with its top bit flipped.
                    let wa = vreinterpretq_s8_u8(veorq_u8(load(pa.add(g * 64 + c0)), flip));
                    for i in 0..R {
                        ia[i] = dot4::<DOT>(ia[i], wa, bcast(xq[i].add(j * 32 + g * 4)));
                    }
                }
                let da = vld1q_f32(pa.add(512 + qq * 16) as *const f32);
                for i in 0..R {
                    f[i] = vfmaq_f32(f[i], vcvtq_f32_s32(ia[i]), da);
                }
            }
            for i in 0..R {
                let dx = vdupq_n_f32(a.d[(r0 + i) * kb + b]);
                acc[i][qq] = vfmaq_f32(acc[i][qq], f[i], dx);
            }
        }
    }
    store(&acc, n, out);
}

/// `super::attend` with 4 f32 lanes.
///
/// # Safety
/// The processor has NEON; `d` is a multiple of 4, and the lengths are those
/// `super::attend` checks.
#[target_feature(enable = "neon")]
pub(super) unsafe fn attend(
    q: &[f32],
    kv: &KeyValues<'_>,
    d: usize,
    scale: f32,
    out: &mut [f32],
    scores: &mut Vec<f32>,
) {
    let (stride, lo, p) = (kv.stride, kv.lo, kv.p);
    let (nh, n, c4) = (q.len() / d, p + 1 - lo, d / 4);
    let (kp, vp) = (kv.keys.as_ptr(), kv.vals.as_ptr());
    scores.clear();
    scores.resize(nh * n, 0.0);
    let mut t0 = lo;
    while t0 <= p {
        let t1 = (t0 + ATTN_TILE).min(p + 1);
        for h in 0..nh {
            let qp = q.as_ptr().add(h * d);
            let row = &mut scores[h * n..(h + 1) * n];
            for j in t0..t1 {
                let mut a = vdupq_n_f32(0.0);
                for c in 0..c4 {
                    a = vfmaq_f32(
                        a,
                        vld1q_f32(qp.add(4 * c)),
                        vld1q_f32(kp.add(j * stride + 4 * c)),
                    );
                }
                row[j - lo] = vaddvq_f32(a) * scale;
            }
        }
        t0 = t1;
    }
    softmax(scores, n);
    out.fill(0.0);
    let mut t0 = lo;
    while t0 <= p {
        let t1 = (t0 + ATTN_TILE).min(p + 1);
        for h in 0..nh {
            let w = &scores[h * n + t0 - lo..h * n + t1 - lo];
            let op = out.as_mut_ptr().add(h * d);
            for c in 0..c4 {
                let mut o = vld1q_f32(op.add(4 * c));
                for (j, &wj) in w.iter().enumerate() {
                    o = vfmaq_f32(
                        o,
                        vdupq_n_f32(wj),
                        vld1q_f32(vp.add((t0 + j) * stride + 4 * c)),
                    );
                }
                vst1q_f32(op.add(4 * c), o);
            }
        }
        t0 = t1;
    }
}

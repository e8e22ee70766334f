//! AVX2 kernels (with FMA and F16C), for x86-64 processors without AVX-512: one
//! 16-column tile as two 8-column halves of 256-bit registers. Int8 products with
//! `vpmaddubsw` (pairs of u8 × i8 into i16) and `vpmaddwd` (into i32), or with
//! `vpdpbusd` on 256-bit registers where AVX-VNNI exists (`VNNI = true`); attention
//! with 8 f32 lanes. Input and output as `scalar.rs`, which the products equal bit for
//! bit: every i16 partial sum stays below 2^15 (bounds beside each use), so the
//! integer sums are exact. Reached only through a `Kernels` value for `Isa::Avx2` or
//! `Isa::AvxVnni`; never called on a processor without those instructions.
//!
//! Register use decides the speed here: AVX2 has 16 vector registers, so with several
//! rows each body runs the tile's two 8-column halves one after the other (all of `k`
//! for columns 0-7, then for 8-15), which halves the accumulators that must stay live
//! (`halves`). Without VNNI, the 4- and 5-bit formats add several `vpmaddubsw`
//! results in i16 before one `vpmaddwd` widens them (bounds at `madd_sum`), and Q4_K
//! multiplies by its sub-block scale in that same `vpmaddwd`.

use super::{softmax, Acts, KeyValues, ATTN_TILE, Q4K_SB, Q5_PAIR, Q6K_SB, Q8_BLK, QK};
use std::arch::x86_64::*;

/// Bytes ahead of each weight load that are requested early (as in `avx512.rs`).
const PREFETCH: usize = 2048;

/// Load the 32 bytes at `p` (one half of a tile line) and request the line
/// `PREFETCH` bytes ahead.
///
/// # Safety
/// `p` is 32-byte aligned and valid for 32 bytes; the caller runs with AVX2.
#[inline(always)]
unsafe fn load(p: *const u8) -> __m256i {
    _mm_prefetch::<_MM_HINT_T0>(p.wrapping_add(PREFETCH) as *const i8);
    _mm256_load_si256(p as *const __m256i)
}

/// Broadcast 4 activation quants (one i32) to all lanes.
///
/// # Safety
/// `p` is valid for 4 bytes; the caller runs with AVX2.
#[inline(always)]
unsafe fn bcast(p: *const i8) -> __m256i {
    _mm256_set1_epi32((p as *const i32).read_unaligned())
}

/// `acc + Σ w1 x1 + Σ w2 x2`, four u8 × i8 products of each operand per i32 lane.
/// Without VNNI the two `vpmaddubsw` results are added in i16: each is at most
/// 2 · 63 · 128 = 16,128 in magnitude for weights below 64 (Q4_K, Q5_0, Q6_K), so
/// their sum stays below 2^15.
///
/// # Safety
/// The caller runs with AVX2, and with AVX-VNNI when `VNNI`.
#[inline(always)]
unsafe fn dot2<const VNNI: bool>(
    acc: __m256i,
    w1: __m256i,
    x1: __m256i,
    w2: __m256i,
    x2: __m256i,
) -> __m256i {
    if VNNI {
        _mm256_dpbusd_avx_epi32(_mm256_dpbusd_avx_epi32(acc, w1, x1), w2, x2)
    } else {
        _mm256_add_epi32(
            acc,
            _mm256_madd_epi16(madd_sum(w1, x1, w2, x2), _mm256_set1_epi16(1)),
        )
    }
}

/// Eight f16 values at `p` as f32 lanes.
///
/// # Safety
/// `p` is valid for 16 bytes; the caller runs with F16C.
#[inline(always)]
unsafe fn f16x8(p: *const u8) -> __m256 {
    _mm256_cvtph_ps(_mm_loadu_si128(p as *const __m128i))
}

/// Eight bytes at `p` widened to i32 lanes, unsigned or signed.
///
/// # Safety
/// `p` is valid for 8 bytes; the caller runs with AVX2.
#[inline(always)]
unsafe fn u8x8(p: *const u8) -> __m256i {
    _mm256_cvtepu8_epi32(_mm_loadl_epi64(p as *const __m128i))
}

/// As `u8x8`, sign-extending.
///
/// # Safety
/// As `u8x8`.
#[inline(always)]
unsafe fn i8x8(p: *const u8) -> __m256i {
    _mm256_cvtepi8_epi32(_mm_loadl_epi64(p as *const __m128i))
}

/// Store one 8-column half of each row's accumulators, `hh` 0 or 1.
///
/// # Safety
/// `out` is valid for 16 columns in each of `R` rows of stride `n`.
#[inline(always)]
unsafe fn store<const R: usize>(acc: &[__m256; R], hh: usize, n: usize, out: *mut f32) {
    for (i, half) in acc.iter().enumerate() {
        _mm256_storeu_ps(out.add(i * n + hh * 8), *half);
    }
}

/// Runs `half(hh, blocks, acc)` over the tile's two 8-column halves and all of `kb`
/// super-blocks, then stores. With several rows, all of `k` for one half and then for
/// the other, so only one half's accumulators stay live; with one row (generation,
/// bound by memory bandwidth) both halves of each super-block in turn, so every
/// weight line is used whole while it is in cache. Either way each column sees the
/// same operations in the same order.
///
/// # Safety
/// `out` is valid for 16 columns in each of `R` rows of stride `n`; the caller runs
/// with AVX.
#[inline(always)]
unsafe fn halves<const R: usize>(
    kb: usize,
    n: usize,
    out: *mut f32,
    mut half: impl FnMut(usize, std::ops::Range<usize>, &mut [__m256; R]),
) {
    if R == 1 {
        let mut acc = [[_mm256_setzero_ps(); R]; 2];
        for b in 0..kb {
            for (hh, acc) in acc.iter_mut().enumerate() {
                half(hh, b..b + 1, acc);
            }
        }
        for (hh, acc) in acc.iter().enumerate() {
            store(acc, hh, n, out);
        }
    } else {
        for hh in 0..2 {
            let mut acc = [_mm256_setzero_ps(); R];
            half(hh, 0..kb, &mut acc);
            store(&acc, hh, n, out);
        }
    }
}

/// `w1 · x1 + w2 · x2` as two `vpmaddubsw` (pairs of u8 × i8) added in i16. Each `vpmaddubsw` lane is at most 2 · w_max · 127 in magnitude (activation quants
/// lie in −127..=127, as `d = max / 127`), so a caller may add `N` such results in i16
/// only while `N · 2 · w_max · 127 < 2^15`: 8 for 4-bit weights (30,480), 4 for 5-bit
/// (31,496), 2 for 6-bit (32,004).
///
/// # Safety
/// The caller runs with AVX2.
#[inline(always)]
unsafe fn madd_sum(w1: __m256i, x1: __m256i, w2: __m256i, x2: __m256i) -> __m256i {
    _mm256_add_epi16(_mm256_maddubs_epi16(w1, x1), _mm256_maddubs_epi16(w2, x2))
}

/// Activation quant pointers of rows `r0 .. r0 + R`.
fn rows<const R: usize>(a: &Acts, r0: usize) -> [*const i8; R] {
    std::array::from_fn(|i| a.q[(r0 + i) * a.kb * QK..].as_ptr())
}

/// `quantise_block` 8 values at a time.
///
/// # Safety
/// The processor has AVX2; `xs.len()` is a multiple of 16 and at most `q.len()`.
#[target_feature(enable = "avx2")]
pub(super) unsafe fn quantise(xs: &[f32], q: &mut [i8], sums: &mut [i32; 16]) -> f32 {
    let abs = _mm256_castsi256_ps(_mm256_set1_epi32(0x7fff_ffff));
    let mut vmax = _mm256_setzero_ps();
    for c in xs.chunks_exact(8) {
        vmax = _mm256_max_ps(vmax, _mm256_and_ps(_mm256_loadu_ps(c.as_ptr()), abs));
    }
    let mut lanes = [0f32; 8];
    _mm256_storeu_ps(lanes.as_mut_ptr(), vmax);
    let amax = lanes.iter().fold(0f32, |a, &v| a.max(v));
    if amax == 0.0 {
        return 0.0;
    }
    let iscale = 127.0 / amax;
    let s = _mm256_set1_ps(iscale);
    let (lo, hi) = (_mm256_set1_epi32(-128), _mm256_set1_epi32(127));
    let round = |p: *const f32| {
        let r = _mm256_cvtps_epi32(_mm256_mul_ps(_mm256_loadu_ps(p), s)); // nearest, ties even
        _mm256_min_epi32(_mm256_max_epi32(r, lo), hi)
    };
    for (i, c) in xs.chunks_exact(16).enumerate() {
        let (a, b) = (round(c.as_ptr()), round(c.as_ptr().add(8)));
        let mut v = [0i32; 16];
        _mm256_storeu_si256(v.as_mut_ptr() as *mut __m256i, a);
        _mm256_storeu_si256(v.as_mut_ptr().add(8) as *mut __m256i, b);
        sums[i] = v.iter().sum();
        for (q, v) in q[i * 16..(i + 1) * 16].iter_mut().zip(v) {
            *q = v as i8;
        }
    }
    1.0 / iscale
}

/// Generates the public entry of one product kernel: the body compiled twice, for
/// AVX2 alone and with AVX-VNNI, chosen by `VNNI`.
macro_rules! entry {
    ($(#[$doc:meta])* $name:ident => $body:ident ($($arg:ident: $ty:ty),*)) => {
        $(#[$doc])*
        ///
        /// # Safety
        /// The processor has AVX2, FMA and F16C, and AVX-VNNI when `VNNI`; `w` is one
        /// 64-byte aligned tile of this format covering `a.kb` super-blocks; rows
        /// `r0 .. r0 + R` exist in `a`; `out` is valid for 16 columns in each of `R`
        /// rows of stride `n`.
        pub(super) unsafe fn $name<const R: usize, const VNNI: bool>($($arg: $ty),*) {
            /// # Safety
            /// As the enclosing function.
            #[target_feature(enable = "avx2,fma,f16c")]
            unsafe fn plain<const R: usize>($($arg: $ty),*) {
                $body::<R, false>($($arg),*)
            }
            /// # Safety
            /// As the enclosing function.
            #[target_feature(enable = "avx2,fma,f16c,avxvnni")]
            unsafe fn vnni<const R: usize>($($arg: $ty),*) {
                $body::<R, true>($($arg),*)
            }
            if VNNI {
                vnni::<R>($($arg),*)
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

/// Body of `q4k`. Per sub-block of 32 values: without VNNI the four lines' eight
/// `vpmaddubsw` results are summed in i16 (at most 8 · 3,810 = 30,480) and one
/// `vpmaddwd` against the column's 6-bit scale (both i16 halves of a lane) widens and
/// scales them; with VNNI the i32 sums are multiplied by the scale. The integers
/// equal the scalar kernel's either way.
///
/// # Safety
/// As `q4k`.
#[inline(always)]
unsafe fn q4k_body<const R: usize, const VNNI: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let mask = _mm256_set1_epi8(0x0f);
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    halves::<R>(kb, n, out, |hh, blocks, acc| {
        let c0 = hh * 32;
        for b in blocks {
            let sb = w.add(b * Q4K_SB);
            let mut sumi = [_mm256_setzero_si256(); R];
            for s in 0..8 {
                // Scale of each of this half's 8 columns, one per i32 lane.
                let sc = u8x8(sb.add(2048 + s * 16 + hh * 8));
                let mut part = [_mm256_setzero_si256(); R];
                for g in 0..4 {
                    let wv = load(sb.add((s * 4 + g) * 64 + c0));
                    let lo = _mm256_and_si256(wv, mask);
                    let hi = _mm256_and_si256(_mm256_srli_epi16::<4>(wv), mask);
                    let off = b * QK + s * 32 + g * 8;
                    for i in 0..R {
                        let x = xq[i].add(off);
                        let (x1, x2) = (bcast(x), bcast(x.add(4)));
                        part[i] = if VNNI {
                            dot2::<true>(part[i], lo, x1, hi, x2)
                        } else {
                            _mm256_add_epi16(part[i], madd_sum(lo, x1, hi, x2))
                        };
                    }
                }
                // Without VNNI the scale goes in both i16 halves of each lane, for
                // `vpmaddwd`.
                let sc = if VNNI {
                    sc
                } else {
                    _mm256_or_si256(sc, _mm256_slli_epi32::<16>(sc))
                };
                for i in 0..R {
                    let t = if VNNI {
                        _mm256_mullo_epi32(part[i], sc)
                    } else {
                        _mm256_madd_epi16(part[i], sc)
                    };
                    sumi[i] = _mm256_add_epi32(sumi[i], t);
                }
            }
            let mut mins = [_mm256_setzero_si256(); R];
            for p in 0..4 {
                let mn = _mm256_cvtepu8_epi16(_mm_loadu_si128(
                    sb.add(2176 + p * 32 + hh * 16) as *const __m128i
                ));
                for (i, m) in mins.iter_mut().enumerate() {
                    let s = *a.sum32_pairs.get_unchecked(((r0 + i) * kb + b) * 4 + p);
                    *m = _mm256_add_epi32(*m, _mm256_madd_epi16(mn, _mm256_set1_epi32(s)));
                }
            }
            let d = f16x8(sb.add(2304 + hh * 16));
            let dmin = f16x8(sb.add(2336 + hh * 16));
            for i in 0..R {
                let dx = _mm256_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
                let f = _mm256_cvtepi32_ps(sumi[i]);
                let v = _mm256_fmadd_ps(f, _mm256_mul_ps(d, dx), acc[i]);
                let fm = _mm256_cvtepi32_ps(mins[i]);
                acc[i] = _mm256_fnmadd_ps(fm, _mm256_mul_ps(dmin, dx), v);
            }
        }
    });
}

/// Top bits of a Q6_K value moved to bits 4-5 of each byte (as in `avx512.rs`).
///
/// # Safety
/// The caller runs with AVX2.
#[inline(always)]
unsafe fn top2<const S: i32>(h: __m256i) -> __m256i {
    let m = _mm256_set1_epi8(0x30);
    match S {
        4 => _mm256_and_si256(_mm256_slli_epi16::<4>(h), m),
        2 => _mm256_and_si256(_mm256_slli_epi16::<2>(h), m),
        0 => _mm256_and_si256(h, m),
        _ => _mm256_and_si256(_mm256_srli_epi16::<2>(h), m),
    }
}

/// Body of `q6k`.
///
/// # Safety
/// As `q6k`.
#[inline(always)]
unsafe fn q6k_body<const R: usize, const VNNI: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let mask = _mm256_set1_epi8(0x0f);
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    halves::<R>(kb, n, out, |hh, blocks, acc| {
        let c0 = hh * 32;
        for b in blocks {
            let sb = w.add(b * Q6K_SB);
            let mut sumi = [_mm256_setzero_si256(); R];
            // Sub-block `sub` of 16 values: two lines and the line of their top bits.
            for sub in 0..16 {
                let (s, gp) = (sub / 2, sub % 2);
                let mut part: [__m256i; R] = std::array::from_fn(|i| {
                    _mm256_set1_epi32(*a.corr16.get_unchecked(((r0 + i) * kb + b) * 16 + sub))
                });
                let h = load(sb.add(2048 + sub * 64 + c0));
                for gg in 0..2 {
                    let g = 2 * gp + gg;
                    let wv = load(sb.add((s * 4 + g) * 64 + c0));
                    let (tl, th) = if gg == 0 {
                        (top2::<4>(h), top2::<2>(h))
                    } else {
                        (top2::<0>(h), top2::<-2>(h))
                    };
                    let lo = _mm256_or_si256(_mm256_and_si256(wv, mask), tl);
                    let hi =
                        _mm256_or_si256(_mm256_and_si256(_mm256_srli_epi16::<4>(wv), mask), th);
                    let off = b * QK + s * 32 + g * 8;
                    for i in 0..R {
                        let x = xq[i].add(off);
                        part[i] = dot2::<VNNI>(part[i], lo, bcast(x), hi, bcast(x.add(4)));
                    }
                }
                let sc = i8x8(sb.add(3072 + sub * 16 + hh * 8));
                for i in 0..R {
                    sumi[i] = _mm256_add_epi32(sumi[i], _mm256_mullo_epi32(part[i], sc));
                }
            }
            let d = _mm256_load_ps(sb.add(3328 + hh * 32) as *const f32);
            for i in 0..R {
                let dx = _mm256_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
                let f = _mm256_cvtepi32_ps(sumi[i]);
                acc[i] = _mm256_fmadd_ps(f, _mm256_mul_ps(d, dx), acc[i]);
            }
        }
    });
}

/// Fifth bit of a Q5_0 value moved to bit 4 of each byte (as in `avx512.rs`).
///
/// # Safety
/// The caller runs with AVX2.
#[inline(always)]
unsafe fn fifth<const S: i32>(h: __m256i) -> __m256i {
    let m = _mm256_set1_epi8(0x10);
    let v = match S {
        4 => _mm256_slli_epi16::<4>(h),
        3 => _mm256_slli_epi16::<3>(h),
        2 => _mm256_slli_epi16::<2>(h),
        1 => _mm256_slli_epi16::<1>(h),
        0 => h,
        -1 => _mm256_srli_epi16::<1>(h),
        -2 => _mm256_srli_epi16::<2>(h),
        _ => _mm256_srli_epi16::<3>(h),
    };
    _mm256_and_si256(v, m)
}

/// Body of `q5`.
///
/// # Safety
/// As `q5`.
#[inline(always)]
unsafe fn q5_body<const R: usize, const VNNI: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    pairs: usize,
    n: usize,
    out: *mut f32,
) {
    let mask = _mm256_set1_epi8(0x0f);
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    // Σ (q − 16) x = Σ q x − 16 Σ x, and corr32 holds −128 Σ x per block.
    let c = |i: usize, blk: usize| {
        _mm256_set1_epi32(*a.corr32.get_unchecked((r0 + i) * kb * 8 + blk) / 8)
    };
    // Line `g` of a block half: its low and high values, fifth bits or'ed in.
    let line = |unit: *const u8, half: usize, g: usize, h: __m256i, c0: usize| {
        let wv = load(unit.add((half * 4 + g) * 64 + c0));
        let (fl, fh) = match g {
            0 => (fifth::<4>(h), fifth::<3>(h)),
            1 => (fifth::<2>(h), fifth::<1>(h)),
            2 => (fifth::<0>(h), fifth::<-1>(h)),
            _ => (fifth::<-2>(h), fifth::<-3>(h)),
        };
        let lo = _mm256_or_si256(_mm256_and_si256(wv, mask), fl);
        let hi = _mm256_or_si256(_mm256_and_si256(_mm256_srli_epi16::<4>(wv), mask), fh);
        (lo, hi)
    };
    halves::<R>(kb, n, out, |hh, blocks, acc| {
        let c0 = hh * 32;
        for b in blocks {
            let mut f = [_mm256_setzero_ps(); R];
            for p in b * 4..pairs.min(b * 4 + 4) {
                let unit = w.add(p * Q5_PAIR);
                for half in 0..2 {
                    let blk = 2 * p + half;
                    let h = load(unit.add(512 + half * 64 + c0));
                    let mut ia: [__m256i; R] = std::array::from_fn(|i| c(i, blk));
                    // Two lines at a time: without VNNI their four `vpmaddubsw`
                    // results add in i16 (5-bit weights: at most 4 · 7,874 = 31,496).
                    for g in [0, 2] {
                        let (lo0, hi0) = line(unit, half, g, h, c0);
                        let (lo1, hi1) = line(unit, half, g + 1, h, c0);
                        for i in 0..R {
                            let x = xq[i].add(blk * 32 + g * 8);
                            ia[i] = if VNNI {
                                dot2::<true>(
                                    dot2::<true>(ia[i], lo0, bcast(x), hi0, bcast(x.add(4))),
                                    lo1,
                                    bcast(x.add(8)),
                                    hi1,
                                    bcast(x.add(12)),
                                )
                            } else {
                                let t = _mm256_add_epi16(
                                    madd_sum(lo0, bcast(x), hi0, bcast(x.add(4))),
                                    madd_sum(lo1, bcast(x.add(8)), hi1, bcast(x.add(12))),
                                );
                                _mm256_add_epi32(ia[i], _mm256_madd_epi16(t, _mm256_set1_epi16(1)))
                            };
                        }
                    }
                    let d = f16x8(unit.add(640 + half * 32 + hh * 16));
                    for i in 0..R {
                        f[i] = _mm256_fmadd_ps(_mm256_cvtepi32_ps(ia[i]), d, f[i]);
                    }
                }
            }
            for i in 0..R {
                let dx = _mm256_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
                acc[i] = _mm256_fmadd_ps(f[i], dx, acc[i]);
            }
        }
    });
}

/// Σ q_w q_x of one Q8_0 line half into `acc`, four products per i32 lane. The tile
/// stores `q_w + 128`: with VNNI that unsigned byte goes to `vpdpbusd` and the
/// caller starts `acc` at −128 Σ q_x; without, the byte is turned back into the
/// signed `q_w` and multiplied as |q_w| · (q_x with q_w's sign), each pair at most
/// 2 · 128 · 127 = 32,512 in i16 (activation quants lie in −127..=127, as
/// `d = max / 127`), and `acc` starts at zero.
///
/// # Safety
/// The caller runs with AVX2, and with AVX-VNNI when `VNNI`.
#[inline(always)]
unsafe fn dot_q8<const VNNI: bool>(acc: __m256i, w: __m256i, x: __m256i) -> __m256i {
    if VNNI {
        _mm256_dpbusd_avx_epi32(acc, w, x)
    } else {
        let ws = _mm256_xor_si256(w, _mm256_set1_epi8(-128));
        let p = _mm256_maddubs_epi16(_mm256_abs_epi8(ws), _mm256_sign_epi8(x, ws));
        _mm256_add_epi32(acc, _mm256_madd_epi16(p, _mm256_set1_epi16(1)))
    }
}

/// Body of `q8_0`.
///
/// # Safety
/// As `q8_0`.
#[inline(always)]
unsafe fn q8_0_body<const R: usize, const VNNI: bool>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    nb: usize,
    n: usize,
    out: *mut f32,
) {
    let kb = a.kb;
    let xq = rows::<R>(a, r0);
    let c = |i: usize, blk: usize| {
        if VNNI {
            _mm256_set1_epi32(*a.corr32.get_unchecked((r0 + i) * kb * 8 + blk))
        } else {
            _mm256_setzero_si256()
        }
    };
    halves::<R>(kb, n, out, |hh, blocks, acc| {
        let c0 = hh * 32;
        for b in blocks {
            let mut f = [_mm256_setzero_ps(); R];
            for j in b * 8..nb.min(b * 8 + 8) {
                let pa = w.add(j * Q8_BLK);
                let mut ia: [__m256i; R] = std::array::from_fn(|i| c(i, j));
                for g in 0..8 {
                    let wa = load(pa.add(g * 64 + c0));
                    for i in 0..R {
                        ia[i] = dot_q8::<VNNI>(ia[i], wa, bcast(xq[i].add(j * 32 + g * 4)));
                    }
                }
                let da = _mm256_load_ps(pa.add(512 + hh * 32) as *const f32);
                for i in 0..R {
                    f[i] = _mm256_fmadd_ps(_mm256_cvtepi32_ps(ia[i]), da, f[i]);
                }
            }
            for i in 0..R {
                let dx = _mm256_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
                acc[i] = _mm256_fmadd_ps(f[i], dx, acc[i]);
            }
        }
    });
}

/// Sum of the 8 lanes, in one fixed order.
///
/// # Safety
/// The caller runs with AVX.
#[inline(always)]
unsafe fn hsum(v: __m256) -> f32 {
    let s = _mm_add_ps(_mm256_castps256_ps128(v), _mm256_extractf128_ps::<1>(v));
    let s = _mm_add_ps(s, _mm_movehl_ps(s, s));
    _mm_cvtss_f32(_mm_add_ss(s, _mm_movehdup_ps(s)))
}

/// `super::attend` with 8 f32 lanes.
///
/// # Safety
/// The processor has AVX2 and FMA; `d` is a multiple of 8, and the lengths are those
/// `super::attend` checks.
#[target_feature(enable = "avx2,fma")]
pub(super) unsafe fn attend(
    q: &[f32],
    kv: &KeyValues<'_>,
    d: usize,
    scale: f32,
    out: &mut [f32],
    scores: &mut Vec<f32>,
) {
    let (stride, lo, p) = (kv.stride, kv.lo, kv.p);
    let (nh, n, c8) = (q.len() / d, p + 1 - lo, d / 8);
    let (kp, vp) = (kv.keys.as_ptr(), kv.vals.as_ptr());
    scores.clear();
    scores.resize(nh * n, 0.0);
    let mut t0 = lo;
    while t0 <= p {
        let t1 = (t0 + ATTN_TILE).min(p + 1);
        for h in 0..nh {
            let qp = q.as_ptr().add(h * d);
            let row = &mut scores[h * n..(h + 1) * n];
            let mut j = t0;
            while j + 4 <= t1 {
                let mut acc = [_mm256_setzero_ps(); 4];
                for c in 0..c8 {
                    let qc = _mm256_loadu_ps(qp.add(8 * c));
                    for (t, a) in acc.iter_mut().enumerate() {
                        let k = _mm256_loadu_ps(kp.add((j + t) * stride + 8 * c));
                        *a = _mm256_fmadd_ps(qc, k, *a);
                    }
                }
                for (t, a) in acc.into_iter().enumerate() {
                    row[j + t - lo] = hsum(a) * scale;
                }
                j += 4;
            }
            while j < t1 {
                let mut a = _mm256_setzero_ps();
                for c in 0..c8 {
                    let k = _mm256_loadu_ps(kp.add(j * stride + 8 * c));
                    a = _mm256_fmadd_ps(_mm256_loadu_ps(qp.add(8 * c)), k, a);
                }
                row[j - lo] = hsum(a) * scale;
                j += 1;
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
            // Four registers of the output at a time, then the rest one by one.
            let mut c = 0;
            while c + 4 <= c8 {
                weighted::<4>(op.add(8 * c), vp.add(t0 * stride + 8 * c), stride, w);
                c += 4;
            }
            while c < c8 {
                weighted::<1>(op.add(8 * c), vp.add(t0 * stride + 8 * c), stride, w);
                c += 1;
            }
        }
        t0 = t1;
    }
}

/// `o += Σ_j w[j] · v_j` for `8 U` output values at `op`, value rows from `vp` at
/// `stride`.
///
/// # Safety
/// The caller runs with AVX and FMA; `op` is valid for `8 U` values and `vp` for
/// `w.len()` rows of `stride`, each at least `8 U` values.
#[inline(always)]
unsafe fn weighted<const U: usize>(op: *mut f32, vp: *const f32, stride: usize, w: &[f32]) {
    let mut o: [__m256; U] = std::array::from_fn(|u| _mm256_loadu_ps(op.add(8 * u)));
    for (j, &wj) in w.iter().enumerate() {
        let wv = _mm256_set1_ps(wj);
        for (u, ou) in o.iter_mut().enumerate() {
            *ou = _mm256_fmadd_ps(wv, _mm256_loadu_ps(vp.add(j * stride + 8 * u)), *ou);
        }
    }
    for (u, ou) in o.iter().enumerate() {
        _mm256_storeu_ps(op.add(8 * u), *ou);
    }
}

row_operations!("avx2,fma", "The processor has AVX2 and FMA.");

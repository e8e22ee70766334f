//! AVX-512 kernels (F/BW/VL and VNNI): one 16-column tile per 512-bit register,
//! int8 products with `vpdpbusd`, and attention with 16 f32 lanes. Input and output
//! as `scalar.rs`, which they equal bit for bit on the products. Reached only through
//! a `Kernels` value for `Isa::Avx512`; never called on a processor without those
//! instructions.

use super::{softmax, Acts, KeyValues, ATTN_TILE, Q4K_SB, Q5_PAIR, Q6K_SB, Q8_BLK, QK};
use std::arch::x86_64::*;

/// Broadcast 4 activation quants (one i32) to all lanes.
///
/// # Safety
/// `p` is valid for 4 bytes; the caller runs with AVX-512 F.
#[inline(always)]
unsafe fn bcast(p: *const i8) -> __m512i {
    _mm512_set1_epi32((p as *const i32).read_unaligned())
}

/// Bytes ahead of each weight load that are requested early. A single row leaves
/// the core mostly waiting on memory; asking for lines this far ahead overlaps the
/// wait with arithmetic (tiles of one worker's range are contiguous). 2 KiB was
/// the best of 0, 1, 2, 4 and 8 KiB in `cargo bench --bench kernels`.
const PREFETCH: usize = 2048;

/// Load one 64-byte line of a tile and request the line `PREFETCH` bytes ahead.
///
/// # Safety
/// `p` is 64-byte aligned and valid for 64 bytes; the caller runs with AVX-512 F.
#[inline(always)]
unsafe fn load(p: *const u8) -> __m512i {
    _mm_prefetch::<_MM_HINT_T0>(p.wrapping_add(PREFETCH) as *const i8);
    _mm512_load_si512(p as *const __m512i)
}

/// `quantise_block` 16 values at a time.
///
/// # Safety
/// The processor has AVX-512 F/BW; `xs.len()` is a multiple of 16 and at most
/// `q.len()`.
#[target_feature(enable = "avx512f,avx512bw")]
pub(super) unsafe fn quantise(xs: &[f32], q: &mut [i8], sums: &mut [i32; 16]) -> f32 {
    let mut vmax = _mm512_setzero_ps();
    for c in xs.chunks_exact(16) {
        vmax = _mm512_max_ps(vmax, _mm512_abs_ps(_mm512_loadu_ps(c.as_ptr())));
    }
    let amax = _mm512_reduce_max_ps(vmax);
    if amax == 0.0 {
        return 0.0;
    }
    let iscale = 127.0 / amax;
    let s = _mm512_set1_ps(iscale);
    let lo = _mm512_set1_epi32(-128);
    let hi = _mm512_set1_epi32(127);
    for (i, c) in xs.chunks_exact(16).enumerate() {
        let v = _mm512_mul_ps(_mm512_loadu_ps(c.as_ptr()), s);
        let r = _mm512_cvtps_epi32(v); // MXCSR default: nearest, ties to even
        let r = _mm512_min_epi32(_mm512_max_epi32(r, lo), hi);
        sums[i] = _mm512_reduce_add_epi32(r);
        _mm_storeu_si128(
            q.as_mut_ptr().add(i * 16) as *mut __m128i,
            _mm512_cvtepi32_epi8(r),
        );
    }
    1.0 / iscale
}

/// Q4_K: `R` rows from `r0` against one tile.
///
/// # Safety
/// The processor has AVX-512 F/BW/VNNI and F16C; `w` is one 64-byte aligned Q4_K
/// tile of `a.kb` super-blocks; rows `r0 .. r0 + R` exist in `a`; `out` is valid for
/// 16 columns in each of `R` rows of stride `n`.
#[target_feature(enable = "avx512f,avx512bw,avx512vnni,f16c")]
pub(super) unsafe fn q4k<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let mask = _mm512_set1_epi8(0x0f);
    let kb = a.kb;
    let xq: [*const i8; R] = std::array::from_fn(|i| a.q.as_ptr().add((r0 + i) * kb * QK));
    let mut acc = [_mm512_setzero_ps(); R];
    for b in 0..kb {
        let sb = w.add(b * Q4K_SB);
        let mut sumi = [_mm512_setzero_si512(); R];
        for sp in 0..4 {
            let mut ia = [_mm512_setzero_si512(); R];
            let mut ib = [_mm512_setzero_si512(); R];
            for g in 0..4 {
                let wa = load(sb.add((sp * 8 + g) * 64));
                let wb = load(sb.add((sp * 8 + 4 + g) * 64));
                let la = _mm512_and_si512(wa, mask);
                let ha = _mm512_and_si512(_mm512_srli_epi16::<4>(wa), mask);
                let lb = _mm512_and_si512(wb, mask);
                let hb = _mm512_and_si512(_mm512_srli_epi16::<4>(wb), mask);
                let off = b * QK + sp * 64 + g * 8;
                for i in 0..R {
                    let x = xq[i].add(off);
                    ia[i] = _mm512_dpbusd_epi32(ia[i], la, bcast(x));
                    ia[i] = _mm512_dpbusd_epi32(ia[i], ha, bcast(x.add(4)));
                    ib[i] = _mm512_dpbusd_epi32(ib[i], lb, bcast(x.add(32)));
                    ib[i] = _mm512_dpbusd_epi32(ib[i], hb, bcast(x.add(36)));
                }
            }
            let sa = _mm512_cvtepu8_epi32(_mm_load_si128(sb.add(2048 + sp * 32) as *const _));
            let sbv = _mm512_cvtepu8_epi32(_mm_load_si128(sb.add(2048 + sp * 32 + 16) as *const _));
            for i in 0..R {
                let t = _mm512_add_epi32(
                    _mm512_mullo_epi32(ia[i], sa),
                    _mm512_mullo_epi32(ib[i], sbv),
                );
                sumi[i] = _mm512_add_epi32(sumi[i], t);
            }
        }
        let mut mins = [_mm512_setzero_si512(); R];
        for p in 0..4 {
            let mn = _mm512_cvtepu8_epi16(_mm256_load_si256(sb.add(2176 + p * 32) as *const _));
            for (i, acc) in mins.iter_mut().enumerate() {
                let s = *a.sum32_pairs.get_unchecked(((r0 + i) * kb + b) * 4 + p);
                *acc = _mm512_dpwssd_epi32(*acc, mn, _mm512_set1_epi32(s));
            }
        }
        let d = _mm512_cvtph_ps(_mm256_load_si256(sb.add(2304) as *const __m256i));
        let dmin = _mm512_cvtph_ps(_mm256_load_si256(sb.add(2336) as *const __m256i));
        for i in 0..R {
            let dx = _mm512_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
            let f = _mm512_cvtepi32_ps(sumi[i]);
            acc[i] = _mm512_fmadd_ps(f, _mm512_mul_ps(d, dx), acc[i]);
            let fm = _mm512_cvtepi32_ps(mins[i]);
            acc[i] = _mm512_fnmadd_ps(fm, _mm512_mul_ps(dmin, dx), acc[i]);
        }
    }
    for (i, v) in acc.iter().enumerate() {
        _mm512_storeu_ps(out.add(i * n), *v);
    }
}

/// Top bits of a Q6_K value moved to bits 4-5 of each byte: `S` = 4 - 4 gg for the
/// low value of nibble line `2 gp + gg`, 2 - 4 gg for its high value.
///
/// # Safety
/// The caller runs with AVX-512 BW.
#[inline(always)]
unsafe fn top2<const S: i32>(h: __m512i) -> __m512i {
    let m = _mm512_set1_epi8(0x30);
    match S {
        4 => _mm512_and_si512(_mm512_slli_epi16::<4>(h), m),
        2 => _mm512_and_si512(_mm512_slli_epi16::<2>(h), m),
        0 => _mm512_and_si512(h, m),
        _ => _mm512_and_si512(_mm512_srli_epi16::<2>(h), m),
    }
}

/// Q6_K: `R` rows from `r0` against one tile.
///
/// # Safety
/// As `q4k`, for a Q6_K tile.
#[target_feature(enable = "avx512f,avx512bw,avx512vnni")]
pub(super) unsafe fn q6k<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    n: usize,
    out: *mut f32,
) {
    let mask = _mm512_set1_epi8(0x0f);
    let kb = a.kb;
    let xq: [*const i8; R] = std::array::from_fn(|i| a.q.as_ptr().add((r0 + i) * kb * QK));
    let mut acc = [_mm512_setzero_ps(); R];
    for b in 0..kb {
        let sb = w.add(b * Q6K_SB);
        let mut sumi = [_mm512_setzero_si512(); R];
        for s in 0..8 {
            let c = |i: usize, sub: usize| {
                _mm512_set1_epi32(*a.corr16.get_unchecked(((r0 + i) * kb + b) * 16 + sub))
            };
            // Sub-block 2 s is nibble lines g = 0, 1 (top bits line gp = 0);
            // sub-block 2 s + 1 is g = 2, 3 (gp = 1).
            let mut ia: [__m512i; R] = std::array::from_fn(|i| c(i, 2 * s));
            let mut ib: [__m512i; R] = std::array::from_fn(|i| c(i, 2 * s + 1));
            for gp in 0..2 {
                let h = load(sb.add(2048 + (s * 2 + gp) * 64));
                for gg in 0..2 {
                    let g = 2 * gp + gg;
                    let wv = load(sb.add((s * 4 + g) * 64));
                    let (tl, th) = if gg == 0 {
                        (top2::<4>(h), top2::<2>(h))
                    } else {
                        (top2::<0>(h), top2::<-2>(h))
                    };
                    let lo = _mm512_or_si512(_mm512_and_si512(wv, mask), tl);
                    let hi =
                        _mm512_or_si512(_mm512_and_si512(_mm512_srli_epi16::<4>(wv), mask), th);
                    let off = b * QK + s * 32 + g * 8;
                    let dst = if gp == 0 { &mut ia } else { &mut ib };
                    for i in 0..R {
                        let x = xq[i].add(off);
                        dst[i] = _mm512_dpbusd_epi32(dst[i], lo, bcast(x));
                        dst[i] = _mm512_dpbusd_epi32(dst[i], hi, bcast(x.add(4)));
                    }
                }
            }
            let sa = _mm512_cvtepi8_epi32(_mm_load_si128(sb.add(3072 + s * 32) as *const _));
            let sbv = _mm512_cvtepi8_epi32(_mm_load_si128(sb.add(3072 + s * 32 + 16) as *const _));
            for i in 0..R {
                let t = _mm512_add_epi32(
                    _mm512_mullo_epi32(ia[i], sa),
                    _mm512_mullo_epi32(ib[i], sbv),
                );
                sumi[i] = _mm512_add_epi32(sumi[i], t);
            }
        }
        let d = _mm512_load_ps(sb.add(3328) as *const f32);
        for i in 0..R {
            let dx = _mm512_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
            let f = _mm512_cvtepi32_ps(sumi[i]);
            acc[i] = _mm512_fmadd_ps(f, _mm512_mul_ps(d, dx), acc[i]);
        }
    }
    for (i, v) in acc.iter().enumerate() {
        _mm512_storeu_ps(out.add(i * n), *v);
    }
}

/// Fifth bit of a Q5_0 value moved to bit 4 of each byte: `S` = 4 - bit, for the
/// value whose fifth bit sits at `bit` (0..7) of its byte.
///
/// # Safety
/// The caller runs with AVX-512 BW.
#[inline(always)]
unsafe fn fifth<const S: i32>(h: __m512i) -> __m512i {
    let m = _mm512_set1_epi8(0x10);
    let v = match S {
        4 => _mm512_slli_epi16::<4>(h),
        3 => _mm512_slli_epi16::<3>(h),
        2 => _mm512_slli_epi16::<2>(h),
        1 => _mm512_slli_epi16::<1>(h),
        0 => h,
        -1 => _mm512_srli_epi16::<1>(h),
        -2 => _mm512_srli_epi16::<2>(h),
        _ => _mm512_srli_epi16::<3>(h),
    };
    _mm512_and_si512(v, m)
}

/// Q5_0 (`pairs` 64-value units per row): `R` rows from `r0` against one tile.
///
/// # Safety
/// As `q4k`, for a Q5_0 tile of `pairs` units.
#[target_feature(enable = "avx512f,avx512bw,avx512vnni,f16c")]
pub(super) unsafe fn q5<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    pairs: usize,
    n: usize,
    out: *mut f32,
) {
    let mask = _mm512_set1_epi8(0x0f);
    let kb = a.kb;
    let xq: [*const i8; R] = std::array::from_fn(|i| a.q.as_ptr().add((r0 + i) * kb * QK));
    // Σ (q − 16) x = Σ q x − 16 Σ x, and corr32 holds −128 Σ x per block.
    let c = |i: usize, blk: usize| {
        _mm512_set1_epi32(*a.corr32.get_unchecked((r0 + i) * kb * 8 + blk) / 8)
    };
    let mut acc = [_mm512_setzero_ps(); R];
    for b in 0..kb {
        let mut f = [_mm512_setzero_ps(); R];
        for p in b * 4..pairs.min(b * 4 + 4) {
            let unit = w.add(p * Q5_PAIR);
            for half in 0..2 {
                let blk = 2 * p + half;
                let h = load(unit.add(512 + half * 64));
                let mut ia: [__m512i; R] = std::array::from_fn(|i| c(i, blk));
                for g in 0..4 {
                    let wv = load(unit.add((half * 4 + g) * 64));
                    let (fl, fh) = match g {
                        0 => (fifth::<4>(h), fifth::<3>(h)),
                        1 => (fifth::<2>(h), fifth::<1>(h)),
                        2 => (fifth::<0>(h), fifth::<-1>(h)),
                        _ => (fifth::<-2>(h), fifth::<-3>(h)),
                    };
                    let lo = _mm512_or_si512(_mm512_and_si512(wv, mask), fl);
                    let hi =
                        _mm512_or_si512(_mm512_and_si512(_mm512_srli_epi16::<4>(wv), mask), fh);
                    let off = blk * 32 + g * 8;
                    for i in 0..R {
                        let x = xq[i].add(off);
                        ia[i] = _mm512_dpbusd_epi32(ia[i], lo, bcast(x));
                        ia[i] = _mm512_dpbusd_epi32(ia[i], hi, bcast(x.add(4)));
                    }
                }
                let d = _mm512_cvtph_ps(_mm256_load_si256(
                    unit.add(640 + half * 32) as *const __m256i
                ));
                for i in 0..R {
                    f[i] = _mm512_fmadd_ps(_mm512_cvtepi32_ps(ia[i]), d, f[i]);
                }
            }
        }
        for i in 0..R {
            let dx = _mm512_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
            acc[i] = _mm512_fmadd_ps(f[i], dx, acc[i]);
        }
    }
    for (i, v) in acc.iter().enumerate() {
        _mm512_storeu_ps(out.add(i * n), *v);
    }
}

/// Q8_0 (`nb` 32-value blocks per row): `R` rows from `r0` against one tile.
///
/// # Safety
/// As `q4k`, for a Q8_0 tile of `nb` blocks.
#[target_feature(enable = "avx512f,avx512bw,avx512vnni")]
pub(super) unsafe fn q8_0<const R: usize>(
    w: *const u8,
    a: &Acts,
    r0: usize,
    nb: usize,
    n: usize,
    out: *mut f32,
) {
    let kb = a.kb;
    let xq: [*const i8; R] = std::array::from_fn(|i| a.q.as_ptr().add((r0 + i) * kb * QK));
    let c =
        |i: usize, blk: usize| _mm512_set1_epi32(*a.corr32.get_unchecked((r0 + i) * kb * 8 + blk));
    let mut acc = [_mm512_setzero_ps(); R];
    for b in 0..kb {
        let end = nb.min(b * 8 + 8);
        let mut f = [_mm512_setzero_ps(); R];
        let mut j = b * 8;
        while j + 2 <= end {
            let (pa, pb) = (w.add(j * Q8_BLK), w.add((j + 1) * Q8_BLK));
            let mut ia: [__m512i; R] = std::array::from_fn(|i| c(i, j));
            let mut ib: [__m512i; R] = std::array::from_fn(|i| c(i, j + 1));
            for g in 0..8 {
                let (wa, wb) = (load(pa.add(g * 64)), load(pb.add(g * 64)));
                for i in 0..R {
                    let x = xq[i].add(j * 32 + g * 4);
                    ia[i] = _mm512_dpbusd_epi32(ia[i], wa, bcast(x));
                    ib[i] = _mm512_dpbusd_epi32(ib[i], wb, bcast(x.add(32)));
                }
            }
            let da = _mm512_load_ps(pa.add(512) as *const f32);
            let db = _mm512_load_ps(pb.add(512) as *const f32);
            for i in 0..R {
                f[i] = _mm512_fmadd_ps(_mm512_cvtepi32_ps(ia[i]), da, f[i]);
                f[i] = _mm512_fmadd_ps(_mm512_cvtepi32_ps(ib[i]), db, f[i]);
            }
            j += 2;
        }
        if j < end {
            let pa = w.add(j * Q8_BLK);
            let mut ia: [__m512i; R] = std::array::from_fn(|i| c(i, j));
            for g in 0..8 {
                let wa = load(pa.add(g * 64));
                for i in 0..R {
                    ia[i] = _mm512_dpbusd_epi32(ia[i], wa, bcast(xq[i].add(j * 32 + g * 4)));
                }
            }
            let da = _mm512_load_ps(pa.add(512) as *const f32);
            for i in 0..R {
                f[i] = _mm512_fmadd_ps(_mm512_cvtepi32_ps(ia[i]), da, f[i]);
            }
        }
        for i in 0..R {
            let dx = _mm512_set1_ps(*a.d.get_unchecked((r0 + i) * kb + b));
            acc[i] = _mm512_fmadd_ps(f[i], dx, acc[i]);
        }
    }
    for (i, v) in acc.iter().enumerate() {
        _mm512_storeu_ps(out.add(i * n), *v);
    }
}

/// `super::attend` with 16 f32 lanes; dispatches on the head width so a query and an
/// output stay in registers.
///
/// # Safety
/// The processor has AVX-512 F; `d` is a multiple of 16 and at most 256, and the
/// lengths are those `super::attend` checks.
#[target_feature(enable = "avx512f")]
pub(super) unsafe fn attend(
    q: &[f32],
    kv: &KeyValues<'_>,
    d: usize,
    scale: f32,
    out: &mut [f32],
    scores: &mut Vec<f32>,
) {
    let args = (q, kv, scale, out, scores);
    match d / 16 {
        4 => heads::<4>(args),
        8 => heads::<8>(args),
        16 => heads::<16>(args),
        1 => heads::<1>(args),
        2 => heads::<2>(args),
        3 => heads::<3>(args),
        5 => heads::<5>(args),
        6 => heads::<6>(args),
        7 => heads::<7>(args),
        9 => heads::<9>(args),
        10 => heads::<10>(args),
        11 => heads::<11>(args),
        12 => heads::<12>(args),
        13 => heads::<13>(args),
        14 => heads::<14>(args),
        _ => heads::<15>(args),
    }
}

type Args<'a, 'b> = (
    &'a [f32],
    &'a KeyValues<'b>,
    f32,
    &'a mut [f32],
    &'a mut Vec<f32>,
);

/// `attend` for heads of `16 C` values.
///
/// # Safety
/// As `attend`, with `d = 16 C`.
#[target_feature(enable = "avx512f")]
unsafe fn heads<const C: usize>(args: Args<'_, '_>) {
    let (q, kv, scale, out, scores) = args;
    let (stride, lo, p) = (kv.stride, kv.lo, kv.p);
    let d = 16 * C;
    let nh = q.len() / d;
    let n = p + 1 - lo;
    let (kp, vp) = (kv.keys.as_ptr(), kv.vals.as_ptr());
    let score = |acc: __m512| _mm512_reduce_add_ps(acc) * scale;
    scores.clear();
    scores.resize(nh * n, 0.0);
    let mut t0 = lo;
    while t0 <= p {
        let t1 = (t0 + ATTN_TILE).min(p + 1);
        for h in 0..nh {
            let qv: [__m512; C] =
                std::array::from_fn(|c| _mm512_loadu_ps(q.as_ptr().add(h * d + 16 * c)));
            let row = &mut scores[h * n..(h + 1) * n];
            let mut j = t0;
            while j + 4 <= t1 {
                let mut acc = [_mm512_setzero_ps(); 4];
                for (c, qc) in qv.iter().enumerate() {
                    for (t, a) in acc.iter_mut().enumerate() {
                        let k = _mm512_loadu_ps(kp.add((j + t) * stride + 16 * c));
                        *a = _mm512_fmadd_ps(*qc, k, *a);
                    }
                }
                for (t, a) in acc.into_iter().enumerate() {
                    row[j + t - lo] = score(a);
                }
                j += 4;
            }
            while j < t1 {
                let mut a = _mm512_setzero_ps();
                for (c, qc) in qv.iter().enumerate() {
                    a = _mm512_fmadd_ps(*qc, _mm512_loadu_ps(kp.add(j * stride + 16 * c)), a);
                }
                row[j - lo] = score(a);
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
            let op = out.as_mut_ptr().add(h * d);
            let mut o: [__m512; C] = std::array::from_fn(|c| _mm512_loadu_ps(op.add(16 * c)));
            for (j, &w) in (t0..t1).zip(&scores[h * n + t0 - lo..h * n + t1 - lo]) {
                let w = _mm512_set1_ps(w);
                for (c, oc) in o.iter_mut().enumerate() {
                    *oc = _mm512_fmadd_ps(w, _mm512_loadu_ps(vp.add(j * stride + 16 * c)), *oc);
                }
            }
            for (c, oc) in o.iter().enumerate() {
                _mm512_storeu_ps(op.add(16 * c), *oc);
            }
        }
        t0 = t1;
    }
}

row_operations!(
    "avx512f,avx512bw,avx512vl,avx2,fma",
    "The processor has AVX-512 F/BW/VL, AVX2 and FMA."
);

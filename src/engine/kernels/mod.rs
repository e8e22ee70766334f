//! Kernels of the decoder, one file per instruction-set family, chosen at run time:
//! matrix products of quantised weights repacked once at load into 16-column tiles,
//! multiplied by activation rows quantised to int8, and the attention of one query
//! group over the cached keys and values. Input: a Q4_K, Q6_K, Q5_0 or
//! Q8_0-representable (Q4_0, Q8_0) weight `n × k` and f32 rows `m × k`. Output: f32
//! rows `m × n`. This file holds one cached check of the processor's features, the cap
//! from `ASSIZE_KERNELS`, the tile layout and the dispatch; `scalar.rs` is the plain
//! reference every vector kernel is tested against, `avx512.rs` (AVX-512 VNNI),
//! `avx2.rs` (AVX2, with `vpdpbusd` on 256-bit registers where AVX-VNNI exists) and
//! `neon.rs` (ARM, `sdot` where the dot-product extension exists) the vector ones.
//! Never runs a kernel whose instructions this processor lacks: a `Kernels` value, the
//! only way to reach one, exists only after the check. Never lets one row's result
//! depend on the other rows of the call or on the thread count: every output element
//! is summed by one worker in a fixed order. The integer sums are exact and the float
//! steps run in the same order per output column on every family, so the products
//! give the same bits on every family.
//!
//! Numerics follow ggml's formats (Gerganov et al., ggml `k_quants.c`, `ggml-quants.c`):
//! activations are quantised per 256 values as Q8_K (`d = max / -127`,
//! `q = round(x / d)`, sums of 16 quants kept), and each weight sub-block contributes
//! `d_x · (d_w · sc · Σ q_w q_x − d_min · mn · Σ q_x)` (Q4_K),
//! `d_x · d_w · sc · Σ (q_w − 32) q_x` (Q6_K), `d_x · d_w · Σ (q_w − 16) q_x` (Q5_0) or
//! `d_x · d_w · Σ q_w q_x` (Q8_0). Integer sums are exact; the float steps run in one
//! order per output element.
//!
//! Tile layouts (one tile = 16 output columns, `col` below), little-endian. "Nibble
//! line `(s, g)`" means `[col][4]` bytes whose byte `j` holds value `32 s + 8 g + j` in
//! its low nibble and value `32 s + 8 g + j + 4` in its high nibble.
//! - Q4_K, per 256-value super-block (2368 bytes, 4.625 bits a weight): nibble lines
//!   `[s 8][g 4]`; scales `[s][col]` u8; mins `[pair 4][col][2]` u8; `d`, `dmin` f16
//!   `[col]` as in the file.
//! - Q6_K, per super-block (3392 bytes, 6.6 bits): the low four bits as nibble lines
//!   `[s 8][g 4]`; the top two bits as lines `[s 8][gp 2][col][4]` whose byte `j`
//!   holds, two bits each from bit 0, the values of nibble lines `(s, 2gp)` low, high,
//!   `(s, 2gp + 1)` low, high at position `j`; scales `[sub 16][col]` i8; `d` f32 `[col]`.
//! - Q5_0, per 64 values (two ggml blocks, 704 bytes, 5.5 bits): the low four bits as
//!   nibble lines `[blk 2][g 4]`; the fifth bits `[blk 2][col][4]`, byte `j` with bit
//!   `2 g + h` for value `32 blk + 8 g + 4 h + j`; `d` f16 `[blk][col]`.
//! - Q8_0, per 32-value block (576 bytes, 9 bits): quants `[g 8][col][4]` stored
//!   `q + 128`; `d` f32 `[col]`.

use std::sync::OnceLock;

/// The row operations (`gate`, `rms_norm`, `rope`) of one family: the scalar code
/// compiled under the family's `#[target_feature]`, so its loops use the family's
/// registers with the scalar arithmetic. `$features` are the features enabled, `$has`
/// the `# Safety` condition the dispatcher checked.
#[cfg(target_arch = "x86_64")]
macro_rules! row_operations {
    ($features:literal, $has:literal) => {
        /// `super::gate` compiled for this family's registers.
        ///
        /// # Safety
        #[doc = $has]
        #[target_feature(enable = $features)]
        pub(super) unsafe fn gate(act: crate::engine::ops::Activation, g: &mut [f32], u: &[f32]) {
            super::scalar::gate(act, g, u)
        }

        /// `super::rms_norm` compiled for this family's registers.
        ///
        /// # Safety
        #[doc = $has]
        #[target_feature(enable = $features)]
        pub(super) unsafe fn rms_norm(x: &[f32], w: &[f32], eps: f32) -> Vec<f32> {
            super::scalar::rms_norm(x, w, eps)
        }

        /// `super::rope` compiled for this family's registers.
        ///
        /// # Safety
        #[doc = $has]
        #[target_feature(enable = $features)]
        pub(super) unsafe fn rope(
            x: &mut [f32],
            width: usize,
            d: usize,
            table: &crate::engine::ops::RopeTable,
            pairs: crate::engine::ops::RopePairs,
        ) {
            super::scalar::rope(x, width, d, table, pairs)
        }
    };
}

#[cfg(target_arch = "x86_64")]
mod avx2;
#[cfg(target_arch = "x86_64")]
mod avx512;
#[cfg(target_arch = "aarch64")]
mod neon;
mod scalar;

use candle_core::quantized::{GgmlDType, QTensor};
use candle_core::Device;

use super::ops::{exp, Activation, RopePairs, RopeTable};

/// Output columns of one tile (one 512-bit register of f32 / i32 lanes).
const TILE_N: usize = 16;
/// Values of one activation super-block (ggml's `QK_K`).
const QK: usize = 256;
const Q4K_SB: usize = 2368;
const Q6K_SB: usize = 3392;
const Q5_PAIR: usize = 704;
const Q8_BLK: usize = 576;

/// Rows the kernels process together; they share each unpacked weight register.
const MT: usize = 4;

/// Weight formats the kernels take.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// ggml Q4_K: 4-bit quants, 6-bit scales and mins per 32 values.
    Q4K,
    /// ggml Q6_K: 6-bit quants, 8-bit scales per 16 values.
    Q6K,
    /// ggml Q5_0: 5-bit quants, f16 scale per 32.
    Q5,
    /// ggml Q8_0 (also exact for Q4_0 sources): 8-bit quants, f16 scale per 32.
    Q8_0,
}

/// Zeroed tile storage aligned to 2 MiB and, on Linux, marked for transparent huge
/// pages: streaming a weight for one row then misses the TLB once per 2 MiB instead
/// of once per 4 KiB page. Tile loads are 64-byte aligned, so they never straddle
/// cache lines.
struct TileBuf {
    ptr: *mut u8,
    len: usize,
}

// SAFETY: the buffer is plain bytes, written only while the `Packed` is built.
unsafe impl Send for TileBuf {}
unsafe impl Sync for TileBuf {}

const HUGE_PAGE: usize = 2 << 20;

impl TileBuf {
    fn zeroed(len: usize) -> TileBuf {
        let layout = Self::layout(len);
        // SAFETY: the layout has a non-zero size.
        let ptr = unsafe { std::alloc::alloc(layout) };
        if ptr.is_null() {
            std::alloc::handle_alloc_error(layout);
        }
        #[cfg(target_os = "linux")]
        if layout.size() >= HUGE_PAGE {
            // SAFETY: advice on memory this buffer owns; failure only loses speed.
            unsafe { libc::madvise(ptr as *mut libc::c_void, layout.size(), libc::MADV_HUGEPAGE) };
        }
        // SAFETY: `ptr` is valid for `layout.size()` bytes.
        unsafe { std::ptr::write_bytes(ptr, 0, layout.size()) };
        TileBuf { ptr, len }
    }

    fn layout(len: usize) -> std::alloc::Layout {
        let align = if len >= HUGE_PAGE { HUGE_PAGE } else { 64 };
        std::alloc::Layout::from_size_align(len.max(64).div_ceil(align) * align, align)
            .expect("tile buffer layout")
    }

    fn bytes(&self) -> &[u8] {
        // SAFETY: `ptr` is valid for `len` initialised bytes while `self` lives.
        unsafe { std::slice::from_raw_parts(self.ptr, self.len) }
    }

    fn bytes_mut(&mut self) -> &mut [u8] {
        // SAFETY: as `bytes`, and `&mut self` makes the view unique.
        unsafe { std::slice::from_raw_parts_mut(self.ptr, self.len) }
    }
}

impl Drop for TileBuf {
    fn drop(&mut self) {
        // SAFETY: allocated in `zeroed` with this layout.
        unsafe { std::alloc::dealloc(self.ptr, Self::layout(self.len)) };
    }
}

/// A weight repacked into 16-column tiles.
pub struct Packed {
    format: Format,
    kernels: Kernels,
    /// Output features.
    pub n: usize,
    /// Input features.
    pub k: usize,
    tile_bytes: usize,
    data: TileBuf,
}

/// Instruction-set families with their own kernels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Isa {
    /// Plain Rust: any processor; the reference the others are tested against.
    Scalar,
    /// x86-64 AVX2, FMA and F16C (Intel since 2013, AMD Zen 1-3): int8 products with
    /// `vpmaddubsw` / `vpmaddwd`.
    Avx2,
    /// AVX2 plus AVX-VNNI (Intel client chips since 2021): `vpdpbusd` on 256 bits.
    AvxVnni,
    /// AVX-512 F/BW/VL and VNNI, AVX2, FMA, F16C (Intel servers, AMD Zen 4/5).
    Avx512,
    /// 64-bit ARM with NEON (Advanced SIMD, always present on AArch64).
    Neon,
    /// NEON plus the dot-product extension (`sdot`; Apple M1 and later, Neoverse).
    NeonDot,
}

impl Isa {
    /// Every family, best first within each architecture.
    pub const ALL: [Isa; 6] = [
        Isa::Avx512,
        Isa::AvxVnni,
        Isa::Avx2,
        Isa::NeonDot,
        Isa::Neon,
        Isa::Scalar,
    ];

    /// The name `ASSIZE_KERNELS` takes and reports show.
    pub fn name(self) -> &'static str {
        match self {
            Isa::Scalar => "scalar",
            Isa::Avx2 => "avx2",
            Isa::AvxVnni => "avxvnni",
            Isa::Avx512 => "avx512",
            Isa::Neon => "neon",
            Isa::NeonDot => "neondot",
        }
    }

    /// Whether this processor has every instruction the family's kernels use.
    pub fn runs_here(self) -> bool {
        #[cfg(target_arch = "x86_64")]
        let x86 = |f: &[bool]| f.iter().all(|&b| b);
        match self {
            Isa::Scalar => true,
            #[cfg(target_arch = "x86_64")]
            Isa::Avx2 => x86(&[
                is_x86_feature_detected!("avx2"),
                is_x86_feature_detected!("fma"),
                is_x86_feature_detected!("f16c"),
            ]),
            #[cfg(target_arch = "x86_64")]
            Isa::AvxVnni => Isa::Avx2.runs_here() && is_x86_feature_detected!("avxvnni"),
            #[cfg(target_arch = "x86_64")]
            Isa::Avx512 => {
                Isa::Avx2.runs_here()
                    && x86(&[
                        is_x86_feature_detected!("avx512f"),
                        is_x86_feature_detected!("avx512bw"),
                        is_x86_feature_detected!("avx512vl"),
                        is_x86_feature_detected!("avx512vnni"),
                    ])
            }
            #[cfg(target_arch = "aarch64")]
            Isa::Neon => std::arch::is_aarch64_feature_detected!("neon"),
            #[cfg(target_arch = "aarch64")]
            Isa::NeonDot => {
                std::arch::is_aarch64_feature_detected!("neon")
                    && std::arch::is_aarch64_feature_detected!("dotprod")
            }
            #[allow(unreachable_patterns)]
            _ => false,
        }
    }
}

impl std::fmt::Display for Isa {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

/// Proof that this processor runs one family's kernels: the only way to reach a
/// kernel. Built by `Kernels::new`, which checks the features, so a packed weight or an
/// attention call that holds one cannot execute an instruction the processor lacks.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Kernels(Isa);

impl Kernels {
    /// `isa`'s kernels, when this processor runs them.
    pub fn new(isa: Isa) -> Option<Kernels> {
        isa.runs_here().then_some(Kernels(isa))
    }

    /// The best family this processor runs (checked once).
    pub fn best() -> Kernels {
        static BEST: OnceLock<Kernels> = OnceLock::new();
        *BEST.get_or_init(|| {
            Isa::ALL
                .iter()
                .find_map(|&isa| Kernels::new(isa))
                .unwrap_or(Kernels(Isa::Scalar))
        })
    }

    /// The kernels loads use: the best family, capped by `ASSIZE_KERNELS` (a family
    /// name such as `avx2` or `scalar`, so that one machine can run a lesser family's
    /// path); `None` with `ASSIZE_KERNELS=candle` (candle's own kernels, for
    /// comparison). A family this processor lacks, or an unknown name, is reported
    /// once on stderr and the best family is used. Read once.
    pub fn active() -> Option<Kernels> {
        static ACTIVE: OnceLock<Option<Kernels>> = OnceLock::new();
        *ACTIVE.get_or_init(|| {
            let want = std::env::var("ASSIZE_KERNELS").unwrap_or_default();
            if want.is_empty() {
                return Some(Kernels::best());
            }
            if want == "candle" {
                return None;
            }
            match Isa::ALL.iter().find(|i| i.name() == want) {
                Some(&isa) => Kernels::new(isa).or_else(|| {
                    eprintln!(
                        "warning: ASSIZE_KERNELS={want}: this processor lacks those \
                         instructions; using {}",
                        Kernels::best().isa()
                    );
                    Some(Kernels::best())
                }),
                None => {
                    let names: Vec<&str> = Isa::ALL.iter().map(|i| i.name()).collect();
                    eprintln!(
                        "warning: ASSIZE_KERNELS={want} is not a kernel family ({} or \
                         candle); using {}",
                        names.join(", "),
                        Kernels::best().isa()
                    );
                    Some(Kernels::best())
                }
            }
        })
    }

    /// The kernels of attention and the row operations: the active family, or the best
    /// one when the matrix products run on candle's (`ASSIZE_KERNELS=candle`).
    pub fn for_rows() -> Kernels {
        Kernels::active().unwrap_or_else(Kernels::best)
    }

    /// The family.
    pub fn isa(self) -> Isa {
        self.0
    }
}

/// Cached keys and values of one key/value head: rows `j` at `j * stride` of `keys`
/// and `vals`, of which positions `lo ..= p` are visible.
pub struct KeyValues<'a> {
    pub keys: &'a [f32],
    pub vals: &'a [f32],
    pub stride: usize,
    pub lo: usize,
    pub p: usize,
}

/// Attention of the query heads `q` (`q.len() / d` heads of `d` values) that share one
/// key/value head: softmax(q · k · `scale`) · v over the
/// visible positions, written to `out` (`q.len()` values); `scores` is scratch space.
/// Keys and values are visited in tiles of `ATTN_TILE` positions that stay in the L1
/// cache while every head of the unit uses them. Per head: scores of four keys at a
/// time (each key summed in the same order whatever its group), softmax in position
/// order, then the weighted sum of values accumulated in position order. A head's
/// result therefore does not depend on which other heads or rows share its unit. The
/// vector families take head widths that are a multiple of their lane count (AVX-512
/// up to 256); any other width runs the scalar kernel.
pub fn attend(
    kernels: Kernels,
    q: &[f32],
    kv: &KeyValues<'_>,
    d: usize,
    scale: f32,
    out: &mut [f32],
    scores: &mut Vec<f32>,
) {
    assert!(d > 0 && q.len().is_multiple_of(d) && out.len() == q.len());
    assert!(kv.lo <= kv.p && kv.stride >= d);
    assert!(kv.keys.len() >= kv.p * kv.stride + d && kv.vals.len() >= kv.p * kv.stride + d);
    // SAFETY: `kernels` proves the features; the lengths are checked above.
    match kernels.isa() {
        #[cfg(target_arch = "x86_64")]
        Isa::Avx512 if d.is_multiple_of(16) && d <= 256 => unsafe {
            avx512::attend(q, kv, d, scale, out, scores)
        },
        #[cfg(target_arch = "x86_64")]
        Isa::Avx512 | Isa::Avx2 | Isa::AvxVnni if d.is_multiple_of(8) => unsafe {
            avx2::attend(q, kv, d, scale, out, scores)
        },
        #[cfg(target_arch = "aarch64")]
        Isa::Neon | Isa::NeonDot if d.is_multiple_of(4) => unsafe {
            neon::attend(q, kv, d, scale, out, scores)
        },
        _ => scalar::attend(q, kv, d, scale, out, scores),
    }
}

/// `g[i] = act(g[i]) · u[i]`, the gated feed-forward activation of a block, compiled
/// for each family's vector width (a portable build's baseline has no SIMD rounding
/// instruction, so this loop would call the C library per element). Element by element
/// without fused steps, so every family gives the same bits. On ARM, NEON is the
/// baseline and the plain loop already uses it.
pub fn gate(kernels: Kernels, act: Activation, g: &mut [f32], u: &[f32]) {
    assert_eq!(g.len(), u.len(), "gate and up rows of different widths");
    // SAFETY: `kernels` proves the features.
    match kernels.isa() {
        #[cfg(target_arch = "x86_64")]
        Isa::Avx512 => unsafe { avx512::gate(act, g, u) },
        #[cfg(target_arch = "x86_64")]
        Isa::Avx2 | Isa::AvxVnni => unsafe { avx2::gate(act, g, u) },
        _ => scalar::gate(act, g, u),
    }
}

/// RMS norm of each `w.len()`-wide row (`ops::rms_norm`), compiled for each family's
/// vector width; the same bits on every family (lanes added in a fixed order, no
/// fused steps).
pub fn rms_norm(kernels: Kernels, x: &[f32], w: &[f32], eps: f32) -> Vec<f32> {
    // SAFETY: `kernels` proves the features.
    match kernels.isa() {
        #[cfg(target_arch = "x86_64")]
        Isa::Avx512 => unsafe { avx512::rms_norm(x, w, eps) },
        #[cfg(target_arch = "x86_64")]
        Isa::Avx2 | Isa::AvxVnni => unsafe { avx2::rms_norm(x, w, eps) },
        _ => scalar::rms_norm(x, w, eps),
    }
}

/// Rotary embedding of every head of each row (`ops::rope`), compiled for each family's
/// vector width; the same bits on every family.
pub(crate) fn rope(
    kernels: Kernels,
    x: &mut [f32],
    width: usize,
    d: usize,
    table: &RopeTable,
    pairs: RopePairs,
) {
    // SAFETY: `kernels` proves the features.
    match kernels.isa() {
        #[cfg(target_arch = "x86_64")]
        Isa::Avx512 => unsafe { avx512::rope(x, width, d, table, pairs) },
        #[cfg(target_arch = "x86_64")]
        Isa::Avx2 | Isa::AvxVnni => unsafe { avx2::rope(x, width, d, table, pairs) },
        _ => scalar::rope(x, width, d, table, pairs),
    }
}

/// Positions per attention tile: 32 rows of keys or values of width 256 are 32 KiB.
const ATTN_TILE: usize = 32;

/// Turn each `n`-wide row of scores into softmax weights, in position order, with the
/// branch-free `exp` (inlined into each family's kernel, so the loops vectorise there).
#[inline(always)]
fn softmax(scores: &mut [f32], n: usize) {
    for row in scores.chunks_exact_mut(n) {
        let max = row.iter().fold(f32::NEG_INFINITY, |m, &s| m.max(s));
        for s in row.iter_mut() {
            *s = exp(*s - max);
        }
        let sum = row.iter().fold(0f32, |a, &s| a + s);
        for s in row.iter_mut() {
            *s /= sum;
        }
    }
}

/// IEEE 754 binary16 to f32 (exact; subnormals included).
fn f16_to_f32(bits: u16) -> f32 {
    let sign = ((bits >> 15) as u32) << 31;
    let exp = ((bits >> 10) & 0x1f) as u32;
    let man = (bits & 0x3ff) as u32;
    let v = match (exp, man) {
        (0, 0) => sign,
        (0, _) => {
            // Subnormal: man · 2^-24, exact in f32.
            let f = man as f32 * (1.0 / 16_777_216.0);
            return if sign != 0 { -f } else { f };
        }
        (31, 0) => sign | 0x7f80_0000,
        (31, _) => sign | 0x7fc0_0000 | (man << 13),
        _ => sign | ((exp + 112) << 23) | (man << 13),
    };
    f32::from_bits(v)
}

fn f16_at(b: &[u8], at: usize) -> f32 {
    f16_to_f32(u16::from_le_bytes([b[at], b[at + 1]]))
}

/// ggml's unpacking of the 6-bit scale and min of sub-block `j` of a Q4_K block.
fn scale_min_k4(j: usize, s: &[u8]) -> (u8, u8) {
    if j < 4 {
        (s[j] & 63, s[j + 4] & 63)
    } else {
        (
            (s[j + 4] & 0x0f) | ((s[j - 4] >> 6) << 4),
            (s[j + 4] >> 4) | ((s[j] >> 6) << 4),
        )
    }
}

fn put_f32(dst: &mut [u8], v: f32) {
    dst[..4].copy_from_slice(&v.to_le_bytes());
}

impl Packed {
    /// Repack `qt` (`n × k`, GGUF order) for `kernels`; `None` when its type or shape
    /// is not covered (`n` must be a multiple of 16; `k` of 256 for Q4_K / Q6_K, of 32
    /// for Q4_0 / Q5_0 / Q8_0).
    pub fn new(qt: &QTensor, kernels: Kernels) -> candle_core::Result<Option<Packed>> {
        let (n, k) = qt.shape().dims2()?;
        if n == 0 || k == 0 || !n.is_multiple_of(TILE_N) {
            return Ok(None);
        }
        let dtype = qt.dtype();
        // (format, bytes and values of one tile unit, values of one source block)
        let (format, unit_bytes, unit_vals, src_vals) = match dtype {
            GgmlDType::Q4K if k.is_multiple_of(QK) => (Format::Q4K, Q4K_SB, QK, QK),
            GgmlDType::Q6K if k.is_multiple_of(QK) => (Format::Q6K, Q6K_SB, QK, QK),
            GgmlDType::Q5_0 if k.is_multiple_of(32) => (Format::Q5, Q5_PAIR, 64, 32),
            GgmlDType::Q4_0 | GgmlDType::Q8_0 if k.is_multiple_of(32) => {
                (Format::Q8_0, Q8_BLK, 32, 32)
            }
            _ => return Ok(None),
        };
        let tile_bytes = k.div_ceil(unit_vals) * unit_bytes;
        let mut data = TileBuf::zeroed(n / TILE_N * tile_bytes);
        let src = qt.data()?;
        let src_block = dtype.type_size();
        let blocks = k / src_vals;
        // Q4_0 values come dequantised from candle and are requantised exactly with
        // the block's own scale (each is d · q with an integer |q| <= 8).
        let values = if dtype == GgmlDType::Q4_0 {
            Some(
                qt.dequantize(&Device::Cpu)?
                    .flatten_all()?
                    .to_vec1::<f32>()?,
            )
        } else {
            None
        };
        let out = data.bytes_mut();
        for row in 0..n {
            let (tile, col) = (row / TILE_N, row % TILE_N);
            let tile_out = &mut out[tile * tile_bytes..(tile + 1) * tile_bytes];
            for b in 0..blocks {
                let blk = &src[(row * blocks + b) * src_block..][..src_block];
                match format {
                    Format::Q4K => pack_q4k(blk, &mut tile_out[b * Q4K_SB..][..Q4K_SB], col),
                    Format::Q6K => pack_q6k(blk, &mut tile_out[b * Q6K_SB..][..Q6K_SB], col),
                    Format::Q5 => {
                        let dst = &mut tile_out[b / 2 * Q5_PAIR..][..Q5_PAIR];
                        pack_q5_0(blk, dst, b % 2, col);
                    }
                    Format::Q8_0 => {
                        let d = f16_at(blk, 0);
                        let mut q = [0i8; 32];
                        match &values {
                            Some(v) => {
                                for (i, qi) in q.iter_mut().enumerate() {
                                    let y = v[row * k + b * 32 + i];
                                    *qi = if d == 0.0 { 0 } else { (y / d).round() as i8 };
                                }
                            }
                            None => q.iter_mut().zip(&blk[2..34]).for_each(|(q, &b)| {
                                *q = b as i8;
                            }),
                        }
                        pack_q8_0(d, &q, &mut tile_out[b * Q8_BLK..][..Q8_BLK], col);
                    }
                }
            }
        }
        Ok(Some(Packed {
            format,
            kernels,
            n,
            k,
            tile_bytes,
            data,
        }))
    }

    fn bytes_of_tile(&self, t: usize) -> &[u8] {
        &self.data.bytes()[t * self.tile_bytes..(t + 1) * self.tile_bytes]
    }

    /// Row `r` of the weight, dequantised with ggml's formulas and operation order
    /// (`dequantize_row_*`): the values a lookup in the original table gives. Used when
    /// the output projection shares its table with the token embedding.
    pub fn row(&self, r: usize) -> Vec<f32> {
        assert!(r < self.n, "row {r} of a {}-row weight", self.n);
        let (tile, col) = (self.bytes_of_tile(r / TILE_N), r % TILE_N);
        let f32_at = |at: usize| f32::from_le_bytes(tile[at..at + 4].try_into().expect("4 bytes"));
        let mut y = vec![0f32; self.k];
        match self.format {
            Format::Q4K => {
                for (b, ys) in y.chunks_exact_mut(QK).enumerate() {
                    let sb = &tile[b * Q4K_SB..];
                    let (d, dmin) = (f16_at(sb, 2304 + col * 2), f16_at(sb, 2336 + col * 2));
                    for (s, ys) in ys.chunks_exact_mut(32).enumerate() {
                        let sc = sb[2048 + s * 16 + col] as f32;
                        let mn = sb[2176 + (s / 2) * 32 + col * 2 + s % 2] as f32;
                        let (d1, m1) = (d * sc, dmin * mn);
                        for (i, v) in ys.iter_mut().enumerate() {
                            let byte = sb[(s * 4 + i % 32 / 8) * 64 + col * 4 + i % 4];
                            let q = if i % 8 < 4 { byte & 0x0f } else { byte >> 4 };
                            *v = d1 * q as f32 - m1;
                        }
                    }
                }
            }
            Format::Q6K => {
                for (b, ys) in y.chunks_exact_mut(QK).enumerate() {
                    let sb = &tile[b * Q6K_SB..];
                    let d = f32_at(b * Q6K_SB + 3328 + col * 4);
                    for (i, v) in ys.iter_mut().enumerate() {
                        let (s, g, j, h) = (i / 32, i % 32 / 8, i % 4, i % 8 / 4);
                        let byte = sb[(s * 4 + g) * 64 + col * 4 + j];
                        let low = if h == 0 { byte & 0x0f } else { byte >> 4 };
                        let hb = sb[2048 + (s * 2 + g / 2) * 64 + col * 4 + j];
                        let top = (hb >> (4 * (g % 2) + 2 * h)) & 3;
                        let q = (low | (top << 4)) as i32 - 32;
                        let sc = sb[3072 + (i / 16) * 16 + col] as i8 as f32;
                        *v = d * sc * q as f32;
                    }
                }
            }
            Format::Q5 => {
                for (blk, ys) in y.chunks_exact_mut(32).enumerate() {
                    let pair = &tile[blk / 2 * Q5_PAIR..];
                    let half = blk % 2;
                    let at = 640 + half * 32 + col * 2;
                    let d = f16_to_f32(u16::from_le_bytes([pair[at], pair[at + 1]]));
                    for (i, v) in ys.iter_mut().enumerate() {
                        let (g, h, j) = (i / 8, i % 8 / 4, i % 4);
                        let byte = pair[(half * 4 + g) * 64 + col * 4 + j];
                        let low = if h == 0 { byte & 0x0f } else { byte >> 4 };
                        let fifth = (pair[512 + half * 64 + col * 4 + j] >> (2 * g + h)) & 1;
                        *v = ((low | (fifth << 4)) as i32 - 16) as f32 * d;
                    }
                }
            }
            Format::Q8_0 => {
                for (blk, ys) in y.chunks_exact_mut(32).enumerate() {
                    let at = blk * Q8_BLK;
                    let d = f32_at(at + 512 + col * 4);
                    for (i, v) in ys.iter_mut().enumerate() {
                        let q = tile[at + (i / 4) * 64 + col * 4 + i % 4] as i32 - 128;
                        *v = q as f32 * d;
                    }
                }
            }
        }
        y
    }

    /// Bytes held by the repacked weight.
    pub fn bytes(&self) -> usize {
        self.data.len
    }

    /// The weight format of the tiles.
    pub fn format(&self) -> Format {
        self.format
    }

    /// The kernels this weight runs on.
    pub fn kernels(&self) -> Kernels {
        self.kernels
    }

    /// `y = x · Wᵀ` for `m` rows of `x` (`m × k`, row-major): `m × n`, on candle's
    /// worker pool.
    pub fn forward(&self, x: &[f32], m: usize) -> Vec<f32> {
        Self::run(&[self], x, m, true).pop().expect("one weight")
    }

    /// `forward` for several weights of the same input width (the query, key and value
    /// projections, say): the rows are quantised once and all tiles go to the pool in
    /// one call. Results are bit-identical to separate calls.
    pub fn forward_many(weights: &[&Packed], x: &[f32], m: usize) -> Vec<Vec<f32>> {
        Self::run(weights, x, m, true)
    }

    /// `forward_many` with the work split over the pool (`parallel`) or run on this
    /// thread.
    fn run(weights: &[&Packed], x: &[f32], m: usize, parallel: bool) -> Vec<Vec<f32>> {
        let k = weights.first().map_or(0, |w| w.k);
        assert!(
            weights.iter().all(|w| w.k == k),
            "weights of different widths"
        );
        assert_eq!(x.len(), m * k, "activation rows of the wrong width");
        let kernels = weights.first().map_or(Kernels(Isa::Scalar), |w| w.kernels);
        let acts = Acts::quantise(x, m, k, parallel, kernels);
        let mut outs: Vec<Vec<f32>> = weights.iter().map(|w| vec![0f32; m * w.n]).collect();
        let shared: Vec<SharedOut> = outs.iter_mut().map(|o| SharedOut(o.as_mut_ptr())).collect();
        // First tile number of each weight in the combined range.
        let mut starts = Vec::with_capacity(weights.len() + 1);
        let mut total = 0;
        for w in weights {
            starts.push(total);
            total += w.n / TILE_N;
        }
        starts.push(total);
        let unit = |range: std::ops::Range<usize>| {
            let mut wi = 0;
            for t in range {
                while t >= starts[wi + 1] {
                    wi += 1;
                }
                // SAFETY: tile t writes only columns [16 t', 16 t' + 16) of each row of
                // its weight's output, which outlives this call.
                unsafe { weights[wi].tile(t - starts[wi], &acts, shared[wi].ptr()) };
            }
        };
        if parallel {
            candle_core::utils::barrier_pool().execute_chunked(total, unit);
        } else {
            unit(0..total);
        }
        outs
    }

    /// All rows of `acts` against tile `t`, `MT` rows at a time, then one by one; the
    /// per-row instruction sequence is the same either way.
    ///
    /// # Safety
    /// `t` is a tile of this weight, `acts` holds rows of width `self.k`, and `out`
    /// points at column `16 t` of row 0 of an `acts.m × self.n` output that no other
    /// thread writes in columns `16 t .. 16 t + 16`.
    unsafe fn tile(&self, t: usize, acts: &Acts, out: *mut f32) {
        let base = self.data.ptr.add(t * self.tile_bytes);
        let mut r = 0;
        while r + MT <= acts.m {
            self.rows::<MT>(base, acts, r, out.add(r * self.n + t * TILE_N));
            r += MT;
        }
        while r < acts.m {
            self.rows::<1>(base, acts, r, out.add(r * self.n + t * TILE_N));
            r += 1;
        }
    }

    /// Rows `r0 .. r0 + R` against the tile at `w`, on this weight's kernels.
    ///
    /// # Safety
    /// As `tile`; `w` is the start of one of this weight's tiles and `out` its first
    /// output column in row `r0`. The features are those `self.kernels` checked.
    #[inline(always)]
    unsafe fn rows<const R: usize>(&self, w: *const u8, a: &Acts, r0: usize, out: *mut f32) {
        let (n, pairs, blocks) = (self.n, self.k.div_ceil(64), self.k / 32);
        macro_rules! family {
            ($m:ident $(, $v:literal)?) => {
                match self.format {
                    Format::Q4K => $m::q4k::<R $(, $v)?>(w, a, r0, n, out),
                    Format::Q6K => $m::q6k::<R $(, $v)?>(w, a, r0, n, out),
                    Format::Q5 => $m::q5::<R $(, $v)?>(w, a, r0, pairs, n, out),
                    Format::Q8_0 => $m::q8_0::<R $(, $v)?>(w, a, r0, blocks, n, out),
                }
            };
        }
        match self.kernels.isa() {
            #[cfg(target_arch = "x86_64")]
            Isa::Avx512 => family!(avx512),
            #[cfg(target_arch = "x86_64")]
            Isa::AvxVnni => family!(avx2, true),
            #[cfg(target_arch = "x86_64")]
            Isa::Avx2 => family!(avx2, false),
            #[cfg(target_arch = "aarch64")]
            Isa::NeonDot => family!(neon, true),
            #[cfg(target_arch = "aarch64")]
            Isa::Neon => family!(neon, false),
            _ => family!(scalar),
        }
    }
}

fn pack_q4k(blk: &[u8], dst: &mut [u8], col: usize) {
    let scales = &blk[4..16];
    let qs = &blk[16..144];
    let mut v = [0u8; QK];
    for c in 0..4 {
        for j in 0..32 {
            v[c * 64 + j] = qs[c * 32 + j] & 0x0f;
            v[c * 64 + 32 + j] = qs[c * 32 + j] >> 4;
        }
    }
    for s in 0..8 {
        for g in 0..4 {
            for j in 0..4 {
                let i = s * 32 + g * 8 + j;
                dst[(s * 4 + g) * 64 + col * 4 + j] = v[i] | (v[i + 4] << 4);
            }
        }
        let (sc, mn) = scale_min_k4(s, scales);
        dst[2048 + s * 16 + col] = sc;
        dst[2176 + (s / 2) * 32 + col * 2 + s % 2] = mn;
    }
    dst[2304 + col * 2..][..2].copy_from_slice(&blk[..2]);
    dst[2336 + col * 2..][..2].copy_from_slice(&blk[2..4]);
}

fn pack_q6k(blk: &[u8], dst: &mut [u8], col: usize) {
    let (ql, qh, scales) = (&blk[..128], &blk[128..192], &blk[192..208]);
    let d = f16_at(blk, 208);
    let mut v = [0u8; QK];
    for h in 0..2 {
        let (ql, qh) = (&ql[h * 64..], &qh[h * 32..]);
        for j in 0..32 {
            v[h * 128 + j] = (ql[j] & 0x0f) | ((qh[j] & 3) << 4);
            v[h * 128 + j + 32] = (ql[j + 32] & 0x0f) | (((qh[j] >> 2) & 3) << 4);
            v[h * 128 + j + 64] = (ql[j] >> 4) | (((qh[j] >> 4) & 3) << 4);
            v[h * 128 + j + 96] = (ql[j + 32] >> 4) | (((qh[j] >> 6) & 3) << 4);
        }
    }
    for s in 0..8 {
        for g in 0..4 {
            for j in 0..4 {
                let i = s * 32 + g * 8 + j;
                dst[(s * 4 + g) * 64 + col * 4 + j] = (v[i] & 0x0f) | ((v[i + 4] & 0x0f) << 4);
                let shift = 4 * (g % 2);
                dst[2048 + (s * 2 + g / 2) * 64 + col * 4 + j] |=
                    ((v[i] >> 4) << shift) | ((v[i + 4] >> 4) << (shift + 2));
            }
        }
    }
    for (s, &sc) in scales.iter().enumerate() {
        dst[3072 + s * 16 + col] = sc;
    }
    put_f32(&mut dst[3328 + col * 4..], d);
}

/// One ggml `block_q5_0` (f16 `d`, 32 fifth bits `qh`, 16 bytes of nibbles: byte `j`
/// holds value `j` low and `j + 16` high) into half `half` of a 64-value tile unit.
fn pack_q5_0(blk: &[u8], dst: &mut [u8], half: usize, col: usize) {
    let qh = u32::from_le_bytes([blk[2], blk[3], blk[4], blk[5]]);
    let qs = &blk[6..22];
    let value = |i: usize| {
        let low = if i < 16 {
            qs[i] & 0x0f
        } else {
            qs[i - 16] >> 4
        };
        (low, ((qh >> i) & 1) as u8)
    };
    for g in 0..4 {
        for j in 0..4 {
            let (l0, h0) = value(8 * g + j);
            let (l1, h1) = value(8 * g + j + 4);
            dst[(half * 4 + g) * 64 + col * 4 + j] = l0 | (l1 << 4);
            dst[512 + half * 64 + col * 4 + j] |= (h0 << (2 * g)) | (h1 << (2 * g + 1));
        }
    }
    dst[640 + half * 32 + col * 2..][..2].copy_from_slice(&blk[..2]);
}

fn pack_q8_0(d: f32, q: &[i8; 32], dst: &mut [u8], col: usize) {
    for g in 0..8 {
        for j in 0..4 {
            dst[g * 64 + col * 4 + j] = (q[g * 4 + j] as i16 + 128) as u8;
        }
    }
    put_f32(&mut dst[512 + col * 4..], d);
}

/// Activation rows quantised to Q8_K, zero-padded to whole super-blocks, with the
/// per-sub-block sums each weight format needs for its offset or min term.
struct Acts {
    m: usize,
    /// Super-blocks per row.
    kb: usize,
    /// Quants, `m × kb × 256`.
    q: Vec<i8>,
    /// Scale per super-block, `m × kb`.
    d: Vec<f32>,
    /// Q4_K mins: sums of sub-blocks 2p and 2p+1 (32 values each) as two i16 halves
    /// of one i32, `m × kb × 4`.
    sum32_pairs: Vec<i32>,
    /// Q6_K offset: −32 · sum of each 16 quants, `m × kb × 16`.
    corr16: Vec<i32>,
    /// Q8_0 offset: −128 · sum of each 32 quants, `m × kb × 8`.
    corr32: Vec<i32>,
}

impl Acts {
    fn quantise(x: &[f32], m: usize, k: usize, parallel: bool, kernels: Kernels) -> Acts {
        let kb = k.div_ceil(QK);
        let mut a = Acts {
            m,
            kb,
            q: vec![0; m * kb * QK],
            d: vec![0.0; m * kb],
            sum32_pairs: vec![0; m * kb * 4],
            corr16: vec![0; m * kb * 16],
            corr32: vec![0; m * kb * 8],
        };
        let ptrs = ActsPtrs {
            q: a.q.as_mut_ptr(),
            d: a.d.as_mut_ptr(),
            p: a.sum32_pairs.as_mut_ptr(),
            c16: a.corr16.as_mut_ptr(),
            c32: a.corr32.as_mut_ptr(),
        };
        let unit = |rows: std::ops::Range<usize>| {
            for r in rows {
                // SAFETY: row r writes only its own slices of the buffers.
                unsafe { ptrs.row(r, &x[r * k..(r + 1) * k], kb, kernels) };
            }
        };
        if parallel && m > 1 {
            candle_core::utils::barrier_pool().execute_chunked(m, unit);
        } else {
            unit(0..m);
        }
        a
    }
}

/// Raw views of the `Acts` buffers, each row written by one worker.
struct ActsPtrs {
    q: *mut i8,
    d: *mut f32,
    p: *mut i32,
    c16: *mut i32,
    c32: *mut i32,
}
// SAFETY: workers write disjoint rows.
unsafe impl Sync for ActsPtrs {}

impl ActsPtrs {
    /// Quantise activation row `r` (`x`, at most `kb` super-blocks wide).
    ///
    /// # Safety
    /// `r` is a row of the buffers these pointers view, and no other thread writes it.
    unsafe fn row(&self, r: usize, x: &[f32], kb: usize, kernels: Kernels) {
        let q = std::slice::from_raw_parts_mut(self.q.add(r * kb * QK), kb * QK);
        for (b, xs) in x.chunks(QK).enumerate() {
            let mut s16 = [0i32; 16];
            let d = quantise_block(xs, &mut q[b * QK..(b + 1) * QK], &mut s16, kernels);
            *self.d.add(r * kb + b) = d;
            for p in 0..4 {
                let lo = (s16[4 * p] + s16[4 * p + 1]) as i16 as u16 as u32;
                let hi = (s16[4 * p + 2] + s16[4 * p + 3]) as i16 as u16 as u32;
                *self.p.add((r * kb + b) * 4 + p) = (lo | (hi << 16)) as i32;
            }
            for (j, s) in s16.iter().enumerate() {
                *self.c16.add((r * kb + b) * 16 + j) = -32 * s;
            }
            for j in 0..8 {
                *self.c32.add((r * kb + b) * 8 + j) = -128 * (s16[2 * j] + s16[2 * j + 1]);
            }
        }
    }
}

/// ggml's Q8_K rule for up to 256 values (`len` a multiple of 16; the rest of `q`
/// stays zero): `d = max|x| / 127`, `q = round(x / d)` with ties to even. ggml maps the
/// largest value to −127 instead of +127; that flips the signs of both `q` and `d`
/// and leaves every product `d · q` unchanged. Returns `d`; `sums` gets the sums of
/// each 16 quants.
fn quantise_block(xs: &[f32], q: &mut [i8], sums: &mut [i32; 16], kernels: Kernels) -> f32 {
    assert!(xs.len().is_multiple_of(16) && xs.len() <= q.len());
    // SAFETY: `kernels` proves the features; the lengths are checked above.
    match kernels.isa() {
        #[cfg(target_arch = "x86_64")]
        Isa::Avx512 => unsafe { avx512::quantise(xs, q, sums) },
        #[cfg(target_arch = "x86_64")]
        Isa::Avx2 | Isa::AvxVnni => unsafe { avx2::quantise(xs, q, sums) },
        _ => scalar::quantise(xs, q, sums),
    }
}

/// Output buffer shared by tile workers; each writes its own 16 columns.
struct SharedOut(*mut f32);
// SAFETY: workers write disjoint column ranges.
unsafe impl Sync for SharedOut {}
impl SharedOut {
    fn ptr(&self) -> *mut f32 {
        self.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::Tensor;

    /// Pseudo-random values in (-1, 1) with a per-row magnitude, from `seed`.
    fn values(rows: usize, cols: usize, seed: u64) -> Vec<f32> {
        let mut s = seed.wrapping_mul(0x9e37_79b9_7f4a_7c15) | 1;
        (0..rows * cols)
            .map(|i| {
                s ^= s << 13;
                s ^= s >> 7;
                s ^= s << 17;
                let u = (s >> 40) as f32 / (1u64 << 24) as f32 * 2.0 - 1.0;
                u * (0.2 + (i / cols % 5) as f32 * 0.3)
            })
            .collect()
    }

    fn quantised(dtype: GgmlDType, n: usize, k: usize, seed: u64) -> QTensor {
        let t = Tensor::from_vec(values(n, k, seed), (n, k), &Device::Cpu).expect("tensor");
        QTensor::quantize(&t, dtype).expect("quantize")
    }

    fn bits(v: &[f32]) -> Vec<u32> {
        v.iter().map(|x| x.to_bits()).collect()
    }

    /// f64 products of candle's dequantised weights with the dequantised Q8_K rows
    /// (`d · q`), and the sum of |terms| of each product for the error bound.
    fn reference(qt: &QTensor, x: &[f32], m: usize) -> (Vec<f64>, Vec<f64>) {
        let (n, k) = qt.shape().dims2().expect("2-d");
        let w = qt
            .dequantize(&Device::Cpu)
            .and_then(|t| t.flatten_all())
            .and_then(|t| t.to_vec1::<f32>())
            .expect("dequantize");
        let a = Acts::quantise(x, m, k, false, Kernels(Isa::Scalar));
        let mut y = vec![0f64; m * n];
        let mut mag = vec![0f64; m * n];
        for r in 0..m {
            let xr: Vec<f64> = (0..k)
                .map(|i| a.d[r * a.kb + i / QK] as f64 * a.q[r * a.kb * QK + i] as f64)
                .collect();
            for c in 0..n {
                for i in 0..k {
                    let t = w[c * k + i] as f64 * xr[i];
                    y[r * n + c] += t;
                    mag[r * n + c] += t.abs();
                }
            }
        }
        (y, mag)
    }

    /// The scalar kernel of `dtype` against `reference`.
    fn check_against_reference(dtype: GgmlDType, n: usize, k: usize, m: usize) {
        let qt = quantised(dtype, n, k, 7);
        let p = Packed::new(&qt, Kernels(Isa::Scalar))
            .expect("pack")
            .expect("covered");
        let x = values(m, k, 11);
        let y = p.forward(&x, m);
        let (want, mag) = reference(&qt, &x, m);
        for (i, ((&y, &w), &g)) in y.iter().zip(&want).zip(&mag).enumerate() {
            let err = (y as f64 - w).abs();
            assert!(
                err <= 2e-6 * g + 1e-6,
                "{dtype:?} element {i}: kernel {y}, reference {w}, |terms| {g}"
            );
        }
    }

    /// Q4_K layout of ggml (`block_q4_K`, Gerganov et al.): the kernel equals the f64
    /// product of candle's dequantised weights with the same Q8_K activations, up to
    /// f32 rounding.
    #[test]
    fn scalar_q4k_gemm_matches_dequantised_reference() {
        check_against_reference(GgmlDType::Q4K, 48, 512, 6);
    }

    /// ggml `block_q6_K`: as for Q4_K.
    #[test]
    fn scalar_q6k_gemm_matches_dequantised_reference() {
        check_against_reference(GgmlDType::Q6K, 32, 768, 5);
    }

    /// ggml `block_q8_0`, with an inner width (640) that ends in a partial activation
    /// super-block.
    #[test]
    fn scalar_q8_0_gemm_with_partial_superblock_matches_dequantised_reference() {
        check_against_reference(GgmlDType::Q8_0, 32, 640, 7);
    }

    /// ggml `block_q5_0` (Gerganov et al., `ggml-quants.c`): its own 5.5-bit tiles, with
    /// an even (896 = 28 blocks) and an odd (864 = 27 blocks) block count per row.
    #[test]
    fn scalar_q5_0_gemm_matches_dequantised_reference() {
        check_against_reference(GgmlDType::Q5_0, 16, 896, 4);
        check_against_reference(GgmlDType::Q5_0, 32, 864, 5);
    }

    /// ggml `block_q4_0` weights become Q8_0 tiles exactly: the reference uses candle's
    /// dequantisation of the original Q4_0 weight.
    #[test]
    fn scalar_q4_0_weights_repack_exactly_as_q8_0() {
        check_against_reference(GgmlDType::Q4_0, 16, 320, 3);
    }

    /// A packed row dequantises to exactly candle's `dequantize` of the file's row
    /// (ggml `dequantize_row_*`, same operation order), for every tile format: a tied
    /// token embedding can be read from the output projection's tiles.
    #[test]
    fn packed_rows_dequantise_like_candle() {
        for (dtype, k) in [
            (GgmlDType::Q4K, 512),
            (GgmlDType::Q6K, 768),
            (GgmlDType::Q5_0, 864),
            (GgmlDType::Q8_0, 640),
            (GgmlDType::Q4_0, 320),
        ] {
            let n = 32;
            let qt = quantised(dtype, n, k, 6);
            let p = Packed::new(&qt, Kernels::best())
                .expect("pack")
                .expect("covered");
            let want = qt
                .dequantize(&Device::Cpu)
                .and_then(|t| t.flatten_all())
                .and_then(|t| t.to_vec1::<f32>())
                .expect("dequantize");
            for r in 0..n {
                assert_eq!(
                    bits(&p.row(r)),
                    bits(&want[r * k..(r + 1) * k]),
                    "{dtype:?} row {r}"
                );
            }
        }
    }

    /// Several weights in one pool call give the bits of separate calls.
    #[test]
    fn fused_weights_equal_separate_calls() {
        let k = 512;
        let ws: Vec<Packed> = [
            GgmlDType::Q4K,
            GgmlDType::Q6K,
            GgmlDType::Q5_0,
            GgmlDType::Q8_0,
        ]
        .iter()
        .enumerate()
        .map(|(i, &t)| {
            Packed::new(&quantised(t, 16 * (i + 1), k, i as u64), Kernels::best())
                .expect("pack")
                .expect("covered")
        })
        .collect();
        let refs: Vec<&Packed> = ws.iter().collect();
        for m in [1, 5] {
            let x = values(m, k, 2);
            let fused = Packed::forward_many(&refs, &x, m);
            for (w, y) in ws.iter().zip(&fused) {
                assert_eq!(
                    bits(y),
                    bits(&w.forward(&x, m)),
                    "{:?}, {m} rows",
                    w.format()
                );
            }
        }
    }

    /// Activation quantisation is ggml's Q8_K rule as candle implements it
    /// (`BlockQ8K::from_float`): same dequantised values.
    #[test]
    fn activation_quantisation_matches_candle_q8k() {
        let (m, k) = (3, 512);
        let x = values(m, k, 5);
        let t = Tensor::from_vec(x.clone(), (m, k), &Device::Cpu).expect("tensor");
        let want = QTensor::quantize(&t, GgmlDType::Q8K)
            .and_then(|q| q.dequantize(&Device::Cpu))
            .and_then(|t| t.flatten_all())
            .and_then(|t| t.to_vec1::<f32>())
            .expect("candle q8k");
        let a = Acts::quantise(&x, m, k, false, Kernels(Isa::Scalar));
        let ours: Vec<f32> = (0..m * k).map(|i| a.d[i / QK] * a.q[i] as f32).collect();
        // Compared as values: ggml's opposite sign turns some zero products into -0.
        assert_eq!(ours, want);
    }

    /// A row's result does not depend on the other rows of the call: each of 37 rows
    /// (9 groups of four and a remainder) equals the same row multiplied alone, bit
    /// for bit, for every format.
    #[test]
    fn row_result_is_identical_alone_and_in_a_batch_of_37() {
        for (dtype, k) in [
            (GgmlDType::Q4K, 512),
            (GgmlDType::Q6K, 256),
            (GgmlDType::Q5_0, 352),
            (GgmlDType::Q8_0, 320),
        ] {
            let (n, m) = (32, 37);
            let p = Packed::new(&quantised(dtype, n, k, 3), Kernels::best())
                .expect("pack")
                .expect("covered");
            let x = values(m, k, 9);
            let batch = p.forward(&x, m);
            for r in 0..m {
                let alone = p.forward(&x[r * k..(r + 1) * k], 1);
                assert_eq!(
                    bits(&alone),
                    bits(&batch[r * n..(r + 1) * n]),
                    "{dtype:?} row {r}"
                );
            }
        }
    }

    /// The same bits whether the tiles run on candle's worker pool or on one thread.
    #[test]
    fn pooled_and_single_thread_runs_are_bit_identical() {
        for dtype in [
            GgmlDType::Q4K,
            GgmlDType::Q6K,
            GgmlDType::Q5_0,
            GgmlDType::Q8_0,
        ] {
            let (n, k, m) = (256, 512, 37);
            let p = Packed::new(&quantised(dtype, n, k, 4), Kernels::best())
                .expect("pack")
                .expect("covered");
            let x = values(m, k, 8);
            assert_eq!(
                bits(&Packed::run(&[&p], &x, m, true)[0]),
                bits(&Packed::run(&[&p], &x, m, false)[0]),
                "{dtype:?}"
            );
        }
    }

    /// Shapes the tiles cannot hold are declined, not mispacked.
    #[test]
    fn uncovered_shapes_and_types_are_declined() {
        let odd_n = quantised(GgmlDType::Q4K, 24, 256, 1);
        assert!(Packed::new(&odd_n, Kernels::best())
            .expect("pack")
            .is_none());
        let q4_1 = quantised(GgmlDType::Q4_1, 16, 256, 1);
        assert!(Packed::new(&q4_1, Kernels::best()).expect("pack").is_none());
    }

    /// binary16 edge values convert exactly (IEEE 754-2008 encodings).
    #[test]
    fn f16_conversion_is_exact_on_edge_values() {
        assert_eq!(f16_to_f32(0x3c00), 1.0);
        assert_eq!(f16_to_f32(0xc000), -2.0);
        assert_eq!(f16_to_f32(0x0001), 2f32.powi(-24));
        assert_eq!(f16_to_f32(0x7bff), 65504.0);
        assert_eq!(f16_to_f32(0x8000).to_bits(), (-0.0f32).to_bits());
        assert!(f16_to_f32(0x7c00).is_infinite());
    }

    /// `isa`'s kernels, or `None` after saying on the terminal (past the test
    /// harness's capture) that the test was skipped and why.
    fn family(isa: Isa, test: &str) -> Option<Kernels> {
        let k = Kernels::new(isa);
        if k.is_none() {
            use std::io::Write;
            let _ = writeln!(
                std::io::stderr(),
                "{test}: skipped: this processor lacks the {isa} instructions"
            );
        }
        k
    }

    /// Every weight format, with inner widths that end in partial activation
    /// super-blocks and odd block counts, and row counts that use the four-row and
    /// the one-row kernels: `isa`'s products, activation quants, gated activations, RMS
    /// norms and rotary embeddings
    /// equal the scalar kernels' bit for bit.
    fn products_equal_scalar(isa: Isa, test: &str) {
        let Some(kernels) = family(isa, test) else {
            return;
        };
        let scalar = Kernels(Isa::Scalar);
        let up = values(1, 999, 2);
        for act in [Activation::Silu, Activation::GeluTanh] {
            let (mut ours, mut reference) = (values(1, 999, 1), values(1, 999, 1));
            gate(kernels, act, &mut ours, &up);
            gate(scalar, act, &mut reference, &up);
            assert_eq!(bits(&ours), bits(&reference), "{isa} {act:?}");
        }
        let (x, w) = (values(5, 999, 3), values(1, 999, 4));
        assert_eq!(
            bits(&rms_norm(kernels, &x, &w, 1e-6)),
            bits(&rms_norm(scalar, &x, &w, 1e-6)),
            "{isa} RMS norm"
        );
        let table = RopeTable::new(&crate::engine::ops::rope_freqs(64, 1e4), 7, 5);
        for pairs in [RopePairs::Halves, RopePairs::Adjacent] {
            let (mut ours, mut reference) = (values(5, 256, 6), values(5, 256, 6));
            rope(kernels, &mut ours, 256, 64, &table, pairs);
            rope(scalar, &mut reference, 256, 64, &table, pairs);
            assert_eq!(bits(&ours), bits(&reference), "{isa} RoPE {pairs:?}");
        }
        for (dtype, n, k) in [
            (GgmlDType::Q4K, 48, 768),
            (GgmlDType::Q6K, 32, 512),
            (GgmlDType::Q5_0, 32, 864),
            (GgmlDType::Q5_0, 16, 896),
            (GgmlDType::Q8_0, 32, 640),
            (GgmlDType::Q4_0, 16, 320),
        ] {
            let qt = quantised(dtype, n, k, 5);
            let ours = Packed::new(&qt, kernels).expect("pack").expect("covered");
            let reference = Packed::new(&qt, scalar).expect("pack").expect("covered");
            for m in [1, 3, 9] {
                let x = values(m, k, 13 + m as u64);
                let (a, b) = (
                    Acts::quantise(&x, m, k, false, kernels),
                    Acts::quantise(&x, m, k, false, scalar),
                );
                assert_eq!((&a.q, bits(&a.d)), (&b.q, bits(&b.d)), "{dtype:?} quants");
                assert_eq!(
                    bits(&ours.forward(&x, m)),
                    bits(&reference.forward(&x, m)),
                    "{isa} {dtype:?} {n}x{k}, {m} rows"
                );
            }
        }
        // Largest weight values against activation quants of ±127: the products that
        // add several `vpmaddubsw` results in 16 bits (see `avx2.rs`) are at their
        // bound here, and would wrap past it.
        for (dtype, k) in [
            (GgmlDType::Q4K, 512),
            (GgmlDType::Q5_0, 512),
            (GgmlDType::Q6K, 512),
            (GgmlDType::Q8_0, 512),
        ] {
            let qt = extreme_weights(dtype, 32, k);
            let ours = Packed::new(&qt, kernels).expect("pack").expect("covered");
            let reference = Packed::new(&qt, scalar).expect("pack").expect("covered");
            let x: Vec<f32> = (0..5 * k)
                .map(|i| if (i / k) % 2 == 0 { 1.0 } else { -1.0 })
                .collect();
            assert_eq!(
                bits(&ours.forward(&x, 5)),
                bits(&reference.forward(&x, 5)),
                "{isa} {dtype:?} at the largest weights"
            );
        }
    }

    /// Weights whose quantised values are the format's largest on almost every
    /// position: per block one value sets the scale's sign or the minimum, the rest
    /// quantise to 15 (Q4_K), 31 (Q5_0), about 63 (Q6_K) or 127 in magnitude (Q8_0).
    fn extreme_weights(dtype: GgmlDType, n: usize, k: usize) -> QTensor {
        // (period, the value that starts each period, every other value)
        let (period, first, rest) = match dtype {
            GgmlDType::Q4K => (32, 0.0, 1.0),
            GgmlDType::Q5_0 => (32, 1.0, -0.9375),
            GgmlDType::Q6K => (16, 1.0, -0.96875),
            _ => (2, 1.0, -1.0),
        };
        let v: Vec<f32> = (0..n * k)
            .map(|i| if i % period == 0 { first } else { rest })
            .collect();
        let t = Tensor::from_vec(v, (n, k), &Device::Cpu).expect("tensor");
        QTensor::quantize(&t, dtype).expect("quantize")
    }

    #[test]
    fn avx512_products_equal_scalar() {
        products_equal_scalar(Isa::Avx512, "avx512_products_equal_scalar");
    }

    #[test]
    fn avx2_products_equal_scalar() {
        products_equal_scalar(Isa::Avx2, "avx2_products_equal_scalar");
    }

    #[test]
    fn avx2_vnni_products_equal_scalar() {
        products_equal_scalar(Isa::AvxVnni, "avx2_vnni_products_equal_scalar");
    }

    #[test]
    fn neon_products_equal_scalar() {
        products_equal_scalar(Isa::Neon, "neon_products_equal_scalar");
    }

    #[test]
    fn neon_dot_products_equal_scalar() {
        products_equal_scalar(Isa::NeonDot, "neon_dot_products_equal_scalar");
    }

    /// Scaled dot-product attention (Vaswani et al. 2017) from its definition, in f64:
    /// softmax(q·k · scale) · v over positions `lo..=p` of rows at `stride`.
    fn textbook(q: &[f32], kv: &KeyValues<'_>, d: usize, scale: f64) -> Vec<f64> {
        let s: Vec<f64> = (kv.lo..=kv.p)
            .map(|j| {
                (0..d)
                    .map(|i| q[i] as f64 * kv.keys[j * kv.stride + i] as f64)
                    .sum::<f64>()
                    * scale
            })
            .collect();
        let max = s.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let w: Vec<f64> = s.iter().map(|x| (x - max).exp()).collect();
        let z: f64 = w.iter().sum();
        (0..d)
            .map(|i| {
                (kv.lo..=kv.p)
                    .zip(&w)
                    .map(|(j, w)| w / z * kv.vals[j * kv.stride + i] as f64)
                    .sum()
            })
            .collect()
    }

    /// `isa`'s attention of three heads over one key/value head, for head widths its
    /// vector kernel takes (64, 128, 256, and widths of 8 and 16 lanes) and one it
    /// hands to the scalar kernel (36), with and without a window start: each head
    /// within 1e-5 of the definition, and bit for bit the same computed alone.
    fn attention_matches_definition(isa: Isa, test: &str) {
        let Some(kernels) = family(isa, test) else {
            return;
        };
        for (d, lo, p) in [
            (64, 0, 40),
            (128, 3, 37),
            (256, 0, 9),
            (48, 5, 70),
            (40, 0, 33),
            (36, 2, 20),
        ] {
            let stride = d + 8;
            let keys = values(p + 1, stride, 3);
            let vals = values(p + 1, stride, 4);
            let kv = KeyValues {
                keys: &keys,
                vals: &vals,
                stride,
                lo,
                p,
            };
            let q = values(3, d, 5);
            let scale = 1.0 / (d as f32).sqrt();
            let (mut out, mut scratch) = (vec![0f32; q.len()], Vec::new());
            attend(kernels, &q, &kv, d, scale, &mut out, &mut scratch);
            for (h, (qh, oh)) in q.chunks(d).zip(out.chunks(d)).enumerate() {
                let want = textbook(qh, &kv, d, scale as f64);
                for (got, want) in oh.iter().zip(&want) {
                    assert!(
                        (*got as f64 - want).abs() < 1e-5,
                        "{isa} d {d} head {h}: {got} vs {want}"
                    );
                }
                let mut alone = vec![0f32; d];
                attend(kernels, qh, &kv, d, scale, &mut alone, &mut scratch);
                assert_eq!(bits(&alone), bits(oh), "{isa} d {d} head {h} alone");
            }
        }
    }

    #[test]
    fn scalar_attention_matches_definition() {
        attention_matches_definition(Isa::Scalar, "scalar_attention_matches_definition");
    }

    #[test]
    fn avx512_attention_matches_definition() {
        attention_matches_definition(Isa::Avx512, "avx512_attention_matches_definition");
    }

    #[test]
    fn avx2_attention_matches_definition() {
        attention_matches_definition(Isa::Avx2, "avx2_attention_matches_definition");
    }

    #[test]
    fn neon_attention_matches_definition() {
        attention_matches_definition(Isa::Neon, "neon_attention_matches_definition");
    }

    /// A family this processor lacks cannot be asked for: `Kernels::new` refuses it,
    /// so no packed weight or attention call can reach its instructions.
    #[test]
    fn kernels_exist_only_for_families_this_processor_runs() {
        for isa in Isa::ALL {
            assert_eq!(Kernels::new(isa).is_some(), isa.runs_here(), "{isa}");
        }
        assert!(Kernels::new(Isa::Scalar).is_some());
        #[cfg(target_arch = "x86_64")]
        assert!(Kernels::new(Isa::Neon).is_none() && Kernels::new(Isa::NeonDot).is_none());
        #[cfg(target_arch = "aarch64")]
        assert!(Kernels::new(Isa::Avx2).is_none() && Kernels::new(Isa::Avx512).is_none());
        assert!(Kernels::best().isa().runs_here());
    }
}

//! GGUF header validation before candle's reader sees the file. Stage: engine,
//! model loading. Input: the file's bytes (streamed) and its length. Output: `Ok`,
//! or the first field found damaged, named. Checks the version, counts, key, string
//! and array lengths against the bytes left, value and tensor types, the alignment
//! (a power of two), dimension products with checked arithmetic, and every tensor's
//! offset (aligned) and size against the file length. Never allocates by a length
//! it has not checked against the file, and never panics on any input.

use std::io::{BufReader, Read};
use std::path::Path;

use super::EngineError;

/// Most dimensions a GGUF tensor may have (ggml's limit).
const MAX_DIMS: u32 = 4;
/// Deepest nesting of arrays accepted in metadata.
const MAX_ARRAY_DEPTH: u32 = 3;
/// Alignment of tensor data when `general.alignment` is absent (GGUF specification).
const DEFAULT_ALIGNMENT: u64 = 32;

/// A damaged field: which one, and what is wrong with it.
#[derive(Debug, Clone, PartialEq)]
pub struct Damage {
    /// The field (`tensor count`, `metadata key 3`, `tensor `blk.0.attn_q.weight` offset`).
    pub field: String,
    /// What is wrong.
    pub reason: String,
    /// For tensor data past the end of the file: the tensor and the bytes it needs
    /// (a truncated download rather than a damaged header).
    pub past_end: Option<(String, u64)>,
}

fn damage(field: impl Into<String>, reason: impl Into<String>) -> Damage {
    Damage {
        field: field.into(),
        reason: reason.into(),
        past_end: None,
    }
}

/// Validate the header of the GGUF file at `path` (its magic already checked).
pub fn check_file(path: &Path, file_size: u64) -> Result<(), EngineError> {
    let file = std::fs::File::open(path).map_err(|source| EngineError::Io {
        path: path.to_path_buf(),
        source,
    })?;
    check(BufReader::new(file), file_size).map_err(|d| match d.past_end {
        Some((tensor, needed)) => EngineError::Truncated {
            path: path.to_path_buf(),
            tensor,
            needed,
            actual: file_size,
        },
        None => EngineError::Damaged {
            path: path.to_path_buf(),
            field: d.field,
            reason: d.reason,
        },
    })
}

/// Validate a GGUF header read from `r`, a file of `len` bytes.
pub fn check(r: impl Read, len: u64) -> Result<(), Damage> {
    let mut h = Header {
        r,
        pos: 0,
        len,
        wide: true,
    };
    if h.bytes(4, "magic")? != b"GGUF" {
        return Err(damage("magic", "the file does not start with `GGUF`"));
    }
    let version = h.u32("version")?;
    if !(1..=3).contains(&version) {
        return Err(damage(
            "version",
            format!("{version} is not a GGUF version (1 to 3)"),
        ));
    }
    h.wide = version >= 2;
    let tensors = h.count("tensor count", 8 + 4 + 4 + 8)?;
    let kvs = h.count("metadata count", 8 + 4 + 1)?;
    let mut alignment = DEFAULT_ALIGNMENT;
    for i in 0..kvs {
        let key = h.string(&format!("metadata key {i}"))?;
        let ty = h.u32(&format!("type of `{key}`"))?;
        if key == "general.alignment" {
            alignment = match (ty, h.value(ty, &key, 0)?) {
                (4, Some(a)) if a > 0 && a.is_power_of_two() => a,
                (4, Some(a)) => {
                    return Err(damage(
                        "general.alignment",
                        format!("{a} is not a power of two above 0"),
                    ))
                }
                _ => {
                    return Err(damage(
                        "general.alignment",
                        "is not a 32-bit unsigned integer",
                    ))
                }
            };
        } else {
            h.value(ty, &key, 0)?;
        }
    }
    let mut table = Vec::new();
    for i in 0..tensors {
        table.push(h.tensor(i)?);
    }
    let start = h
        .pos
        .checked_next_multiple_of(alignment)
        .ok_or_else(|| damage("tensor data start", "overflows"))?;
    for t in &table {
        t.check_extent(start, alignment, len)?;
    }
    Ok(())
}

/// One tensor-table entry, checked for its own consistency.
struct TensorEntry {
    name: String,
    bytes: u64,
    offset: u64,
}

impl TensorEntry {
    fn check_extent(&self, start: u64, alignment: u64, len: u64) -> Result<(), Damage> {
        let field = |what: &str| format!("tensor `{}` {what}", self.name);
        if self.offset % alignment != 0 {
            return Err(damage(
                field("offset"),
                format!(
                    "{} is not a multiple of the alignment {alignment}",
                    self.offset
                ),
            ));
        }
        let end = start
            .checked_add(self.offset)
            .and_then(|s| s.checked_add(self.bytes))
            .ok_or_else(|| damage(field("offset"), "overflows"))?;
        if end > len {
            let mut d = damage(
                field("data"),
                format!("ends at byte {end}, past the end of the file ({len} bytes)"),
            );
            d.past_end = Some((self.name.clone(), end));
            return Err(d);
        }
        Ok(())
    }
}

/// (elements per block, bytes per block) of the ggml types candle reads.
fn block_layout(ty: u32) -> Option<(u64, u64)> {
    Some(match ty {
        0 => (1, 4),      // F32
        1 | 30 => (1, 2), // F16, BF16
        2 => (32, 18),    // Q4_0
        3 => (32, 20),    // Q4_1
        6 => (32, 22),    // Q5_0
        7 => (32, 24),    // Q5_1
        8 => (32, 34),    // Q8_0
        9 => (32, 36),    // Q8_1
        10 => (256, 84),  // Q2_K
        11 => (256, 110), // Q3_K
        12 => (256, 144), // Q4_K
        13 => (256, 176), // Q5_K
        14 => (256, 210), // Q6_K
        15 => (256, 292), // Q8_K
        _ => return None,
    })
}

/// A reader that knows how many bytes of the file are left.
struct Header<R> {
    r: R,
    pos: u64,
    len: u64,
    /// GGUF 2 and 3 use 64-bit counts and lengths; GGUF 1 uses 32-bit ones.
    wide: bool,
}

impl<R: Read> Header<R> {
    fn left(&self) -> u64 {
        self.len.saturating_sub(self.pos)
    }

    fn bytes(&mut self, n: u64, field: &str) -> Result<Vec<u8>, Damage> {
        if n > self.left() {
            return Err(damage(
                field,
                format!("needs {n} bytes, {} are left in the file", self.left()),
            ));
        }
        let mut buf = vec![0u8; n as usize];
        self.r
            .read_exact(&mut buf)
            .map_err(|e| damage(field, format!("cannot be read ({e})")))?;
        self.pos += n;
        Ok(buf)
    }

    fn skip(&mut self, n: u64, field: &str) -> Result<(), Damage> {
        if n > self.left() {
            return Err(damage(
                field,
                format!("needs {n} bytes, {} are left in the file", self.left()),
            ));
        }
        let copied = std::io::copy(&mut (&mut self.r).take(n), &mut std::io::sink())
            .map_err(|e| damage(field, format!("cannot be read ({e})")))?;
        if copied != n {
            return Err(damage(field, "the file ends inside it"));
        }
        self.pos += n;
        Ok(())
    }

    fn u32(&mut self, field: &str) -> Result<u32, Damage> {
        let b = self.bytes(4, field)?;
        Ok(u32::from_le_bytes(b.try_into().expect("4 bytes")))
    }

    fn u64(&mut self, field: &str) -> Result<u64, Damage> {
        let b = self.bytes(8, field)?;
        Ok(u64::from_le_bytes(b.try_into().expect("8 bytes")))
    }

    /// A count or length: 64-bit in GGUF 2 and 3, 32-bit in GGUF 1.
    fn length(&mut self, field: &str) -> Result<u64, Damage> {
        if self.wide {
            self.u64(field)
        } else {
            self.u32(field).map(u64::from)
        }
    }

    /// A count of entries each at least `min_entry` bytes long, bounded by the file.
    fn count(&mut self, field: &str, min_entry: u64) -> Result<u64, Damage> {
        let n = self.length(field)?;
        if n > self.left() / min_entry {
            return Err(damage(
                field,
                format!("{n} entries cannot fit in the {} bytes left", self.left()),
            ));
        }
        Ok(n)
    }

    fn string(&mut self, field: &str) -> Result<String, Damage> {
        let n = self.length(field)?;
        let b = self.bytes(n, field)?;
        String::from_utf8(b).map_err(|e| damage(field, format!("is not UTF-8 ({e})")))
    }

    /// Read (and mostly skip) a metadata value; returns unsigned integers' values.
    fn value(&mut self, ty: u32, key: &str, depth: u32) -> Result<Option<u64>, Damage> {
        let field = format!("value of `{key}`");
        let fixed = match ty {
            0 | 1 | 7 => 1,
            2 | 3 => 2,
            4 | 5 | 6 => 4,
            10 | 11 | 12 => 8,
            _ => 0,
        };
        match ty {
            4 => return self.u32(&field).map(|v| Some(v as u64)),
            10 => return self.u64(&field).map(Some),
            _ if fixed > 0 => self.skip(fixed, &field)?,
            8 => {
                let n = self.length(&field)?;
                let b = self.bytes(n, &field)?;
                std::str::from_utf8(&b)
                    .map_err(|e| damage(&field, format!("is not UTF-8 ({e})")))?;
            }
            9 => {
                if depth >= MAX_ARRAY_DEPTH {
                    return Err(damage(&field, "arrays nested too deep"));
                }
                let elem = self.u32(&field)?;
                let n = self.length(&field)?;
                let min = match elem {
                    0 | 1 | 7 => 1,
                    2 | 3 => 2,
                    4 | 5 | 6 => 4,
                    8 | 10 | 11 | 12 => 8,
                    9 => 12,
                    t => {
                        return Err(damage(
                            &field,
                            format!("array element type {t} does not exist"),
                        ))
                    }
                };
                if n > self.left() / min {
                    return Err(damage(
                        &field,
                        format!("array of {n} cannot fit in the {} bytes left", self.left()),
                    ));
                }
                if elem == 8 || elem == 9 {
                    for _ in 0..n {
                        self.value(elem, key, depth + 1)?;
                    }
                } else {
                    self.skip(n * min, &field)?;
                }
            }
            t => return Err(damage(&field, format!("value type {t} does not exist"))),
        }
        Ok(None)
    }

    fn tensor(&mut self, i: u64) -> Result<TensorEntry, Damage> {
        let name = self.string(&format!("name of tensor {i}"))?;
        let field = |what: &str| format!("tensor `{name}` {what}");
        let n_dims = self.u32(&field("dimension count"))?;
        if n_dims == 0 || n_dims > MAX_DIMS {
            return Err(damage(
                field("dimension count"),
                format!("{n_dims} is not between 1 and {MAX_DIMS}"),
            ));
        }
        let mut dims = Vec::with_capacity(n_dims as usize);
        for _ in 0..n_dims {
            dims.push(self.length(&field("dimensions"))?);
        }
        let ty = self.u32(&field("type"))?;
        let offset = self.u64(&field("offset"))?;
        let (block, size) = block_layout(ty).ok_or_else(|| {
            damage(
                field("type"),
                format!("type id {ty} is not a tensor type assize can read"),
            )
        })?;
        let elems = dims
            .iter()
            .try_fold(1u64, |acc, &d| acc.checked_mul(d))
            .ok_or_else(|| damage(field("dimensions"), format!("{dims:?} multiply past 2^64")))?;
        if elems == 0 {
            return Err(damage(
                field("dimensions"),
                format!("{dims:?} hold no elements"),
            ));
        }
        if dims[0] % block != 0 {
            return Err(damage(
                field("dimensions"),
                format!(
                    "first dimension {} is not a multiple of the block size {block}",
                    dims[0]
                ),
            ));
        }
        let bytes = (elems / block)
            .checked_mul(size)
            .filter(|&b| usize::try_from(b).is_ok())
            .ok_or_else(|| {
                damage(
                    field("dimensions"),
                    format!("{dims:?} give a size past 2^64 bytes"),
                )
            })?;
        Ok(TensorEntry {
            name,
            bytes,
            offset,
        })
    }
}

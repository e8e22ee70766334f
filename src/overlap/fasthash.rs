//! Overlap stage, a small fast hasher for the n-gram and vocabulary maps.
//!
//! Input: keys (token strings, id arrays, packed character n-grams). Output: 64-bit
//! hashes. Must never be used where an attacker chooses keys to force collisions:
//! it has no random seed, which is fine for scoring local answer files.
//!
//! The mixing step is the multiply-rotate "Fx" hash used inside the Rust compiler;
//! the standard SipHash was most of the run time of every metric here.

use std::collections::HashMap;
use std::hash::{BuildHasherDefault, Hasher};

/// A `HashMap` with the fast hasher below.
pub(crate) type FastMap<K, V> = HashMap<K, V, BuildHasherDefault<FxHasher>>;

/// Multiply-rotate hasher: quick on short keys, not collision-resistant.
#[derive(Default, Clone, Copy)]
pub(crate) struct FxHasher {
    hash: u64,
}

const SEED: u64 = 0x51_7c_c1_b7_27_22_0a_95;

impl FxHasher {
    #[inline]
    fn add(&mut self, word: u64) {
        self.hash = (self.hash.rotate_left(5) ^ word).wrapping_mul(SEED);
    }
}

impl Hasher for FxHasher {
    #[inline]
    fn write(&mut self, bytes: &[u8]) {
        let mut chunks = bytes.chunks_exact(8);
        for c in &mut chunks {
            self.add(u64::from_le_bytes(
                c.try_into().expect("chunks_exact gives 8 bytes"),
            ));
        }
        let rest = chunks.remainder();
        if !rest.is_empty() {
            let mut buf = [0u8; 8];
            buf[..rest.len()].copy_from_slice(rest);
            self.add(u64::from_le_bytes(buf));
        }
    }
    #[inline]
    fn write_u8(&mut self, i: u8) {
        self.add(u64::from(i));
    }
    #[inline]
    fn write_u32(&mut self, i: u32) {
        self.add(u64::from(i));
    }
    #[inline]
    fn write_u64(&mut self, i: u64) {
        self.add(i);
    }
    #[inline]
    fn write_u128(&mut self, i: u128) {
        self.add(i as u64);
        self.add((i >> 64) as u64);
    }
    #[inline]
    fn write_usize(&mut self, i: usize) {
        self.add(i as u64);
    }
    #[inline]
    fn finish(&self) -> u64 {
        self.hash
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Equal keys hash equally and the map behaves like any `HashMap`.
    #[test]
    fn fast_map_counts_like_a_hash_map() {
        let mut m: FastMap<&str, u32> = FastMap::default();
        for w in ["a", "bb", "a", "ccccccccc", "a"] {
            *m.entry(w).or_insert(0) += 1;
        }
        assert_eq!((m["a"], m["bb"], m["ccccccccc"]), (3, 1, 1));
    }
}

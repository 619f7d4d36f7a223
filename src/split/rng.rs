//! Seed derivation, bounded draws and shuffles over the raw ChaCha20 stream.
//!
//! Nothing stored may depend on the `rand` crate's distributions or shuffle, which may change
//! between versions; these few functions are ours and pinned by tests with exact outputs.

use rand_chacha::ChaCha20Rng;
use rand_core::{Rng, SeedableRng};

/// What a derived stream is for; part of the ChaCha20 stream id, so streams never overlap.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u64)]
pub enum Domain {
    /// Assignment of rows to train, validation and test.
    Partition = 1,
    /// Assignment of development rows to folds; the index is the repeat.
    Folds = 2,
    /// Per-candidate seeds; the index is the candidate id.
    Candidate = 3,
    /// Bootstrap resamples of a reveal; the index is the candidate id.
    Bootstrap = 4,
    /// Noise of the reusable-holdout mechanism; the index is the reveal's ordinal on its partition.
    Noise = 5,
    /// Inner folds of nested cross-validation; the index is the outer fold.
    NestedFolds = 6,
    /// Seeds handed to external commands; keyed by the candidate seed, the index is the fold.
    Command = 7,
}

/// A ChaCha20 generator keyed by `seed` (little-endian in the first 8 key bytes) on the stream
/// `(domain << 32) | index`. Same arguments, same stream, on every platform and version.
pub fn stream(seed: u64, domain: Domain, index: u32) -> ChaCha20Rng {
    let mut key = [0u8; 32];
    key[..8].copy_from_slice(&seed.to_le_bytes());
    let mut rng = ChaCha20Rng::from_seed(key);
    rng.set_stream(((domain as u64) << 32) | u64::from(index));
    rng
}

/// A 64-bit seed derived from the run seed for one domain and index (first word of its stream).
pub fn derive_seed(seed: u64, domain: Domain, index: u32) -> u64 {
    stream(seed, domain, index).next_u64()
}

/// Uniform integer in `0..n` without bias (Lemire 2019, "Fast random integer generation in an
/// interval", ACM TOMACS 29(1)). `n` must be positive.
pub fn bounded(rng: &mut ChaCha20Rng, n: u64) -> u64 {
    debug_assert!(n > 0);
    let mut m = u128::from(rng.next_u64()) * u128::from(n);
    let mut low = m as u64;
    if low < n {
        let threshold = n.wrapping_neg() % n;
        while low < threshold {
            m = u128::from(rng.next_u64()) * u128::from(n);
            low = m as u64;
        }
    }
    (m >> 64) as u64
}

/// Fisher-Yates shuffle in place (Knuth, TAOCP vol. 2, Algorithm P), drawing from the top down.
pub fn shuffle<T>(rng: &mut ChaCha20Rng, items: &mut [T]) {
    for i in (1..items.len()).rev() {
        let j = bounded(rng, (i + 1) as u64) as usize;
        items.swap(i, j);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// RFC 8439 section 2.3.2 block function test vector (key 00..1f, counter 1,
    /// nonce 00:00:00:09:00:00:00:4a:00:00:00:00). rand_chacha's 64-bit counter and 64-bit stream
    /// map onto the RFC's words 12-15, so the same block comes out. Expected words from the RFC.
    #[test]
    fn chacha20_matches_rfc8439_block_vector() {
        let mut key = [0u8; 32];
        for (i, b) in key.iter_mut().enumerate() {
            *b = i as u8;
        }
        let mut rng = ChaCha20Rng::from_seed(key);
        // word 12 = 1 (counter), word 13 = 0x09000000, word 14 = 0x4a000000, word 15 = 0
        rng.set_stream(0x4a00_0000);
        rng.set_word_pos(((0x0900_0000u128 << 32) | 1) * 16);
        let expected: [u32; 16] = [
            0xe4e7f110, 0x15593bd1, 0x1fdd0f50, 0xc47120a3, 0xc7f4d1c7, 0x0368c033, 0x9aaa2204,
            0x4e6cd4c3, 0x466482d2, 0x09aa9f07, 0x05d7c214, 0xa2028bd9, 0xd19c12b5, 0xb94e16de,
            0xe883d0cb, 0x4e3c50a2,
        ];
        for w in expected {
            assert_eq!(rng.next_u32(), w);
        }
    }

    /// RFC 8439 appendix A.1, test vector #1 (also RFC 7539): all-zero key and nonce, block
    /// counter 0. This is exactly the stream keyed by seed 0 on stream id 0, so seeds mean the
    /// same on every platform and version. Expected bytes from the RFC; also re-derived by
    /// tests/reference/split_check.py.
    #[test]
    fn chacha20_all_zero_key_keystream() {
        let mut rng = ChaCha20Rng::from_seed([0u8; 32]);
        let mut block = [0u8; 64];
        rng.fill_bytes(&mut block);
        let expected = "76b8e0ada0f13d90405d6ae55386bd28bdd219b8a08ded1aa836efcc8b770dc7\
                        da41597c5157488d7724e03fb8d84a376a43b8f41518a11cc387b669b2ee6586";
        assert_eq!(crate::spec::hex(&block), expected);
    }

    #[test]
    fn bounded_stays_in_range_and_hits_every_value() {
        let mut rng = stream(1, Domain::Partition, 0);
        let mut seen = [0u32; 7];
        for _ in 0..7000 {
            let v = bounded(&mut rng, 7);
            seen[v as usize] += 1;
        }
        assert!(seen.iter().all(|&c| (850..1150).contains(&c)), "{seen:?}");
        assert_eq!(bounded(&mut rng, 1), 0);
    }

    /// Pins the exact permutation for a fixed seed, so any change in the stream, the bounded draw
    /// or the shuffle (for example through a dependency upgrade) fails here first.
    #[test]
    fn shuffle_is_pinned() {
        let mut v: Vec<u32> = (0..12).collect();
        shuffle(&mut stream(42, Domain::Partition, 0), &mut v);
        assert_eq!(v, PINNED_SHUFFLE_42);
        assert_eq!(derive_seed(42, Domain::Candidate, 3), PINNED_SEED_42_C3);
    }

    /// Recorded from this implementation (the RFC vector above is the outside check of the stream).
    const PINNED_SHUFFLE_42: [u32; 12] = [5, 6, 2, 4, 9, 10, 1, 7, 11, 3, 8, 0];
    const PINNED_SEED_42_C3: u64 = 8204392660967152638;

    #[test]
    fn streams_differ_by_domain_and_index() {
        let a = derive_seed(7, Domain::Folds, 0);
        let b = derive_seed(7, Domain::Folds, 1);
        let c = derive_seed(7, Domain::Candidate, 0);
        let d = derive_seed(8, Domain::Folds, 0);
        assert!(a != b && a != c && a != d && b != c);
    }
}

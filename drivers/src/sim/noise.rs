//! A fast seeded generator for the per-point display noise of simulated traces.
//!
//! A 10,001-point trace needs 10,001 normal deviates per sweep. The bench's main generator
//! (`StdRng`, a ChaCha cipher) is slower than the rest of the sweep put together, so each sweep
//! draws one 64-bit seed from it and feeds the Ziggurat sampler of `rand_distr` from xoshiro256++
//! (D. Blackman and S. Vigna, "Scrambled linear pseudorandom number generators", ACM TOMS 2021),
//! seeded through SplitMix64 as its authors recommend. The noise stays reproducible from the
//! bench's seed.

use rand::RngCore;

/// xoshiro256++: 256 bits of state, period 2^256 - 1; not for cryptography.
#[derive(Debug, Clone)]
pub struct Xoshiro256PlusPlus {
    s: [u64; 4],
}

impl Xoshiro256PlusPlus {
    /// Expands a 64-bit seed into the state with SplitMix64 (never all zero).
    pub fn from_seed_u64(seed: u64) -> Xoshiro256PlusPlus {
        let mut x = seed;
        let mut next = || {
            x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = x;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            z ^ (z >> 31)
        };
        Xoshiro256PlusPlus {
            s: [next(), next(), next(), next()],
        }
    }
}

impl RngCore for Xoshiro256PlusPlus {
    fn next_u32(&mut self) -> u32 {
        (self.next_u64() >> 32) as u32
    }

    fn next_u64(&mut self) -> u64 {
        let s = &mut self.s;
        let result = s[0].wrapping_add(s[3]).rotate_left(23).wrapping_add(s[0]);
        let t = s[1] << 17;
        s[2] ^= s[0];
        s[3] ^= s[1];
        s[1] ^= s[2];
        s[0] ^= s[3];
        s[2] ^= t;
        s[3] = s[3].rotate_left(45);
        result
    }

    fn fill_bytes(&mut self, dst: &mut [u8]) {
        for chunk in dst.chunks_mut(8) {
            let bytes = self.next_u64().to_le_bytes();
            chunk.copy_from_slice(&bytes[..chunk.len()]);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn first_outputs_match_the_reference_implementation() {
        // Reference: the authors' xoshiro256plusplus.c with state {1, 2, 3, 4}; the first
        // output is rotl(1 + 4, 23) + 1 = 41943041 (worked by hand from the published code).
        let mut rng = Xoshiro256PlusPlus { s: [1, 2, 3, 4] };
        assert_eq!(rng.next_u64(), 41_943_041);
    }
}

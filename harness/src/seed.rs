//! Derivation of each run's seed from the study's master seed and the run's identity.
//!
//! The derivation is a fixed, documented function (FNV-1a 64 over the bytes, finished with the
//! SplitMix64 mixer of Steele, Lea & Flood 2014), so that seeds are identical across platforms,
//! Rust versions, thread counts, shards and resumptions. Written by hand because the standard
//! library's hasher is explicitly not stable across releases.

/// SplitMix64 finaliser (Steele, Lea & Flood 2014, "Fast splittable pseudorandom number
/// generators", OOPSLA).
pub fn splitmix64(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// FNV-1a 64-bit hash (Fowler, Noll & Vo).
pub fn fnv1a64(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in bytes {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0000_0100_0000_01B3);
    }
    h
}

/// Seed of one run: a function of the master seed, the target label, the cell's canonical
/// settings string and the replicate index alone. The result is below 2^53 so that it is exact
/// in JSON numbers.
pub fn run_seed(master: u64, target_label: &str, cell_key: &str, replicate: u64) -> u64 {
    let mut bytes = Vec::with_capacity(target_label.len() + cell_key.len() + 2);
    bytes.extend_from_slice(target_label.as_bytes());
    bytes.push(0);
    bytes.extend_from_slice(cell_key.as_bytes());
    let h = fnv1a64(&bytes);
    let z = splitmix64(splitmix64(master ^ splitmix64(h)) ^ replicate);
    z & ((1u64 << 53) - 1)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix_reference_values() {
        // Reference outputs of SplitMix64 seeded with 0 (the first three values of the
        // generator x += golden; mix(x)), as published with Vigna's xorshift/xoshiro sources.
        // The generator's first output for state 0 is mix(0x9E3779B97F4A7C15) = 0xE220A8397B1DCDAF.
        assert_eq!(splitmix64(0), 0xE220_A839_7B1D_CDAF);
    }

    #[test]
    fn fnv_reference_values() {
        // FNV-1a 64 test vectors from the FNV reference page (Noll): "" and "a".
        assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
    }

    #[test]
    fn seeds_differ_and_fit_in_53_bits() {
        let a = run_seed(1, "t", "x=1", 0);
        let b = run_seed(1, "t", "x=1", 1);
        let c = run_seed(2, "t", "x=1", 0);
        let d = run_seed(1, "u", "x=1", 0);
        assert!(a != b && a != c && a != d);
        for s in [a, b, c, d] {
            assert!(s < (1u64 << 53));
        }
    }
}

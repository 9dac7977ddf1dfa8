//! Which arm a unit gets: weighted rendezvous hashing.
//!
//! Every (unit, arm) pair gets a uniform number U from a hash, and the arm with the smallest
//! score −ln(U) / w wins: rendezvous ("highest random weight") hashing of Thaler & Ravishankar
//! (1998), "Using name-based mappings to increase hit rates", IEEE/ACM Transactions on
//! Networking 6(1), with the weighted scores of Schindelhauer & Schomaker (2005), "Weighted
//! distributed hash tables", SPAA. The scores are independent exponential clocks of rates wⱼ,
//! so arm j wins for a share wⱼ / Σw of the units: the propensity is the weight. When the
//! weights move, a unit's clocks stay the same, so it changes arm only when the race's winner
//! changes; for such a shared-randomness coupling the share that moves is at most
//! 2·TV / (1 + TV), TV the total-variation distance between the old and new weights (Daliri,
//! Musco & Suresh 2025, "Coupling without communication and drafter-invariant speculative
//! decoding", IEEE ISIT; the bound is from memory, and `tests/assignment.rs` measures it).
//!
//! The hash is fixed, byte for byte, so that the Python client (`clients/python`) gives a unit
//! the same arm: FNV-1a 64 of `experiment ‖ 0x00 ‖ unit`, XORed with FNV-1a 64 of the arm's
//! name, through the SplitMix64 finalizer; U = (top 53 bits + ½) / 2⁵³. Arms are raced in
//! ascending order of name and a tie keeps the earlier one.

const FNV_OFFSET: u64 = 0xcbf2_9ce4_8422_2325;
const FNV_PRIME: u64 = 0x0000_0100_0000_01b3;

/// FNV-1a, 64 bits, continuing from `h`.
fn fnv1a(mut h: u64, bytes: &[u8]) -> u64 {
    for &b in bytes {
        h ^= u64::from(b);
        h = h.wrapping_mul(FNV_PRIME);
    }
    h
}

/// The key of `unit` in `experiment`: FNV-1a 64 of the experiment, a zero byte, the unit.
pub fn unit_key(experiment: &str, unit: &str) -> u64 {
    fnv1a(fnv1a(fnv1a(FNV_OFFSET, experiment.as_bytes()), &[0]), unit.as_bytes())
}

/// The seed of an arm: FNV-1a 64 of its name.
pub fn arm_seed(arm: &str) -> u64 {
    fnv1a(FNV_OFFSET, arm.as_bytes())
}

/// The SplitMix64 finalizer (Steele, Lea & Flood 2014, "Fast splittable pseudorandom number
/// generators", OOPSLA): a bijection of 64-bit words with full avalanche.
pub fn mix(mut z: u64) -> u64 {
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

/// A uniform number in (0, 1) from a hash: its top 53 bits, centred.
pub fn uniform(z: u64) -> f64 {
    ((z >> 11) as f64 + 0.5) * (1.0 / (1u64 << 53) as f64)
}

/// One arm in a race: its name's seed and its weight.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Racer {
    pub seed: u64,
    pub weight: f64,
}

/// The index of the arm `key` lands on among `arms` (in ascending order of name); `None` when no
/// arm has a positive weight.
pub fn choose(key: u64, arms: &[Racer]) -> Option<usize> {
    let mut best: Option<(usize, f64)> = None;
    for (j, a) in arms.iter().enumerate() {
        // NaN and negative weights are never chosen.
        if a.weight.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) {
            continue;
        }
        let score = -uniform(mix(key ^ a.seed)).ln() / a.weight;
        if best.is_none_or(|(_, s)| score < s) {
            best = Some((j, score));
        }
    }
    best.map(|(j, _)| j)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a_matches_its_published_test_vectors() {
        // FNV-1a 64 of "" and "a": 0xcbf29ce484222325 and 0xaf63dc4c8601ec8c (the FNV test
        // suite published with the algorithm by Fowler, Noll & Vo; from memory).
        assert_eq!(fnv1a(FNV_OFFSET, b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a(FNV_OFFSET, b"a"), 0xaf63_dc4c_8601_ec8c);
    }

    #[test]
    fn an_arm_without_weight_is_never_chosen() {
        let arms = [Racer { seed: arm_seed("a"), weight: 0.0 }, Racer { seed: arm_seed("b"), weight: 1.0 }];
        for u in 0..1000 {
            assert_eq!(choose(unit_key("e", &format!("u{u}")), &arms), Some(1));
        }
        assert_eq!(choose(1, &arms[..1]), None);
    }
}

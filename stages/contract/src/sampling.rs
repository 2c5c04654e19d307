//! Seeded random subsets that do not depend on the order or the thread in
//! which items are visited: item `index` is kept when a hash of (seed,
//! salt, index) falls below the probability. Stages use it to fit on, or
//! average, a bounded subset of a long recording's events.

/// Whether item `index` belongs to the subset of probability `probability`
/// drawn with `seed`; `salt` separates independent subsets of one stage.
pub fn keep(seed: u64, salt: u64, index: u64, probability: f64) -> bool {
    uniform(seed, salt, index) < probability
}

/// A number in [0, 1) that depends only on (seed, salt, index).
pub fn uniform(seed: u64, salt: u64, index: u64) -> f64 {
    // SplitMix64 finaliser over the combined key.
    let mut z = seed ^ salt.wrapping_mul(0xD1B5_4A32_D192_ED03) ^ index.wrapping_mul(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^= z >> 31;
    (z >> 11) as f64 / (1u64 << 53) as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn subset_has_the_requested_fraction_and_depends_on_seed_and_salt() {
        let kept = (0..100_000u64).filter(|&i| keep(7, 1, i, 0.2)).count();
        assert!((kept as f64 - 20_000.0).abs() < 600.0, "{kept}");
        let same_seed = (0..1000u64).filter(|&i| keep(7, 1, i, 0.5) == keep(8, 1, i, 0.5)).count();
        let same_salt = (0..1000u64).filter(|&i| keep(7, 1, i, 0.5) == keep(7, 2, i, 0.5)).count();
        assert!(same_seed < 600 && same_salt < 600, "{same_seed} {same_salt}");
        assert!((0..1000u64).all(|i| keep(3, 0, i, 1.0)) && !(0..1000u64).any(|i| keep(3, 0, i, 0.0)));
    }
}

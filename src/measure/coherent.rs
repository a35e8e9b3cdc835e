//! Coherent sampling: choose a test frequency with a whole, odd number of cycles J in the record, J coprime with
//! the record length, so the record holds the sine at n distinct, uniformly spread phases and its energy falls
//! exactly on one bin (IEEE Std 1241, coherent sampling; J odd and gcd(J, n) = 1).

/// Greatest common divisor (Euclid).
pub fn gcd(mut a: u64, mut b: u64) -> u64 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// True when `j` is an admissible cycle count for a record of `n` samples: odd, gcd(j, n) = 1 and
/// 1 <= j < n/2.
pub fn is_admissible_cycles(j: u64, n: usize) -> bool {
    j >= 1 && j % 2 == 1 && 2 * j < n as u64 && gcd(j, n as u64) == 1
}

/// The admissible cycle count J nearest to `f_hz * n / fs_hz` (see [`is_admissible_cycles`]) and its frequency
/// `J fs / n` (Hz). Ties go to the lower J. Frequencies at or below 0 give the lowest admissible J and those at or
/// above fs/2 the highest. Returns `None` when no J is admissible (n < 3) or an input is not finite, or the
/// sample rate not positive.
pub fn coherent_frequency(f_hz: f64, fs_hz: f64, n: usize) -> Option<(f64, u64)> {
    if !(f_hz.is_finite() && fs_hz.is_finite() && fs_hz > 0.0) || n < 3 {
        return None;
    }
    let n64 = n as u64;
    let j_max = (n64 - 1) / 2; // largest j with 2j < n
    let target = (f_hz * n as f64 / fs_hz).clamp(0.0, j_max as f64 + 1.0);
    let lo_start = (target.floor() as u64).min(j_max);
    // Walk outwards from the target; the first admissible candidates found below and above bound the answer.
    let mut below = None;
    let mut j = lo_start;
    while j >= 1 {
        if is_admissible_cycles(j, n) {
            below = Some(j);
            break;
        }
        j -= 1;
    }
    let mut above = None;
    let mut j = lo_start + 1;
    while j <= j_max {
        if is_admissible_cycles(j, n) {
            above = Some(j);
            break;
        }
        j += 1;
    }
    let best = match (below, above) {
        (Some(b), Some(a)) => {
            if target - b as f64 <= a as f64 - target {
                b
            } else {
                a
            }
        }
        (Some(b), None) => b,
        (None, Some(a)) => a,
        (None, None) => return None,
    };
    Some((best as f64 * fs_hz / n as f64, best))
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{RngExt, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Oracle: scan every J, keep the admissible one nearest to the target (first = lowest on ties).
    fn brute(f_hz: f64, fs_hz: f64, n: usize) -> Option<u64> {
        let target = f_hz * n as f64 / fs_hz;
        let mut best: Option<(f64, u64)> = None;
        for j in 1..n as u64 {
            if j % 2 == 1 && 2 * j < n as u64 && gcd(j, n as u64) == 1 {
                let d = (j as f64 - target).abs();
                if best.is_none_or(|(bd, _)| d < bd) {
                    best = Some((d, j));
                }
            }
        }
        best.map(|(_, j)| j)
    }

    #[test]
    fn returns_the_nearest_odd_cycle_count_coprime_with_the_length() {
        // IEEE Std 1241 coherent sampling condition: J odd, gcd(J, n) = 1; checked against a brute-force scan.
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        for _ in 0..2000 {
            let n: usize = rng.random_range(3..3000);
            let fs = rng.random_range(1.0..1e6);
            let f = rng.random_range(-0.1..0.6) * fs;
            let (fc, j) = coherent_frequency(f, fs, n).unwrap();
            assert!(j % 2 == 1 && gcd(j, n as u64) == 1 && 2 * j < n as u64 && j >= 1);
            assert_eq!(Some(j), brute(f, fs, n), "f {f} fs {fs} n {n}");
            assert!((fc - j as f64 * fs / n as f64).abs() <= 1e-12 * fs);
        }
    }

    #[test]
    fn power_of_two_records_take_any_odd_count() {
        // With n = 2^k every odd J is coprime with n (common practice, no source).
        let (f, j) = coherent_frequency(1000.0, 48000.0, 4096).unwrap();
        // target 85.33 -> 85 (odd)
        assert_eq!(j, 85);
        assert!((f - 85.0 * 48000.0 / 4096.0).abs() < 1e-9);
        // target 86.0 exactly -> 85 and 87 tie, the lower wins
        let (_, j) = coherent_frequency(86.0 * 48000.0 / 4096.0, 48000.0, 4096).unwrap();
        assert_eq!(j, 85);
    }

    #[test]
    fn skips_counts_sharing_a_factor_with_the_length() {
        // n = 3000 = 2^3 3 5^3: J = 15 (target) shares 3 and 5; 13 and 17 are the neighbours, 13 is nearer to 14.9.
        let (_, j) = coherent_frequency(14.9, 3000.0, 3000).unwrap();
        assert_eq!(j, 13);
        assert_eq!(coherent_frequency(15.2, 3000.0, 3000).unwrap().1, 17);
    }

    #[test]
    fn degenerate_inputs_give_none() {
        assert_eq!(coherent_frequency(1.0, 10.0, 2), None);
        assert_eq!(coherent_frequency(f64::NAN, 10.0, 100), None);
        assert_eq!(coherent_frequency(1.0, 0.0, 100), None);
        assert_eq!(coherent_frequency(1.0, 10.0, 3).unwrap().1, 1);
    }
}

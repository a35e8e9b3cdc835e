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

/// Largest relative move of a test tone that [`place_tone`] accepts: 0.1 % (our bound; IEEE Std 1241 asks only for
/// a whole, odd number of cycles coprime with the record length, and leaves the record length free).
pub const PLACEMENT_TOLERANCE: f64 = 1e-3;

/// Moves of at most this much end the search early: a tenth of [`PLACEMENT_TOLERANCE`].
const PLACEMENT_GOOD: f64 = PLACEMENT_TOLERANCE / 10.0;

/// A coherent record for a test tone: the record's length, the whole cycles it holds and the tone's frequency.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Placement {
    pub record_len: usize,
    pub cycles: u64,
    pub frequency_hz: f64,
}

impl Placement {
    /// Relative move of the tone from `f_hz`.
    pub fn moved_by(&self, f_hz: f64) -> f64 {
        (self.frequency_hz - f_hz).abs() / f_hz
    }
}

/// True when `n` has no prime factor above 7 (such lengths keep every FFT of the record on fast radices).
pub fn is_smooth(mut n: usize) -> bool {
    if n == 0 {
        return false;
    }
    for p in [2, 3, 5, 7] {
        while n.is_multiple_of(p) {
            n /= p;
        }
    }
    n == 1
}

/// The admissible cycle count (odd, coprime with `n`, below n/2, at least `min_cycles`) nearest to
/// `f_hz * n / fs_hz` among the two odd integers around it, with its relative frequency error; `None` when
/// neither is admissible.
fn nearest_odd_cycles(f_hz: f64, fs_hz: f64, n: usize, min_cycles: u64) -> Option<(u64, f64)> {
    let target = f_hz * n as f64 / fs_hz;
    let below = target.floor() as u64;
    let below = if below % 2 == 1 {
        below
    } else {
        below.saturating_sub(1)
    };
    let mut best: Option<(u64, f64)> = None;
    for j in [below, below + 2] {
        if j < min_cycles || !is_admissible_cycles(j, n) {
            continue;
        }
        let err = (j as f64 * fs_hz / n as f64 - f_hz).abs() / f_hz;
        if best.is_none_or(|(_, e)| err < e) {
            best = Some((j, err));
        }
    }
    best
}

/// Choose the record length as well as the cycle count so that a tone asked for at `f_hz` moves as little as
/// possible: a length in `n_min..=n_max` (end-aligned records can start later) and an admissible J. Preference:
/// the longest 7-smooth length in the upper quarter of the range that moves the tone by at most a tenth of
/// [`PLACEMENT_TOLERANCE`], then the longest length of any factorisation in the upper half that does, then the
/// least move found if it is within [`PLACEMENT_TOLERANCE`]. At least `min_cycles` cycles (a tone must clear the
/// window's DC lobe: more cycles than the lobe's half-width in bins). `None` when no length meets the tolerance
/// (records too short for the tone's period, or the tone at or above fs/2): lengthen the record or analyse
/// non-coherently.
pub fn place_tone(
    f_hz: f64,
    fs_hz: f64,
    n_max: usize,
    n_min: usize,
    min_cycles: u64,
) -> Option<Placement> {
    if !(f_hz.is_finite() && f_hz > 0.0 && fs_hz.is_finite() && fs_hz > 0.0) || f_hz >= fs_hz / 2.0
    {
        return None;
    }
    let n_min = n_min.max(3);
    if n_max < n_min {
        return None;
    }
    let mut best: Option<(usize, u64, f64)> = None;
    let consider = |n: usize, best: &mut Option<(usize, u64, f64)>| -> bool {
        let Some((j, err)) = nearest_odd_cycles(f_hz, fs_hz, n, min_cycles) else {
            return false;
        };
        if best.is_none_or(|(_, _, e)| err < e) {
            *best = Some((n, j, err));
        }
        err <= PLACEMENT_GOOD
    };
    let quarter = n_min.max(n_max - n_max / 4);
    let half = n_min.max(n_max - n_max / 2);
    let found = (quarter..=n_max)
        .rev()
        .filter(|&n| is_smooth(n))
        .find(|&n| consider(n, &mut best))
        .or_else(|| (half..=n_max).rev().find(|&n| consider(n, &mut best)));
    let (n, j) = match found {
        Some(n) => {
            let (j, _) = nearest_odd_cycles(f_hz, fs_hz, n, min_cycles)?;
            (n, j)
        }
        None => match best {
            Some((n, j, err)) if err <= PLACEMENT_TOLERANCE => (n, j),
            _ => return None,
        },
    };
    Some(Placement {
        record_len: n,
        cycles: j,
        frequency_hz: j as f64 * fs_hz / n as f64,
    })
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

    #[test]
    fn placement_moves_a_tone_by_at_most_the_tolerance() {
        // The bound is ours (PLACEMENT_TOLERANCE); the conditions on J are IEEE Std 1241's coherent sampling.
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        for _ in 0..300 {
            let n_max: usize = rng.random_range(2000..200_000);
            let fs = rng.random_range(1e3..1e7);
            // At least 3 cycles in the record and below 0.45 fs.
            let f = rng.random_range((3.0 * fs / n_max as f64)..(0.45 * fs));
            let p = place_tone(f, fs, n_max, 16, 1).expect("a placement");
            assert!(
                p.moved_by(f) <= PLACEMENT_TOLERANCE,
                "f {f} fs {fs} n {n_max}: {p:?}"
            );
            assert!(is_admissible_cycles(p.cycles, p.record_len));
            assert!(p.record_len <= n_max && 2 * p.record_len >= n_max);
            assert!(
                (p.frequency_hz - p.cycles as f64 * fs / p.record_len as f64).abs() < 1e-9 * fs
            );
        }
    }

    #[test]
    fn placement_keeps_the_starter_tone_near_one_kilohertz() {
        // 1792 conversions at 100 kHz: J = 17 in 1792 samples would give 948.66 Hz (-5 %); with the length free
        // J = 17 in 1699 samples gives 1000.59 Hz (+0.06 %), and a shorter smooth length may do better still.
        let p = place_tone(1000.0, 100_000.0, 1792, 16, 5).unwrap();
        assert!(p.moved_by(1000.0) <= PLACEMENT_TOLERANCE, "{p:?}");
        assert!(p.record_len >= 896);
        // Integer fs/f: J fs/n = f exactly would need n = 100 J, never coprime with J > 1.
        assert_ne!(p.frequency_hz, 1000.0);
    }

    #[test]
    fn placement_refuses_short_records_and_tones_above_half_the_rate() {
        // 40 samples of a tone with 3.2 cycles: no odd J within 0.1 %.
        assert_eq!(place_tone(1000.0, 12_500.0, 40, 16, 1), None);
        assert_eq!(place_tone(6000.0, 10_000.0, 100_000, 16, 1), None);
        assert_eq!(place_tone(f64::NAN, 10_000.0, 100_000, 16, 1), None);
        assert_eq!(place_tone(100.0, 10_000.0, 10, 16, 1), None);
        // One whole cycle in 25 samples is exact, but a tone needs more cycles than the window's DC lobe.
        assert_eq!(
            place_tone(1000.0, 25_000.0, 25, 16, 1).map(|p| p.cycles),
            Some(1)
        );
        assert_eq!(place_tone(1000.0, 25_000.0, 25, 16, 5), None);
    }

    #[test]
    fn smooth_lengths() {
        assert!(
            is_smooth(1792) && is_smooth(1) && !is_smooth(1699) && !is_smooth(0) && !is_smooth(22)
        );
    }
}

//! Scientific notation with ten significant digits, exactly as `format!("{:.9e}", v)` writes it
//! ("-1.234567890e-7", "0.000000000e0"), several times faster: the waveform file writes millions of them.
//!
//! The fast path scales |v| by an exact power of ten (10^k is exact in binary for 0 <= k <= 22) with one
//! correctly rounded multiplication or division, so the scaled value, between 10^9 and 10^10, is within
//! 10^10 x 2^-53 (about 1.1e-6) of the exact product. Its integer part is then the exact first ten digits unless
//! the exact value lies that close to a rounding boundary (a fractional part near one half) or to a power of ten;
//! those values, and every value whose power of ten is not exact (|v| beyond about 1e-13..1e31), NaN and the
//! infinities, go through the standard library's exact formatting. The result is always the standard library's
//! (a test compares them on millions of values).

/// Exact powers of ten (10^0 ..= 10^22 are exact in binary64).
const POW10: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
    1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
];

/// How close (in units of the last digit) the scaled value may come to a rounding boundary before the exact
/// path decides: far above the fast path's error (about 1.1e-6), far below one.
const GUARD: f64 = 1e-4;

/// Append `v` to `out` as `{:.9e}` does.
pub fn push_e9(out: &mut Vec<u8>, v: f64) {
    match fast(v) {
        Some((neg, digits, exp)) => {
            if neg {
                out.push(b'-');
            }
            // d.ddddddddd: the first five digits and the last five as two u32 halves, written two digits at
            // a time.
            let mut buf = [0u8; 11];
            let hi = (digits / 100_000) as u32;
            let lo = (digits % 100_000) as u32;
            buf[0] = b'0' + (hi / 10_000) as u8;
            buf[1] = b'.';
            put4(&mut buf[2..6], hi % 10_000);
            buf[6] = b'0' + (lo / 10_000) as u8;
            put4(&mut buf[7..11], lo % 10_000);
            out.extend_from_slice(&buf);
            out.push(b'e');
            if exp < 0 {
                out.push(b'-');
            }
            push_u32(out, exp.unsigned_abs());
        }
        None => {
            let _ = std::io::Write::write_fmt(out, format_args!("{v:.9e}"));
        }
    }
}

/// "00", "01", ..., "99".
const PAIRS: [u8; 200] = {
    let mut t = [0u8; 200];
    let mut i = 0;
    while i < 100 {
        t[2 * i] = b'0' + (i / 10) as u8;
        t[2 * i + 1] = b'0' + (i % 10) as u8;
        i += 1;
    }
    t
};

/// The four decimal digits of `n` < 10^4, leading zeros kept.
fn put4(out: &mut [u8], n: u32) {
    let (a, b) = ((n / 100) as usize, (n % 100) as usize);
    out[..2].copy_from_slice(&PAIRS[2 * a..2 * a + 2]);
    out[2..4].copy_from_slice(&PAIRS[2 * b..2 * b + 2]);
}

/// Append `n` in decimal, as `{}` writes it.
pub fn push_u32(out: &mut Vec<u8>, n: u32) {
    let mut buf = [0u8; 10];
    let mut i = buf.len();
    let mut m = n;
    loop {
        i -= 1;
        buf[i] = b'0' + (m % 10) as u8;
        m /= 10;
        if m == 0 {
            break;
        }
    }
    out.extend_from_slice(&buf[i..]);
}

/// (negative, the ten digits as an integer in 10^9..10^10, the decimal exponent), or None for the exact path.
fn fast(v: f64) -> Option<(bool, u64, i32)> {
    if !v.is_finite() {
        return None;
    }
    let neg = v.is_sign_negative();
    let a = v.abs();
    if a == 0.0 {
        return Some((neg, 0, 0));
    }
    let biased = ((a.to_bits() >> 52) & 0x7ff) as i32;
    if biased == 0 {
        return None; // subnormal: far outside the fast path's range
    }
    // a lies in [2^e2, 2^(e2 + 1)), so its decimal exponent is floor(e2 log10 2) or one more; checked below.
    let e2 = biased - 1023;
    // floor(e2 log10 2) in integers (78913 / 2^18 = 0.30102920..., exact over the exponents of finite f64;
    // the loop below corrects it anyway when the scaled value falls outside [1e9, 1e10)).
    let mut e = (e2 * 78913) >> 18;
    for _ in 0..3 {
        let k = 9 - e;
        let scaled = if (0..=22).contains(&k) {
            a * POW10[k as usize]
        } else if (-22..0).contains(&k) {
            a / POW10[(-k) as usize]
        } else {
            return None;
        };
        if scaled < 1e9 {
            e -= 1;
            continue;
        }
        if scaled >= 1e10 {
            e += 1;
            continue;
        }
        // Too close to a power of ten to be sure which side it is on.
        if !(1e9 + GUARD..=1e10 - GUARD).contains(&scaled) {
            return None;
        }
        // scaled lies in [1e9, 1e10): truncation is the floor, and exact through u64.
        let floor = (scaled as u64) as f64;
        let frac = scaled - floor;
        if (frac - 0.5).abs() < GUARD {
            return None;
        }
        let mut digits = floor as u64 + u64::from(frac > 0.5);
        let mut exp = e;
        if digits == 10_000_000_000 {
            digits = 1_000_000_000;
            exp += 1;
        }
        return Some((neg, digits, exp));
    }
    None
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{RngExt, SeedableRng};

    fn check(v: f64) {
        let mut s = Vec::new();
        push_e9(&mut s, v);
        assert_eq!(
            String::from_utf8(s).unwrap(),
            format!("{v:.9e}"),
            "bits {:#x}",
            v.to_bits()
        );
    }

    #[test]
    fn whole_numbers_as_the_standard_library_writes_them() {
        for n in [0u32, 1, 9, 10, 99, 100, 65535, 1 << 24, u32::MAX] {
            let mut s = Vec::new();
            push_u32(&mut s, n);
            assert_eq!(String::from_utf8(s).unwrap(), n.to_string());
        }
    }

    #[test]
    fn the_same_text_as_the_standard_library_on_millions_of_values() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        // Any bit pattern (every exponent, NaN and infinities included).
        for _ in 0..1_000_000 {
            check(f64::from_bits(rng.random::<u64>()));
        }
        // Values a waveform holds: volts and seconds across the fast path's whole range.
        for _ in 0..3_000_000 {
            let e: f64 = rng.random_range(-16.0..32.0);
            let m: f64 = rng.random_range(-1.0..1.0);
            check(m * 10f64.powf(e));
        }
        // Grid times, as the waveform file writes them.
        for n in 0..200_000u64 {
            check(n as f64 / 10e6);
            check(n as f64 / 48e3);
        }
    }

    #[test]
    fn boundaries_ties_and_specials_match() {
        for v in [
            0.0,
            -0.0,
            1.0,
            -1.0,
            9.9999999995,
            9.99999999949,
            9.99999999951,
            1.00000000005,
            0.5,
            1e-7,
            2.5e-12,
            123456789.05,
            f64::MIN_POSITIVE,
            f64::MAX,
            f64::EPSILON,
            f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
        ] {
            check(v);
        }
        // Every power of ten and its neighbours.
        for k in -20..25 {
            let p = 10f64.powi(k);
            for v in [p, p.next_up(), p.next_down(), -p] {
                check(v);
            }
        }
        // Exact decimal ties at the tenth digit (x.xxxxxxxxx5 exactly representable).
        for i in 0..2000u64 {
            let v = (2 * i + 1) as f64 / 2.0 * 1e-9 + 1.0;
            check(v);
            check((1u64 << 40) as f64 + i as f64 + 0.5);
        }
    }
}

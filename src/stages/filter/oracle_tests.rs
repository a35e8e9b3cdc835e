//! The block and sample paths against the same recursion run in double-double arithmetic.
use super::block::Dd;
use super::*;
#[test]
fn block_path_error_against_a_double_double_oracle() {
    let cases = [
        (
            FilterFamily::Chebyshev { ripple_db: 6.0 },
            FilterResponse::Lowpass,
            5,
            2000.0,
        ),
        (FilterFamily::Bessel, FilterResponse::Highpass, 8, 2000.0),
        (
            FilterFamily::Butterworth,
            FilterResponse::Lowpass,
            2,
            2000.0,
        ),
        (FilterFamily::Butterworth, FilterResponse::Lowpass, 4, 500.0),
        (
            FilterFamily::Butterworth,
            FilterResponse::Lowpass,
            8,
            2000.0,
        ),
    ];
    use rand::{RngExt, SeedableRng};
    let mut r = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    let input: Vec<f64> = (0..200_000).map(|_| r.random_range(-1.0..1.0)).collect();
    for (fam, resp, n, div) in cases {
        let cfg = FilterCfg {
            response: resp,
            family: fam,
            order: n,
            cutoff_hz: 1e6 / div,
        };
        let f = Filter::new(&cfg, Timebase::new(1e6));
        let mut a = f.clone();
        let ticked: Vec<f64> = input.iter().map(|x| a.tick(*x)).collect();
        let mut b = f.clone();
        let mut blocked = vec![0.0; input.len()];
        for (i, o) in input.chunks(4096).zip(blocked.chunks_mut(4096)) {
            b.process(i, o);
        }
        // double-double reference of the sections, then FIR in dd
        let ns = 1 + 2 * f.sections.len();
        let mut x = vec![Dd::default(); ns + 1];
        let mut hist: Vec<Dd> = vec![Dd::default(); MAX_FIR_TAPS];
        let mut exact = vec![0.0; input.len()];
        for (i, u) in input.iter().enumerate() {
            let y = BlockForm::step(&f.sections, &mut x, Dd::from(*u));
            let y = match &f.fir {
                None => y,
                Some(fir) => {
                    hist.rotate_right(1);
                    hist[0] = y;
                    let mut acc = Dd::default();
                    for (h, t) in hist.iter().zip(&fir.taps[..fir.len]) {
                        acc = acc.add(h.mul(*t));
                    }
                    acc
                }
            };
            exact[i] = y.hi;
        }
        let peak = exact.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let e = |v: &[f64]| {
            v.iter()
                .zip(&exact)
                .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()))
                / peak
        };
        let (et, eb) = (e(&ticked), e(&blocked));
        eprintln!("{fam:?} {resp:?} n={n} /{div}: sample path {et:e}, block path {eb:e}");
        // Measured: lowpass block path 1e-15 to 7e-15 (sample path 1e-13 to 3e-12); the order-8 Bessel
        // highpass 2.8e-11 (sample path 5.7e-12).
        let tol = match resp {
            FilterResponse::Lowpass => 1e-13,
            FilterResponse::Highpass => 1e-10,
        };
        assert!(eb < tol, "{fam:?} {resp:?} n={n} /{div}: {eb:e}");
    }
}

//! Realisation of the analog prototype on the grid: exact pole mapping z = exp(p dt), moment-matched zeros,
//! the sections' recursion and their discrete response (see the documentation of the `filter` module).

use std::f64::consts::PI;
use std::sync::OnceLock;

use num_complex::Complex64;

use super::kind::FilterResponse;

/// Fewest and most taps of the FIR numerator that goes with the first-order lowpass section.
const LOWPASS_FIRST_ORDER_TAPS: (usize, usize) = (4, 10);
/// The first-order lowpass section takes the fewest taps whose group delay is within this fraction of the
/// analog section's, everywhere up to rate/20 ...
const FIRST_ORDER_DELAY_GOAL: f64 = 0.003;
/// ... and whose magnitude is within this many dB.
const FIRST_ORDER_MAGNITUDE_GOAL_DB: f64 = 0.005;
/// Taps of the FIR correction section of a highpass.
const HIGHPASS_CORRECTION_TAPS: usize = 3;
/// Largest gain at rate/2 (relative to the passband gain) allowed for the highpass correction section.
const HIGHPASS_MAX_BOOST: f64 = 2.5;
/// Capacity of the FIR section.
pub(super) const MAX_FIR_TAPS: usize = 10;
const _: () =
    assert!(LOWPASS_FIRST_ORDER_TAPS.1 <= MAX_FIR_TAPS && HIGHPASS_CORRECTION_TAPS <= MAX_FIR_TAPS);
/// Points of the Gauss-Legendre rule used for the moment integrals.
const QUADRATURE_POINTS: usize = 32;

/// A second-order (or, with `b2 = a2 = 0`, first-order) section
/// H(z) = (b0 + b1 z^-1 + b2 z^-2) / (1 + a1 z^-1 + a2 z^-2), computed as
/// `y[n] = (b0 x[n] + g[n-1]) - a1 y[n-1]` with `g[n] = (b1 x[n] + b2 x[n-1]) - a2 y[n-1]`: the recursion
/// through y is one multiply and one subtraction per sample (the feed-forward part is off that path).
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct Section {
    pub(super) b: [f64; 3],
    /// Number m of exact zeros at z = 1 in `b` (b = (1 - z^-1)^m): used only to evaluate the response
    /// precisely near DC, never in the hot path.
    dc_zeros: u8,
    pub(super) a1: f64,
    pub(super) a2: f64,
    /// State: g[n-1] (see above), b2 x[n-1], y[n-1].
    pub(super) g: f64,
    pub(super) h: f64,
    pub(super) y1: f64,
}

impl Section {
    fn new(b: [f64; 3], a1: f64, a2: f64) -> Self {
        let dc_zeros = if b == [1.0, -2.0, 1.0] {
            2
        } else if b == [1.0, -1.0, 0.0] {
            1
        } else {
            0
        };
        Section {
            b,
            dc_zeros,
            a1,
            a2,
            g: 0.0,
            h: 0.0,
            y1: 0.0,
        }
    }

    #[inline(always)]
    pub(super) fn tick(&mut self, x: f64) -> f64 {
        let y = (self.b[0] * x + self.g) - self.a1 * self.y1;
        self.g = (self.b[1] * x + self.h) - self.a2 * self.y1;
        self.h = self.b[2] * x;
        self.y1 = y;
        y
    }

    pub(super) fn denominator(&self) -> [f64; 3] {
        [1.0, self.a1, self.a2]
    }

    /// Numerator at `zinv`; (1 - z^-1)^m is evaluated as (2 sin^2(w/2) + j sin w)^m to keep its relative
    /// accuracy near DC.
    pub(super) fn numerator_at(&self, zinv: Complex64) -> Complex64 {
        match self.dc_zeros {
            0 => poly_at(&self.b, zinv),
            m => {
                let w = -zinv.arg();
                let d = Complex64::new(2.0 * (w / 2.0).sin().powi(2), w.sin());
                d.powu(m as u32)
            }
        }
    }

    /// Group delay of the numerator in samples ((1 - z^-1)^m has exactly m/2).
    pub(super) fn numerator_delay(&self, zinv: Complex64) -> f64 {
        match self.dc_zeros {
            0 => poly_delay(&self.b, zinv),
            m => m as f64 / 2.0,
        }
    }
}

/// A short FIR section in transposed form: y[n] = sum_k taps[k] x[n - k].
#[derive(Debug, Clone, Copy, PartialEq)]
pub(super) struct Fir {
    pub(super) taps: [f64; MAX_FIR_TAPS],
    pub(super) len: usize,
    /// w[k] holds sum_{i > k} taps[i] x[n - i + k + 1]; w[len - 1] stays 0.
    pub(super) w: [f64; MAX_FIR_TAPS],
}

impl Fir {
    fn new(taps: &[f64]) -> Self {
        assert!(!taps.is_empty() && taps.len() <= MAX_FIR_TAPS);
        let mut t = [0.0; MAX_FIR_TAPS];
        t[..taps.len()].copy_from_slice(taps);
        Fir {
            taps: t,
            len: taps.len(),
            w: [0.0; MAX_FIR_TAPS],
        }
    }

    #[inline(always)]
    pub(super) fn tick(&mut self, x: f64) -> f64 {
        let y = self.taps[0] * x + self.w[0];
        for k in 0..self.len - 1 {
            self.w[k] = self.taps[k + 1] * x + self.w[k + 1];
        }
        y
    }
}

/// P(zinv) for P = sum p_k zinv^k.
pub(super) fn poly_at(p: &[f64], zinv: Complex64) -> Complex64 {
    p.iter()
        .rev()
        .fold(Complex64::new(0.0, 0.0), |acc, c| acc * zinv + c)
}

/// Group delay in samples of the polynomial P(z^-1): Re(sum k p_k z^-k / P(z^-1)).
pub(super) fn poly_delay(p: &[f64], zinv: Complex64) -> f64 {
    let mut num = Complex64::new(0.0, 0.0);
    let mut den = Complex64::new(0.0, 0.0);
    let mut zk = Complex64::new(1.0, 0.0);
    for (k, c) in p.iter().enumerate() {
        num += zk * (k as f64 * c);
        den += zk * c;
        zk *= zinv;
    }
    (num / den).re
}

// ---------------------------------------------------------------------------------------------------------
// Realisation: exact pole mapping and moment-matched zeros.
// ---------------------------------------------------------------------------------------------------------

/// A group of analog poles realised by one section.
enum PoleGroup {
    Pair(Complex64, Complex64),
    Single(Complex64),
}

/// Group poles (conjugate pairs adjacent, then reals) into second-order groups and at most one first-order group.
fn group_poles(poles: &[Complex64]) -> Vec<PoleGroup> {
    let mut groups = Vec::new();
    let mut reals = Vec::new();
    let mut i = 0;
    while i < poles.len() {
        if poles[i].im != 0.0 {
            groups.push(PoleGroup::Pair(poles[i], poles[i + 1]));
            i += 2;
        } else {
            reals.push(poles[i]);
            i += 1;
        }
    }
    let mut chunks = reals.chunks_exact(2);
    for pair in &mut chunks {
        groups.push(PoleGroup::Pair(pair[0], pair[1]));
    }
    if let [p] = chunks.remainder() {
        groups.push(PoleGroup::Single(*p));
    }
    groups
}

/// Gauss-Legendre nodes and weights on [0, 1].
fn quadrature() -> &'static [(f64, f64)] {
    static RULE: OnceLock<Vec<(f64, f64)>> = OnceLock::new();
    RULE.get_or_init(|| {
        let n = QUADRATURE_POINTS;
        let mut rule = Vec::with_capacity(n);
        for i in 0..n {
            // Newton on the Legendre polynomial P_n from the usual initial guess.
            let mut x = (PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
            let mut dp = 1.0;
            for _ in 0..100 {
                let (mut p0, mut p1) = (1.0, x);
                for k in 2..=n {
                    let p2 = ((2 * k - 1) as f64 * x * p1 - (k - 1) as f64 * p0) / k as f64;
                    p0 = p1;
                    p1 = p2;
                }
                dp = n as f64 * (x * p1 - p0) / (x * x - 1.0);
                let dx = p1 / dp;
                x -= dx;
                if dx.abs() < 1e-16 {
                    break;
                }
            }
            let w = 2.0 / ((1.0 - x * x) * dp * dp);
            rule.push(((1.0 + x) / 2.0, w / 2.0));
        }
        rule
    })
}

/// Taylor coefficients in x of phi(y - x), phi(u) = (e^u - 1)/u = int_0^1 e^(u t) dt, up to x^(len-1):
/// c_j = (-1)^j / j! * int_0^1 t^j e^(y t) dt.
fn phi_series(y: Complex64, len: usize) -> Vec<Complex64> {
    let mut c = vec![Complex64::new(0.0, 0.0); len];
    for &(t, w) in quadrature() {
        let e = (y * t).exp() * w;
        let mut tj = 1.0;
        for cj in c.iter_mut() {
            *cj += e * tj;
            tj *= t;
        }
    }
    let mut fact = 1.0;
    for (j, cj) in c.iter_mut().enumerate() {
        if j > 0 {
            fact *= j as f64;
        }
        let sign = if j % 2 == 0 { 1.0 } else { -1.0 };
        *cj *= sign / fact;
    }
    c
}

/// Product of two truncated power series.
fn series_mul(a: &[Complex64], b: &[Complex64]) -> Vec<Complex64> {
    let len = a.len().min(b.len());
    (0..len)
        .map(|j| (0..=j).map(|i| a[i] * b[j - i]).sum())
        .collect()
}

/// Reciprocal of a truncated power series (a[0] != 0).
fn series_recip(a: &[Complex64]) -> Vec<Complex64> {
    let mut r = vec![Complex64::new(0.0, 0.0); a.len()];
    r[0] = 1.0 / a[0];
    for j in 1..a.len() {
        let acc: Complex64 = (1..=j).map(|i| a[i] * r[j - i]).sum();
        r[j] = -acc / a[0];
    }
    r
}

/// Taps b_0..b_{K-1} (K = c.len()) with sum_l b_l e^(-l x) = sum_j c_j x^j + O(x^K): solves
/// sum_l b_l (-l)^j / j! = c_j by Gaussian elimination with partial pivoting.
fn moment_match(c: &[f64]) -> Vec<f64> {
    let k = c.len();
    let mut m = vec![vec![0.0; k + 1]; k];
    let mut fact = 1.0;
    for (j, row) in m.iter_mut().enumerate() {
        if j > 0 {
            fact *= j as f64;
        }
        for (l, v) in row.iter_mut().take(k).enumerate() {
            *v = (-(l as f64)).powi(j as i32) / fact;
        }
        row[k] = c[j];
    }
    for col in 0..k {
        let piv = (col..k)
            .max_by(|&a, &b| m[a][col].abs().total_cmp(&m[b][col].abs()))
            .expect("non-empty");
        m.swap(col, piv);
        let (upper, lower) = m.split_at_mut(col + 1);
        let pivot_row = &upper[col];
        for row in lower.iter_mut() {
            let f = row[col] / pivot_row[col];
            for (v, p) in row[col..].iter_mut().zip(&pivot_row[col..]) {
                *v -= f * p;
            }
        }
    }
    let mut b = vec![0.0; k];
    for r in (0..k).rev() {
        let s: f64 = (r + 1..k).map(|cc| m[r][cc] * b[cc]).sum();
        b[r] = (m[r][k] - s) / m[r][r];
    }
    b
}

/// Real parts of a series whose imaginary parts cancel (products over conjugate pairs).
fn real_parts(c: &[Complex64]) -> Vec<f64> {
    c.iter().map(|z| z.re).collect()
}

/// FIR numerator for the first-order lowpass section 1 / (1 - e^(y) z^-1), y = p dt < 0: moment-matched to
/// G(s) = -y phi(y - s dt). More taps keep the phase right further above the pole but raise the gain near
/// rate/2 (up to about 4x the analog gain for 7 taps), so take the fewest taps that meet the goals.
fn first_order_lowpass_taps(y: f64) -> Vec<f64> {
    let (fewest, most) = LOWPASS_FIRST_ORDER_TAPS;
    let r = y.exp();
    let a = -y;
    let mut taps = Vec::new();
    for k in fewest..=most {
        let c = phi_series(Complex64::new(y, 0.0), k);
        taps = moment_match(&real_parts(&c))
            .iter()
            .map(|t| t * a)
            .collect::<Vec<f64>>();
        // Check this section alone against a / (s + a) on a log grid of w dt up to pi / 10.
        let points = 80;
        let (lo, hi) = ((a * 1e-3).min(1e-3), PI / 10.0);
        let mut ok = true;
        for i in 0..=points {
            let w = lo * (hi / lo).powf(i as f64 / points as f64);
            let zinv = Complex64::from_polar(1.0, -w);
            let den = [1.0, -r];
            let hd = poly_at(&taps, zinv) / poly_at(&den, zinv);
            let ha = a / Complex64::new(a, w);
            let gd_d = poly_delay(&taps, zinv) - poly_delay(&den, zinv);
            let gd_a = a / (a * a + w * w);
            let mag_db = 20.0 * (hd.norm() / ha.norm()).log10();
            if (gd_d / gd_a - 1.0).abs() > FIRST_ORDER_DELAY_GOAL
                || mag_db.abs() > FIRST_ORDER_MAGNITUDE_GOAL_DB
            {
                ok = false;
                break;
            }
        }
        if ok {
            break;
        }
    }
    taps
}

/// Build the sections and the optional FIR section for the analog poles `poles` (rad/s).
pub(super) fn realise(
    poles: &[Complex64],
    response: FilterResponse,
    ref_gain: f64,
    dt_s: f64,
) -> (Vec<Section>, Option<Fir>) {
    let groups = group_poles(poles);
    let mut sections = Vec::with_capacity(groups.len());
    let mut fir_taps: Option<Vec<f64>> = None;
    for g in &groups {
        match (g, response) {
            (PoleGroup::Pair(p1, p2), _) => {
                let (r1, r2) = ((p1 * dt_s).exp(), (p2 * dt_s).exp());
                let a1 = -(r1 + r2).re;
                let a2 = (r1 * r2).re;
                let b = match response {
                    FilterResponse::Lowpass => {
                        // G(s) = p1 p2 dt^2 phi((p1 - s) dt) phi((p2 - s) dt), unit DC gain.
                        let k = (p1 * p2).re * dt_s * dt_s;
                        let c = series_mul(&phi_series(p1 * dt_s, 3), &phi_series(p2 * dt_s, 3));
                        let taps = moment_match(&real_parts(&c));
                        let mut b = [k * taps[0], k * taps[1], k * taps[2]];
                        // Unit DC gain for the coefficients as stored: 1 + a1 + a2 is exact in f64 here
                        // (Sterbenz), so this removes the DC error of rounding poles close to z = 1.
                        let dc = (1.0 + a1 + a2) / (b[0] + b[1] + b[2]);
                        b.iter_mut().for_each(|x| *x *= dc);
                        b
                    }
                    FilterResponse::Highpass => [1.0, -2.0, 1.0],
                };
                sections.push(Section::new(b, a1, a2));
            }
            (PoleGroup::Single(p), FilterResponse::Lowpass) => {
                let r = (p * dt_s).exp().re;
                sections.push(Section::new([1.0, 0.0, 0.0], -r, 0.0));
                fir_taps = Some(first_order_lowpass_taps(p.re * dt_s));
            }
            (PoleGroup::Single(p), FilterResponse::Highpass) => {
                let r = (p * dt_s).exp().re;
                sections.push(Section::new([1.0, -1.0, 0.0], -r, 0.0));
            }
        }
    }
    match response {
        FilterResponse::Lowpass => match fir_taps.as_mut() {
            Some(taps) => taps.iter_mut().for_each(|t| *t *= ref_gain),
            None => {
                let first = sections.first_mut().expect("order >= 1");
                first.b.iter_mut().for_each(|b| *b *= ref_gain);
            }
        },
        FilterResponse::Highpass => {
            // With numerators (1 - z^-1)^m the remaining target is
            // F(s) = g prod phi((p_i - s) dt) / phi(-s dt)^n, close to 1 (a small advance).
            // The correction is a small advance; a causal advance raises the gain towards rate/2 (by about
            // 1 + 4 x advance in samples for 3 taps). Use fewer taps when that boost would exceed
            // HIGHPASS_MAX_BOOST (only for cutoffs above rate/20, where accuracy is not promised).
            let full = HIGHPASS_CORRECTION_TAPS;
            let inv0 = series_recip(&phi_series(Complex64::new(0.0, 0.0), full));
            let mut f = vec![Complex64::new(0.0, 0.0); full];
            f[0] = Complex64::new(ref_gain, 0.0);
            for p in poles {
                f = series_mul(&f, &series_mul(&phi_series(p * dt_s, full), &inv0));
            }
            let target = real_parts(&f);
            for len in (1..=full).rev() {
                let taps = moment_match(&target[..len]);
                let nyquist: f64 = taps
                    .iter()
                    .enumerate()
                    .map(|(i, t)| if i % 2 == 0 { *t } else { -*t })
                    .sum();
                if len == 1 || nyquist.abs() <= HIGHPASS_MAX_BOOST * target[0].abs() {
                    fir_taps = Some(taps);
                    break;
                }
            }
        }
    }
    (sections, fir_taps.map(|t| Fir::new(&t)))
}

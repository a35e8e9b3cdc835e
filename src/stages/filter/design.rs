//! Analog lowpass prototypes at cutoff 1 rad/s (see the documentation of the `filter` module).

use std::f64::consts::PI;

use num_complex::Complex64;

use super::kind::FilterFamily;

/// Lowpass prototype poles at cutoff 1 rad/s (conjugate pairs adjacent, upper one first, then real poles) and
/// the passband reference gain g (H(s) = g prod(-p_i) / prod(s - p_i)).
pub(super) fn lowpass_prototype(family: FilterFamily, n: usize) -> (Vec<Complex64>, f64) {
    let mut poles = Vec::with_capacity(n);
    let push_pair = |poles: &mut Vec<Complex64>, p: Complex64| {
        poles.push(p);
        poles.push(p.conj());
    };
    match family {
        FilterFamily::Butterworth => {
            for k in 0..n / 2 {
                let theta = PI / 2.0 + PI * (2 * k + 1) as f64 / (2 * n) as f64;
                push_pair(&mut poles, Complex64::from_polar(1.0, theta));
            }
            if n % 2 == 1 {
                poles.push(Complex64::new(-1.0, 0.0));
            }
            (poles, 1.0)
        }
        FilterFamily::Chebyshev { ripple_db } => {
            let eps = (10f64.powf(ripple_db / 10.0) - 1.0).sqrt();
            let mu = (1.0 / eps).asinh() / n as f64;
            for k in 1..=n / 2 {
                let theta = (2 * k - 1) as f64 * PI / (2 * n) as f64;
                push_pair(
                    &mut poles,
                    Complex64::new(-mu.sinh() * theta.sin(), mu.cosh() * theta.cos()),
                );
            }
            if n % 2 == 1 {
                poles.push(Complex64::new(-mu.sinh(), 0.0));
            }
            let g = if n.is_multiple_of(2) {
                1.0 / (1.0 + eps * eps).sqrt()
            } else {
                1.0
            };
            (poles, g)
        }
        FilterFamily::Rc => {
            let alpha = 1.0 / (2f64.powf(1.0 / n as f64) - 1.0).sqrt();
            poles.extend(std::iter::repeat_n(Complex64::new(-alpha, 0.0), n));
            (poles, 1.0)
        }
        FilterFamily::Bessel => (bessel_poles(n), 1.0),
    }
}

/// Poles of the Bessel lowpass of order `n`, scaled so that |H(j 1)|^2 = 1/2.
fn bessel_poles(n: usize) -> Vec<Complex64> {
    // Reverse Bessel polynomial theta_n(s) = sum_k (2n-k)! / (2^(n-k) k! (n-k)!) s^k (ascending coefficients).
    let fact = |m: usize| (1..=m).fold(1.0f64, |acc, i| acc * i as f64);
    let coeffs: Vec<f64> = (0..=n)
        .map(|k| fact(2 * n - k) / (2f64.powi((n - k) as i32) * fact(k) * fact(n - k)))
        .collect();
    let roots = poly_roots(&coeffs);
    // |H(j w)|^2 = prod |p|^2 / prod |j w - p|^2 falls monotonically; find where it is 1/2.
    let log_excess = |w: f64| -> f64 {
        let s = Complex64::new(0.0, w);
        roots
            .iter()
            .map(|p| ((s - p).norm_sqr() / p.norm_sqr()).ln())
            .sum::<f64>()
            - 2f64.ln()
    };
    let (mut lo, mut hi) = (1e-3f64, 1e3f64);
    for _ in 0..200 {
        let mid = (lo * hi).sqrt();
        if log_excess(mid) < 0.0 {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let w3 = (lo * hi).sqrt();
    // Order: upper-half-plane poles with their conjugates, then the real pole.
    let mut upper: Vec<Complex64> = roots
        .iter()
        .filter(|p| p.im > 1e-9 * p.norm())
        .map(|p| p / w3)
        .collect();
    upper.sort_by(|a, b| a.im.total_cmp(&b.im));
    let mut poles = Vec::with_capacity(n);
    for p in upper {
        poles.push(p);
        poles.push(p.conj());
    }
    for p in roots.iter().filter(|p| p.im.abs() <= 1e-9 * p.norm()) {
        poles.push(Complex64::new(p.re / w3, 0.0));
    }
    assert_eq!(poles.len(), n, "Bessel roots not in conjugate pairs");
    poles
}

/// Roots of the real polynomial sum c_k x^k (ascending, c_n != 0) by the Aberth-Ehrlich iteration, polished by
/// Newton steps.
fn poly_roots(c: &[f64]) -> Vec<Complex64> {
    let n = c.len() - 1;
    let lead = c[n];
    let monic: Vec<f64> = c.iter().map(|x| x / lead).collect();
    let eval = |z: Complex64| -> (Complex64, Complex64) {
        let mut p = Complex64::new(0.0, 0.0);
        let mut dp = Complex64::new(0.0, 0.0);
        for &a in monic.iter().rev() {
            dp = dp * z + p;
            p = p * z + a;
        }
        (p, dp)
    };
    let radius = monic[0].abs().powf(1.0 / n as f64).max(1e-3);
    let mut z: Vec<Complex64> = (0..n)
        .map(|k| Complex64::from_polar(radius, 2.0 * PI * k as f64 / n as f64 + 0.4))
        .collect();
    for _ in 0..500 {
        let mut biggest = 0.0f64;
        for k in 0..n {
            let (p, dp) = eval(z[k]);
            if p == Complex64::new(0.0, 0.0) {
                continue;
            }
            let ratio = p / dp;
            let repulsion: Complex64 = (0..n)
                .filter(|&j| j != k)
                .map(|j| 1.0 / (z[k] - z[j]))
                .sum();
            let step = ratio / (1.0 - ratio * repulsion);
            z[k] -= step;
            biggest = biggest.max(step.norm() / z[k].norm().max(1e-300));
        }
        if biggest < 1e-15 {
            break;
        }
    }
    for zk in z.iter_mut() {
        for _ in 0..3 {
            let (p, dp) = eval(*zk);
            if dp.norm() > 0.0 {
                *zk -= p / dp;
            }
        }
    }
    z
}

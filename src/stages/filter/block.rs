//! The block path: the cascade of sections as one state-space system over blocks of `BLOCK_LEN` samples
//! (see the documentation of the `filter` module).

use super::MAX_ORDER;
use super::realise::Section;

/// Samples per block of the block path (`process`).
pub(super) const BLOCK_LEN: usize = 8;
/// Most states of the block form: h of the first section, then g and y1 of each of at most 4 sections, and
/// one unused state that pads the count to an even number (whole vector registers).
pub(super) const MAX_STATES: usize = 2 + 2 * (MAX_ORDER as usize).div_ceil(2);

/// The cascade of sections as one linear state-space system, advanced `BLOCK_LEN` samples at a time.
///
/// State z: h of the first section (b2 times the previous input), then for each section its last output
/// y1 ("level") and s - y1 ("slope"), where s = g - a1 y1 is the section's next output for a zero input; the
/// h of every later section is not a state (it is b2 times the previous section's y1). The level/slope basis
/// keeps the block matrices well conditioned with poles close to z = 1: a section's part of P = A^L is then
/// close to [[1, L], [0, 1]] and the rounding of its entries moves the poles by about one ulp, whereas in the
/// sections' own (g, y1) basis the entries grow like L and the poles of the block form would move about 20x
/// more (measured: 1.3e-10 relative output error for a 6 dB Chebyshev at rate/2000 instead of 3e-12).
/// Over a block of L = `BLOCK_LEN` inputs u (state z at the block start): y = M z + T u and z <- P z + Q u,
/// with M (L x n) rows C A^j, T (L x L) the lower-triangular Toeplitz matrix of the impulse response, P = A^L
/// and Q (n x L) columns A^(L-1-k) B. The matrices are built by running the sections' recursion on unit states
/// and unit inputs in double-double arithmetic and rounding once. They are stored by columns (one column per
/// state or input sample) for the column-form kernel.
#[derive(Debug, Clone, PartialEq)]
pub(super) struct BlockForm {
    /// Number of states n (3, 5, 7 or 9), padded to an even number by a state that stays 0.
    states: usize,
    /// m[k][j]: output j of the block for unit state k.
    m: [[f64; BLOCK_LEN]; MAX_STATES],
    /// t[k][j]: output j of the block for a unit input at sample k (0 for j < k).
    t: [[f64; BLOCK_LEN]; BLOCK_LEN],
    /// p[k][i]: state i at the block end for unit state k.
    p: [[f64; MAX_STATES]; MAX_STATES],
    /// q[k][i]: state i at the block end for a unit input at sample k.
    q: [[f64; MAX_STATES]; BLOCK_LEN],
}

/// A double-double number hi + lo (|lo| <= ulp(hi) / 2), for building the block matrices.
#[derive(Debug, Clone, Copy, Default)]
pub(super) struct Dd {
    pub(super) hi: f64,
    lo: f64,
}

impl Dd {
    pub(super) fn from(x: f64) -> Dd {
        Dd { hi: x, lo: 0.0 }
    }

    /// Error-free sum, then renormalised (Knuth's two-sum).
    pub(super) fn add(self, o: Dd) -> Dd {
        let s = self.hi + o.hi;
        let bb = s - self.hi;
        let e = (self.hi - (s - bb)) + (o.hi - bb);
        let e = e + self.lo + o.lo;
        let hi = s + e;
        Dd {
            hi,
            lo: e - (hi - s),
        }
    }

    fn neg(self) -> Dd {
        Dd {
            hi: -self.hi,
            lo: -self.lo,
        }
    }

    /// Product with an f64 (the error of hi * c by a fused multiply-add).
    pub(super) fn mul(self, c: f64) -> Dd {
        let p = self.hi * c;
        let e = self.hi.mul_add(c, -p) + self.lo * c;
        let hi = p + e;
        Dd {
            hi,
            lo: e - (hi - p),
        }
    }
}

impl BlockForm {
    /// One sample of the cascade in double-double, state x = (h of the first section, then g and y1 of each
    /// section).
    pub(super) fn step(sections: &[Section], x: &mut [Dd], u: Dd) -> Dd {
        let old = x.to_vec();
        let mut v = u;
        for (k, s) in sections.iter().enumerate() {
            let h = if k == 0 {
                old[0]
            } else {
                old[2 * k].mul(s.b[2])
            };
            let (g, y1) = (old[1 + 2 * k], old[2 + 2 * k]);
            let y = v.mul(s.b[0]).add(g).add(y1.mul(s.a1).neg());
            x[1 + 2 * k] = v.mul(s.b[1]).add(h).add(y1.mul(s.a2).neg());
            x[2 + 2 * k] = y;
            v = y;
        }
        x[0] = u.mul(sections[0].b[2]);
        v
    }

    pub(super) fn new(sections: &[Section]) -> BlockForm {
        let n = 2 + 2 * sections.len();
        assert!(n <= MAX_STATES);
        let mut bf = BlockForm {
            states: n,
            m: [[0.0; BLOCK_LEN]; MAX_STATES],
            t: [[0.0; BLOCK_LEN]; BLOCK_LEN],
            p: [[0.0; MAX_STATES]; MAX_STATES],
            q: [[0.0; MAX_STATES]; BLOCK_LEN],
        };
        let zero = Dd::default();
        // 1 + a1 of each section, exactly.
        let c: Vec<Dd> = sections
            .iter()
            .map(|s| Dd::from(1.0).add(Dd::from(s.a1)))
            .collect();
        // z -> x: g = slope + (1 + a1) level, y1 = level.
        let to_x = |z: &[Dd]| {
            let mut x = z.to_vec();
            for (k, ck) in c.iter().enumerate() {
                let (level, slope) = (z[1 + 2 * k], z[2 + 2 * k]);
                x[1 + 2 * k] = slope.add(level.mul(ck.hi)).add(level.mul(ck.lo));
                x[2 + 2 * k] = level;
            }
            x
        };
        // x -> z: level = y1, slope = g - (1 + a1) y1.
        let to_z = |x: &[Dd]| {
            let mut z = x.to_vec();
            for (k, ck) in c.iter().enumerate() {
                let (g, y1) = (x[1 + 2 * k], x[2 + 2 * k]);
                z[1 + 2 * k] = y1;
                z[2 + 2 * k] = g.add(y1.mul(ck.hi).neg()).add(y1.mul(ck.lo).neg());
            }
            z
        };
        // The last state is the padding: its row and column stay 0.
        for k in 0..n - 1 {
            let mut z = vec![zero; n];
            z[k] = Dd::from(1.0);
            let mut x = to_x(&z);
            for j in 0..BLOCK_LEN {
                bf.m[k][j] = Self::step(sections, &mut x, zero).hi;
            }
            for (i, zi) in to_z(&x).iter().enumerate() {
                bf.p[k][i] = zi.hi;
            }
        }
        for k in 0..BLOCK_LEN {
            let mut x = vec![zero; n];
            for j in 0..BLOCK_LEN {
                let u = if j == k { Dd::from(1.0) } else { zero };
                bf.t[k][j] = Self::step(sections, &mut x, u).hi;
            }
            for (i, zi) in to_z(&x).iter().enumerate() {
                bf.q[k][i] = zi.hi;
            }
        }
        bf
    }

    /// The block state z of the sections' state (rounded once).
    pub(super) fn state_of(sections: &[Section]) -> [f64; MAX_STATES] {
        let mut z = [0.0; MAX_STATES];
        z[0] = sections[0].h;
        for (k, sec) in sections.iter().enumerate() {
            z[1 + 2 * k] = sec.y1;
            z[2 + 2 * k] = sec.g - (1.0 + sec.a1) * sec.y1;
        }
        z
    }

    /// Set the sections' state from the block state z (rounded once); `last_input` is the cascade's last
    /// input, for the h of the first section.
    pub(super) fn set_sections(z: &[f64; MAX_STATES], sections: &mut [Section], last_input: f64) {
        let mut v = last_input;
        for (k, sec) in sections.iter_mut().enumerate() {
            sec.y1 = z[1 + 2 * k];
            sec.g = z[2 + 2 * k] + (1.0 + sec.a1) * sec.y1;
            // As the sample path computes it: b2 times the section's last input.
            sec.h = sec.b[2] * v;
            v = sec.y1;
        }
    }

    /// Run whole blocks: `input.len()` is a multiple of `BLOCK_LEN`; `x` is the state (first `states` used).
    pub(super) fn run(&self, x: &mut [f64; MAX_STATES], input: &[f64], output: &mut [f64]) {
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: called only where the running processor reports AVX2.
            unsafe { self.run_avx2(x, input, output) };
            return;
        }
        self.run_any(x, input, output);
    }

    /// [`Self::run_any`] compiled for 256-bit vectors (four lanes per instruction instead of two). The same
    /// arithmetic in the same order (Rust never fuses a multiply and an add on its own), so the results are
    /// bit-identical to the baseline build's.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    pub(super) fn run_avx2(&self, x: &mut [f64; MAX_STATES], input: &[f64], output: &mut [f64]) {
        self.run_any(x, input, output);
    }

    #[inline(always)]
    pub(super) fn run_any(&self, x: &mut [f64; MAX_STATES], input: &[f64], output: &mut [f64]) {
        match self.states {
            4 => self.run_n::<4>(x, input, output),
            6 => self.run_n::<6>(x, input, output),
            8 => self.run_n::<8>(x, input, output),
            _ => self.run_n::<10>(x, input, output),
        }
    }

    #[inline(always)]
    fn run_n<const N: usize>(
        &self,
        state: &mut [f64; MAX_STATES],
        input: &[f64],
        output: &mut [f64],
    ) {
        let mut x: [f64; N] = *state.first_chunk::<N>().expect("N <= MAX_STATES");
        let m: &[[f64; BLOCK_LEN]; N] = self.m.first_chunk::<N>().expect("N <= MAX_STATES");
        let mut p = [[0.0; N]; N];
        for (pk, full) in p.iter_mut().zip(&self.p) {
            *pk = *full.first_chunk::<N>().expect("N <= MAX_STATES");
        }
        let mut q = [[0.0; N]; BLOCK_LEN];
        for (qk, full) in q.iter_mut().zip(&self.q) {
            *qk = *full.first_chunk::<N>().expect("N <= MAX_STATES");
        }
        for (u, y) in input
            .chunks_exact(BLOCK_LEN)
            .zip(output.chunks_exact_mut(BLOCK_LEN))
        {
            let u: &[f64; BLOCK_LEN] = u.try_into().expect("whole block");
            let y: &mut [f64; BLOCK_LEN] = y.try_into().expect("whole block");
            block_step(m, &self.t, &p, &q, &mut x, u, y);
        }
        state[..N].copy_from_slice(&x);
    }
}

/// One block of the block form in column form (broadcast one state or input, scale a whole column, add), so
/// that the loops vectorise. The input terms are summed first, off the recursion; the state terms of x <- P x
/// + Q u go to two partial sums (even and odd states) to shorten the loop-carried chain.
#[inline(always)]
fn block_step<const N: usize>(
    m: &[[f64; BLOCK_LEN]; N],
    t: &[[f64; BLOCK_LEN]; BLOCK_LEN],
    p: &[[f64; N]; N],
    q: &[[f64; N]; BLOCK_LEN],
    x: &mut [f64; N],
    u: &[f64; BLOCK_LEN],
    y: &mut [f64; BLOCK_LEN],
) {
    let mut acc = [0.0; BLOCK_LEN];
    let mut xa = [0.0; N];
    for k in 0..BLOCK_LEN {
        let uk = u[k];
        // Dense (t[k][j] = 0 for j < k): whole columns vectorise; adding 0 x u leaves acc unchanged.
        for j in 0..BLOCK_LEN {
            acc[j] += t[k][j] * uk;
        }
        for i in 0..N {
            xa[i] += q[k][i] * uk;
        }
    }
    let mut xb = [0.0; N];
    // The last state is the padding (always 0): its column is skipped.
    for k in 0..N - 1 {
        let xk = x[k];
        for j in 0..BLOCK_LEN {
            acc[j] += m[k][j] * xk;
        }
        let part = if k % 2 == 0 { &mut xa } else { &mut xb };
        for i in 0..N {
            part[i] += p[k][i] * xk;
        }
    }
    *y = acc;
    for i in 0..N {
        x[i] = xa[i] + xb[i];
    }
}

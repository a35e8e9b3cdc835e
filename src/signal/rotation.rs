//! Four interleaved rotations: cosines and sines of an angle advancing by a fixed step, for loops that would
//! otherwise wait on one rotation recurrence per sample. Lane k holds the angle of sample `4 i + k` of the
//! current step i; each step advances every lane by four samples, so the four recurrences overlap.
//!
//! Callers restart from an exactly computed angle every so many samples (rounding then cannot build up beyond
//! about 1e-13 relative between restarts).

/// Cosines and sines of `phi + n w` for four consecutive samples `n`.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Quad {
    pub cos: [f64; 4],
    pub sin: [f64; 4],
    c4: f64,
    s4: f64,
}

impl Quad {
    /// Lanes at `phi`, `phi + w`, `phi + 2 w`, `phi + 3 w` (rad).
    pub fn new(phi: f64, w: f64) -> Quad {
        let (s1, c1) = w.sin_cos();
        let (s4, c4) = (4.0 * w).sin_cos();
        let (mut sin, mut cos) = ([0.0f64; 4], [0.0f64; 4]);
        (sin[0], cos[0]) = phi.sin_cos();
        for k in 1..4 {
            sin[k] = sin[k - 1] * c1 + cos[k - 1] * s1;
            cos[k] = cos[k - 1] * c1 - sin[k - 1] * s1;
        }
        Quad { cos, sin, c4, s4 }
    }

    /// Move every lane four samples on.
    #[inline]
    pub fn advance(&mut self) {
        for k in 0..4 {
            let s = self.sin[k] * self.c4 + self.cos[k] * self.s4;
            self.cos[k] = self.cos[k] * self.c4 - self.sin[k] * self.s4;
            self.sin[k] = s;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lanes_follow_the_angle_over_a_thousand_samples() {
        let (phi, w) = (0.7, 0.0123);
        let mut q = Quad::new(phi, w);
        for i in 0..256 {
            for k in 0..4 {
                let a = phi + (4 * i + k) as f64 * w;
                assert!((q.cos[k] - a.cos()).abs() < 1e-13 && (q.sin[k] - a.sin()).abs() < 1e-13);
            }
            q.advance();
        }
    }
}

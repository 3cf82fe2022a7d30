//! Cheap seeded randomness for the plant: one PCG stream per component, and a hash for
//! values that must be reproducible without state (garbage on the wire).

use rand::{Rng, SeedableRng};
use rand_pcg::Pcg64Mcg;

/// The splitmix64 finaliser: a well-mixed 64-bit hash of `x`.
#[inline]
pub fn mix(mut x: u64) -> u64 {
    x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
    x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^ (x >> 31)
}

/// A random stream. Each component draws from its own stream (seed mixed with a
/// stream number), so adding a component does not change the others' randomness.
#[derive(Debug, Clone)]
pub struct Stream(Pcg64Mcg);

impl Stream {
    /// A stream for `seed` and component number `stream`.
    pub fn new(seed: u64, stream: u64) -> Stream {
        Stream(Pcg64Mcg::seed_from_u64(mix(seed ^ mix(stream))))
    }

    /// Uniform in [0, 1).
    #[inline]
    pub fn uniform(&mut self) -> f64 {
        self.0.random::<f64>()
    }

    /// Approximately standard normal: Irwin–Hall sum of four 16-bit uniforms from one
    /// 64-bit draw, rescaled to unit variance. Tails end at ±3.46 σ, which is what
    /// measurement noise needs; it costs one generator call and no transcendentals.
    #[inline]
    pub fn normal(&mut self) -> f64 {
        let r = self.0.random::<u64>();
        // The four 16-bit fields summed in two rounds: first the pairs (1+0, 3+2) side by
        // side in the two 32-bit halves, then the halves. The same sum as adding the four
        // one by one, in fewer instructions (this runs once per meter report).
        const LOW16_OF_EACH_HALF: u64 = 0x0000_FFFF_0000_FFFF;
        let pairs = (r & LOW16_OF_EACH_HALF) + ((r >> 16) & LOW16_OF_EACH_HALF);
        let sum = (pairs & 0xFFFF_FFFF) + (pairs >> 32);
        // Each term is uniform on [0, 65535]: mean 32767.5, variance (65536² − 1)/12.
        const MEAN: f64 = 4.0 * 32_767.5;
        const SD: f64 = 37_837.23; // sqrt(4 × (65536² − 1) / 12)
        // `sum` < 2¹⁸: as a 32-bit signed integer it converts in one instruction, to the
        // same value.
        (f64::from(sum as i32) - MEAN) / SD
    }
}

/// Standard normal draws of one [`Stream`], made 64 at a time: the same values in the
/// same order as calling [`Stream::normal`] each time, but the division in each draw is
/// done in a batch, off the hot loop's critical path (a lone `divsd` per step stalled it).
#[derive(Debug, Clone)]
pub struct NormalBatch {
    stream: Stream,
    buf: [f64; 64],
    next: usize,
}

impl NormalBatch {
    /// Draws from `stream`.
    pub fn new(stream: Stream) -> NormalBatch {
        NormalBatch { stream, buf: [0.0; 64], next: 64 }
    }

    /// The next draw.
    #[inline]
    pub fn draw(&mut self) -> f64 {
        if self.next == self.buf.len() {
            self.refill();
        }
        let z = self.buf[self.next];
        self.next += 1;
        z
    }

    #[cold]
    #[inline(never)]
    fn refill(&mut self) {
        for z in &mut self.buf {
            *z = self.stream.normal();
        }
        self.next = 0;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn batch_draws_the_same_values_as_the_stream() {
        let mut one = Stream::new(3, 4);
        let mut batch = NormalBatch::new(Stream::new(3, 4));
        for _ in 0..200 {
            assert_eq!(one.normal().to_bits(), batch.draw().to_bits());
        }
    }

    #[test]
    fn normal_has_unit_variance() {
        let mut s = Stream::new(7, 1);
        let n = 200_000;
        let (mut m, mut v) = (0.0, 0.0);
        for _ in 0..n {
            let x = s.normal();
            m += x;
            v += x * x;
        }
        m /= n as f64;
        v = v / n as f64 - m * m;
        assert!(m.abs() < 0.01, "{m}");
        assert!((v - 1.0).abs() < 0.01, "{v}");
    }
}

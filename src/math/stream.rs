//! Seeded, portable generation of test inputs.
//!
//! ChaCha20 from a 64-bit seed, and a fixed conversion from its `u64` stream to `f64`
//! (the top 53 bits, scaled), so the same seed gives bit-identical arrays on every
//! machine and with every version of the `rand` crates.

use ndarray::{Array, Dimension, IntoDimension};
use rand_chacha::rand_core::{RngCore, SeedableRng};
use rand_chacha::ChaCha20Rng;

/// A portable stream of pseudo-random numbers.
#[derive(Debug, Clone)]
pub struct Stream {
    rng: ChaCha20Rng,
}

impl Stream {
    /// The stream for `seed`.
    pub fn new(seed: u64) -> Self {
        Stream {
            rng: ChaCha20Rng::seed_from_u64(seed),
        }
    }

    /// Uniform in `[0, 1)`, a multiple of 2^-53.
    pub fn unit(&mut self) -> f64 {
        (self.rng.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }

    /// Uniform in `[-scale, scale)`.
    pub fn symmetric(&mut self, scale: f64) -> f64 {
        (2.0 * self.unit() - 1.0) * scale
    }

    /// Uniform integer in `0..bound` (`bound >= 1`), by rejection so it is unbiased.
    pub fn below(&mut self, bound: u64) -> u64 {
        let bound = bound.max(1);
        let zone = u64::MAX - u64::MAX % bound;
        loop {
            let x = self.rng.next_u64();
            if x < zone {
                return x % bound;
            }
        }
    }

    /// An array of `shape` filled row-major with values uniform in `[-scale, scale)`.
    pub fn array<D: Dimension, S: IntoDimension<Dim = D>>(
        &mut self,
        shape: S,
        scale: f64,
    ) -> Array<f64, D> {
        let dim = shape.into_dimension();
        let values = (0..dim.size()).map(|_| self.symmetric(scale)).collect();
        Array::from_shape_vec(dim, values).expect("length matches the shape")
    }
}

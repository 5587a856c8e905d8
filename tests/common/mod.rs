//! Helpers shared by the test targets (included with `#[path]`).
#![allow(dead_code)]

use ndarray::{Array2, Array3};
use posconform::math::Stream;

/// Random relative-attention inputs `(q, k, r, u, v)` for `H, L, M, d`.
#[derive(Debug, Clone)]
pub struct RelativeCase {
    pub q: Array3<f64>,
    pub k: Array3<f64>,
    pub r: Array3<f64>,
    pub u: Array2<f64>,
    pub v: Array2<f64>,
}

impl RelativeCase {
    pub fn random(seed: u64, heads: usize, l: usize, m: usize, d: usize) -> Self {
        let mut s = Stream::new(seed);
        RelativeCase {
            q: s.array((heads, l, d), 1.0),
            k: s.array((heads, m + l, d), 1.0),
            r: s.array((heads, m + l, d), 1.0),
            u: s.array((heads, d), 1.0),
            v: s.array((heads, d), 1.0),
        }
    }

    pub fn inputs(&self) -> posconform::xl_relative::RelativeInputs<'_> {
        posconform::xl_relative::RelativeInputs {
            q: self.q.view(),
            k: self.k.view(),
            r: self.r.view(),
            u: self.u.view(),
            v: self.v.view(),
        }
    }
}

/// Largest absolute difference over entries where `a` is finite; panics if the two
/// arrays disagree on which entries are masked (`-inf`).
pub fn max_visible_diff(a: &Array3<f64>, b: &Array3<f64>) -> f64 {
    assert_eq!(a.shape(), b.shape());
    a.iter()
        .zip(b)
        .map(|(x, y)| {
            assert_eq!(x.is_finite(), y.is_finite(), "mask disagrees: {x} vs {y}");
            if x.is_finite() {
                (x - y).abs()
            } else {
                0.0
            }
        })
        .fold(0.0, f64::max)
}

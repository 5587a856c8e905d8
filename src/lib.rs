//! posconform: reference numerics and conformance checks for positional encoding in
//! attention kernels.
//!
//! The index conventions (layout, absolute positions, distance `Δ = M + i - j`, causal
//! visibility over `[memory ; current]`) are stated once, in docs/conventions.md and in
//! [`attention`]; every scheme module links there and cites its paper.
//!
//! Data flows one way through the modules: [`math`] (dtypes, the numerical contract,
//! the one matrix product, angles, the seeded stream) → [`scheme`] (one module per
//! scheme behind [`scheme::SchemeModel`]) → [`case`] and [`suite`] → [`mod@reference`] and
//! [`budget`] → [`kernel`] and [`compare`] → [`run`] (check, fuzz, shrink, verify, and
//! `select`: which cases a run covers) and [`bench`] (timing against calibration
//! workloads, the regression gate) → [`report`].
//!
//! # Example
//!
//! Transformer-XL relative scores for one head, two queries and one memory key,
//! computed by the naive per-pair form and by the efficient relative-shift form:
//!
//! ```
//! use ndarray::{array, Array3};
//! use posconform::xl_relative::{scores, scores_naive, RelativeInputs, RelativeParams};
//!
//! let q = Array3::from_shape_vec((1, 2, 2), vec![0.5, -1.0, 2.0, 0.25]).unwrap();
//! let k = Array3::from_shape_vec((1, 3, 2), vec![1.0, 0.0, 0.0, 1.0, 1.0, 1.0]).unwrap();
//! let r = Array3::from_shape_vec((1, 3, 2), vec![0.1, 0.2, 0.3, 0.4, 0.5, 0.6]).unwrap();
//! let (u, v) = (array![[0.01, 0.02]], array![[0.03, 0.04]]);
//! let inputs = RelativeInputs { q: q.view(), k: k.view(), r: r.view(), u: u.view(), v: v.view() };
//! let params = RelativeParams::default(); // scale 1/sqrt(d), no clamp
//!
//! let fast = scores(&inputs, &params)?;
//! let slow = scores_naive(&inputs, &params)?;
//! // Query 0 sees the memory key and itself, not the future key (Δ = -1).
//! assert!(fast[[0, 0, 2]] == f64::NEG_INFINITY && slow[[0, 0, 2]] == f64::NEG_INFINITY);
//! for (a, b) in fast.iter().zip(&slow).filter(|(a, _)| a.is_finite()) {
//!     assert!((a - b).abs() < 1e-15);
//! }
//! # Ok::<(), posconform::Error>(())
//! ```
#![deny(missing_docs)]

pub mod attention;
pub mod bench;
pub mod budget;
pub mod case;
pub mod compare;
pub mod demo;
pub mod diagnose;
mod error;
pub mod files;
pub mod headwise;
pub mod kernel;
pub mod math;
pub mod recurrence;
pub mod reference;
pub mod report;
pub mod run;
pub mod scheme;
pub mod shape;
pub mod suite;
pub mod tensor;
pub mod variant;
pub mod vector;

pub use attention::{Scale, Window};
pub use case::{Case, Operation, Output};
pub use error::{Error, KernelErrorKind, Result};
pub use kernel::Kernel;
pub use math::Dtype;
pub use report::Report;
pub use run::{check, select, verify};
pub use scheme::sinusoidal::{Sinusoid, SinusoidLayout};
pub use scheme::SchemeSpec;
pub use scheme::{alibi, bucketed, clipped, learned, rotary, sinusoidal, xl_relative, Scheme};

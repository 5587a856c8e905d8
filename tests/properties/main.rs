//! Property tests: one function per invariant, the invariant in its doc comment, each with a planted-bug companion showing the property can fail.
#[path = "../common/mod.rs"]
mod common;

mod aliasing;
mod alibi;
mod bucketed;
mod checker_paths;
mod clipped;
mod masking;
mod recurrence;
mod rotary;
mod sinusoidal;
mod xl_relative;

//! Checks against published values and independent high-precision tables. Every value names its source beside the check.
#[path = "../common/mod.rs"]
mod common;

mod alibi;
mod angles;
mod bucketed;
mod clipped;
mod rotary;
mod sinusoidal;
mod xl_relative;

//! The zoo: correct attention kernels written independently of the reference code, and
//! the same kernels with small planted bugs.
mod core;
mod harness;
mod kernel;
mod on_demand;
mod property;
mod real;
mod structural;
mod tightness;
mod variants;

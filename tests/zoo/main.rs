//! The zoo: correct attention kernels written independently of the reference code, and
//! the same kernels with small planted bugs. Their job is to show that the error
//! budgets accept every kernel inside the numerical contract and still catch realistic
//! bugs.
//!
//! - `kernel`: one configurable in-process kernel (`posconform::kernel::Kernel`) for every
//!   scheme and operation, written from the conventions of docs/protocol.md and the
//!   `posconform::case` docs alone; `real`: the f64/f32 arithmetic it is generic over.
//! - `variants`: the named correct configurations and the base kernels bugs are planted in.
//! - `structural`: each correct variant, raised to f64, agrees with the expected values
//!   to 1e-9 (the formulas, apart from any budget question).
//! - `core`: `zoo_core`, each correct variant through `posconform::check::check` on the
//!   core suite and a fixed fuzz budget, zero over budget and zero errors.
//! - `property`: a random correct variant on a random case raises no false alarm; the
//!   same property fails once a bug is planted.
//! - `on_demand` (ignored): core, long and 10 × 2000 fuzz cases per variant, a table.
//! - `tightness` (ignored): at which positions each planted bug is still caught, per dtype.
//!
//! ```sh
//! cargo test --release --test zoo                                     # CI part
//! cargo test --release --test zoo -- --ignored --nocapture zoo_full   # minutes
//! cargo test --release --test zoo -- --ignored --nocapture tightness  # seconds
//! ```
mod core;
mod harness;
mod kernel;
mod on_demand;
mod property;
mod real;
mod structural;
mod tightness;
mod variants;

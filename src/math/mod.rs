//! The numbers everything else is built from: dtypes and rounding, the numerical contract,
//! the one matrix product, rotation angles in double-double, and the seeded input stream.
//! Nothing here knows about schemes, cases or kernels.

pub mod angle;
pub mod contract;
pub mod precision;
pub mod product;
pub mod stream;

pub use contract::{AngleScaling, Contract};
pub use precision::{ulp_distance, Dtype};
pub use stream::Stream;

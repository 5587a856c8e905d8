//! Running checks: a live kernel through the suite, fuzzing and shrinking (`check`), and
//! a results directory against golden vectors (`verify`).

pub mod check;
pub mod fuzz;
pub mod shrink;
pub mod verify;

//! Running checks: a live kernel through the suite, fuzzing and shrinking (`check`), and
//! a results directory against golden vectors (`verify`).

pub mod check;
mod diagnosis;
pub mod fuzz;
pub mod plant;
pub mod shrink;
pub mod verify;

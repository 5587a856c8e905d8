//! Running checks: a live kernel through the suite, fuzzing and shrinking (`check`), and
//! a results directory against golden vectors (`verify`); which cases a run covers
//! (`select`: filters and one part of N).

pub mod check;
mod diagnosis;
pub mod fuzz;
pub mod plant;
pub mod select;
pub mod shrink;
pub mod verify;

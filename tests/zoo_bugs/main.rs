//! The buggy zoo: kernels that each carry one realistic mistake, written from
//! docs/conventions.md and docs/protocol.md alone (never from the library's reference,
//! its fault catalogue or its diagnosis), to measure how well a report names a real bug.
//!
//! - `kernel`: one plain kernel for every scheme and operation with a [`kernel::Mistake`]
//!   planted where a practitioner makes it.
//! - `specimens`: the buggy kernels, each with the answer a report should give: the
//!   catalogued fault id (`posconform explain` lists them) that names the mistake, or
//!   `none` when no catalogued fault is this mistake.
//! - `score`: runs a specimen through `posconform::check::check` (the `core` suite and a
//!   fixed fuzz budget) and scores the report from its JSON form: caught, named,
//!   misleading.
//! - `naming`: every specimen scored, a table printed, the rates asserted; a companion
//!   showing that the scoring fails a wrong label.
//! - `control`: the same kernel without a mistake conforms on every scheme, so each
//!   specimen differs from a conforming kernel by its one mistake only.
//!
//! ```sh
//! cargo test --test zoo_bugs -- --nocapture     # the table
//! ```
mod control;
mod kernel;
mod naming;
mod score;
mod specimens;

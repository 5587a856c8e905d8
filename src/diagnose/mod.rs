//! Naming the bug: a catalogue of known positional-encoding mistakes, each a faulty
//! variant of the reference that can run any case, and the differential diagnosis that
//! ranks them by how well each reproduces a failing kernel's outputs.
//!
//! - [`Fault`]: one mistake, with an id of words (`mask-not-offset-by-memory`), what it
//!   is, how it typically arises, which cases expose it and the fix, and its variant
//!   (a [`Deviation`] of the reference pipeline, [`crate::variant`]).
//! - [`catalogue`]: every fault, in a stable order (`posconform explain` lists it).
//! - [`diagnose_case`]: for one failing case, runs every applicable variant on the
//!   same inputs and compares the kernel's outputs with each at the case's budgets.
//! - [`RunDiagnosis`]: the faults that explain a run's failures, with the passing
//!   cases that contradict them.

mod differential;
mod example;
mod faults;

use crate::case::Case;
use crate::math::Dtype;
use crate::variant::Deviation;

pub use differential::{
    diagnose_case, diagnose_run, Candidate, CaseDiagnosis, CaseEvidence, Finding, RunCandidate,
    RunDiagnosis,
};
pub use example::{example, Example, ExampleElement};

/// Whether a fault breaks the model or is an equivalent convention.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FaultKind {
    /// A mistake: the kernel computes something else than the published scheme.
    Bug,
    /// Another way of writing the scheme that agrees where it matters for attention
    /// (probabilities, relative properties) and differs in what a case pins down: worth
    /// knowing, not a broken model (weights trained with the published convention may
    /// still not transfer).
    Convention,
}

/// How a kernel's outputs are matched against a variant's.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Matching {
    /// Element by element, within the case's budgets.
    Values,
    /// By the size of the error alone: a precision mistake rounds differently in every
    /// kernel, so only an error of the variant's size (within a factor of 4 of it, and
    /// over budget) is evidence.
    ErrorSize,
}

/// The faulty variant of a fault: the deviation, and which cases it can run on.
pub trait FaultVariant: Deviation {
    /// Whether the mistake can show on `case` at all (its scheme and operation).
    fn applies(&self, case: &Case) -> bool;

    /// For a precision fault that makes a kernel of `dtype` compute in a narrower
    /// dtype: that dtype. A kernel with this fault is a correct kernel of that dtype,
    /// so its outputs are within that dtype's budgets; outputs outside them are not
    /// this fault, whatever the size of their error.
    fn computes_in(&self, _case: &Case, _dtype: Dtype) -> Option<Dtype> {
        None
    }

    /// For a precision fault whose error comes from rounding the same few quantities
    /// (angles formed in half precision): any kernel with it makes nearly the same
    /// error, element by element, so the signs of its errors follow the variant's.
    fn deterministic_error(&self) -> bool {
        false
    }
}

/// One catalogued mistake.
pub struct Fault {
    /// The id, in words (`rel-shift-off-by-one`); what reports and `explain` use.
    pub id: &'static str,
    /// The mistake, in one sentence.
    pub mistake: &'static str,
    /// How it typically arises.
    pub arises: &'static str,
    /// Which cases expose it.
    pub exposes: &'static str,
    /// How to fix it.
    pub fix: &'static str,
    /// A mistake or an equivalent convention.
    pub kind: FaultKind,
    /// How outputs are matched against the variant.
    pub matching: Matching,
    /// The faulty variant.
    pub variant: &'static dyn FaultVariant,
}

impl std::fmt::Debug for Fault {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Fault").field("id", &self.id).finish()
    }
}

impl PartialEq for Fault {
    fn eq(&self, other: &Self) -> bool {
        self.id == other.id
    }
}

impl serde::Serialize for Fault {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        use serde::ser::SerializeStruct;
        let mut st = s.serialize_struct("Fault", 7)?;
        st.serialize_field("id", self.id)?;
        st.serialize_field("mistake", self.mistake)?;
        st.serialize_field("arises", self.arises)?;
        st.serialize_field("exposes", self.exposes)?;
        st.serialize_field("fix", self.fix)?;
        st.serialize_field("kind", &self.kind)?;
        st.serialize_field("matching", &self.matching)?;
        st.end()
    }
}

/// Every catalogued fault, in a stable order (grouped by where the mistake sits).
pub fn catalogue() -> &'static [Fault] {
    faults::CATALOGUE
}

/// The fault with this id.
pub fn fault(id: &str) -> Option<&'static Fault> {
    catalogue().iter().find(|f| f.id == id)
}

/// The command that explains a fault.
pub fn explain_command(id: &str) -> String {
    format!("posconform explain {id}")
}

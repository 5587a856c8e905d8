//! The fault catalogue and the differential diagnosis: the faulty variants agree with
//! the reference where they must, each reproduces its own mistake, and reports name
//! what the data supports and nothing more.

mod docs_page;
mod independent;
mod patterns;
mod plant;
mod variants;

//! rotary (in progress)

//! bucketed (in progress)

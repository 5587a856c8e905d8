//! clipped (in progress)

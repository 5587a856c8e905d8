//! sinusoidal (in progress)

//! alibi (in progress)

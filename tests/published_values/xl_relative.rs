//! xl_relative (in progress)

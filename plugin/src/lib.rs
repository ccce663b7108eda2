//! Breakdown plugin (work in progress).

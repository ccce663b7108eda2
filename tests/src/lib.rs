//! Shared helpers for Breakdown's cross-crate and external-reference tests.

//! Shared helpers for the end-to-end tests in `tests/tests/`.
#![forbid(unsafe_code)]

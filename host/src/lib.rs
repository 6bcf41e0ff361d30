//! # fringe-host: the `fringe` command-line tool
//!
//! Library half of the host tool; `main.rs` only parses, runs and maps the
//! result to an exit code.
#![forbid(unsafe_code)]

pub mod cli;
pub mod drift;
pub mod plots;
pub mod product_file;
pub mod report;
pub mod samples;
pub mod timefmt;

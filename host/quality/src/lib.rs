//! # fringe-quality: the quality engineer's tools over the record store
//!
//! The host's `watch` and `audit` stages (docs/DESIGN.md,
//! docs/ARCHITECTURE.md). It reads the store through
//! `fringe_store::RecordRead` (any back end) and never the device link;
//! the only record it writes is a lab grab sample ([`views::GrabSample`]).
//!
//! - [`drift`]: CUSUM and EWMA monitors with their run lengths;
//!   [`analysis`]: what the monitors and reports read from a store;
//! - [`samples`]: reference-sample tables (CSV); [`product_file`]: product
//!   calibration files (TOML); [`cal`]: fit, predict, bias/slope adjust;
//! - [`audit`]: tamper-evident bundles (export, verify); [`export`]: bulk
//!   CSV / JSON Lines exports of readings, events and lab samples;
//! - [`plots`], [`report`]: SVG charts and the HTML report;
//! - [`views`]: what the commands show (drift, report, history, lab
//!   samples, audit summaries), written to a writer the caller gives;
//! - [`timefmt`]: times as people read and type them; [`numbers`]: the
//!   precision rule of every CSV column;
//! - [`limits`]: alarm limits of a line (moisture band, largest uncertainty);
//! - [`watch`]: the live drift check of a streaming device (monitor, gateway).
//!
//! Nothing here prints to a terminal, parses a command line or exits.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod analysis;
pub mod audit;
pub mod cal;
pub mod drift;
pub mod export;
pub mod files;
pub mod limits;
pub mod numbers;
pub mod plots;
pub mod product_file;
pub mod report;
pub mod samples;
pub mod timefmt;
pub mod views;
pub mod watch;

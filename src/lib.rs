//! probity: a ledger for predictive-modelling experiments on tabular data.
//!
//! An experiment is a TOML spec (data, split, model grid). The runner fits the grid with
//! cross-validation on the development rows only, every score goes into an SQLite ledger, and
//! the test partition stays sealed. Data flows one way through the modules, in reading order:
//! spec -> data -> split -> guard -> models/metrics -> runner -> ledger -> report -> cli.

// Panics are bugs: library code returns errors. Tests may unwrap.
#![deny(clippy::unwrap_used, clippy::expect_used)]
#![cfg_attr(test, allow(clippy::unwrap_used, clippy::expect_used))]

pub mod cli;
pub mod compare;
pub mod data;
pub mod error;
pub mod external;
pub mod failpoint;
pub mod files;
#[cfg(feature = "test-hooks")]
#[doc(hidden)]
pub mod fuzzing;
pub mod guard;
pub mod ledger;
pub mod metrics;
pub mod models;
pub mod par;
pub mod replay;
pub mod report;
pub mod runner;
pub mod signing;
pub mod spec;
pub mod split;
#[cfg(test)]
pub(crate) mod testgen;

pub use error::{Error, Result};

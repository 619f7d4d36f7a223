//! The one integration-test binary: drives `probity` end to end and runs the reference checks.

mod bad_input;
mod bundles;
mod classification;
mod commands;
mod concurrency;
mod consult;
mod crash;
mod disk;
mod fixtures;
mod fuzzed;
mod guard;
mod listing;
mod numeric;
mod plots;
mod reference;
mod replay;
mod run;
mod tidy;
mod util;

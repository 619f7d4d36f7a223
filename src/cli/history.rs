//! `probity history`: one line per stored run.

use super::{Global, RunSelect, open_existing, out, out_json};
use crate::error::Result;

/// List the runs in the ledger, oldest first
#[derive(clap::Args, Debug)]
pub struct Args {
    #[command(flatten)]
    pub select: RunSelect,
    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_existing(g)?;
    let filter = a.select.filter(&ledger)?;
    let runs = ledger.history_where(&filter)?;
    if a.json {
        out_json(&crate::report::json::history(&runs))?;
    } else if runs.is_empty() {
        out(if filter.since.is_some() || filter.experiment.is_some() {
            "no run matches\n"
        } else {
            "no runs yet\n"
        })?;
    } else {
        out(&crate::report::table::history(&runs))?;
    }
    Ok(0)
}

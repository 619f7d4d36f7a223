//! `probity history`: one line per stored run.

use super::{Global, RunSelect, open_reading, out, out_json};
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
    let ledger = open_reading(g)?;
    let filter = a.select.filter(&ledger)?;
    let runs = ledger.history_where(&filter)?;
    let starts: Vec<_> = ledger
        .unfinished()?
        .into_iter()
        .filter(|u| {
            filter
                .experiment
                .as_ref()
                .is_none_or(|e| *e == u.experiment)
                && filter.since.as_ref().is_none_or(|s| u.started_at >= *s)
        })
        .collect();
    if a.json {
        out_json(&crate::report::json::history(&runs, &starts))?;
        return Ok(0);
    }
    let mut text = if runs.is_empty() {
        (if filter.since.is_some() || filter.experiment.is_some() {
            "no run matches\n"
        } else {
            "no runs yet\n"
        })
        .to_string()
    } else {
        crate::report::table::history(&runs)
    };
    text.push_str(&crate::report::table::unfinished(&starts));
    out(&text)?;
    Ok(0)
}

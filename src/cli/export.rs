//! `probity export WHAT`: runs, candidates or fold scores as CSV or JSON.

use super::{Global, RunSelect, open_reading, out};
use crate::error::{Error, Result};
use crate::report::export::{self, RunExport};
use std::path::PathBuf;

#[derive(clap::ValueEnum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum What {
    /// One line per run: provenance, partition, selection
    Runs,
    /// One line per candidate: parameters, train and validation means and standard errors
    Candidates,
    /// One line per stored fold score (long form)
    Folds,
}

#[derive(clap::ValueEnum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    Csv,
    Json,
}

/// Export runs, candidates or fold scores as CSV or JSON, for analysis elsewhere
#[derive(clap::Args, Debug)]
pub struct Args {
    /// What to export
    #[arg(value_enum)]
    pub what: What,
    #[arg(long, value_enum, default_value = "csv")]
    pub format: Format,
    /// Only these runs (repeat the option for several) [default: every run the filters keep]
    #[arg(long = "run", value_name = "RUN")]
    pub runs: Vec<i64>,
    #[command(flatten)]
    pub select: RunSelect,
    /// Write to this file instead of standard output
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// CSV: prefix text cells that start with =, +, - or @ with ' so a spreadsheet does not
    /// run them as formulas (numbers are kept; without it every cell is exact)
    #[arg(long)]
    pub spreadsheet_safe: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_reading(g)?;
    let filter = a.select.filter(&ledger)?;
    let mut ids: Vec<i64> = ledger
        .history_where(&filter)?
        .iter()
        .map(|r| r.id)
        .collect();
    if !a.runs.is_empty() {
        for id in &a.runs {
            if ledger.run(*id)?.is_none() {
                return Err(Error::Input(format!(
                    "--run {id}: no such run in {}; `probity history` lists the runs",
                    ledger.path().display()
                )));
            }
        }
        ids.retain(|id| a.runs.contains(id));
    }
    let mut runs = Vec::with_capacity(ids.len());
    for id in ids {
        let detail = ledger
            .run(id)?
            .ok_or_else(|| Error::Internal(format!("run {id} vanished while exporting")))?;
        let (_, commit, target, _, replay_of) = ledger.provenance(id)?;
        let fold_scores = if a.what == What::Folds {
            ledger.run_fold_scores(id)?
        } else {
            Vec::new()
        };
        runs.push(RunExport {
            detail,
            build: (commit, target, replay_of),
            fold_scores,
        });
    }
    let text = match (a.what, a.format) {
        (What::Runs, Format::Csv) => export::runs_csv(&runs, a.spreadsheet_safe)?,
        (What::Candidates, Format::Csv) => export::candidates_csv(&runs, a.spreadsheet_safe)?,
        (What::Folds, Format::Csv) => export::folds_csv(&runs, a.spreadsheet_safe)?,
        (what, Format::Json) => {
            let v = match what {
                What::Runs => export::runs_json(&runs),
                What::Candidates => export::candidates_json(&runs),
                What::Folds => export::folds_json(&runs),
            };
            let mut s = serde_json::to_string_pretty(&v)
                .map_err(|e| Error::Internal(format!("write JSON: {e}")))?;
            s.push('\n');
            s
        }
    };
    match &a.out {
        Some(path) => std::fs::write(path, text).map_err(|e| Error::Io {
            action: "cannot write",
            path: path.clone(),
            source: e,
        })?,
        None => out(&text)?,
    }
    Ok(0)
}

//! `probity report RUN --out FILE.html`: one self-contained page for a model review.

use super::{Global, open_reading};
use crate::error::Result;
use std::path::PathBuf;

/// Write a self-contained HTML report of a run (for a model review)
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run id (as `history` lists)
    pub run: i64,
    /// The HTML file to write
    #[arg(long, value_name = "FILE.html")]
    pub out: PathBuf,
    /// The data file, when it moved since the run (its SHA-256 must match; for the residuals)
    #[arg(long, value_name = "PATH")]
    pub data: Option<PathBuf>,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_reading(g)?;
    let d = super::stored_run(&ledger, a.run)?;
    let (_, commit, target, _, _) = ledger.provenance(a.run)?;
    let metric = d.summary.metric.clone();
    let partition = d.summary.partition_id.clone();
    let reveals = ledger.reveal_points(&partition)?;
    let mut plots = Vec::new();
    // A run with nothing ordered to draw simply has no complexity plot.
    if let Ok(svg) = crate::report::plot::complexity_svg(&d, &metric) {
        plots.push((format!("Complexity: train and validation {metric}"), svg));
    }
    let higher = crate::metrics::Metric::parse(&metric)
        .is_some_and(crate::metrics::Metric::higher_is_better);
    if let Ok(svg) = crate::report::plot::reveals_svg(&partition, &reveals, &metric, higher) {
        plots.push((format!("Reveals of partition {partition}"), svg));
    }
    // The residuals (or calibration) plot refits the selected candidate on each fold, from the
    // stored spec and the data file, which must still be there with the same SHA-256.
    let selected = d.summary.selected;
    let oof = super::reveal::reload(&d, a.data.as_deref())
        .and_then(|(spec, table)| crate::runner::out_of_fold(&spec, &table, selected as usize));
    let mut missing = None;
    match oof {
        Ok(o) if o.classes.is_empty() => plots.push((
            format!("Out-of-fold residuals of candidate {selected}"),
            crate::report::plot::residuals_svg(a.run, selected, &o)?,
        )),
        Ok(o) => plots.push((
            format!("Calibration of candidate {selected} (out-of-fold)"),
            crate::report::plot::calibration_svg(a.run, selected, &o)?,
        )),
        Err(e) => missing = Some(format!("no residuals plot: {e}")),
    }
    let (entries, breaks) = ledger.verify()?;
    let digest = ledger.predictions_digest(a.run)?;
    let extras = crate::report::html::Extras {
        build: (commit, target),
        predictions_digest: digest,
        reveals,
        uses: ledger.partition_history(&partition)?.uses,
        replays: ledger.replays_involving(a.run)?,
        chain: ledger.run_chain_entry(a.run)?,
        notes: ledger.notes(a.run)?,
        plots,
        chain_state: (entries, breaks.is_empty()),
        missing,
    };
    let page = crate::report::html::page(&d, &extras);
    super::write_file(&a.out, &page)?;
    Ok(0)
}

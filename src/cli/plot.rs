//! `probity plot RUN --out FILE.svg`: a stored run drawn as SVG.

use super::{Global, open_reading};
use crate::error::{Error, Result};
use std::path::PathBuf;

#[derive(clap::ValueEnum, Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// Train and validation score against each family's ordered parameter
    Complexity,
    /// Each reveal of the run's test partition against the development estimate
    Reveals,
    /// Out-of-fold residuals (regression) or calibration (classification) of a candidate
    Residuals,
}

/// Draw a stored run as an SVG file
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run id (as `history` lists)
    pub run: i64,
    /// The SVG file to write
    #[arg(long, value_name = "FILE.svg")]
    pub out: PathBuf,
    #[arg(long, value_enum, default_value = "complexity")]
    pub kind: Kind,
    /// The metric drawn [default: the run's selection metric]
    #[arg(long, value_name = "NAME")]
    pub metric: Option<String>,
    /// residuals: the candidate drawn [default: the run's selected candidate]
    #[arg(long, value_name = "ID")]
    pub candidate: Option<i64>,
    /// residuals: the data file, when it moved since the run (its SHA-256 must match)
    #[arg(long, value_name = "PATH")]
    pub data: Option<PathBuf>,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_reading(g)?;
    let d = super::stored_run(&ledger, a.run)?;
    let metric = a.metric.clone().unwrap_or_else(|| d.summary.metric.clone());
    if !d
        .candidates
        .iter()
        .any(|c| c.validation.contains_key(&metric))
    {
        let known: Vec<String> = d
            .candidates
            .first()
            .map(|c| c.validation.keys().cloned().collect())
            .unwrap_or_default();
        return Err(Error::Input(format!(
            "--metric {metric}: run {} has no such score; it has {}",
            a.run,
            known.join(", ")
        )));
    }
    let svg = match a.kind {
        Kind::Complexity => crate::report::plot::complexity_svg(&d, &metric)?,
        Kind::Reveals => {
            let partition = &d.summary.partition_id;
            let points = ledger.reveal_points(partition)?;
            let higher = crate::metrics::Metric::parse(&metric)
                .is_some_and(crate::metrics::Metric::higher_is_better);
            crate::report::plot::reveals_svg(partition, &points, &metric, higher)?
        }
        Kind::Residuals => {
            let candidate = a.candidate.unwrap_or(d.summary.selected);
            if !d.candidates.iter().any(|c| c.id == candidate) {
                return Err(Error::Input(format!(
                    "run {} has no candidate {candidate}; `probity show {}` lists them",
                    a.run, a.run
                )));
            }
            // The fits are made again from the stored spec and the checked data file.
            let (spec, table) = super::reveal::reload(&d, a.data.as_deref())?;
            let oof = crate::runner::out_of_fold(&spec, &table, candidate as usize)?;
            if oof.classes.is_empty() {
                crate::report::plot::residuals_svg(a.run, candidate, &oof)?
            } else {
                crate::report::plot::calibration_svg(a.run, candidate, &oof)?
            }
        }
    };
    super::write_file(&a.out, &svg)?;
    Ok(0)
}

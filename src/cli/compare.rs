//! `probity compare RUN RUN`: two runs side by side, with the corrected resampled t-test of two
//! candidates scored on the same folds.

use super::{Global, open_reading, out, out_json};
use crate::error::{Error, Result};
use crate::metrics::Metric;

/// Compare two runs: spec differences, shared candidates' scores, and a paired test
#[derive(clap::Args, Debug)]
pub struct Args {
    /// The first run (A)
    pub a: i64,
    /// The second run (B); the same run compares its selected candidate with the runner-up
    pub b: i64,
    /// The two candidates to test: one of run A, one of run B [default: each run's selected]
    #[arg(long, num_args = 2, value_names = ["A", "B"])]
    pub candidates: Option<Vec<i64>>,
    /// The validation metric compared [default: run A's selection metric]
    #[arg(long, value_name = "NAME")]
    pub metric: Option<String>,
    /// Print JSON instead of tables
    #[arg(long)]
    pub json: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_reading(g)?;
    let (ra, rb) = (
        super::stored_run(&ledger, a.a)?,
        super::stored_run(&ledger, a.b)?,
    );
    let name = a
        .metric
        .clone()
        .unwrap_or_else(|| ra.summary.metric.clone());
    let metric = Metric::parse(&name)
        .filter(|m| {
            ra.candidates
                .iter()
                .any(|c| c.validation.contains_key(m.name()))
        })
        .ok_or_else(|| {
            let known: Vec<&str> = ra
                .candidates
                .first()
                .map(|c| c.validation.keys().map(String::as_str).collect())
                .unwrap_or_default();
            Error::Input(format!(
                "--metric {name}: run {} has no such validation score; it has {}",
                a.a,
                known.join(", ")
            ))
        })?;
    let pair = match &a.candidates {
        Some(ids) => Some((ids[0], ids[1])),
        None => crate::compare::default_pair(&ra, &rb, metric),
    };
    for (run, id) in pair.iter().flat_map(|(x, y)| [(&ra, *x), (&rb, *y)]) {
        if !run.candidates.iter().any(|c| c.id == id) {
            return Err(Error::Input(format!(
                "--candidates: run {} has no candidate {id} (it has 1 to {})",
                run.summary.id,
                run.candidates.len()
            )));
        }
    }
    let scores = match pair {
        Some((ca, cb)) => Some((
            (ca, ledger.fold_scores(a.a, ca)?),
            (cb, ledger.fold_scores(a.b, cb)?),
        )),
        None => None,
    };
    let c = crate::compare::compare(&ra, &rb, metric, scores);
    if a.json {
        out_json(&crate::report::json::compare(&c))?;
    } else {
        out(&crate::report::table::compare(&c))?;
    }
    Ok(0)
}

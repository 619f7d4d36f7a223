//! `probity reveal RUN`: score one candidate once on the sealed test rows, counted.
//!
//! Order matters: confirm, compute, write the reveal, then print. A reveal whose score was
//! printed is always in the ledger.

use super::{Global, open_existing, out, out_json, warn};
use crate::error::{Error, Result};
use crate::ledger::{Ledger, RevealRecord, RunDetail};
use serde_json::{Value, json};
use std::io::IsTerminal;
use std::path::{Path, PathBuf};

/// Score a run's selected (or named) candidate once on the sealed test rows; every reveal is
/// counted per partition and per row
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run id
    pub run: i64,
    /// Reveal this candidate instead of the selected one
    #[arg(long, value_name = "ID")]
    pub candidate: Option<i64>,
    /// Do not ask for confirmation (needed without a terminal)
    #[arg(long)]
    pub yes: bool,
    /// The data file, when it moved (its SHA-256 must match the run's)
    #[arg(long, value_name = "PATH")]
    pub data: Option<PathBuf>,
    /// Print JSON instead of text
    #[arg(long)]
    pub json: bool,
}

/// The run's spec and data, re-read and checked against the ledger.
pub(crate) fn reload(
    d: &RunDetail,
    data: Option<&Path>,
) -> Result<(crate::spec::Spec, crate::data::Table)> {
    let spec_path = Path::new(&d.spec_path);
    let base = spec_path
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default();
    let spec = crate::spec::parse(&d.spec_text, spec_path, &base)?;
    let text = super::text_columns(&spec);
    let path = data
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from(&d.data_path));
    let table = crate::data::load(&path, &text, crate::data::all_cores())?;
    if table.sha256 != d.summary.data_sha256 {
        return Err(Error::Input(format!(
            "{} has SHA-256 {} but run {} used {}; the data changed, so the run's partition cannot be rebuilt (pass --data with the original file)",
            path.display(),
            table.sha256,
            d.summary.id,
            d.summary.data_sha256
        )));
    }
    Ok((spec, table))
}

/// How many of `keys` were test rows of a revealed partition (other than `exclude`), the most
/// reveals among them, and the last reveal time.
pub(crate) fn exposed(
    ledger: &Ledger,
    keys: &[crate::data::RowKey],
    exclude: Option<&str>,
) -> Result<(usize, i64, String)> {
    if !ledger.has_reveals()? {
        return Ok((0, 0, String::new()));
    }
    let map = ledger.exposure(exclude)?;
    let (mut n, mut most, mut last) = (0usize, 0i64, String::new());
    for k in keys {
        if let Some((count, when)) = map.get(k) {
            n += 1;
            most = most.max(*count);
            if *when > last {
                last = when.clone();
            }
        }
    }
    Ok((n, most, last))
}

/// Thousands separators for counts in messages.
pub(crate) fn count(n: usize) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let mut ledger = open_existing(g)?;
    let d = super::stored_run(&ledger, a.run)?;
    let candidate = a.candidate.unwrap_or(d.summary.selected);
    let cand = d
        .candidates
        .iter()
        .find(|c| c.id == candidate)
        .ok_or_else(|| {
            Error::Input(format!(
                "run {} has no candidate {candidate}; `probity show {}` lists them",
                a.run, a.run
            ))
        })?
        .clone();
    let (spec, table) = reload(&d, a.data.as_deref())?;
    // The ledger's identity version: its partitions', this one's included.
    let prep = crate::runner::prepare(&spec, &table, crate::data::all_cores(), ledger.identity()?)?;
    if prep.partition_id != d.summary.partition_id {
        return Err(Error::Internal(format!(
            "rebuilt partition {} differs from the stored {}",
            prep.partition_id, d.summary.partition_id
        )));
    }
    if prep.test_keys.is_empty() {
        return Err(Error::Input(format!(
            "run {} has no test partition (test = 0): there is nothing to reveal",
            a.run
        )));
    }
    if matches!(spec.guard.mode, crate::spec::GuardMode::Reusable { .. })
        && spec.select.metric == crate::metrics::Metric::Brier
        && prep.classes.len() > 2
    {
        return Err(Error::Input(format!(
            "mode = \"reusable\" needs per-row values in [0, 1]; the Brier score of {} classes ranges up to 2. Use accuracy, or mode = \"count\"",
            prep.classes.len()
        )));
    }
    let partition = d.summary.partition_id.clone();
    let history = ledger.partition_history(&partition)?;
    let budget = spec.guard.reveals;
    let (rows_seen, rows_most, rows_last) = exposed(&ledger, &prep.test_keys, Some(&partition))?;
    let n = prep.test_keys.len();
    // Ask first: the question shows what has been spent already.
    if !a.yes {
        let question = format!(
            "partition {partition}: revealed {} time(s) so far, budget {budget}; {} of its {} test rows were revealed in other partitions{}.\nreveal run {} candidate {} ({} {}) on {} test rows? [y/N] ",
            history.reveals,
            count(rows_seen),
            count(n),
            if rows_seen > 0 {
                format!(" (up to {rows_most} time(s), last on {rows_last})")
            } else {
                String::new()
            },
            a.run,
            candidate,
            cand.family,
            crate::report::params_text(&cand.params),
            count(n)
        );
        if !(std::io::stdin().is_terminal() && std::io::stderr().is_terminal()) {
            return Err(Error::Input(
                "reveal reads the sealed test rows and is counted; confirm on a terminal, or pass --yes to confirm here".into(),
            ));
        }
        eprint!("{question}");
        let mut line = String::new();
        std::io::stdin()
            .read_line(&mut line)
            .map_err(|e| Error::Io {
                action: "cannot read the answer from",
                path: PathBuf::from("stdin"),
                source: e,
            })?;
        if !matches!(line.trim(), "y" | "Y" | "yes") {
            return Err(Error::Input(
                "reveal cancelled; nothing was recorded".into(),
            ));
        }
    }
    let permit = crate::guard::permit(true).ok_or_else(|| Error::Internal("no permit".into()))?;
    let outcome = crate::runner::score_test(
        &spec,
        &table,
        &prep,
        candidate as usize,
        &permit,
        spec.guard.confidence,
    )?;
    let metric = spec.select.metric;
    let mi = prep.metrics.iter().position(|m| *m == metric).unwrap_or(0);
    let test_value = outcome.scores[mi].ok_or_else(|| {
        Error::Input(format!("{} is undefined on these test rows", metric.name()))
    })?;
    let development = cand
        .validation
        .get(metric.name())
        .and_then(|s| s.mean)
        .unwrap_or(f64::NAN);
    let mut noise = crate::split::rng::stream(
        spec.split.seed,
        crate::split::rng::Domain::Noise,
        history.reveals as u32,
    );
    let answer = crate::guard::answer(
        spec.guard.mode,
        budget,
        &history,
        development,
        test_value,
        metric.higher_is_better(),
        &mut noise,
    );
    let mut seen = history.candidates.clone();
    seen.insert((d.spec_hash.clone(), candidate));
    let k = seen.len();
    let optimism = crate::guard::optimism(
        metric,
        n,
        k,
        outcome.intervals[mi].map(|i| i.2),
        spec.guard.confidence,
    );
    let reveals = history.reveals + 1;
    let over_budget = match spec.guard.mode {
        crate::spec::GuardMode::Reusable { .. } => answer.kind == "refused",
        _ => reveals > budget as usize,
    };
    let now = chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true);
    let record = RevealRecord {
        run_id: a.run,
        candidate,
        partition_id: partition.clone(),
        source: "reveal".into(),
        revealed_at: now,
        user: super::user(),
        host: super::host(),
        tool_version: env!("CARGO_PKG_VERSION").into(),
        mode: spec.guard.mode.name().into(),
        budget: i64::from(budget),
        metric: metric.name().into(),
        n_rows: n as i64,
        seed: outcome.seed.to_string(),
        resamples: outcome.resamples as i64,
        confidence: spec.guard.confidence,
        answer: answer.value,
        answer_kind: answer.kind.into(),
        mechanism: answer.mechanism.to_string(),
        optimism: serde_json::to_string(&optimism).map_err(|e| Error::Internal(e.to_string()))?,
        scores: prep
            .metrics
            .iter()
            .enumerate()
            .map(|(i, m)| {
                (
                    m.name().to_string(),
                    outcome.scores[i],
                    outcome.intervals[i].map(|v| v.0),
                    outcome.intervals[i].map(|v| v.1),
                    outcome.intervals[i].map(|v| v.2),
                )
            })
            .collect(),
    };
    // Written before anything is printed: a score the user saw is never missing from the count.
    let id = ledger.write_reveal(&record)?;
    crate::failpoint::pause("reveal:print");

    let exact = matches!(spec.guard.mode, crate::spec::GuardMode::Count);
    let mut warnings = Vec::new();
    if over_budget {
        warnings.push(match spec.guard.mode {
            crate::spec::GuardMode::Reusable { .. } => format!("partition {partition}: the reusable holdout's budget of {budget} over-threshold answers is spent; no more test answers (audit fails)"),
            _ => format!(
                "partition {partition} has now been revealed {reveals} times, over its budget of {budget}: its test score is no longer an unbiased estimate (audit fails)"
            ),
        });
    }
    if rows_seen > 0 {
        warnings.push(format!(
            "{} of these {} test rows had been revealed in other partitions (up to {rows_most} time(s), last on {rows_last}): their effective reveal count is {}",
            count(rows_seen),
            count(n),
            rows_most.max(reveals as i64)
        ));
    }
    for w in &warnings {
        warn(w);
    }
    let mut test = serde_json::Map::new();
    let mut interval = serde_json::Map::new();
    if exact {
        for (i, m) in prep.metrics.iter().enumerate() {
            test.insert(m.name().into(), json!(outcome.scores[i]));
            interval.insert(
                m.name().into(),
                json!(outcome.intervals[i].map(|v| [v.0, v.1])),
            );
        }
    } else {
        test.insert(metric.name().into(), json!(answer.value));
    }
    let doc = json!({
        "reveal": id,
        "run": a.run,
        "candidate": candidate,
        "partition": partition,
        "rows": n,
        "mode": spec.guard.mode.name(),
        "metric": metric.name(),
        "metrics": prep.metrics.iter().map(|m| m.name()).collect::<Vec<_>>(),
        "test": Value::Object(test),
        "interval": Value::Object(interval),
        "confidence": spec.guard.confidence,
        "resamples": outcome.resamples,
        "bootstrap_seed": outcome.seed.to_string(),
        "answer": {"kind": answer.kind, "value": answer.value},
        "development": {metric.name(): development},
        "reveals": reveals,
        "budget": budget,
        "over_budget": over_budget,
        "rows_revealed_before": rows_seen,
        "optimism": serde_json::to_value(&optimism).unwrap_or(Value::Null),
        "warnings": warnings,
    });
    if a.json {
        out_json(&doc)?;
    } else {
        out(&crate::report::table::reveal(
            &doc,
            &cand.family,
            &crate::report::params_text(&cand.params),
        ))?;
    }
    Ok(0)
}

//! `probity reveal RUN`: score one candidate once on the sealed test rows, counted.
//!
//! Order matters: confirm, compute, write the reveal, then print. A reveal whose score was
//! printed is always in the ledger.

use super::{FIND_TRIES, Global, open_existing, out, out_json, warn};
use crate::error::{Error, Result};
use crate::ledger::RunDetail;
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
    /// Run the candidate's external command even though the run came from another ledger or
    /// its inputs changed (the command and its inputs' hashes are listed first)
    #[arg(long)]
    pub allow_commands: bool,
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

/// Thousands separators for counts in messages.
pub(crate) fn count(n: usize) -> String {
    crate::guard::consult::thousands(n)
}

/// Who is acting now, for a consultation's record.
pub(crate) fn who() -> crate::guard::consult::Who {
    crate::guard::consult::Who {
        at: chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        user: super::user(),
        host: super::host(),
        tool_version: env!("CARGO_PKG_VERSION").into(),
    }
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
    super::command_consent(
        &ledger,
        &d,
        &spec,
        candidate as usize,
        a.allow_commands,
        "revealing it",
    )?;
    // The ledger's identity version: its partitions', this one's included.
    // The partition's own identity version, as it was stored.
    let identity = ledger
        .partition_identity(&d.summary.partition_id)?
        .unwrap_or(crate::data::Identity::CURRENT);
    let prep = crate::runner::prepare(&spec, &table, identity)?;
    if prep.partition_id != d.summary.partition_id {
        // The data's hash and the stored spec were checked: only an altered record (edited,
        // or merged from a forged bundle) can name another partition than they give.
        return Err(Error::Integrity(format!(
            "run {} is stored over partition {}, but its spec and data give partition {}: the run's record was altered (edited, or merged from a forged bundle); `probity audit --verify` checks the ledger",
            a.run, d.summary.partition_id, prep.partition_id
        )));
    }
    if prep.sealed.count(crate::split::Part::Test) == 0 {
        return Err(Error::Input(format!(
            "run {} has no test partition (test = 0): there is nothing to reveal",
            a.run
        )));
    }
    let partition = d.summary.partition_id.clone();
    let seal = ledger.seal(&partition)?;
    let rules = seal.rules;
    if matches!(rules.mode, crate::spec::GuardMode::Reusable { .. })
        && spec.select.metric == crate::metrics::Metric::Brier
        && prep.classes.len() > 2
    {
        return Err(Error::Input(format!(
            "mode = \"reusable\" needs per-row values in [0, 1]; the Brier score of {} classes ranges up to 2. Use accuracy, or mode = \"count\"",
            prep.classes.len()
        )));
    }
    // For the question only: the history that counts is read again inside the write.
    let before = ledger.partition_history(&partition)?;
    let test_rows = prep.test_rows();
    let exposure = ledger.exposure(&table, &prep)?;
    let n = test_rows.len();
    // Ask first: the question shows what has been spent already.
    if !a.yes {
        let question = format!(
            "partition {partition}: consulted {} time(s) so far ({} reveal(s), {} development use(s)), budget {}; {} of its {} test rows were revealed in other partitions{}.\nreveal run {} candidate {} ({} {}) on {} test rows? [y/N] ",
            before.consultations(),
            before.reveals,
            before.uses.len(),
            rules.reveals,
            count(exposure.rows),
            count(n),
            if exposure.rows > 0 {
                format!(
                    " (up to {} time(s), last on {})",
                    exposure.most, exposure.last
                )
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
        rules.confidence,
    )?;
    let metric = spec.select.metric;
    let development = cand
        .validation
        .get(metric.name())
        .and_then(|s| s.mean)
        .unwrap_or(f64::NAN);
    let query = crate::guard::consult::RevealQuery {
        subject: crate::guard::consult::Subject {
            who: who(),
            run: a.run,
            candidate,
            spec_hash: &d.spec_hash,
            partition: &partition,
            metric,
        },
        seed: spec.split.seed,
        development,
        rows: n,
        test: crate::guard::consult::TestScores {
            metrics: &prep.metrics,
            scores: &outcome.scores,
            intervals: &outcome.intervals,
            seed: outcome.seed,
            resamples: outcome.resamples,
        },
        exposure,
    };
    // Decided and written in one transaction, before anything is printed: a score the user
    // saw is never missing from the count, and two reveals at once each see the other.
    // Other partitions holding these test rows: the reveal is a look at their rows too. They
    // are found outside the transaction (it may take a while on a large file); a partition
    // stored meanwhile makes the transaction refuse, and they are found again.
    let mut stored = None;
    for _ in 0..FIND_TRIES {
        let seen = ledger.partitions_seen()?;
        let partners = ledger.test_partners(&table, &prep)?;
        // Where simultaneous reveals are lined up in the race tests.
        crate::failpoint::pause("reveal:consult");
        let mut touched = vec![partition.clone()];
        touched.extend(partners.iter().map(|(p, _)| p.clone()));
        stored = ledger.consult(&seen, &touched, |states| {
            let (seal, history) = &states[0];
            let c = crate::guard::consult::reveal(seal, history, &query)?;
            let mut records = vec![c.record.clone()];
            let mut through = Vec::new();
            for ((seal, history), (other, rows)) in states[1..].iter().zip(&partners) {
                let subject = crate::guard::consult::Subject {
                    partition: other,
                    ..query.subject.clone()
                };
                let t = crate::guard::consult::through(seal, history, &subject, *rows, &partition)?;
                records.push(t.record.clone());
                through.push(t);
            }
            Ok((records, (c, through)))
        })?;
        if stored.is_some() {
            break;
        }
    }
    let Some((ids, (c, through))) = stored else {
        return Err(Error::Internal(format!(
            "new partitions kept being stored while this reveal was checked ({FIND_TRIES} tries); nothing was recorded: run it again"
        )));
    };
    let id = ids.first().copied().unwrap_or(0);
    crate::failpoint::pause("reveal:print");

    let mut warnings = c.warnings.clone();
    for t in &through {
        warnings.extend(t.warnings.iter().cloned());
    }
    if let Some(w) = crate::guard::consult::rules_differ(&seal, &spec.guard, &partition) {
        warnings.push(w);
    }
    for w in &warnings {
        warn(w);
    }
    let mut test = serde_json::Map::new();
    let mut interval = serde_json::Map::new();
    if c.exact {
        for (i, m) in prep.metrics.iter().enumerate() {
            test.insert(m.name().into(), json!(outcome.scores[i]));
            interval.insert(
                m.name().into(),
                json!(outcome.intervals[i].map(|v| [v.0, v.1])),
            );
        }
    } else {
        test.insert(metric.name().into(), json!(c.answer.value));
    }
    let doc = json!({
        "reveal": id,
        "run": a.run,
        "candidate": candidate,
        "partition": partition,
        "rows": n,
        "mode": rules.mode.name(),
        "metric": metric.name(),
        "metrics": prep.metrics.iter().map(|m| m.name()).collect::<Vec<_>>(),
        "test": Value::Object(test),
        "interval": Value::Object(interval),
        "confidence": rules.confidence,
        "resamples": outcome.resamples,
        "bootstrap_seed": outcome.seed.to_string(),
        "answer": {"kind": c.answer.kind, "value": c.answer.value},
        "development": {metric.name(): development},
        "reveals": c.position,
        "development_uses": c.uses.iter().map(|(run, rows)| json!({"run": run, "rows": rows})).collect::<Vec<_>>(),
        "consultations": c.consultations,
        "budget": c.budget,
        "over_budget": c.over_budget,
        "rows_revealed_before": query.exposure.rows,
        "optimism": serde_json::to_value(&c.optimism).unwrap_or(Value::Null),
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

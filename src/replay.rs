//! Replay's comparison: a stored run against a fresh outcome of its spec and data, bit for
//! bit (every fold score, every aggregate, the selection, the partition, the refitted model's
//! predictions digest, the command inputs' hashes). Reads the ledger through its typed reads.

use crate::error::{Error, Result};
use crate::ledger::{Ledger, Stat};
use crate::runner::RunOutcome;
use serde_json::Value;
use std::collections::BTreeMap;

fn json_str(s: &str) -> Value {
    Value::String(s.to_string())
}

/// One item that differs between a stored run and its replay.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Difference {
    pub candidate: Option<i64>,
    pub repeat: Option<i64>,
    pub fold: Option<i64>,
    pub part: Option<String>,
    /// A metric name, or what was compared (`selected`, `predictions_digest`, `partition`, ...).
    pub metric: String,
    pub stored: Value,
    pub replayed: Value,
}

/// Bit-for-bit comparison of a stored run with a fresh outcome.
#[derive(Debug, Clone)]
pub struct Comparison {
    pub compared: i64,
    pub differences: Vec<Difference>,
}

fn same(a: Option<f64>, b: Option<f64>) -> bool {
    match (a, b) {
        (None, None) => true,
        (Some(x), Some(y)) => x.to_bits() == y.to_bits(),
        _ => false,
    }
}

/// Compare every stored score of `run` (every candidate, fold, part and metric, and the
/// aggregates), the selection, the partition and the refitted model's predictions digest
/// with `out`, bit for bit.
pub fn compare(ledger: &Ledger, run: i64, spec_hash: &str, out: &RunOutcome) -> Result<Comparison> {
    let d = ledger
        .run(run)?
        .ok_or_else(|| Error::Input(format!("no run {run}")))?;
    let mut diffs = Vec::new();
    let mut compared = 0i64;
    let mut item = |metric: &str, stored: Value, replayed: Value, diffs: &mut Vec<Difference>| {
        compared += 1;
        if stored != replayed {
            diffs.push(Difference {
                candidate: None,
                repeat: None,
                fold: None,
                part: None,
                metric: metric.into(),
                stored,
                replayed,
            });
        }
    };
    item(
        "spec_hash",
        json_str(&d.spec_hash),
        json_str(spec_hash),
        &mut diffs,
    );
    item(
        "partition",
        json_str(&d.summary.partition_id),
        json_str(&out.prepared.partition_id),
        &mut diffs,
    );
    item(
        "candidates",
        Value::from(d.candidates.len()),
        Value::from(out.candidates.len()),
        &mut diffs,
    );
    item(
        "best",
        Value::from(d.best),
        Value::from(out.best as i64),
        &mut diffs,
    );
    item(
        "selected",
        Value::from(d.summary.selected),
        Value::from(out.selected as i64),
        &mut diffs,
    );
    let digest = ledger.predictions_digest(run)?;
    item(
        "predictions_digest",
        digest.map_or(Value::Null, Value::String),
        json_str(&out.predictions_digest),
        &mut diffs,
    );
    let stored_inputs: BTreeMap<String, String> = ledger.run_inputs(run)?.into_iter().collect();
    let fresh_inputs: BTreeMap<String, String> = out.inputs.iter().cloned().collect();
    for path in stored_inputs
        .keys()
        .chain(fresh_inputs.keys())
        .collect::<std::collections::BTreeSet<_>>()
    {
        let (a, b) = (stored_inputs.get(path), fresh_inputs.get(path));
        item(
            &format!("input {path}"),
            a.map_or(Value::Null, |v| json_str(v)),
            b.map_or(Value::Null, |v| json_str(v)),
            &mut diffs,
        );
    }
    // Scores, by key.
    let stored = ledger.run_fold_scores(run)?;
    let mut fresh: BTreeMap<(i64, i64, i64, String, String), Option<f64>> = BTreeMap::new();
    for c in &out.candidates {
        for f in &c.folds {
            for (part, sc) in [("train", &f.train), ("validation", &f.validation)] {
                for (k, m) in out.prepared.metrics.iter().enumerate() {
                    fresh.insert(
                        (
                            c.id as i64,
                            f.repeat as i64,
                            f.fold as i64,
                            part.into(),
                            m.name().into(),
                        ),
                        sc[k],
                    );
                }
            }
        }
    }
    for (c, (rep, fold, part, metric, v)) in stored {
        compared += 1;
        let key = (c, rep, fold, part.clone(), metric.clone());
        let got = fresh.remove(&key);
        if got.is_none_or(|g| !same(v, g)) {
            diffs.push(Difference {
                candidate: Some(c),
                repeat: Some(rep),
                fold: Some(fold),
                part: Some(part),
                metric,
                stored: v.map_or(Value::Null, Value::from),
                replayed: got.flatten().map_or(Value::Null, Value::from),
            });
        }
    }
    for ((c, rep, fold, part, metric), v) in fresh {
        compared += 1;
        diffs.push(Difference {
            candidate: Some(c),
            repeat: Some(rep),
            fold: Some(fold),
            part: Some(part),
            metric,
            stored: Value::Null,
            replayed: v.map_or(Value::Null, Value::from),
        });
    }
    // Aggregates.
    for c in &out.candidates {
        let Some(row) = d.candidates.iter().find(|x| x.id == c.id as i64) else {
            continue;
        };
        for (part, mean, se, stored) in [
            ("train", &c.train, &c.train_se, &row.train),
            (
                "validation",
                &c.validation,
                &c.validation_se,
                &row.validation,
            ),
        ] {
            for (k, m) in out.prepared.metrics.iter().enumerate() {
                let s = stored.get(m.name()).copied().unwrap_or(Stat {
                    mean: None,
                    se: None,
                });
                for (what, a, b) in [("mean", s.mean, mean[k]), ("se", s.se, se[k])] {
                    compared += 1;
                    if !same(a, b) {
                        diffs.push(Difference {
                            candidate: Some(c.id as i64),
                            repeat: None,
                            fold: None,
                            part: Some(part.into()),
                            metric: format!("{} {what}", m.name()),
                            stored: a.map_or(Value::Null, Value::from),
                            replayed: b.map_or(Value::Null, Value::from),
                        });
                    }
                }
            }
        }
    }
    Ok(Comparison {
        compared,
        differences: diffs,
    })
}

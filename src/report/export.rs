//! `export`: runs, candidates and fold scores as flat CSV or JSON, for analysis elsewhere. Each
//! CSV has one header line; numbers are written in the shortest form that reads back to the
//! same f64, and an absent value is an empty cell (JSON: null). The columns are documented in
//! the README and kept stable: columns may be added at the end, never renamed or removed.

use crate::error::{Error, Result};
use crate::ledger::{FoldScore, RunDetail, Stat};
use crate::metrics::Metric;
use serde_json::{Value, json};
use std::collections::BTreeMap;

/// What a run contributes to an export: its detail, its build facts and its fold scores.
pub struct RunExport {
    pub detail: RunDetail,
    /// (tool commit, target triple, replay of)
    pub build: (String, String, Option<i64>),
    pub fold_scores: Vec<(i64, FoldScore)>,
}

/// The run columns of the CSV, in order.
pub const RUN_COLUMNS: [&str; 31] = [
    "run",
    "experiment",
    "status",
    "started_at",
    "finished_at",
    "tool_version",
    "tool_commit",
    "target",
    "user",
    "host",
    "threads",
    "seed",
    "spec_path",
    "spec_sha256",
    "data_path",
    "data_sha256",
    "data_rows",
    "data_columns",
    "rows_used",
    "partition",
    "n_train",
    "n_validation",
    "n_test",
    "holdout",
    "metric",
    "rule",
    "best",
    "selected",
    "selected_validation",
    "replay_of",
    "note",
];

fn num(v: Option<f64>) -> String {
    // Display writes the shortest digits that read back to the same f64.
    v.map_or(String::new(), |x| x.to_string())
}

fn run_cells(r: &RunExport) -> Vec<String> {
    let d = &r.detail;
    let s = &d.summary;
    vec![
        s.id.to_string(),
        s.experiment.clone(),
        s.status.clone(),
        s.started_at.clone(),
        d.finished_at.clone(),
        d.tool_version.clone(),
        r.build.0.clone(),
        r.build.1.clone(),
        d.user.clone(),
        d.host.clone(),
        d.threads.to_string(),
        d.seed.clone(),
        d.spec_path.clone(),
        d.spec_hash.clone(),
        d.data_path.clone(),
        s.data_sha256.clone(),
        d.data_rows.to_string(),
        d.data_columns.to_string(),
        d.rows_used.to_string(),
        s.partition_id.clone(),
        d.n_train.to_string(),
        d.n_validation.to_string(),
        d.n_test.to_string(),
        d.holdout.to_string(),
        s.metric.clone(),
        d.rule.clone(),
        d.best.to_string(),
        s.selected.to_string(),
        num(s.selected_score),
        r.build.2.map_or(String::new(), |v| v.to_string()),
        s.note.clone().unwrap_or_default(),
    ]
}

/// The metrics present in any of `runs`, in the order tables list them.
fn metrics_of(runs: &[RunExport]) -> Vec<&'static str> {
    Metric::REGRESSION
        .iter()
        .chain(Metric::CLASSIFICATION.iter())
        .map(|m| m.name())
        .filter(|name| {
            runs.iter().any(|r| {
                r.detail
                    .candidates
                    .iter()
                    .any(|c| c.validation.contains_key(*name) || c.train.contains_key(*name))
            })
        })
        .collect()
}

fn csv_text(
    header: Vec<String>,
    rows: impl Iterator<Item = Vec<String>>,
    safe: bool,
) -> Result<String> {
    let mut w = csv::Writer::from_writer(Vec::new());
    let fail = |e: csv::Error| Error::Internal(format!("write CSV: {e}"));
    if safe {
        w.write_record(
            header
                .iter()
                .map(|c| super::spreadsheet_safe(c).into_owned()),
        )
        .map_err(fail)?;
    } else {
        w.write_record(&header).map_err(fail)?;
    }
    for row in rows {
        if safe {
            w.write_record(row.iter().map(|c| super::spreadsheet_safe(c).into_owned()))
                .map_err(fail)?;
        } else {
            w.write_record(&row).map_err(fail)?;
        }
    }
    let bytes = w
        .into_inner()
        .map_err(|e| Error::Internal(format!("write CSV: {e}")))?;
    String::from_utf8(bytes).map_err(|e| Error::Internal(format!("write CSV: {e}")))
}

/// One line per run.
pub fn runs_csv(runs: &[RunExport], safe: bool) -> Result<String> {
    csv_text(
        RUN_COLUMNS.iter().map(|c| c.to_string()).collect(),
        runs.iter().map(run_cells),
        safe,
    )
}

pub fn runs_json(runs: &[RunExport]) -> Value {
    let rows: Vec<Value> = runs
        .iter()
        .map(|r| {
            let d = &r.detail;
            let s = &d.summary;
            json!({
                "run": s.id,
                "experiment": s.experiment,
                "status": s.status,
                "started_at": s.started_at,
                "finished_at": d.finished_at,
                "tool_version": d.tool_version,
                "tool_commit": r.build.0,
                "target": r.build.1,
                "user": d.user,
                "host": d.host,
                "threads": d.threads,
                "seed": d.seed,
                "spec_path": d.spec_path,
                "spec_sha256": d.spec_hash,
                "data_path": d.data_path,
                "data_sha256": s.data_sha256,
                "data_rows": d.data_rows,
                "data_columns": d.data_columns,
                "rows_used": d.rows_used,
                "partition": s.partition_id,
                "n_train": d.n_train,
                "n_validation": d.n_validation,
                "n_test": d.n_test,
                "holdout": d.holdout,
                "metric": s.metric,
                "rule": d.rule,
                "best": d.best,
                "selected": s.selected,
                "selected_validation": s.selected_score,
                "replay_of": r.build.2,
                "note": s.note,
            })
        })
        .collect();
    json!({ "runs": rows })
}

/// One line per candidate: its identity, then for each metric present the train and
/// validation means and standard errors (`validation_rmse`, `validation_rmse_se`, ...).
pub fn candidates_csv(runs: &[RunExport], safe: bool) -> Result<String> {
    let metrics = metrics_of(runs);
    let mut header: Vec<String> = [
        "run",
        "experiment",
        "candidate",
        "family",
        "params",
        "standardize",
        "seed",
        "selected",
        "failure",
    ]
    .iter()
    .map(|c| c.to_string())
    .collect();
    for part in ["train", "validation"] {
        for m in &metrics {
            header.push(format!("{part}_{m}"));
            header.push(format!("{part}_{m}_se"));
        }
    }
    let stat = |map: &BTreeMap<String, Stat>, m: &str| -> [String; 2] {
        let s = map.get(m);
        [num(s.and_then(|s| s.mean)), num(s.and_then(|s| s.se))]
    };
    let rows = runs.iter().flat_map(|r| {
        let s = &r.detail.summary;
        let metrics = &metrics;
        r.detail.candidates.iter().map(move |c| {
            let mut row = vec![
                s.id.to_string(),
                s.experiment.clone(),
                c.id.to_string(),
                c.family.clone(),
                c.params.to_string(),
                c.standardize.to_string(),
                c.seed.clone(),
                (c.id == s.selected).to_string(),
                c.failure.clone().unwrap_or_default(),
            ];
            for map in [&c.train, &c.validation] {
                for m in metrics {
                    row.extend(stat(map, m));
                }
            }
            row
        })
    });
    csv_text(header, rows, safe)
}

pub fn candidates_json(runs: &[RunExport]) -> Value {
    let stats = |map: &BTreeMap<String, Stat>| -> Value {
        Value::Object(
            map.iter()
                .map(|(k, s)| (k.clone(), json!({"mean": s.mean, "se": s.se})))
                .collect(),
        )
    };
    let rows: Vec<Value> = runs
        .iter()
        .flat_map(|r| {
            let s = &r.detail.summary;
            r.detail.candidates.iter().map(move |c| {
                json!({
                    "run": s.id,
                    "experiment": s.experiment,
                    "candidate": c.id,
                    "family": c.family,
                    "params": c.params,
                    "standardize": c.standardize,
                    "seed": c.seed,
                    "selected": c.id == s.selected,
                    "failure": c.failure,
                    "train": stats(&c.train),
                    "validation": stats(&c.validation),
                })
            })
        })
        .collect();
    json!({ "candidates": rows })
}

const FOLD_COLUMNS: [&str; 7] = [
    "run",
    "candidate",
    "repeat",
    "fold",
    "part",
    "metric",
    "value",
];

/// One line per stored fold score (long form).
pub fn folds_csv(runs: &[RunExport], safe: bool) -> Result<String> {
    let rows = runs.iter().flat_map(|r| {
        let id = r.detail.summary.id;
        r.fold_scores
            .iter()
            .map(move |(c, (rep, fold, part, metric, v))| {
                vec![
                    id.to_string(),
                    c.to_string(),
                    rep.to_string(),
                    fold.to_string(),
                    part.clone(),
                    metric.clone(),
                    num(*v),
                ]
            })
    });
    csv_text(
        FOLD_COLUMNS.iter().map(|c| c.to_string()).collect(),
        rows,
        safe,
    )
}

pub fn folds_json(runs: &[RunExport]) -> Value {
    let rows: Vec<Value> = runs
        .iter()
        .flat_map(|r| {
            let id = r.detail.summary.id;
            r.fold_scores.iter().map(move |(c, (rep, fold, part, metric, v))| {
                json!({"run": id, "candidate": c, "repeat": rep, "fold": fold, "part": part, "metric": metric, "value": v})
            })
        })
        .collect();
    json!({ "folds": rows })
}

//! The `--json` documents. Their shapes are documented in the README and kept stable: fields
//! may be added, never renamed or removed.

use crate::ledger::{CandidateRow, RunDetail, RunSummary, Stat};
use serde_json::{Map, Value, json};
use std::collections::BTreeMap;

fn means(m: &BTreeMap<String, Stat>) -> Value {
    Value::Object(
        m.iter()
            .map(|(k, s)| (k.clone(), json!(s.mean)))
            .collect::<Map<_, _>>(),
    )
}

fn ses(m: &BTreeMap<String, Stat>) -> Value {
    Value::Object(
        m.iter()
            .map(|(k, s)| (k.clone(), json!(s.se)))
            .collect::<Map<_, _>>(),
    )
}

fn candidate(c: &CandidateRow) -> Value {
    json!({
        "id": c.id,
        "model": c.family,
        "params": c.params,
        "standardize": c.standardize,
        "seed": c.seed,
        "train": means(&c.train),
        "train_se": ses(&c.train),
        "validation": means(&c.validation),
        "validation_se": ses(&c.validation),
        "failure": c.failure,
    })
}

/// `run --json`.
pub fn run(d: &RunDetail) -> Value {
    let s = &d.summary;
    json!({
        "run": s.id,
        "experiment": s.experiment,
        "data": {"path": d.data_path, "sha256": s.data_sha256, "rows": d.data_rows, "rows_used": d.rows_used, "columns": d.data_columns},
        "partition": {
            "id": s.partition_id,
            "train": d.n_train,
            "validation": d.n_validation,
            "test": d.n_test,
            "folds": if d.holdout { 0 } else { d.folds.len() },
            "holdout": d.holdout,
        },
        "seed": d.seed,
        "metric": s.metric,
        "rule": d.rule,
        "selected": s.selected,
        "best": d.best,
        "candidates": d.candidates.iter().map(candidate).collect::<Vec<_>>(),
        "development": {
            "runs": d.partition_runs,
            "candidates": d.partition_candidates,
            "expected_max": super::table::selection_optimism(d).map(|s| s.0),
            "optimism": super::table::selection_optimism(d).and_then(|s| s.1),
        },
        "nested": d.nested.as_ref().map(|n| json!({
            "metric": n.metric, "estimate": n.estimate, "se": n.se, "outer_folds": n.outer_folds, "selections": n.selections,
        })),
        "warnings": d.warnings,
    })
}

/// `show --json`: everything of `run --json`, plus provenance and the stored spec.
pub fn show(d: &RunDetail) -> Value {
    let mut v = run(d);
    let extra = json!({
        "status": d.summary.status,
        "started_at": d.summary.started_at,
        "finished_at": d.finished_at,
        "tool_version": d.tool_version,
        "user": d.user,
        "host": d.host,
        "threads": d.threads,
        "spec": {"path": d.spec_path, "sha256": d.spec_hash, "text": d.spec_text},
        "folds": d.folds.iter().map(|f| json!({"repeat": f.repeat, "fold": f.fold, "fit": f.n_fit, "score": f.n_score})).collect::<Vec<_>>(),
        "note": d.summary.note,
    });
    if let (Some(o), Value::Object(e)) = (v.as_object_mut(), extra) {
        o.extend(e);
    }
    v
}

/// `history --json`.
/// Runs that recorded a start but were never stored (`history --json` and `audit --json`).
pub fn unfinished(starts: &[crate::ledger::starts::Unfinished]) -> Value {
    Value::Array(
        starts
            .iter()
            .map(|u| {
                json!({
                    "start": u.id,
                    "experiment": u.experiment,
                    "started_at": u.started_at,
                    "state": u.state.name(),
                    "user": u.user,
                    "host": u.host,
                    "pid": u.pid,
                    "data_sha256": u.data_sha256,
                    "spec_path": u.spec_path,
                })
            })
            .collect(),
    )
}

pub fn history(runs: &[RunSummary], starts: &[crate::ledger::starts::Unfinished]) -> Value {
    json!({
        "unfinished": unfinished(starts),
        "runs": runs.iter().map(|r| json!({
            "run": r.id,
            "experiment": r.experiment,
            "started_at": r.started_at,
            "status": r.status,
            "data_sha256": r.data_sha256,
            "partition": r.partition_id,
            "candidates": r.candidates,
            "metric": r.metric,
            "selected": r.selected,
            "selected_model": r.selected_family,
            "selected_params": r.selected_params,
            "selected_validation": r.selected_score,
            "note": r.note,
        })).collect::<Vec<_>>()
    })
}

/// `compare --json`.
pub fn compare(c: &crate::compare::Comparison) -> Value {
    let test = c.test.as_ref().map(|t| {
        let r = t.result.as_ref();
        json!({
            "a": t.a,
            "b": t.b,
            "a_mean": t.a_mean,
            "b_mean": t.b_mean,
            "difference": r.map(|r| r.mean),
            "resamples": r.map(|r| r.resamples),
            "variance": r.map(|r| r.variance),
            "ratio": r.map(|r| r.ratio),
            "se": r.map(|r| r.se),
            "t": r.map(|r| r.t),
            "df": r.map(|r| r.df),
            "p": r.map(|r| r.p),
            "low": r.map(|r| r.low),
            "high": r.map(|r| r.high),
            "reason": t.reason,
        })
    });
    json!({
        "a": c.a,
        "b": c.b,
        "fields": c.fields.iter().map(|f| json!({"name": f.name, "a": f.a, "b": f.b, "same": f.same})).collect::<Vec<_>>(),
        "spec_diff": c.spec_diff.iter().filter(|(k, _)| *k != ' ').map(|(k, l)| json!({"side": if *k == '-' { "a" } else { "b" }, "line": l})).collect::<Vec<_>>(),
        "metric": c.metric,
        "higher_is_better": c.higher_is_better,
        "matched": c.matched.iter().map(|m| json!({
            "model": m.family, "params": m.params, "a": m.a, "b": m.b,
            "a_validation": m.a_score, "b_validation": m.b_score, "difference": m.difference(),
        })).collect::<Vec<_>>(),
        "only_a": c.only_a.iter().map(|(id, f, p)| json!({"candidate": id, "model": f, "params": p})).collect::<Vec<_>>(),
        "only_b": c.only_b.iter().map(|(id, f, p)| json!({"candidate": id, "model": f, "params": p})).collect::<Vec<_>>(),
        "same_folds": c.same_folds,
        "test": test,
        "no_test": c.no_test,
        "verdict": crate::report::table::verdict(c),
    })
}

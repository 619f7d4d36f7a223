//! The `--json` documents. Their shapes are documented in the README and kept stable: fields
//! may be added, never renamed or removed.

use crate::ledger::{CandidateRow, RunDetail, RunSummary, Stat};
use serde::ser::{Serialize, SerializeMap, SerializeSeq, Serializer};
use serde_json::{Map, Value, json};
use std::collections::BTreeMap;

/// A run's document (`run --json`, `show --json`): its fields as values, and its candidates
/// written straight to the output when it is serialised. Built as a tree of values, a
/// 10,000-candidate run took 90 MB and most of its print time. The bytes are the same: keys in
/// byte order, as a value map writes them, and the same numbers.
pub struct RunDoc<'a> {
    fields: Map<String, Value>,
    candidates: &'a [CandidateRow],
}

impl RunDoc<'_> {
    /// Add (or replace) a field.
    pub fn insert(&mut self, key: &str, value: Value) {
        self.fields.insert(key.to_string(), value);
    }

    /// The whole document as a tree of values: the plain definition the streamed form is
    /// tested against.
    #[cfg(test)]
    fn to_value(&self) -> Value {
        let mut v = self.fields.clone();
        v.insert(
            "candidates".into(),
            Value::Array(self.candidates.iter().map(candidate).collect()),
        );
        Value::Object(v)
    }
}

impl Serialize for RunDoc<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut m = s.serialize_map(Some(self.fields.len() + 1))?;
        let mut pending = true;
        for (k, v) in &self.fields {
            if pending && k.as_str() > "candidates" {
                m.serialize_entry("candidates", &Candidates(self.candidates))?;
                pending = false;
            }
            m.serialize_entry(k, v)?;
        }
        if pending {
            m.serialize_entry("candidates", &Candidates(self.candidates))?;
        }
        m.end()
    }
}

struct Candidates<'a>(&'a [CandidateRow]);

impl Serialize for Candidates<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut q = s.serialize_seq(Some(self.0.len()))?;
        for c in self.0 {
            q.serialize_element(&CandidateDoc(c))?;
        }
        q.end()
    }
}

/// `candidate(c)`, written as it goes (keys in byte order).
struct CandidateDoc<'a>(&'a CandidateRow);

impl Serialize for CandidateDoc<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let c = self.0;
        let mut m = s.serialize_map(Some(10))?;
        m.serialize_entry("failure", &c.failure)?;
        m.serialize_entry("id", &c.id)?;
        m.serialize_entry("model", &c.family)?;
        m.serialize_entry("params", &c.params)?;
        m.serialize_entry("seed", &c.seed)?;
        m.serialize_entry("standardize", &c.standardize)?;
        m.serialize_entry("train", &Stats(&c.train, false))?;
        m.serialize_entry("train_se", &Stats(&c.train, true))?;
        m.serialize_entry("validation", &Stats(&c.validation, false))?;
        m.serialize_entry("validation_se", &Stats(&c.validation, true))?;
        m.end()
    }
}

/// `means` (or `ses` when `.1`), written as it goes.
struct Stats<'a>(&'a BTreeMap<String, Stat>, bool);

impl Serialize for Stats<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut m = s.serialize_map(Some(self.0.len()))?;
        for (k, st) in self.0 {
            // As a value would: a number, or null when absent or not finite.
            let v = if self.1 { st.se } else { st.mean }.filter(|v| v.is_finite());
            m.serialize_entry(k, &v)?;
        }
        m.end()
    }
}

#[cfg(test)]
fn means(m: &BTreeMap<String, Stat>) -> Value {
    Value::Object(
        m.iter()
            .map(|(k, s)| (k.clone(), json!(s.mean)))
            .collect::<Map<_, _>>(),
    )
}

#[cfg(test)]
fn ses(m: &BTreeMap<String, Stat>) -> Value {
    Value::Object(
        m.iter()
            .map(|(k, s)| (k.clone(), json!(s.se)))
            .collect::<Map<_, _>>(),
    )
}

/// A candidate's document as a value (the definition `CandidateDoc` is tested against).
#[cfg(test)]
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
pub fn run(d: &RunDetail) -> RunDoc<'_> {
    let s = &d.summary;
    let fields = json!({
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
    });
    let fields = match fields {
        Value::Object(m) => m,
        _ => Map::new(),
    };
    RunDoc {
        fields,
        candidates: &d.candidates,
    }
}

/// `show --json`: everything of `run --json`, plus provenance and the stored spec.
pub fn show(d: &RunDetail) -> RunDoc<'_> {
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
    if let Value::Object(e) = extra {
        v.fields.extend(e);
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

#[cfg(test)]
mod tests {
    use super::*;

    fn row(id: i64, mean: Option<f64>, failure: Option<&str>) -> CandidateRow {
        let stats = |m: Option<f64>| -> BTreeMap<String, Stat> {
            [("rmse", m), ("mae", Some(0.1 + 0.2)), ("r2", Some(-0.0))]
                .into_iter()
                .map(|(k, v)| {
                    (
                        k.to_string(),
                        Stat {
                            mean: v,
                            se: v.map(|x| x / 3.0),
                        },
                    )
                })
                .collect()
        };
        CandidateRow {
            id,
            failure: failure.map(str::to_string),
            family: "ridge".into(),
            params: json!({"lambda": 1e-300, "feature": "temp\"day"}),
            standardize: id % 2 == 0,
            seed: "18446744073709551615".into(),
            train: stats(mean),
            validation: stats(mean.map(|m| m * 7.0)),
        }
    }

    /// The streamed document is byte for byte the value tree's (pretty and compact), with
    /// absent, infinite and NaN scores, a failure, and fields on both sides of "candidates".
    #[test]
    fn the_streamed_run_document_equals_the_value_tree() {
        let rows = [
            row(1, Some(1.5), None),
            row(2, None, Some("exit status 3")),
            row(3, Some(f64::INFINITY), None),
            row(4, Some(f64::NAN), None),
            row(5, Some(5e-324), None),
        ];
        for cut in [0, 1, 3, 5] {
            let mut doc = RunDoc {
                fields: Map::new(),
                candidates: &rows[..cut],
            };
            for k in ["best", "z", "candidate", "candidatesx", "a", "data"] {
                doc.insert(k, json!({"k": k, "n": [1, 2.5, null]}));
            }
            let tree = doc.to_value();
            assert_eq!(
                serde_json::to_string_pretty(&doc).unwrap(),
                serde_json::to_string_pretty(&tree).unwrap()
            );
            assert_eq!(
                serde_json::to_string(&doc).unwrap(),
                serde_json::to_string(&tree).unwrap()
            );
        }
    }
}

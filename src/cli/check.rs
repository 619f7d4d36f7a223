//! `probity check SPEC`: validate the spec and the data, show the partition and folds; writes
//! nothing.

use super::{Global, load_inputs, out, out_json};
use crate::data::Values;
use crate::error::Result;
use crate::split::Part;
use serde_json::json;
use std::path::PathBuf;

/// Validate a spec and its data without running or writing anything
#[derive(clap::Args, Debug)]
pub struct Args {
    /// The experiment spec (TOML)
    pub spec: PathBuf,
    /// The memory a fit may use, e.g. 8G (K, M, G, T: binary units) [default: what the
    /// system reports available]
    #[arg(long, value_name = "SIZE", value_parser = super::parse_size)]
    pub memory: Option<u64>,
    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

pub fn run(_g: &Global, a: Args) -> Result<i32> {
    let (spec, table) = load_inputs(&a.spec, crate::data::all_cores())?;
    // Nothing is stored, so no identity is computed.
    let prep = crate::runner::prepare(&spec, &table, crate::data::Identity::CURRENT)?;
    let entries = crate::runner::entries(&spec);
    crate::runner::check_grid(&spec, &table, &prep, &entries, super::memory(a.memory))?;
    let n_cands: usize = entries.iter().map(|e| e.expand().len()).sum();
    let s = &prep.sealed;
    let folds: Vec<serde_json::Value> =
        s.folds().iter().map(|f| json!({"repeat": f.repeat, "fold": f.index, "fit": f.fit.len(), "score": f.score.len()})).collect();
    let kinds: Vec<(String, &str)> = prep
        .features
        .iter()
        .map(|&c| {
            let col = &table.columns[c];
            (
                col.name.clone(),
                if matches!(col.values, Values::Numeric(_)) {
                    "numeric"
                } else {
                    "categorical"
                },
            )
        })
        .collect();
    if a.json {
        return out_json(&json!({
            "experiment": spec.name,
            "spec_sha256": spec.canonical_hash(),
            "data": {"path": spec.data.path.display().to_string(), "sha256": table.sha256, "rows": table.n_rows(), "rows_used": prep.rows.len(), "columns": table.columns.len()},
            "target": spec.data.target.name,
            "features": kinds.iter().map(|(n, k)| json!({"name": n, "kind": k})).collect::<Vec<_>>(),
            "partition": {"id": prep.partition_id, "train": s.count(Part::Train), "validation": s.count(Part::Validation), "test": s.count(Part::Test), "holdout": s.holdout()},
            "folds": folds,
            "candidates": n_cands,
            "warnings": prep.warnings,
        }))
        .map(|_| 0);
    }
    let mut t = String::new();
    t.push_str(&format!(
        "spec       {} ok (experiment {}, canonical sha256 {})\n",
        a.spec.display(),
        spec.name,
        &spec.canonical_hash()[..16]
    ));
    t.push_str(&format!(
        "data       {}\n           sha256 {}\n",
        spec.data.path.display(),
        table.sha256
    ));
    t.push_str(&format!(
        "rows       {} in file, {} used, {} columns\n",
        table.n_rows(),
        prep.rows.len(),
        table.columns.len()
    ));
    t.push_str(&format!("target     {}\n", spec.data.target.name));
    let fl: Vec<String> = kinds
        .iter()
        .map(|(n, k)| {
            if *k == "numeric" {
                n.clone()
            } else {
                format!("{n} (categorical)")
            }
        })
        .collect();
    t.push_str(&format!("features   {}\n", fl.join(", ")));
    t.push_str(&format!(
        "partition  {}  train {}  validation {}  test {} (sealed)\n",
        prep.partition_id,
        s.count(Part::Train),
        s.count(Part::Validation),
        s.count(Part::Test)
    ));
    if s.holdout() {
        t.push_str("scoring    fixed validation partition\n");
    } else {
        for f in s.folds() {
            t.push_str(&format!(
                "fold       repeat {} fold {}: fit {} rows, score {} rows\n",
                f.repeat + 1,
                f.index + 1,
                f.fit.len(),
                f.score.len()
            ));
        }
    }
    t.push_str(&format!(
        "grid       {n_cands} candidates (the mean baseline included)\n"
    ));
    for w in &prep.warnings {
        super::warn(w);
    }
    out(&t).map(|_| 0)
}

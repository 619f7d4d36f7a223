//! `probity audit`: every partition's reveals against its budget, and where revealed rows turn
//! up again, and the tamper-evident chain. Exit 4 when the chain is broken, 3 when any partition
//! is over budget, so a team can gate on it.

use super::{Global, open_reading, out, out_json};
use crate::error::Result;
use serde_json::{Value, json};

/// Check every partition's reveals against its budget (exit 3 when any is over)
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Only verify the tamper-evident chain (audit always verifies it too)
    #[arg(long)]
    pub verify: bool,
    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_reading(g)?;
    let (entries, breaks) = ledger.verify()?;
    let head = ledger.head()?;
    // Reported, never counted against the chain: an interrupted run stored nothing.
    let starts = ledger.unfinished()?;
    let chain = json!({
        "entries": entries,
        "head": head,
        "intact": breaks.is_empty(),
        "breaks": breaks.iter().map(|b| json!({"seq": b.seq, "kind": b.kind, "id": b.id, "what": b.what})).collect::<Vec<_>>(),
    });
    if a.verify {
        if a.json {
            out_json(
                &json!({"chain": chain, "unfinished": crate::report::json::unfinished(&starts)}),
            )?;
        } else {
            let mut text = crate::report::table::chain(&chain);
            text.push_str(&crate::report::table::unfinished(&starts));
            out(&text)?;
        }
        return Ok(if breaks.is_empty() { 0 } else { 4 });
    }
    let parts = ledger.audit()?;
    let mut rows = Vec::new();
    let mut any_over = false;
    for p in &parts {
        let rules = &p.seal.rules;
        let h = &p.history;
        let over = crate::guard::consult::over_budget(rules, h);
        any_over |= over;
        let status = if p.test_rows == 0 {
            "no test rows"
        } else if h.consultations() == 0 {
            "sealed"
        } else if over {
            "OVER BUDGET"
        } else {
            "within budget"
        };
        let optimism: Value = p
            .optimism
            .as_deref()
            .and_then(|o| serde_json::from_str(o).ok())
            .unwrap_or(Value::Null);
        rows.push(json!({
            "id": p.id,
            "experiment": p.experiments.join(", "),
            "test_rows": p.test_rows,
            "reveals": h.reveals,
            "development_uses": h.uses.iter().map(|(run, n)| json!({"run": run, "rows": n})).collect::<Vec<_>>(),
            "consultations": h.consultations(),
            "candidates_revealed": h.candidates.len(),
            "people": p.people,
            "first_reveal": p.first,
            "last_reveal": p.last,
            "mode": rules.mode.name(),
            "budget": rules.reveals,
            "overlap": rules.overlap.name(),
            "sealed_by_run": p.seal.by,
            "over_budget": over,
            "optimism": optimism,
            "status": status,
        }));
    }
    // Each warning with what it is about (the text labels it; JSON keeps the sentences).
    let mut warnings: Vec<(&str, String)> = ledger
        .overlap_findings()?
        .into_iter()
        .map(|w| ("overlap", w))
        .collect();
    let merges = ledger.merges()?;
    for m in merges.iter().filter(|m| m["verdict"] != "trusted") {
        warnings.push(("unverified merge", format!(
            "merge {} ({} by {}@{}) brought {} entries from a bundle {}, merged with --allow-unverified: nothing shows who made them",
            m["merge"],
            m["merged_at"].as_str().unwrap_or(""),
            m["user"].as_str().unwrap_or(""),
            m["host"].as_str().unwrap_or(""),
            m["entries_merged"],
            match (m["signer"].as_str(), m["public_key"].as_str()) {
                (Some(n), Some(k)) => format!("signed by {n:?} with key {k}, which this ledger does not trust"),
                _ => "that was not signed".to_string(),
            }
        )));
    }
    if a.json {
        let warnings: Vec<&String> = warnings.iter().map(|(_, w)| w).collect();
        out_json(
            &json!({"partitions": rows, "warnings": warnings, "merges": merges, "chain": chain, "unfinished": crate::report::json::unfinished(&starts)}),
        )?;
    } else {
        let mut text = crate::report::table::audit(&rows, &warnings);
        text.push_str(&crate::report::table::chain(&chain));
        text.push_str(&crate::report::table::unfinished(&starts));
        out(&text)?;
    }
    // A broken chain outranks a spent budget: nothing else in the ledger can be trusted.
    Ok(if !breaks.is_empty() {
        4
    } else if any_over {
        3
    } else {
        0
    })
}

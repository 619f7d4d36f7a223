//! `probity show RUN`: one stored run in full.

use super::{Global, open_reading, out, out_json};
use crate::error::Result;

/// Show one run: provenance, partition, every candidate's scores, warnings
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run id (as `history` lists)
    pub run: i64,
    /// List every candidate (the table otherwise stops after 50)
    #[arg(long)]
    pub all: bool,
    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_reading(g)?;
    let d = super::stored_run(&ledger, a.run)?;
    let notes = ledger.notes(a.run)?;
    if a.json {
        let mut doc = crate::report::json::show(&d);
        doc.insert(
            "notes",
            serde_json::json!(
                notes
                    .iter()
                    .map(
                        |(at, user, text)| serde_json::json!({"at": at, "user": user, "text": text})
                    )
                    .collect::<Vec<_>>()
            ),
        );
        out_json(&doc)?;
        return Ok(0);
    }
    let mut t = crate::report::table::run_header(&d);
    t.push_str(&format!(
        "spec       {}  canonical sha256 {}\n",
        d.spec_path, d.spec_hash
    ));
    t.push_str(&format!(
        "tool       probity {}, {} threads, finished {}\n",
        d.tool_version, d.threads, d.finished_at
    ));
    if let Some(n) = &d.summary.note {
        t.push_str(&format!("note       {n}\n"));
    }
    t.push('\n');
    t.push_str(&crate::report::table::leaderboard(
        &d,
        if a.all { None } else { Some(50) },
    ));
    if !notes.is_empty() {
        t.push_str("\nnotes:\n");
        for (at, user, text) in &notes {
            t.push_str(&format!("  - {at} {user}: {text}\n"));
        }
    }
    if !d.warnings.is_empty() {
        t.push_str("\nwarnings raised by this run:\n");
        for w in &d.warnings {
            t.push_str(&format!("  - {w}\n"));
        }
    }
    out(&t)?;
    Ok(0)
}

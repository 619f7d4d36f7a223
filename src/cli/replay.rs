//! `probity replay RUN`: re-execute a stored run from the ledger's spec text and seeds, compare
//! every stored number bit for bit, and record the replay. Exit 0 identical, 5 different.

use super::{Global, open_existing, out, out_json};
use crate::error::{Error, Result};
use crate::ledger::ReplayRecord;
use serde_json::json;
use std::path::PathBuf;

/// Re-run a stored run from its stored spec and seeds and compare every score bit for bit
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run id
    pub run: i64,
    /// The data file, when it moved (its SHA-256 must match the run's)
    #[arg(long, value_name = "PATH")]
    pub data: Option<PathBuf>,
    /// Worker threads (results do not depend on it) [default: all cores]
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Run the external commands the stored spec names (they are shown first)
    #[arg(long)]
    pub allow_commands: bool,
    /// The memory a fit may use, e.g. 8G (K, M, G, T: binary units) [default: what the
    /// system reports available]
    #[arg(long, value_name = "SIZE", value_parser = super::parse_size)]
    pub memory: Option<u64>,
    /// Print JSON instead of text
    #[arg(long)]
    pub json: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let mut ledger = open_existing(g)?;
    let d = super::stored_run(&ledger, a.run)?;
    // The spec comes from the ledger, not from the file on disk, which may have changed.
    let (spec, table) = super::reveal::reload(&d, a.data.as_deref())?;
    // A replay runs what the ledger says; external commands only with explicit consent, and a
    // merged run's in the box whatever its spec says.
    if ledger.run_merged(d.summary.id)? {
        crate::external::sandbox::force();
    }
    let commands: Vec<String> = spec
        .models
        .iter()
        .filter_map(|m| m.command.as_ref())
        .map(super::command_line)
        .collect();
    if !commands.is_empty() {
        if !a.allow_commands {
            return Err(Error::Input(format!(
                "run {} uses external commands ({}); replay runs them only with --allow-commands",
                a.run,
                commands.join("; ")
            )));
        }
        for c in &commands {
            eprintln!("replay will run: {c}");
        }
    }
    let threads = a
        .threads
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()))
        .max(1);
    let started = chrono::Utc::now();
    // A replay is a run: its start is recorded, so a killed replay shows as interrupted.
    let start = ledger.begin_run(&super::start_info(
        &spec,
        &table,
        d.spec_path.clone(),
        &started,
    ))?;
    let stored = replay_and_store(
        &mut ledger,
        &a,
        &d,
        &spec,
        &table,
        threads,
        started,
        start.id,
    );
    match stored {
        Ok(doc) => {
            start.release();
            let identical = doc["identical"] == json!(true);
            if a.json {
                out_json(&doc)?;
            } else {
                out(&crate::report::table::replay(&doc))?;
            }
            Ok(if identical { 0 } else { 5 })
        }
        Err(e) => {
            if let Err(f) = ledger.abandon_run(start) {
                super::warn(&format!(
                    "the start of this replay stays in the ledger (shown as interrupted): {f}"
                ));
            }
            Err(e)
        }
    }
}

/// Run the stored spec again, compare, and store the replay with its verdict; the JSON
/// document both outputs are made from.
#[allow(clippy::too_many_arguments)]
fn replay_and_store(
    ledger: &mut crate::ledger::Ledger,
    a: &Args,
    d: &crate::ledger::RunDetail,
    spec: &crate::spec::Spec,
    table: &crate::data::Table,
    threads: usize,
    started: chrono::DateTime<chrono::Utc>,
    start: i64,
) -> Result<serde_json::Value> {
    let outcome = {
        let progress = super::progress::Progress::start(a.json);
        crate::runner::run_reporting(spec, table, threads, super::memory(a.memory), &|d, t| {
            progress.tasks(d, t)
        })?
    };
    let cmp = crate::replay::compare(ledger, a.run, &spec.canonical_hash(), &outcome)?;
    let identical = cmp.differences.is_empty();
    let shown: Vec<_> = cmp.differences.iter().take(100).collect();
    let (stored_version, stored_commit, stored_target, stored_threads, _) =
        ledger.provenance(a.run)?;
    let mut meta = super::run_meta(
        &started,
        threads,
        d.spec_path.clone(),
        a.data
            .as_deref()
            .map(super::absolute)
            .unwrap_or_else(|| d.data_path.clone()),
        Some(format!("replay of run {}", a.run)),
        Some(start),
    );
    meta.replay = Some(ReplayRecord {
        replay_of: a.run,
        identical,
        compared: cmp.compared,
        differing: cmp.differences.len() as i64,
        differences: serde_json::to_string(&shown).map_err(|e| Error::Internal(e.to_string()))?,
    });
    let id = ledger.write_run(spec, table, &outcome, &meta)?;
    let doc = json!({
        "run": id,
        "replay_of": a.run,
        "identical": identical,
        "compared": cmp.compared,
        "identical_items": cmp.compared - cmp.differences.len() as i64,
        "differing": cmp.differences.len(),
        "differences": shown,
        "stored": {"tool_version": stored_version, "tool_commit": stored_commit, "target": stored_target, "threads": stored_threads},
        "replayed": {"tool_version": env!("CARGO_PKG_VERSION"), "tool_commit": env!("PROBITY_GIT_COMMIT"), "target": env!("PROBITY_TARGET"), "threads": threads},
    });
    Ok(doc)
}

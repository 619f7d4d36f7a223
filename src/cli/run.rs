//! `probity run SPEC`: fit the grid with cross-validation, store everything, print the
//! leaderboard and the run id.

use super::{Global, absolute, load_inputs, open_for_write, out, out_json, warn};
use crate::error::Result;
use crate::ledger::RunMeta;
use std::path::PathBuf;

/// Run an experiment: every candidate on every fold, stored in the ledger
#[derive(clap::Args, Debug)]
pub struct Args {
    /// The experiment spec (TOML)
    pub spec: PathBuf,
    /// A note stored with the run
    #[arg(long, value_name = "TEXT")]
    pub note: Option<String>,
    /// Worker threads (results are identical for any number) [default: all cores]
    #[arg(long, value_name = "N")]
    pub threads: Option<usize>,
    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let started = chrono::Utc::now();
    let mut phases = super::Phases::start();
    let progress = super::progress::Progress::start(a.json);
    progress.phase("reading the data");
    let threads = a.threads.unwrap_or_else(crate::data::all_cores).max(1);
    let (spec, table) = load_inputs(&a.spec, threads)?;
    phases.mark("load");
    // An existing ledger is opened (and migrated) before the long work, so a bad ledger fails
    // fast; a new one is created only once the run has succeeded, so a refused spec leaves no
    // trace on disk.
    let (path, _) = crate::ledger::locate(g.ledger.as_deref(), &super::cwd()?);
    let early = if path.exists() {
        Some(open_for_write(g)?)
    } else {
        None
    };
    if let Some(dir) = path
        .parent()
        .filter(|d| g.ledger.is_some() && !d.as_os_str().is_empty() && !d.is_dir())
    {
        return Err(crate::error::Error::LedgerRefused {
            path: path.clone(),
            msg: format!(
                "the folder {} does not exist; create it or pass another --ledger path",
                dir.display()
            ),
        });
    }
    // The partition is stored in its own transaction while the grid runs (once the spec has
    // passed every check, so a refused spec still leaves no ledger behind).
    let mut slot = early;
    let mut fresh: Option<String> = None;
    let mut record = |prep: &crate::runner::Prepared, keys: &[crate::data::RowKey]| -> Result<()> {
        let ledger = match &mut slot {
            Some(l) => l,
            None => slot.insert(open_for_write(g)?),
        };
        if ledger.record_partition(&spec, &table, prep, keys)? {
            fresh = Some(prep.partition_id.clone());
        }
        Ok(())
    };
    let outcome = crate::runner::run_recording(
        &spec,
        &table,
        threads,
        &|d, t| progress.tasks(d, t),
        Some(&mut record),
    );
    let mut outcome = match outcome {
        Ok(o) => o,
        Err(e) => {
            // A run that failed leaves no partition it brought in; keep the first error.
            if let (Some(l), Some(id)) = (slot.as_mut(), &fresh)
                && let Err(f) = l.forget_partition(id)
            {
                warn(&format!(
                    "the partition {id} stays in the ledger unused: {f}"
                ));
            }
            return Err(e);
        }
    };
    progress.phase("writing the ledger");
    phases.mark("run");
    let mut ledger = match slot {
        Some(l) => l,
        None => open_for_write(g)?,
    };
    let finished = chrono::Utc::now();
    let meta = RunMeta {
        started_at: started.to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        finished_at: finished.to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        user: super::user(),
        host: super::host(),
        threads,
        spec_path: absolute(&a.spec),
        data_path: absolute(&spec.data.path),
        note: a.note.clone(),
        tool_commit: env!("PROBITY_GIT_COMMIT").to_string(),
        target_triple: env!("PROBITY_TARGET").to_string(),
        replay: None,
    };
    exposure_warnings(&ledger, &table, &mut outcome)?;
    phases.mark("exposure");
    let id = ledger.write_run(&spec, &table, &outcome, &meta)?;
    drop(progress);
    phases.mark("ledger");
    let detail = ledger
        .run(id)?
        .ok_or_else(|| crate::error::Error::Internal(format!("run {id} vanished after commit")))?;
    phases.mark("read back");
    for w in &detail.warnings {
        warn(w);
    }
    if a.json {
        out_json(&crate::report::json::run(&detail))?;
        phases.mark("print");
        return Ok(0);
    }
    let mut t = crate::report::table::run_header(&detail);
    t.push('\n');
    t.push_str(&crate::report::table::leaderboard(&detail, Some(20)));
    t.push_str(&format!(
        "\nrun {id} stored in {}\n",
        ledger.path().display()
    ));
    out(&t)?;
    Ok(0)
}

/// Warn (and store the warning) when rows of this run were test rows of a revealed partition:
/// development rows that were revealed leak the test scores' information into the selection,
/// and a test partition with revealed rows is not fresh.
fn exposure_warnings(
    ledger: &crate::ledger::Ledger,
    table: &crate::data::Table,
    outcome: &mut crate::runner::RunOutcome,
) -> Result<()> {
    if !ledger.has_reveals()? {
        return Ok(());
    }
    let prep = &outcome.prepared;
    let dev = prep.development_keys(table);
    let (n, most, last) = super::reveal::exposed(ledger, &dev, None)?;
    if n > 0 {
        outcome.warnings.push(format!(
            "{} of {} development rows were in a test partition revealed {most} time(s) (last on {last}); what those reveals showed can leak into this selection",
            super::reveal::count(n),
            super::reveal::count(dev.len())
        ));
    }
    let own = ledger.partition_history(&prep.partition_id)?.reveals;
    if own > 0 {
        outcome.warnings.push(format!(
            "this test partition ({}) has already been revealed {own} time(s); a new reveal will count on top",
            prep.partition_id
        ));
    }
    let (n, most, last) =
        super::reveal::exposed(ledger, &prep.test_keys, Some(&prep.partition_id))?;
    if n > 0 {
        outcome.warnings.push(format!(
            "{} of {} test rows were already revealed in another partition (up to {most} time(s), last on {last}); their effective reveal count is {}, so this test partition is not fresh",
            super::reveal::count(n),
            super::reveal::count(prep.test_keys.len()),
            most.max(own as i64)
        ));
    }
    Ok(())
}

//! `probity run SPEC`: fit the grid with cross-validation, store everything, print the
//! leaderboard and the run id.

use super::{Global, absolute, load_inputs, open_for_write, out, out_json, warn};
use crate::data::Table;
use crate::error::Result;
use crate::ledger::Ledger;
use crate::ledger::starts::{RunStart, StartInfo};
use crate::runner::{Identities, Prepared};
use crate::spec::Spec;
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
    /// The memory a fit may use, e.g. 8G (K, M, G, T: binary units) [default: what the
    /// system reports available]
    #[arg(long, value_name = "SIZE", value_parser = super::parse_size)]
    pub memory: Option<u64>,
    /// Print JSON instead of a table
    #[arg(long)]
    pub json: bool,
}

/// What a run stores while its grid goes on: the start (its own small transaction, before the
/// grid), then the partition (its own transaction, beside the grid). A new ledger is created
/// only here, once the spec has passed every check, so a refused spec leaves no trace on disk.
struct Store<'a> {
    g: &'a Global,
    spec: &'a Spec,
    table: &'a Table,
    info: StartInfo,
    ledger: Option<Ledger>,
    start: Option<RunStart>,
    /// The partition's id when this run brought it into the ledger.
    fresh: Option<String>,
}

impl Store<'_> {
    fn ledger(&mut self) -> Result<&mut Ledger> {
        if self.ledger.is_none() {
            self.ledger = Some(open_for_write(self.g)?);
        }
        self.ledger
            .as_mut()
            .ok_or_else(|| crate::error::Error::Internal("no ledger".into()))
    }

    /// Undo what a failed run stored: its start and a partition nothing else uses. The run's
    /// own error is the one reported; a failure here is only a warning.
    fn forget(&mut self) {
        let (start, fresh) = (self.start.take(), self.fresh.take());
        let Some(l) = self.ledger.as_mut() else {
            return;
        };
        if let Some(id) = fresh
            && let Err(f) = l.forget_partition(&id)
        {
            warn(&format!(
                "the partition {id} stays in the ledger unused: {f}"
            ));
        }
        if let Some(s) = start {
            let id = s.id;
            if let Err(f) = l.abandon_run(s) {
                warn(&format!(
                    "the start {id} of this run stays in the ledger (shown as interrupted): {f}"
                ));
            }
        }
    }
}

impl crate::runner::Recorder for Store<'_> {
    fn identity(&mut self, partition: &str) -> Result<crate::data::Identity> {
        // A partition an earlier probity stored keeps its version; a new one takes the current.
        Ok(match &self.ledger {
            Some(l) => l.partition_identity(partition)?,
            None => None,
        }
        .unwrap_or(crate::data::Identity::CURRENT))
    }

    fn started(&mut self, prep: &Prepared) -> Result<()> {
        // A partition sealed with overlap = "refuse" stops the run before its grid (the run's
        // own transaction checks again, for partitions stored meanwhile).
        if let Some(l) = &self.ledger {
            let overlapping = l.development_overlaps(self.table, prep)?;
            crate::guard::consult::development(prep.sealed.development().len(), &overlapping)?;
        }
        let info = self.info.clone();
        let start = self.ledger()?.begin_run(&info)?;
        self.start = Some(start);
        Ok(())
    }

    fn partition(&mut self, prep: &Prepared, ids: &Identities) -> Result<()> {
        let (spec, table) = (self.spec, self.table);
        let info = self.info.clone();
        let mark = crate::ledger::SealMark {
            at: &info.started_at,
            user: &info.user,
            host: &info.host,
        };
        if self
            .ledger()?
            .record_partition(spec, table, prep, ids, &mark)?
        {
            self.fresh = Some(prep.partition_id.clone());
        }
        Ok(())
    }
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let started = chrono::Utc::now();
    let mut phases = super::Phases::start();
    let progress = super::progress::Progress::start(a.json);
    progress.phase("reading the data");
    let threads = a.threads.unwrap_or_else(crate::data::all_cores).max(1);
    if let Some(n) = &a.note {
        crate::ledger::check_note(n)?;
    }
    if phases.parse_only {
        // The benchmark's floor: the spec and the data file read and parsed as for a run,
        // without the file's SHA-256; then nothing else.
        let (_, table) = super::parse_inputs(&a.spec, threads)?;
        phases.mark("parse");
        eprintln!(
            "parsed {} rows x {} columns",
            table.n_rows(),
            table.columns.len()
        );
        return Ok(0);
    }
    let (spec, table) = load_inputs(&a.spec, threads)?;
    phases.mark("load");
    // An existing ledger is opened (and migrated) before the long work, so a bad ledger fails
    // fast; a new one is created only once the checks have passed (`Store`).
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
    let mut store = Store {
        g,
        spec: &spec,
        table: &table,
        info: super::start_info(&spec, &table, absolute(&a.spec), &started),
        ledger: early,
        start: None,
        fresh: None,
    };
    let outcome = crate::runner::run_recording(
        &spec,
        &table,
        threads,
        super::memory(a.memory),
        &|d, t| progress.tasks(d, t),
        Some(&mut store),
    );
    let stored = outcome.and_then(|mut outcome| {
        progress.phase("writing the ledger");
        phases.mark("run");
        let meta = super::run_meta(
            &started,
            threads,
            absolute(&a.spec),
            absolute(&spec.data.path),
            a.note.clone(),
            store.start.as_ref().map(|s| s.id),
        );
        let ledger = store.ledger()?;
        exposure_warnings(ledger, &spec, &table, &mut outcome)?;
        phases.mark("exposure");
        ledger.write_run(&spec, &table, &outcome, &meta)
    });
    let id = match stored {
        Ok(id) => id,
        Err(e) => {
            store.forget();
            return Err(e);
        }
    };
    if let Some(s) = store.start.take() {
        s.release();
    }
    let ledger = store.ledger()?;
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

/// Warn (and store the warning) when this run's own test partition was consulted before, when
/// its test rows were revealed in other partitions (it is then not fresh), and when its spec's
/// `[guard]` differs from the rules the partition was sealed with. (Development rows that are
/// other partitions' test rows are counted and warned in the run's own transaction.)
fn exposure_warnings(
    ledger: &crate::ledger::Ledger,
    spec: &Spec,
    table: &Table,
    outcome: &mut crate::runner::RunOutcome,
) -> Result<()> {
    let prep = &outcome.prepared;
    let seal = ledger.seal(&prep.partition_id)?;
    let (own, exposure) = if ledger.has_reveals()? {
        (
            ledger.partition_history(&prep.partition_id)?,
            ledger.exposure(table, prep)?,
        )
    } else {
        Default::default()
    };
    let w = crate::guard::consult::run_warnings(
        &seal,
        &spec.guard,
        &prep.partition_id,
        &own,
        &exposure,
        prep.sealed.count(crate::split::Part::Test),
    );
    outcome.warnings.extend(w);
    Ok(())
}

//! Command-line interface: clap types, one file per subcommand. The only code that reads the
//! clock or the environment, prints, or writes report files. No statistics here.

mod audit;
mod check;
mod compare;
mod export;
mod history;
mod key;
mod merge;
mod note;
mod pack;
mod plot;
mod predict;
mod progress;
mod replay;
mod report;
mod reveal;
mod run;
mod show;

use crate::error::{Error, Result};
use clap::{Parser, Subcommand};
use std::io::Write;
use std::path::{Path, PathBuf};

/// How often a consultation finds the partitions it touches again when new ones were stored
/// while it looked (`Ledger::consult` returns `None`).
const FIND_TRIES: usize = 5;

const EXIT_CODES: &str = "Exit codes: 0 ok, 1 internal error, 2 bad input or usage, 3 test budget exceeded, \
4 ledger integrity failure, 5 replay differs.";

/// Deterministic, audited model selection on tabular data.
#[derive(Parser, Debug)]
#[command(name = "probity", version, about, after_help = EXIT_CODES)]
pub struct Cli {
    #[command(flatten)]
    pub global: Global,
    #[command(subcommand)]
    pub command: Command,
}

/// Options every subcommand takes.
#[derive(clap::Args, Debug, Clone)]
pub struct Global {
    /// Ledger file [default: .probity/ledger.sqlite in this folder or the nearest parent that has
    /// a .probity folder; created here on first run]
    #[arg(long, global = true, env = "PROBITY_LEDGER", value_name = "PATH")]
    pub ledger: Option<PathBuf>,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    Check(check::Args),
    Audit(audit::Args),
    Run(run::Args),
    History(history::Args),
    Show(show::Args),
    Predict(predict::Args),
    Reveal(reveal::Args),
    Replay(replay::Args),
    Note(note::Args),
    Pack(pack::Args),
    Merge(merge::Args),
    Key(key::Args),
    Export(export::Args),
    Compare(compare::Args),
    Plot(plot::Args),
    Report(report::Args),
}

/// The signal a crash or race test waits for on stderr.
fn announce_pause(name: &str) {
    use std::io::Write;
    let mut err = std::io::stderr();
    let _ = writeln!(err, "probity: paused at {name}");
    let _ = err.flush();
}

/// Parse the process arguments, run, print any error; returns the exit code.
pub fn main() -> i32 {
    // The crash tests' pause points (src/failpoint.rs): only in a build with the test hooks,
    // so a user's environment cannot make a release binary wait inside a transaction.
    if crate::failpoint::COMPILED
        && let Ok(point) = std::env::var("PROBITY_PAUSE_AT")
    {
        crate::failpoint::arm(
            point,
            std::env::var_os("PROBITY_RESUME_ON").map(PathBuf::from),
            announce_pause,
        );
    }
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return code;
        }
    };
    let result = match cli.command {
        Command::Check(a) => check::run(&cli.global, a),
        Command::Audit(a) => audit::run(&cli.global, a),
        Command::Run(a) => run::run(&cli.global, a),
        Command::History(a) => history::run(&cli.global, a),
        Command::Show(a) => show::run(&cli.global, a),
        Command::Predict(a) => predict::run(&cli.global, a),
        Command::Reveal(a) => reveal::run(&cli.global, a),
        Command::Replay(a) => replay::run(&cli.global, a),
        Command::Note(a) => note::run(&cli.global, a),
        Command::Pack(a) => pack::run(&cli.global, a),
        Command::Merge(a) => merge::run(&cli.global, a),
        Command::Key(a) => key::run(&cli.global, a),
        Command::Export(a) => export::run(&cli.global, a),
        Command::Compare(a) => compare::run(&cli.global, a),
        Command::Plot(a) => plot::run(&cli.global, a),
        Command::Report(a) => report::run(&cli.global, a),
    };
    match result {
        Ok(code) => code,
        Err(Error::Io { source, .. }) if source.kind() == std::io::ErrorKind::BrokenPipe => 0,
        Err(e) => {
            eprintln!("probity: {e}");
            e.exit_code()
        }
    }
}

/// Which runs a listing covers.
#[derive(clap::Args, Debug, Clone)]
pub struct RunSelect {
    /// Only runs of this experiment (the spec's `name`)
    #[arg(long, value_name = "NAME")]
    pub experiment: Option<String>,
    /// Only runs started at or after this time: a UTC date (2026-11-30) or an RFC 3339 time
    /// (2026-11-30T14:00:00Z, 2026-11-30T15:00:00+01:00)
    #[arg(long, value_name = "WHEN")]
    pub since: Option<String>,
}

impl RunSelect {
    /// The ledger filter; an unknown experiment or an unreadable time is a usage error.
    pub(crate) fn filter(
        &self,
        ledger: &crate::ledger::Ledger,
    ) -> Result<crate::ledger::RunFilter> {
        if let Some(name) = &self.experiment {
            let names = ledger.experiments()?;
            if !names.contains(name) {
                return Err(Error::Input(format!(
                    "--experiment: no run of an experiment named '{name}' in the ledger{}",
                    crate::error::did_you_mean(name, names.iter().map(String::as_str))
                )));
            }
        }
        let since = self.since.as_deref().map(since_utc).transpose()?;
        Ok(crate::ledger::RunFilter {
            experiment: self.experiment.clone(),
            since,
        })
    }
}

/// A `--since` value as the ledger stores times (RFC 3339, UTC, milliseconds), so that text
/// order is time order.
fn since_utc(text: &str) -> Result<String> {
    let t = text.trim();
    let at = if let Ok(d) = chrono::NaiveDate::parse_from_str(t, "%Y-%m-%d") {
        d.and_hms_opt(0, 0, 0).map(|n| n.and_utc())
    } else {
        chrono::DateTime::parse_from_rfc3339(t)
            .ok()
            .map(|d| d.with_timezone(&chrono::Utc))
    };
    at.map(|d| d.to_rfc3339_opts(chrono::SecondsFormat::Millis, true))
        .ok_or_else(|| {
            Error::Input(format!(
                "--since '{text}' is not a date or a time; write a UTC date (2026-11-30) or an RFC 3339 time (2026-11-30T14:00:00Z)"
            ))
        })
}

/// Write to stdout; a closed pipe ends quietly.
pub(crate) fn out(text: &str) -> Result<()> {
    let mut o = std::io::stdout().lock();
    o.write_all(text.as_bytes())
        .and_then(|_| o.flush())
        .map_err(|e| Error::Io {
            action: "cannot write to",
            path: PathBuf::from("stdout"),
            source: e,
        })
}

pub(crate) fn out_json<T: serde::Serialize + ?Sized>(v: &T) -> Result<()> {
    // Streamed: a run of 10,000 candidates is megabytes of JSON.
    let mut o = std::io::BufWriter::new(std::io::stdout().lock());
    serde_json::to_writer_pretty(&mut o, v)
        .map_err(std::io::Error::from)
        .and_then(|_| o.write_all(b"\n"))
        .and_then(|_| o.flush())
        .map_err(|e| Error::Io {
            action: "cannot write to",
            path: PathBuf::from("stdout"),
            source: e,
        })
}

pub(crate) fn warn(msg: &str) {
    eprintln!("warning: {msg}");
}

pub(crate) fn cwd() -> Result<PathBuf> {
    std::env::current_dir().map_err(|e| Error::Io {
        action: "cannot read the working folder",
        path: PathBuf::from("."),
        source: e,
    })
}

/// Open the ledger for reading (it must exist).
pub(crate) fn open_existing(g: &Global) -> Result<crate::ledger::Ledger> {
    crate::ledger::Ledger::open(&existing(g)?, false)
}

/// `open_existing` for a command that only reads: a read-only ledger (an archived copy, a
/// read-only medium) opens too.
pub(crate) fn open_reading(g: &Global) -> Result<crate::ledger::Ledger> {
    crate::ledger::Ledger::open_read(&existing(g)?)
}

fn existing(g: &Global) -> Result<PathBuf> {
    let (path, found) = crate::ledger::locate(g.ledger.as_deref(), &cwd()?);
    if !found {
        return Err(Error::Input(format!(
            "no ledger found (looked for a .probity folder here and above); run an experiment first (probity run SPEC) or pass --ledger. Default would be {}",
            path.display()
        )));
    }
    keep_out_of_boxes(&path);
    Ok(path)
}

/// The ledger's folder is never granted to a command's box, wherever it is, nor the folder of
/// the file it links to.
fn keep_out_of_boxes(ledger: &Path) {
    crate::external::sandbox::keep_out(ledger.parent().unwrap_or(ledger));
    if let Ok(real) = std::fs::canonicalize(ledger) {
        crate::external::sandbox::keep_out(real.parent().unwrap_or(&real));
    }
}

/// Write a report file and say where it went.
pub(crate) fn write_file(path: &Path, text: &str) -> Result<()> {
    std::fs::write(path, text).map_err(|e| Error::Io {
        action: "cannot write",
        path: path.to_path_buf(),
        source: e,
    })?;
    out(&format!("wrote {}\n", path.display()))
}

/// One stored run, or a usage error that says where to find the run ids.
pub(crate) fn stored_run(
    ledger: &crate::ledger::Ledger,
    id: i64,
) -> Result<crate::ledger::RunDetail> {
    ledger.run(id)?.ok_or_else(|| {
        Error::Input(format!(
            "no run {id} in {}; `probity history` lists the runs",
            ledger.path().display()
        ))
    })
}

/// Open the ledger for writing, creating `.probity/` on first use.
pub(crate) fn open_for_write(g: &Global) -> Result<crate::ledger::Ledger> {
    let (path, found) = crate::ledger::locate(g.ledger.as_deref(), &cwd()?);
    if !found && let Some(dir) = path.parent() {
        std::fs::create_dir_all(dir).map_err(|e| Error::Io {
            action: "cannot create ledger folder",
            path: dir.to_path_buf(),
            source: e,
        })?;
    }
    keep_out_of_boxes(&path);
    crate::ledger::Ledger::open(&path, true)
}

/// A path as absolute text, for the ledger's records.
pub(crate) fn absolute(p: &Path) -> String {
    std::fs::canonicalize(p)
        .unwrap_or_else(|_| p.to_path_buf())
        .display()
        .to_string()
}

/// Load the spec and its data file.
pub(crate) fn load_inputs(
    spec_path: &Path,
    threads: usize,
) -> Result<(crate::spec::Spec, crate::data::Table)> {
    inputs(spec_path, threads, true)
}

/// `load_inputs` without the data file's SHA-256 (`Table::sha256` empty): the benchmark's parse
/// floor (`PROBITY_TIMINGS=parse-only`), never a run's input.
pub(crate) fn parse_inputs(
    spec_path: &Path,
    threads: usize,
) -> Result<(crate::spec::Spec, crate::data::Table)> {
    inputs(spec_path, threads, false)
}

/// The columns a spec reads as text whatever they hold.
pub(crate) fn text_columns(spec: &crate::spec::Spec) -> Vec<&str> {
    spec.data
        .categorical
        .iter()
        .map(|n| n.name.as_str())
        .collect()
}

fn inputs(
    spec_path: &Path,
    threads: usize,
    hash: bool,
) -> Result<(crate::spec::Spec, crate::data::Table)> {
    let spec = crate::spec::load(spec_path)?;
    let text = text_columns(&spec);
    if !spec.data.path.exists() {
        return Err(Error::Spec {
            file: spec.file.clone(),
            loc: Some(spec.data.path_loc),
            msg: format!(
                "data file {} does not exist (path is relative to the spec file's folder)",
                spec.data.path.display()
            ),
        });
    }
    let table = if hash {
        crate::data::load(&spec.data.path, &text, threads)?
    } else {
        crate::data::parse_only(&spec.data.path, &text, threads)?
    };
    Ok((spec, table))
}

/// The facts about a run that come from here (clock, environment, build), with the fields a
/// replay sets left empty.
pub(crate) fn run_meta(
    started: &chrono::DateTime<chrono::Utc>,
    threads: usize,
    spec_path: String,
    data_path: String,
    note: Option<String>,
    start: Option<i64>,
) -> crate::ledger::RunMeta {
    let stamp =
        |t: chrono::DateTime<chrono::Utc>| t.to_rfc3339_opts(chrono::SecondsFormat::Millis, true);
    crate::ledger::RunMeta {
        started_at: stamp(*started),
        finished_at: stamp(chrono::Utc::now()),
        tool_version: env!("CARGO_PKG_VERSION").to_string(),
        user: user(),
        host: host(),
        threads,
        spec_path,
        data_path,
        note,
        tool_commit: env!("PROBITY_GIT_COMMIT").to_string(),
        target_triple: env!("PROBITY_TARGET").to_string(),
        replay: None,
        start,
    }
}

/// What a run's start records (`Ledger::begin_run`).
pub(crate) fn start_info(
    spec: &crate::spec::Spec,
    table: &crate::data::Table,
    spec_path: String,
    started: &chrono::DateTime<chrono::Utc>,
) -> crate::ledger::starts::StartInfo {
    crate::ledger::starts::StartInfo {
        experiment: spec.name.clone(),
        started_at: started.to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        user: user(),
        host: host(),
        spec_path,
        spec_hash: spec.canonical_hash(),
        data_sha256: table.sha256.clone(),
    }
}

pub(crate) fn host() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .or_else(|_| std::fs::read_to_string("/etc/hostname"))
        .map(|s| s.trim().to_string())
        .ok()
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .unwrap_or_else(|| "unknown".into())
}

pub(crate) fn user() -> String {
    // The person, as the user chooses to be named (a shared service account, say).
    if let Ok(u) = std::env::var("PROBITY_USER")
        && !u.trim().is_empty()
        && !u.chars().any(char::is_control)
    {
        return u;
    }
    // The operating system's name for this process's user: what login variables say can be
    // anything, and a uid number names nobody to a reader.
    if let Some(u) = os_user_name() {
        return u;
    }
    for var in ["USER", "LOGNAME", "USERNAME"] {
        if let Ok(u) = std::env::var(var)
            && !u.is_empty()
        {
            return u;
        }
    }
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("Uid:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .map(|u| format!("uid {u}"))
        })
        .unwrap_or_else(|| "unknown".into())
}

/// The user database's name for the effective user, if it has one.
#[cfg(target_os = "linux")]
fn os_user_name() -> Option<String> {
    let mut buf = vec![0 as libc::c_char; 16 << 10];
    // SAFETY: a zeroed passwd is a valid out-parameter; getpwuid_r writes into `pwd` and
    // `buf` (whose length it is given) and sets `found` to `&pwd` or null.
    unsafe {
        let mut pwd: libc::passwd = std::mem::zeroed();
        let mut found: *mut libc::passwd = std::ptr::null_mut();
        let rc = libc::getpwuid_r(
            libc::geteuid(),
            &mut pwd,
            buf.as_mut_ptr(),
            buf.len(),
            &mut found,
        );
        if rc != 0 || found.is_null() || pwd.pw_name.is_null() {
            return None;
        }
        let name = std::ffi::CStr::from_ptr(pwd.pw_name).to_str().ok()?;
        (!name.is_empty()).then(|| name.to_string())
    }
}

#[cfg(not(target_os = "linux"))]
fn os_user_name() -> Option<String> {
    None
}

/// Consent before a stored run's external command runs again (`reveal`, `predict`): a run
/// merged from another ledger, or one whose recorded inputs no longer hash as they did, runs
/// its command only with `--allow-commands`, which lists the argv and the inputs' hashes
/// first. A command of the user's own run, with its inputs unchanged, needs no flag.
pub(crate) fn command_consent(
    ledger: &crate::ledger::Ledger,
    d: &crate::ledger::RunDetail,
    spec: &crate::spec::Spec,
    candidate: usize,
    allow: bool,
    what: &str,
) -> Result<()> {
    if !crate::runner::is_command(spec, candidate) {
        return Ok(());
    }
    let cmds: Vec<&crate::spec::CommandSpec> = spec
        .models
        .iter()
        .filter_map(|m| m.command.as_ref())
        .collect();
    let mut now: Vec<(String, String)> = Vec::new();
    let mut unreadable = false;
    for c in &cmds {
        match crate::external::input_hashes(c) {
            Ok(h) => now.extend(h),
            Err(_) => unreadable = true,
        }
    }
    now.sort();
    let mut stored = ledger.run_inputs(d.summary.id)?;
    stored.sort();
    let merged = ledger.run_merged(d.summary.id)?;
    if merged {
        // Another ledger's spec does not decide to run outside the box here.
        crate::external::sandbox::force();
    }
    // A command meant for the box, where the box would not hold: the run's stored warnings
    // may say it held when it ran, so this look needs its own consent.
    let gap = cmds
        .iter()
        .any(|c| crate::external::sandbox::boxed(c))
        .then(crate::external::sandbox::gap)
        .flatten();
    let why = if merged {
        "came from another ledger".to_string()
    } else if unreadable || now != stored {
        "has command inputs that changed since it ran".to_string()
    } else if let Some(g) = &gap {
        format!("has a command meant for the box, which would not hold here ({g})")
    } else {
        for c in cmds.iter().filter(|c| !crate::external::sandbox::boxed(c)) {
            warn(&format!(
                "running the command of run {} outside the box, as its spec says: {}",
                d.summary.id,
                command_line(c)
            ));
        }
        return Ok(());
    };
    let argv: Vec<String> = cmds.iter().map(|c| command_line(c)).collect();
    if !allow {
        return Err(Error::Input(format!(
            "run {} {why}: {what} would run its external command ({}) as you; read it, then pass --allow-commands to run it",
            d.summary.id,
            argv.join("; ")
        )));
    }
    if let (Some(g), false) = (&gap, why.starts_with("has a command meant")) {
        warn(&format!("the command's box would not hold here: {g}"));
    }
    for a in &argv {
        warn(&format!(
            "running the command of run {} ({why}): {a}",
            d.summary.id
        ));
    }
    for (path, sha) in &now {
        warn(&format!("  input {path}: SHA-256 {sha}"));
    }
    Ok(())
}

/// A command as consent lists it: its argv, its folder, and whether it runs outside the box.
pub(crate) fn command_line(c: &crate::spec::CommandSpec) -> String {
    format!(
        "{:?} in {}{}",
        c.run,
        c.workdir.display(),
        if crate::external::sandbox::boxed(c) {
            ""
        } else {
            ", outside the box (sandbox = false): it can read the data file"
        }
    )
}

/// A size in bytes from `8G`, `512M`, `1.5T` or a plain number (binary units; `iB` and `B`
/// after the letter are accepted).
pub(crate) fn parse_size(s: &str) -> std::result::Result<u64, String> {
    let t = s.trim();
    let lower = t.to_ascii_lowercase();
    let body = lower.trim_end_matches("ib").trim_end_matches('b');
    let (num, mult) = match body.chars().last() {
        Some('k') => (&body[..body.len() - 1], 1u64 << 10),
        Some('m') => (&body[..body.len() - 1], 1 << 20),
        Some('g') => (&body[..body.len() - 1], 1 << 30),
        Some('t') => (&body[..body.len() - 1], 1 << 40),
        _ => (body, 1),
    };
    match num.trim().parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 && v * (mult as f64) < 1.8e19 => {
            Ok((v * mult as f64) as u64)
        }
        _ => Err(format!(
            "'{s}' is not a size; write a number of bytes, or one with K, M, G or T (8G)"
        )),
    }
}

/// The memory a run may use: `given` (`--memory`), else what the system reports available
/// (Linux: `MemAvailable`, and the cgroup's limit less its use when that is lower); `None`
/// where neither is known (no check).
pub(crate) fn memory(given: Option<u64>) -> Option<u64> {
    given.or_else(|| {
        let meminfo = std::fs::read_to_string("/proc/meminfo").ok();
        let available = meminfo.as_deref().and_then(|m| {
            m.lines()
                .find(|l| l.starts_with("MemAvailable:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<u64>().ok())
                .map(|kb| kb.saturating_mul(1024))
        });
        let read = |f: &str| {
            std::fs::read_to_string(format!("/sys/fs/cgroup/{f}"))
                .ok()
                .and_then(|t| t.trim().parse::<u64>().ok())
        };
        let cgroup = match (read("memory.max"), read("memory.current")) {
            (Some(max), Some(used)) => Some(max.saturating_sub(used)),
            _ => None,
        };
        match (available, cgroup) {
            (Some(a), Some(c)) => Some(a.min(c)),
            (a, c) => a.or(c),
        }
    })
}

/// Phase timings on stderr when `PROBITY_TIMINGS` is set (for benchmarking; see DEVELOPERS.md).
pub(crate) struct Phases {
    on: bool,
    /// `PROBITY_TIMINGS=parse-only`: `run` reads and parses the data file without hashing it,
    /// prints that time and stops (the benchmark's parse floor; nothing is stored).
    pub(crate) parse_only: bool,
    last: std::time::Instant,
}

impl Phases {
    pub(crate) fn start() -> Phases {
        let var = std::env::var_os("PROBITY_TIMINGS");
        Phases {
            on: var.is_some(),
            parse_only: var.is_some_and(|v| v == "parse-only"),
            last: std::time::Instant::now(),
        }
    }
    pub(crate) fn mark(&mut self, what: &str) {
        if self.on {
            let now = std::time::Instant::now();
            // Peak resident memory so far, where the system reports it (Linux).
            let peak = std::fs::read_to_string("/proc/self/status")
                .ok()
                .and_then(|st| {
                    st.lines()
                        .find(|l| l.starts_with("VmHWM:"))
                        .map(|l| l.trim_start_matches("VmHWM:").trim().to_string())
                })
                .map_or(String::new(), |kb| format!(" (peak memory {kb})"));
            eprintln!(
                "timing {what}: {:.3} s{peak}",
                (now - self.last).as_secs_f64()
            );
            self.last = now;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::parse_size;

    #[test]
    fn sizes_read_in_binary_units() {
        assert_eq!(parse_size("1024"), Ok(1024));
        assert_eq!(parse_size("8G"), Ok(8 << 30));
        assert_eq!(parse_size("8gib"), Ok(8 << 30));
        assert_eq!(parse_size("512MB"), Ok(512 << 20));
        assert_eq!(parse_size("1.5K"), Ok(1536));
        assert_eq!(parse_size("2T"), Ok(2 << 40));
        for bad in ["", "G", "-1G", "lots", "0", "1e30T", "nanG"] {
            assert!(parse_size(bad).is_err(), "{bad}");
        }
    }
}

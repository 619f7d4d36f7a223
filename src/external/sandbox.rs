//! The box an external command runs in. On Linux with Landlock (5.13 or newer), the command's
//! file-system access is limited to:
//! - the system's folders (`/usr`, `/lib*`, `/bin`, `/sbin`, `/etc`, `/opt`, `/proc`, `/sys`),
//!   read-only, and a few devices (`/dev/null`, `/dev/urandom`...), read and write;
//! - the installation of every program on `PATH` and of the program it runs (the folder above
//!   a `bin`, `sbin` or `shims` folder: an interpreter under a version manager keeps its
//!   libraries beside its `bin`), read-only;
//! - its declared inputs, files or folders, read-only;
//! - its scratch folder, read and write.
//!
//! A folder that holds the data file, the spec's folder, the current folder or the ledger's
//! folder is never granted: those hold the sealed rows and the record of their use; nor is
//! anything inside those folders but the declared inputs. A data file is kept out
//! even when it sits under a system folder, since that folder is then skipped. The rules are
//! built in the parent; the child only applies them (`restrict_self`, two system calls)
//! between fork and exec, where nothing may allocate.

use crate::spec::CommandSpec;
use std::path::{Path, PathBuf};

/// How the command's box stands on this system.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Boxing {
    /// Landlock is enforced, at this ABI version.
    Enforced(i32),
    /// The kernel has no Landlock (or it is disabled): the command runs as the user.
    Unavailable(String),
}

/// The Landlock ABI version of this kernel, or why there is none.
pub fn boxing() -> Boxing {
    imp::boxing()
}

/// The warning a run stores for a command family that runs outside the box, if it does.
pub fn warning(cmd: &CommandSpec, line: usize) -> Option<String> {
    if !boxed(cmd) {
        return Some(format!(
            "the command family at line {line} ran outside the box (sandbox = false): it could read the data file, sealed test rows included, and its scores cannot show whether it did"
        ));
    }
    match boxing() {
        Boxing::Enforced(_) => None,
        Boxing::Unavailable(why) => Some(format!(
            "the command family at line {line} ran outside the box: {why}; it could read the data file, sealed test rows included (Landlock needs Linux 5.13 or newer, with landlock among the kernel's security modules)"
        )),
    }
}

/// Paths no box may reach beyond those of each job (the ledger's folder, which the CLI knows).
static KEPT_OUT: std::sync::Mutex<Vec<PathBuf>> = std::sync::Mutex::new(Vec::new());

/// Keep `path`, and every folder that holds it, out of every box made from now on.
pub fn keep_out(path: &Path) {
    if let Ok(mut k) = KEPT_OUT.lock() {
        k.push(path.to_path_buf());
    }
}

/// The warning a run with boxed commands stores when its data file has other names (hard
/// links): the box keeps out the name it knows, and the spec's inputs were searched for the
/// others, but one in a folder the box grants would be readable.
pub fn linked_data_warning(data: &Path) -> Option<String> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        let links = std::fs::metadata(data).ok()?.nlink();
        (links > 1).then(|| format!(
            "the data file {} has {links} names (hard links); a command's box keeps out this one, and no input may be another, but a name in a system folder would be readable to it: remove the other links",
            data.display()
        ))
    }
    #[cfg(not(unix))]
    {
        let _ = data;
        None
    }
}

/// What the box grants, as paths (for tests and messages).
#[derive(Debug, Default, Clone, PartialEq, Eq)]
pub struct Grants {
    /// Read and execute.
    pub read: Vec<PathBuf>,
    /// Read, and write to existing files (devices).
    pub devices: Vec<PathBuf>,
    /// Everything.
    pub write: Vec<PathBuf>,
}

const SYSTEM: [&str; 12] = [
    "/usr",
    "/lib",
    "/lib32",
    "/lib64",
    "/libx32",
    "/bin",
    "/sbin",
    "/etc",
    "/opt",
    "/nix/store",
    "/proc",
    "/sys",
];

/// The device files a command may use, read and write: no disk, no shared memory.
const DEVICES: [&str; 6] = [
    "/dev/null",
    "/dev/zero",
    "/dev/full",
    "/dev/random",
    "/dev/urandom",
    "/dev/tty",
];

/// Set by the CLI for a command from another ledger: boxed whatever its spec says.
static FORCED: std::sync::atomic::AtomicBool = std::sync::atomic::AtomicBool::new(false);

/// Box every command from now on, `sandbox = false` or not (a merged run's commands).
pub fn force() {
    FORCED.store(true, std::sync::atomic::Ordering::SeqCst);
}

/// Whether `cmd` runs in the box.
pub fn boxed(cmd: &CommandSpec) -> bool {
    cmd.sandbox || FORCED.load(std::sync::atomic::Ordering::SeqCst)
}

/// The program `argv0` names: a path (relative ones against `workdir`), else the first
/// executable file of that name on `PATH`, as the child's exec would find it.
pub fn program_path(argv0: &str, workdir: &Path) -> Option<PathBuf> {
    if argv0.contains('/') {
        return Some(workdir.join(argv0));
    }
    let path = std::env::var_os("PATH")?;
    std::env::split_paths(&path)
        .map(|d| d.join(argv0))
        .find(|p| is_executable(p))
}

fn is_executable(p: &Path) -> bool {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::metadata(p).is_ok_and(|m| m.is_file() && m.permissions().mode() & 0o111 != 0)
    }
    #[cfg(not(unix))]
    {
        p.is_file()
    }
}

/// The installation a program folder belongs to: the folder above `bin`, `sbin` or `shims`.
fn installation(dir: &Path) -> PathBuf {
    match dir.file_name().and_then(|n| n.to_str()) {
        Some("bin" | "sbin" | "shims") => dir.parent().unwrap_or(dir).to_path_buf(),
        _ => dir.to_path_buf(),
    }
}

/// What the box of `cmd` grants when it runs in `scratch`, keeping every path of `protected`
/// (and whatever holds them) out of reach. Declared inputs that hold a protected path are
/// refused before this (`spec`), so here they are only skipped.
pub fn grants(cmd: &CommandSpec, scratch: &Path, protected: &[PathBuf]) -> Grants {
    let real = |p: &Path| std::fs::canonicalize(p).ok();
    let kept: Vec<PathBuf> = KEPT_OUT.lock().map(|k| k.clone()).unwrap_or_default();
    let protected: Vec<PathBuf> = protected
        .iter()
        .chain(&kept)
        .filter_map(|p| real(p))
        .collect();
    let home = std::env::var_os("HOME").and_then(|h| real(Path::new(&h)));
    // A grant covers everything beneath it: one that holds a protected path is never made, and
    // nothing inside a protected folder (the spec's, the current one, the ledger's) is granted
    // but the declared inputs.
    let safe = |p: &Path| {
        p.parent().is_some()
            && home.as_deref() != Some(p)
            && !protected
                .iter()
                .any(|q| q.starts_with(p) || (q.is_dir() && p.starts_with(q)))
    };
    let mut read: Vec<PathBuf> = Vec::new();
    let add = |p: PathBuf, read: &mut Vec<PathBuf>| {
        if safe(&p) && !read.contains(&p) {
            read.push(p);
        }
    };
    for s in SYSTEM {
        if let Some(p) = real(Path::new(s)) {
            add(p, &mut read);
        }
    }
    let mut programs: Vec<PathBuf> = std::env::var_os("PATH")
        .map(|p| std::env::split_paths(&p).collect())
        .unwrap_or_default();
    // The program's own installation, unless it is a declared input (granted as itself).
    let declared = cmd.inputs.iter().any(|(t, _)| *t == cmd.run[0]);
    if !declared
        && let Some(p) = program_path(&cmd.run[0], &cmd.workdir).and_then(|p| real(&p))
        && let Some(dir) = p.parent()
    {
        programs.push(dir.to_path_buf());
    }
    for dir in programs.iter().filter_map(|d| real(d)) {
        add(installation(&dir), &mut read);
    }
    for (_, p) in &cmd.inputs {
        if let Some(p) = real(p) {
            // Inputs are the user's own, named one by one: only the protected paths bar them.
            if !protected.iter().any(|q| q.starts_with(&p)) && !read.contains(&p) {
                read.push(p);
            }
        }
    }
    // Devices one by one: the whole of /dev would hold disks (readable by root) and /dev/shm.
    let devices = DEVICES
        .iter()
        .filter_map(|d| real(Path::new(d)))
        .filter(|p| p.starts_with("/dev") && !protected.iter().any(|q| q.starts_with(p)))
        .collect();
    Grants {
        read,
        devices,
        write: real(scratch).into_iter().collect(),
    }
}

/// End every process of the group `pid` leads (the command and what it started).
pub fn end_group(pid: u32) {
    imp::end_group(pid)
}

/// Prepare `command`'s child: it keeps no descriptor beyond 0-2 that probity's own parent left
/// open (they are marked close-on-exec), and with `grants`, it restricts itself to the box
/// before exec and fails to start (so the candidate fails, naming the box) when that does not
/// take.
pub fn apply(command: &mut std::process::Command, grants: Option<&Grants>) -> Result<(), String> {
    imp::apply(command, grants)
}

#[cfg(target_os = "linux")]
mod imp {
    use super::{Boxing, Grants};
    use landlock::{
        ABI, Access, AccessFs, PathBeneath, PathFd, Ruleset, RulesetAttr, RulesetCreatedAttr,
        RulesetStatus, Scope,
    };

    /// The newest file-system rights the box names; an older kernel enforces what it knows
    /// (reading is restricted from the first version).
    const ABI_USED: ABI = ABI::V5;

    pub fn boxing() -> Boxing {
        // landlock_create_ruleset(NULL, 0, LANDLOCK_CREATE_RULESET_VERSION) returns the ABI
        // version, or fails with ENOSYS (not built) or EOPNOTSUPP (not enabled).
        // SAFETY: the call takes no pointer to memory of ours (NULL, size 0) and only reads.
        let v = unsafe {
            libc::syscall(
                libc::SYS_landlock_create_ruleset,
                std::ptr::null::<libc::c_void>(),
                0usize,
                1u32,
            )
        };
        if v >= 1 {
            Boxing::Enforced(v as i32)
        } else {
            let e = std::io::Error::last_os_error();
            Boxing::Unavailable(match e.raw_os_error() {
                Some(libc::EOPNOTSUPP) => "this kernel has Landlock but it is not enabled".into(),
                Some(libc::ENOSYS) => "this kernel has no Landlock".into(),
                _ => format!("Landlock did not answer ({e})"),
            })
        }
    }

    pub fn end_group(pid: u32) {
        // SAFETY: a signal to a process group probity made (`process_group(0)` at spawn).
        unsafe {
            libc::kill(-(pid as libc::pid_t), libc::SIGKILL);
        }
    }

    /// close_range(3, ~0, CLOSE_RANGE_CLOEXEC): every descriptor from 3 up closes at exec
    /// (Linux 5.11; on an older kernel the call fails and they stay as they were). Rust's own
    /// descriptors are close-on-exec already; this reaches those inherited from outside.
    fn close_inherited() {
        // SAFETY: a system call on descriptor numbers only.
        unsafe {
            libc::syscall(
                libc::SYS_close_range,
                3u32,
                u32::MAX,
                libc::CLOSE_RANGE_CLOEXEC,
            );
        }
    }

    pub fn apply(command: &mut std::process::Command, g: Option<&Grants>) -> Result<(), String> {
        use std::os::unix::process::CommandExt;
        let Some(g) = g else {
            // SAFETY: runs in the child between fork and exec; one system call, no allocation.
            unsafe {
                command.pre_exec(|| {
                    close_inherited();
                    Ok(())
                });
            }
            return Ok(());
        };
        if !matches!(boxing(), Boxing::Enforced(_)) {
            // No Landlock here: the command runs as the user, and the run says so (`warning`).
            return apply(command, None);
        }
        let fail = |e: landlock::RulesetError| format!("cannot build the command's box: {e}");
        let rule = |path: &std::path::Path, access| -> Result<PathBeneath<PathFd>, String> {
            let fd = PathFd::new(path)
                .map_err(|e| format!("cannot open {} for the box: {e}", path.display()))?;
            Ok(PathBeneath::new(fd, access))
        };
        let read = AccessFs::from_read(ABI_USED);
        // Signals and abstract sockets are scoped too where the kernel can (ABI 6): the command
        // cannot kill probity, or talk to a service outside its box that way.
        let mut ruleset = Ruleset::default()
            .handle_access(AccessFs::from_all(ABI_USED))
            .map_err(fail)?
            .scope(Scope::Signal | Scope::AbstractUnixSocket)
            .map_err(fail)?
            .create()
            .map_err(fail)?;
        for p in &g.read {
            ruleset = ruleset.add_rule(rule(p, read)?).map_err(fail)?;
        }
        for p in &g.devices {
            ruleset = ruleset
                .add_rule(rule(p, read | AccessFs::WriteFile)?)
                .map_err(fail)?;
        }
        for p in &g.write {
            ruleset = ruleset
                .add_rule(rule(p, AccessFs::from_all(ABI_USED))?)
                .map_err(fail)?;
        }
        let mut ruleset = Some(ruleset);
        // SAFETY: the closure runs in the child between fork and exec. It makes two system
        // calls (prctl(PR_SET_NO_NEW_PRIVS), landlock_restrict_self) on a ruleset built in the
        // parent, closes its descriptor, and allocates nothing on the way to success; an error
        // is returned as a bare errno.
        unsafe {
            command.pre_exec(move || {
                close_inherited();
                match ruleset.take() {
                    Some(r) => match r.restrict_self() {
                        Ok(s) if s.ruleset != RulesetStatus::NotEnforced => Ok(()),
                        _ => Err(std::io::Error::from_raw_os_error(libc::EPERM)),
                    },
                    None => Ok(()),
                }
            });
        }
        Ok(())
    }
}

#[cfg(not(target_os = "linux"))]
mod imp {
    use super::{Boxing, Grants};

    pub fn boxing() -> Boxing {
        Boxing::Unavailable("Landlock is a Linux feature".into())
    }

    pub fn end_group(_: u32) {}

    pub fn apply(_: &mut std::process::Command, _: Option<&Grants>) -> Result<(), String> {
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn an_installation_is_the_folder_above_its_programs() {
        assert_eq!(
            installation(Path::new("/opt/py/3.11/bin")),
            PathBuf::from("/opt/py/3.11")
        );
        assert_eq!(
            installation(Path::new("/home/u/.pyenv/shims")),
            PathBuf::from("/home/u/.pyenv")
        );
        assert_eq!(
            installation(Path::new("/usr/lib/R")),
            PathBuf::from("/usr/lib/R")
        );
    }

    /// Nothing granted holds a protected path: here a data file under a system folder keeps
    /// that whole folder out, and inputs beside it stay in.
    #[test]
    fn no_grant_holds_a_protected_path() {
        let dir = tempfile::tempdir().unwrap();
        let data = dir.path().join("data.csv");
        let model = dir.path().join("model.py");
        std::fs::write(&data, "a\n1\n").unwrap();
        std::fs::write(&model, "").unwrap();
        let scratch = tempfile::tempdir().unwrap();
        let cmd = CommandSpec {
            run: vec!["sh".into(), "model.py".into()],
            workdir: dir.path().to_path_buf(),
            inputs: vec![("model.py".into(), model.clone())],
            timeout: 1,
            sandbox: true,
        };
        let protected = vec![
            data.clone(),
            dir.path().to_path_buf(),
            PathBuf::from("/etc/hosts"),
        ];
        let g = grants(&cmd, scratch.path(), &protected);
        let real = |p: &Path| std::fs::canonicalize(p).unwrap();
        for p in g.read.iter().chain(&g.devices).chain(&g.write) {
            for q in &protected {
                assert!(
                    !real(q).starts_with(p) || *p == real(&model),
                    "{p:?} holds {q:?}"
                );
            }
        }
        assert!(g.read.contains(&real(&model)));
        assert!(!g.read.contains(&PathBuf::from("/etc")));
        assert!(g.read.contains(&real(Path::new("/usr"))));
        assert_eq!(g.write, vec![real(scratch.path())]);
        // A ledger's folder kept out (as the CLI does with its ledger) keeps out what holds it.
        keep_out(Path::new("/usr/share"));
        let g = grants(&cmd, scratch.path(), &protected);
        assert!(!g.read.contains(&real(Path::new("/usr"))), "{:?}", g.read);
    }
}

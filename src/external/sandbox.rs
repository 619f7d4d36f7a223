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
//! A seccomp filter adds what Landlock does not cover (modes, owners, times, attributes,
//! device nodes, sockets, io_uring); the command runs in a session of its own, and probity,
//! a subreaper, ends whatever it leaves behind.
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

/// The oldest Landlock ABI whose box holds: version 3 (Linux 6.2) is the first that stops a
/// command from truncating, by path, a file it may not open (the data file, the ledger).
pub const ABI_NEEDED: i32 = 3;

/// Why a command would not run in a box that holds on this system, if it would not: no
/// Landlock, or a Landlock too old to hold.
pub fn gap() -> Option<String> {
    match boxing() {
        Boxing::Enforced(v) if v >= ABI_NEEDED => None,
        Boxing::Enforced(v) => Some(format!(
            "this kernel's Landlock (ABI {v}, before Linux 6.2) cannot stop a command from truncating files it may not open, the data file and the ledger among them"
        )),
        Boxing::Unavailable(why) => Some(format!(
            "{why}; the command could read the data file, sealed test rows included (Landlock needs Linux 5.13 or newer, with landlock among the kernel's security modules)"
        )),
    }
}

/// The warning a run stores for a command family that runs outside the box, or in a box that
/// does not hold, if it does.
pub fn warning(cmd: &CommandSpec, line: usize) -> Option<String> {
    if !boxed(cmd) {
        return Some(format!(
            "the command family at line {line} ran outside the box (sandbox = false): it could read the data file, sealed test rows included, and its scores cannot show whether it did"
        ));
    }
    gap()
        .map(|why| format!("the command family at line {line} ran outside a box that holds: {why}"))
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

/// The device files a command may use, read and write: no disk, no shared memory, no
/// terminal (a terminal's ioctls could type into the user's shell; the command runs in a
/// session of its own, without one).
const DEVICES: [&str; 5] = [
    "/dev/null",
    "/dev/zero",
    "/dev/full",
    "/dev/random",
    "/dev/urandom",
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

/// End every process of the group `pid` leads (the command and what it started), and every
/// process that left its group and was orphaned (`spawn`).
pub fn end_group(pid: u32) {
    imp::end_group(pid)
}

/// Spawn a prepared command (`apply`), noted as live so that `end_group` tells it from what
/// commands left behind: probity adopts every orphan of theirs (a subreaper), and any child
/// of its own that is not a live command is one, ended when a command ends.
pub fn spawn(command: &mut std::process::Command) -> std::io::Result<std::process::Child> {
    imp::spawn(command)
}

/// A command spawned with `spawn` has been waited for.
pub fn ended(pid: u32) {
    imp::ended(pid)
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

    /// The commands spawned and not yet waited for, and the children probity had before its
    /// first command (a shell's jobs when it was started with `exec`: never ended here). Held
    /// while spawning, so a command is never taken for an orphan between its fork and its
    /// noting.
    struct Live {
        commands: Vec<u32>,
        before: Option<Vec<i32>>,
    }
    static LIVE: std::sync::Mutex<Live> = std::sync::Mutex::new(Live {
        commands: Vec::new(),
        before: None,
    });

    pub fn spawn(command: &mut std::process::Command) -> std::io::Result<std::process::Child> {
        let mut live = LIVE.lock().unwrap_or_else(|e| e.into_inner());
        if live.before.is_none() {
            live.before = Some(children());
            // Orphans of the commands come to probity, not to init, so they can be ended.
            // SAFETY: prctl on this process with integer arguments.
            unsafe {
                libc::prctl(libc::PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0);
            }
        }
        let child = command.spawn()?;
        live.commands.push(child.id());
        Ok(child)
    }

    pub fn ended(pid: u32) {
        let mut live = LIVE.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(i) = live.commands.iter().position(|p| *p == pid) {
            live.commands.swap_remove(i);
        }
    }

    pub fn end_group(pid: u32) {
        // SAFETY: a signal to the process group of a session probity made (`setsid` at
        // spawn; the command leads both).
        unsafe {
            libc::kill(-(pid as libc::pid_t), libc::SIGKILL);
        }
        end_orphans();
    }

    /// End what commands left running after leaving their group (a session of their own),
    /// adopted here: every child of probity that is neither a live command nor one it had
    /// before. Only when no command is live, so a command's helper is never ended while it
    /// may still be waited for (a grid on 1 thread and on 8 ends the same helpers). Every
    /// orphan is signalled first, then reaped without blocking (a traced one may never be
    /// reapable here); their own children come here next, so this goes round until none is
    /// left, for at most a few seconds.
    fn end_orphans() {
        let live = LIVE.lock().unwrap_or_else(|e| e.into_inner());
        if !live.commands.is_empty() {
            return;
        }
        let before = live.before.clone().unwrap_or_default();
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(5);
        loop {
            let orphans: Vec<i32> = children()
                .into_iter()
                .filter(|p| before.binary_search(p).is_err())
                .collect();
            if orphans.is_empty() || std::time::Instant::now() > deadline {
                return;
            }
            for &p in &orphans {
                // SAFETY: a signal to a child of this process.
                unsafe {
                    libc::kill(p, libc::SIGKILL);
                }
            }
            std::thread::sleep(std::time::Duration::from_millis(2));
            for &p in &orphans {
                // SAFETY: a non-blocking wait for a child of this process.
                unsafe {
                    libc::waitpid(p, std::ptr::null_mut(), libc::WNOHANG);
                }
            }
        }
    }

    /// This process's children, from every thread's list in /proc.
    fn children() -> Vec<i32> {
        let mut out = Vec::new();
        let Ok(tasks) = std::fs::read_dir("/proc/self/task") else {
            return out;
        };
        for t in tasks.flatten() {
            if let Ok(text) = std::fs::read_to_string(t.path().join("children")) {
                out.extend(
                    text.split_whitespace()
                        .filter_map(|p| p.parse::<i32>().ok()),
                );
            }
        }
        out.sort_unstable();
        out.dedup();
        out
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

    /// A seccomp filter for what Landlock does not cover: the command may not change any
    /// file's permissions, owner, times, flags or extended attributes, make device or other
    /// special files, open sockets (no network, no service on a socket file such as a
    /// container daemon's; `socketpair` still works), use io_uring (whose requests seccomp does
    /// not see), load kernel code or watch other processes (bpf, perf events, modules, kexec,
    /// fanotify, userfaultfd, ptrace, port I/O, keyrings), or make namespaces (unshare, setns,
    /// clone with a namespace flag; clone3, whose flags seccomp cannot read, answers ENOSYS so
    /// that the C library falls back to clone). A call from another architecture's table
    /// (32-bit, x32) is refused whole. Built in the parent; the child only loads it.
    fn filter() -> Vec<libc::sock_filter> {
        const LD_W_ABS: u16 = 0x20;
        const JEQ_K: u16 = 0x15;
        const JGE_K: u16 = 0x35;
        const JSET_K: u16 = 0x45;
        const RET_K: u16 = 0x06;
        #[cfg(target_arch = "x86_64")]
        const ARCH: u32 = 0xC000_003E;
        #[cfg(target_arch = "aarch64")]
        const ARCH: u32 = 0xC000_00B7;
        // Offsets in struct seccomp_data: nr, arch, then args (8 bytes each, low half first).
        const NR: u32 = 0;
        const ARCH_AT: u32 = 4;
        let arg_low = |i: u32| 16 + 8 * i;
        let deny = libc::SECCOMP_RET_ERRNO | libc::EPERM as u32;
        let nosys = libc::SECCOMP_RET_ERRNO | libc::ENOSYS as u32;
        let allow = libc::SECCOMP_RET_ALLOW;
        let mut denied: Vec<libc::c_long> = vec![
            libc::SYS_fchmod,
            libc::SYS_fchmodat,
            452, // fchmodat2
            libc::SYS_fchown,
            libc::SYS_fchownat,
            libc::SYS_utimensat,
            libc::SYS_setxattr,
            libc::SYS_lsetxattr,
            libc::SYS_fsetxattr,
            463, // setxattrat
            libc::SYS_removexattr,
            libc::SYS_lremovexattr,
            libc::SYS_fremovexattr,
            466, // removexattrat
            libc::SYS_mknodat,
            libc::SYS_socket,
            libc::SYS_io_uring_setup,
            libc::SYS_io_uring_enter,
            libc::SYS_io_uring_register,
            libc::SYS_bpf,
            libc::SYS_perf_event_open,
            libc::SYS_init_module,
            libc::SYS_finit_module,
            libc::SYS_delete_module,
            libc::SYS_kexec_load,
            libc::SYS_kexec_file_load,
            libc::SYS_fanotify_init,
            libc::SYS_userfaultfd,
            libc::SYS_ptrace,
            libc::SYS_process_vm_readv,
            libc::SYS_process_vm_writev,
            libc::SYS_keyctl,
            libc::SYS_add_key,
            libc::SYS_request_key,
            libc::SYS_unshare,
            libc::SYS_setns,
            libc::SYS_mount,
            libc::SYS_umount2,
            libc::SYS_pivot_root,
            libc::SYS_chroot,
            libc::SYS_open_tree,
            libc::SYS_move_mount,
            libc::SYS_fsopen,
            libc::SYS_fsmount,
            libc::SYS_fspick,
            libc::SYS_name_to_handle_at,
            libc::SYS_open_by_handle_at,
        ];
        #[cfg(target_arch = "x86_64")]
        denied.extend([
            libc::SYS_chmod,
            libc::SYS_chown,
            libc::SYS_lchown,
            libc::SYS_utime,
            libc::SYS_utimes,
            libc::SYS_futimesat,
            libc::SYS_mknod,
            libc::SYS_iopl,
            libc::SYS_ioperm,
        ]);
        // ioctl requests that change a file's flags (immutable, append-only, no-atime...).
        // FS_IOC_SETFLAGS, FS_IOC32_SETFLAGS, FS_IOC_FSSETXATTR.
        let ioctls: [u32; 3] = [0x4008_6602, 0x4004_6602, 0x401c_5820];
        // CLONE_NEWNS | NEWCGROUP | NEWUTS | NEWIPC | NEWUSER | NEWPID | NEWNET | NEWTIME.
        let new_namespaces: u32 = 0x0002_0000
            | 0x0200_0000
            | 0x0400_0000
            | 0x0800_0000
            | 0x1000_0000
            | 0x2000_0000
            | 0x4000_0000
            | 0x0000_0080;
        let op = |code: u16, jt: u8, jf: u8, k: u32| libc::sock_filter { code, jt, jf, k };
        // Each test jumps to one of the three returns at the end: allow, deny, nosys. The
        // program is built forwards with placeholders and patched: `to` records (instruction,
        // target) and true/false side.
        enum To {
            Deny,
            NoSys,
        }
        let mut prog: Vec<libc::sock_filter> = Vec::new();
        let mut jumps: Vec<(usize, To, bool)> = Vec::new();
        prog.push(op(LD_W_ABS, 0, 0, ARCH_AT));
        jumps.push((prog.len(), To::Deny, false));
        prog.push(op(JEQ_K, 0, 0, ARCH));
        prog.push(op(LD_W_ABS, 0, 0, NR));
        jumps.push((prog.len(), To::Deny, true));
        prog.push(op(JGE_K, 0, 0, 0x4000_0000));
        for nr in &denied {
            jumps.push((prog.len(), To::Deny, true));
            prog.push(op(JEQ_K, 0, 0, *nr as u32));
        }
        jumps.push((prog.len(), To::NoSys, true));
        prog.push(op(JEQ_K, 0, 0, libc::SYS_clone3 as u32));
        // clone: its flags (the first argument on both architectures here).
        prog.push(op(JEQ_K, 0, 2, libc::SYS_clone as u32));
        prog.push(op(LD_W_ABS, 0, 0, arg_low(0)));
        jumps.push((prog.len(), To::Deny, true));
        prog.push(op(JSET_K, 0, 0, new_namespaces));
        // ioctl: its request.
        prog.push(op(LD_W_ABS, 0, 0, NR));
        prog.push(op(JEQ_K, 0, ioctls.len() as u8 + 1, libc::SYS_ioctl as u32));
        prog.push(op(LD_W_ABS, 0, 0, arg_low(1)));
        for req in ioctls {
            jumps.push((prog.len(), To::Deny, true));
            prog.push(op(JEQ_K, 0, 0, req));
        }
        prog.push(op(RET_K, 0, 0, allow));
        let deny_at = prog.len();
        prog.push(op(RET_K, 0, 0, deny));
        let nosys_at = prog.len();
        prog.push(op(RET_K, 0, 0, nosys));
        for (at, to, when) in jumps {
            let target = match to {
                To::Deny => deny_at,
                To::NoSys => nosys_at,
            };
            // Offsets count from the next instruction.
            let off = (target - at - 1) as u8;
            if when {
                prog[at].jt = off;
            } else {
                prog[at].jf = off;
            }
        }
        prog
    }

    /// Drop every capability for good (a command run by root keeps root's file ownership, not
    /// its powers): securebits locked so exec gives none back, the bounding and ambient sets
    /// emptied, then the process's own sets. Only system calls with integer arguments or
    /// memory on this frame; an error a user without capabilities meets (EPERM) is expected.
    ///
    /// # Safety
    /// Between fork and exec only.
    unsafe fn drop_capabilities() -> std::io::Result<()> {
        const PR_CAPBSET_DROP: libc::c_int = 24;
        const PR_SET_SECUREBITS: libc::c_int = 28;
        const PR_CAP_AMBIENT: libc::c_int = 47;
        const PR_CAP_AMBIENT_CLEAR_ALL: libc::c_ulong = 4;
        #[repr(C)]
        struct Header {
            version: u32,
            pid: i32,
        }
        #[repr(C)]
        struct Data {
            effective: u32,
            permitted: u32,
            inheritable: u32,
        }
        // SAFETY: prctl and capset with integers and pointers to this frame's memory.
        unsafe {
            // No root privileges at exec, none kept or regained across a uid change, no
            // ambient raise; each locked. (Not the newer bits on executing scripts.)
            const SECUREBITS: libc::c_ulong = 0b1110_1111;
            libc::prctl(PR_SET_SECUREBITS, SECUREBITS);
            for cap in 0..64 {
                libc::prctl(PR_CAPBSET_DROP, cap as libc::c_ulong);
            }
            libc::prctl(PR_CAP_AMBIENT, PR_CAP_AMBIENT_CLEAR_ALL, 0, 0, 0);
            let header = Header {
                version: 0x2008_0522,
                pid: 0,
            };
            let data = [
                Data {
                    effective: 0,
                    permitted: 0,
                    inheritable: 0,
                },
                Data {
                    effective: 0,
                    permitted: 0,
                    inheritable: 0,
                },
            ];
            if libc::syscall(libc::SYS_capset, &header as *const Header, data.as_ptr()) != 0 {
                return Err(std::io::Error::last_os_error());
            }
        }
        Ok(())
    }

    pub fn apply(command: &mut std::process::Command, g: Option<&Grants>) -> Result<(), String> {
        use std::os::unix::process::CommandExt;
        let Some(g) = g else {
            // SAFETY: runs in the child between fork and exec; two system calls, no
            // allocation. A session of its own: its own process group, no terminal.
            unsafe {
                command.pre_exec(|| {
                    close_inherited();
                    libc::setsid();
                    libc::prctl(libc::PR_SET_PDEATHSIG, libc::SIGKILL as libc::c_ulong);
                    Ok(())
                });
            }
            return Ok(());
        };
        if !matches!(boxing(), Boxing::Enforced(_)) {
            // No Landlock here: the command runs as the user, and the run says so (`warning`).
            return apply(command, None);
        }
        let prog = filter();
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
        // The scratch folder: everything but device files (a root command could make a node
        // for a disk or the console there, past the device list).
        let scratch = AccessFs::from_all(ABI_USED)
            & !(AccessFs::MakeChar | AccessFs::MakeBlock | AccessFs::IoctlDev);
        for p in &g.write {
            ruleset = ruleset.add_rule(rule(p, scratch)?).map_err(fail)?;
        }
        let mut ruleset = Some(ruleset);
        // SAFETY: the closure runs in the child between fork and exec. It makes a few system
        // calls (setsid, prctl(PR_SET_NO_NEW_PRIVS), landlock_restrict_self on a ruleset
        // built in the parent, prctl(PR_SET_SECCOMP) with a filter built in the parent),
        // closes the ruleset's descriptor, and allocates nothing on the way to success; an
        // error is returned as a bare errno.
        unsafe {
            command.pre_exec(move || {
                close_inherited();
                libc::setsid();
                // Ends with probity, even killed (its own session no longer gets Ctrl-C).
                libc::prctl(libc::PR_SET_PDEATHSIG, libc::SIGKILL as libc::c_ulong);
                drop_capabilities()?;
                if let Some(r) = ruleset.take() {
                    match r.restrict_self() {
                        Ok(s) if s.ruleset != RulesetStatus::NotEnforced => {}
                        _ => return Err(std::io::Error::from_raw_os_error(libc::EPERM)),
                    }
                }
                let fprog = libc::sock_fprog {
                    len: prog.len() as u16,
                    filter: prog.as_ptr() as *mut libc::sock_filter,
                };
                if libc::prctl(libc::PR_SET_NO_NEW_PRIVS, 1, 0, 0, 0) != 0
                    || libc::prctl(
                        libc::PR_SET_SECCOMP,
                        libc::SECCOMP_MODE_FILTER as libc::c_ulong,
                        &fprog as *const libc::sock_fprog,
                    ) != 0
                {
                    return Err(std::io::Error::last_os_error());
                }
                Ok(())
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

    pub fn spawn(command: &mut std::process::Command) -> std::io::Result<std::process::Child> {
        command.spawn()
    }

    pub fn ended(_: u32) {}

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

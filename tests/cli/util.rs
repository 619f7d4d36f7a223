//! Helpers for driving the binary: fresh temp folders, running commands, reading the ledger.

use std::path::{Path, PathBuf};
use std::process::Output;
use std::sync::atomic::{AtomicUsize, Ordering};

static COUNTER: AtomicUsize = AtomicUsize::new(0);

/// A path under tests/reference/.
pub fn reference(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
        .join(name)
}

/// A fresh, empty working folder for one test.
pub struct Dir {
    pub path: PathBuf,
    _tmp: tempfile::TempDir,
}

impl Dir {
    pub fn new(name: &str) -> Dir {
        let n = COUNTER.fetch_add(1, Ordering::SeqCst);
        let tmp = tempfile::Builder::new()
            .prefix(&format!("probity-{name}-{n}-"))
            .tempdir()
            .unwrap();
        Dir {
            path: tmp.path().to_path_buf(),
            _tmp: tmp,
        }
    }

    pub fn write(&self, name: &str, text: &str) -> PathBuf {
        let p = self.path.join(name);
        if let Some(d) = p.parent() {
            std::fs::create_dir_all(d).unwrap();
        }
        std::fs::write(&p, text).unwrap();
        p
    }

    pub fn copy(&self, from: &Path, name: &str) -> PathBuf {
        let p = self.path.join(name);
        std::fs::copy(from, &p).unwrap();
        p
    }

    /// Run probity here with the ledger at .probity/ledger.sqlite (the default).
    pub fn probity(&self, args: &[&str]) -> Run {
        self.probity_within(args, 600)
    }

    /// This person's public signing key, made on first use.
    pub fn public_key(&self, name: &str) -> String {
        let r = self.probity(&["key", "show"]);
        let line = if r.code() == 0 {
            r.stdout()
        } else {
            self.probity(&["key", "new", "--name", name])
                .expect(0)
                .stdout()
        };
        line.split_whitespace().last().unwrap().to_string()
    }

    /// Trust `signer`'s key (made if need be) in this folder's ledger, under `name`.
    pub fn trusts(&self, signer: &Dir, name: &str) {
        let key = signer.public_key(name);
        self.probity(&["key", "trust", name, &key]).expect(0);
    }

    /// `probity`, killed after `seconds` (its exit code is then -1): for cases that must not
    /// wait on anything.
    pub fn probity_within(&self, args: &[&str], seconds: u64) -> Run {
        self.probity_with(args, &[], seconds)
    }

    /// `probity` with more environment variables.
    pub fn probity_env(&self, args: &[&str], env: &[(&str, &str)]) -> Run {
        self.probity_with(args, env, 600)
    }

    fn probity_with(&self, args: &[&str], env: &[(&str, &str)], seconds: u64) -> Run {
        let mut cmd = assert_cmd::Command::cargo_bin("probity").unwrap();
        cmd.envs(env.iter().copied());
        cmd.current_dir(&self.path)
            .args(args)
            .env_remove("PROBITY_LEDGER")
            .env_remove("PROBITY_KEY")
            // Each folder is a person of its own: its signing key lives in its own config.
            .env("XDG_CONFIG_HOME", self.path.join(".config"))
            .timeout(std::time::Duration::from_secs(seconds));
        let out = cmd.output().unwrap();
        Run {
            args: args.iter().map(|s| s.to_string()).collect(),
            cwd: self.path.clone(),
            out,
        }
    }

    pub fn ledger(&self) -> PathBuf {
        self.path.join(".probity").join("ledger.sqlite")
    }

    /// Row counts of every ledger table (empty when there is no ledger yet).
    pub fn counts(&self) -> Vec<(String, i64)> {
        if !self.ledger().exists() {
            return Vec::new();
        }
        let l = probity::ledger::Ledger::open(&self.ledger(), false).unwrap();
        l.counts().unwrap().into_iter().collect()
    }
}

pub struct Run {
    pub args: Vec<String>,
    pub cwd: PathBuf,
    pub out: Output,
}

impl Run {
    pub fn code(&self) -> i32 {
        self.out.status.code().unwrap_or(-1)
    }
    pub fn stdout(&self) -> String {
        String::from_utf8_lossy(&self.out.stdout).into_owned()
    }
    pub fn stderr(&self) -> String {
        String::from_utf8_lossy(&self.out.stderr).into_owned()
    }
    fn describe(&self) -> String {
        format!(
            "probity {:?} in {}\nstatus {}\nstdout:\n{}\nstderr:\n{}",
            self.args,
            self.cwd.display(),
            self.code(),
            self.stdout(),
            self.stderr()
        )
    }
    /// Assert the exit code and return self.
    pub fn expect(self, code: i32) -> Run {
        assert_eq!(self.code(), code, "{}", self.describe());
        self
    }
    pub fn json(&self) -> serde_json::Value {
        serde_json::from_str(&self.stdout())
            .unwrap_or_else(|e| panic!("not JSON ({e}): {}", self.describe()))
    }
}

/// Compare `actual` with tests/golden/NAME; with BLESS=1 in the environment, rewrite the file.
pub fn check_golden(name: &str, actual: &str) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("golden")
        .join(name);
    if std::env::var_os("BLESS").is_some() {
        std::fs::write(&path, actual).unwrap();
        return;
    }
    let expected = std::fs::read_to_string(&path).unwrap_or_else(|_| {
        panic!(
            "no golden file {}; run with BLESS=1 to create it",
            path.display()
        )
    });
    assert_eq!(
        actual,
        expected,
        "output differs from {} (BLESS=1 rewrites it after review)",
        path.display()
    );
}

/// Whether the binary under test has its pause points (`src/failpoint.rs`: a debug build with
/// the test hooks). `cargo test --release` builds none, so the tests that stop a process at one
/// say that they were skipped and return.
pub fn pauses_compiled(test: &str) -> bool {
    if !probity::failpoint::COMPILED {
        eprintln!("{test}: skipped, this build has no pause points (a release build)");
    }
    probity::failpoint::COMPILED
}

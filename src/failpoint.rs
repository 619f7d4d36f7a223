//! Named pause points for the crash and race tests, compiled in only with the `test-hooks`
//! feature (which `cargo test` turns on) and debug assertions: a user's build ignores
//! `PROBITY_PAUSE_AT`, and so does a release binary built beside the tests (`cargo test
//! --release` or `cargo build --release --all-targets` turn the feature on for every target). When the
//! CLI arms a point, the process announces `probity: paused at NAME` (through the CLI's
//! printer) when it gets there and sleeps, so a test can kill it at a known place (mid-grid,
//! inside the run's transaction, after a reveal is stored but before it is printed). With a
//! resume file (`PROBITY_RESUME_ON`), it goes on once that file exists: a barrier that lets a
//! test release several processes into the same step at once. Unarmed, a pause point is one
//! atomic load; without the hooks, nothing.

#[cfg(all(feature = "test-hooks", debug_assertions))]
mod hooks {
    use std::path::PathBuf;
    use std::sync::OnceLock;

    pub struct Armed {
        pub name: String,
        pub resume: Option<PathBuf>,
        pub announce: fn(&str),
    }

    pub static ARMED: OnceLock<Armed> = OnceLock::new();
}

/// Whether this build has pause points at all.
pub const COMPILED: bool = cfg!(all(feature = "test-hooks", debug_assertions));

/// Arm the pause point `name` for this process, to go on once `resume` exists when given;
/// `announce` tells the waiting test that the point was reached (once; later calls change
/// nothing). Without the test hooks it does nothing.
pub fn arm(name: String, resume: Option<std::path::PathBuf>, announce: fn(&str)) {
    #[cfg(all(feature = "test-hooks", debug_assertions))]
    {
        let _ = hooks::ARMED.set(hooks::Armed {
            name,
            resume,
            announce,
        });
    }
    #[cfg(not(all(feature = "test-hooks", debug_assertions)))]
    {
        let _ = (name, resume, announce);
    }
}

/// Pause here (for at most ten minutes) when this point is armed.
#[inline]
pub fn pause(name: &str) {
    #[cfg(all(feature = "test-hooks", debug_assertions))]
    {
        let Some(armed) = hooks::ARMED.get().filter(|a| a.name == name) else {
            return;
        };
        (armed.announce)(name);
        let step = std::time::Duration::from_millis(5);
        for _ in 0..120_000 {
            if armed.resume.as_ref().is_some_and(|f| f.exists()) {
                return;
            }
            std::thread::sleep(step);
        }
    }
    #[cfg(not(all(feature = "test-hooks", debug_assertions)))]
    {
        let _ = name;
    }
}

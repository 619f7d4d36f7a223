//! Named pause points for the crash and race tests. When the CLI arms a point (from
//! `PROBITY_PAUSE_AT`), the process prints `probity: paused at NAME` on stderr when it gets
//! there and sleeps, so a test can kill it at a known place (mid-grid, inside the run's
//! transaction, after a reveal is stored but before it is printed). With a resume file
//! (`PROBITY_RESUME_ON`), it goes on once that file exists: a barrier that lets a test release
//! several processes into the same step at once. Unarmed, a pause point is one atomic load.

use std::path::PathBuf;
use std::sync::OnceLock;

static ARMED: OnceLock<(String, Option<PathBuf>)> = OnceLock::new();

/// Arm the pause point `name` for this process, to go on once `resume` exists when given
/// (once; later calls change nothing).
pub fn arm(name: String, resume: Option<PathBuf>) {
    let _ = ARMED.set((name, resume));
}

/// Pause here (for at most ten minutes) when this point is armed.
pub fn pause(name: &str) {
    let Some((_, resume)) = ARMED.get().filter(|(a, _)| a == name) else {
        return;
    };
    // The one write to stderr outside cli/: the signal the crash tests wait for.
    use std::io::Write;
    let mut err = std::io::stderr();
    let _ = writeln!(err, "probity: paused at {name}");
    let _ = err.flush();
    let step = std::time::Duration::from_millis(5);
    for _ in 0..120_000 {
        if resume.as_ref().is_some_and(|f| f.exists()) {
            return;
        }
        std::thread::sleep(step);
    }
}

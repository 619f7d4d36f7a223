//! Named pause points for the crash tests. When the CLI arms a point (from `PROBITY_PAUSE_AT`),
//! the process prints `probity: paused at NAME` on stderr when it gets there and sleeps, so a
//! test can kill it at a known place (mid-grid, inside the run's transaction, after a reveal
//! is stored but before it is printed). Unarmed, a pause point is one atomic load.

use std::sync::OnceLock;

static ARMED: OnceLock<String> = OnceLock::new();

/// Arm the pause point `name` for this process (once; later calls change nothing).
pub fn arm(name: String) {
    let _ = ARMED.set(name);
}

/// Pause here (for at most ten minutes) when this point is armed.
pub fn pause(name: &str) {
    if ARMED.get().is_some_and(|a| a == name) {
        // The one write to stderr outside cli/: the signal the crash tests wait for.
        use std::io::Write;
        let mut err = std::io::stderr();
        let _ = writeln!(err, "probity: paused at {name}");
        let _ = err.flush();
        std::thread::sleep(std::time::Duration::from_secs(600));
    }
}

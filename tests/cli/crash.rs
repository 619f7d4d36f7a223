//! Crash safety: a `run` or `reveal` killed with SIGKILL leaves the ledger intact, stores no
//! part of the run, shows the run as interrupted, and never undercounts a reveal whose score
//! could have been seen. The kills land at named pause points (`PROBITY_PAUSE_AT`, see
//! src/failpoint.rs), so each test kills at a known place; one more kills a long run wherever
//! it happens to be.

use crate::fixtures::small_dir;
use crate::util::Dir;
use serde_json::Value;
use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::process::{Child, Command, Stdio};

fn spawn(d: &Dir, args: &[&str], pause: Option<&str>) -> Child {
    let mut c = Command::new(assert_cmd::cargo::cargo_bin("probity"));
    c.current_dir(&d.path)
        .args(args)
        .env_remove("PROBITY_LEDGER")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    if let Some(p) = pause {
        c.env("PROBITY_PAUSE_AT", p);
    }
    c.spawn().unwrap()
}

/// Wait until the child says it paused at `point`, then SIGKILL it; returns its stdout. With
/// `live` (the folder and the child's pid), first check that the paused run's start is listed
/// as running.
fn kill_at(mut child: Child, point: &str, live: Option<(&Dir, i64)>) -> String {
    let mut err = BufReader::new(child.stderr.take().unwrap());
    let mut seen = String::new();
    loop {
        let mut line = String::new();
        let n = err.read_line(&mut line).unwrap();
        assert!(n > 0, "the process ended before pausing at {point}: {seen}");
        seen.push_str(&line);
        if line.trim_end() == format!("probity: paused at {point}") {
            break;
        }
    }
    if let Some((d, pid)) = live {
        let u = unfinished(d);
        let start = u.iter().find(|s| s["pid"] == pid);
        assert_eq!(
            start.map(|s| &s["state"]),
            Some(&Value::from("running")),
            "{u:?}"
        );
    }
    // Child::kill sends SIGKILL on Unix: no handler, no cleanup, as a crash or power loss.
    child.kill().unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(!out.status.success());
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn counts(d: &Dir) -> BTreeMap<String, i64> {
    d.counts().into_iter().collect()
}

fn unfinished(d: &Dir) -> Vec<Value> {
    d.probity(&["history", "--json"]).expect(0).json()["unfinished"]
        .as_array()
        .unwrap()
        .clone()
}

/// The tables a run writes, without its start and the partition (stored on its own).
fn run_tables(c: &BTreeMap<String, i64>) -> Vec<(String, i64)> {
    [
        "runs",
        "folds",
        "candidates",
        "fold_scores",
        "scores",
        "warnings",
        "chain",
    ]
    .iter()
    .map(|t| (t.to_string(), c[*t]))
    .collect()
}

fn intact(d: &Dir) {
    let r = d.probity(&["audit", "--verify"]).expect(0);
    assert!(r.stdout().contains("intact"), "{}", r.stdout());
}

#[test]
fn a_run_killed_mid_grid_or_mid_commit_stores_nothing_and_shows_as_interrupted() {
    if !crate::util::pauses_compiled(
        "a_run_killed_mid_grid_or_mid_commit_stores_nothing_and_shows_as_interrupted",
    ) {
        return;
    }
    let d = small_dir("crash-run");
    d.probity(&["run", "small.toml"]).expect(0);
    let before = counts(&d);
    for (n, point) in ["run:grid", "run:commit"].iter().enumerate() {
        let child = spawn(&d, &["run", "small.toml"], Some(point));
        let pid = child.id() as i64;
        let out = kill_at(child, point, Some((&d, pid)));
        assert!(out.is_empty(), "nothing may be printed: {out}");
        let after = counts(&d);
        assert_eq!(
            run_tables(&after),
            run_tables(&before),
            "killed at {point}: no part of the run is stored"
        );
        let u = unfinished(&d);
        assert_eq!(u.len(), n + 1, "{u:?}");
        assert_eq!(u[n]["state"], "interrupted", "{u:?}");
        assert_eq!(u[n]["pid"], pid);
        assert_eq!(u[n]["experiment"], "small");
        intact(&d);
    }
    // The ledger goes on: the next run is stored as run 2, and the interrupted starts stay listed.
    let r = d.probity(&["run", "small.toml", "--json"]).expect(0).json();
    assert_eq!(r["run"], 2);
    assert_eq!(unfinished(&d).len(), 2);
    let text = d.probity(&["history"]).expect(0).stdout();
    assert!(text.contains("interrupted"), "{text}");
    let audit = d.probity(&["audit", "--verify", "--json"]).expect(0).json();
    assert_eq!(audit["unfinished"].as_array().unwrap().len(), 2);
    intact(&d);
}

#[test]
fn a_reveal_is_stored_whole_or_not_at_all_and_before_it_is_printed() {
    if !crate::util::pauses_compiled(
        "a_reveal_is_stored_whole_or_not_at_all_and_before_it_is_printed",
    ) {
        return;
    }
    let d = small_dir("crash-reveal");
    d.probity(&["run", "small.toml"]).expect(0);
    let before = counts(&d);
    // Killed inside its transaction: not stored, not counted, nothing printed.
    let out = kill_at(
        spawn(&d, &["reveal", "1", "--yes"], Some("reveal:commit")),
        "reveal:commit",
        None,
    );
    assert!(out.is_empty(), "{out}");
    assert_eq!(counts(&d), before);
    intact(&d);
    // Killed after storing, before printing: the reveal counts although its score never
    // reached the screen (an overcount is safe; an undercount would not be).
    let out = kill_at(
        spawn(&d, &["reveal", "1", "--yes"], Some("reveal:print")),
        "reveal:print",
        None,
    );
    assert!(out.is_empty(), "{out}");
    let after = counts(&d);
    assert_eq!(after["reveals"], before["reveals"] + 1);
    assert_eq!(after["chain"], before["chain"] + 1);
    assert_eq!(after["reveal_scores"], before["reveal_scores"] + 4);
    intact(&d);
    // The next reveal is the second of the partition.
    let r = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(r["reveals"], 2, "{r}");
}

#[test]
fn a_long_run_killed_wherever_it_is_leaves_a_consistent_ledger() {
    // Big enough that the debug build spends seconds in the grid.
    let d = Dir::new("crash-long");
    let mut csv = String::from("id,x1,x2,x3,y\n");
    for i in 0..12000u64 {
        let (a, b, c) = ((i * 37 % 101) as f64, (i * 53 % 97) as f64, (i % 13) as f64);
        csv.push_str(&format!(
            "r{i},{a},{b},{c},{}\n",
            a - 0.5 * b + c * (i % 7) as f64
        ));
    }
    d.write("long.csv", &csv);
    d.write(
        "long.toml",
        r#"name = "long"
task = "regression"

[data]
path = "long.csv"
target = "y"
key = "id"

[split]
method = "random"
seed = 3
test = 0.2
folds = 10

[[model]]
kind = "knn"
k = [1, 2, 3, 5, 8, 13, 21, 34]

[[model]]
kind = "lasso"
lambda = [0.001, 0.01, 0.1, 1]
"#,
    );
    let mut child = spawn(&d, &["run", "long.toml", "--threads", "1"], None);
    // Kill as soon as the start is visible (the grid is under way or about to be).
    let t0 = std::time::Instant::now();
    // (No ledger until the run creates it, as its checks pass.)
    while !d.ledger().exists() || unfinished(&d).is_empty() {
        assert!(
            child.try_wait().unwrap().is_none(),
            "the run ended before its start was seen"
        );
        assert!(t0.elapsed().as_secs() < 60, "no start recorded");
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    // Into the grid (the whole run takes seconds in a debug build).
    std::thread::sleep(std::time::Duration::from_millis(300));
    child.kill().unwrap();
    child.wait().unwrap();
    let after = counts(&d);
    let u = unfinished(&d);
    // Either the kill landed before the commit (nothing stored, one interrupted start) or just
    // after it (the whole run stored, no start left): never anything in between.
    if after["runs"] == 0 {
        assert!(run_tables(&after).iter().all(|(_, n)| *n == 0), "{after:?}");
        assert_eq!(u.len(), 1, "{u:?}");
        assert_eq!(u[0]["state"], "interrupted");
    } else {
        assert_eq!(after["runs"], 1);
        assert_eq!(after["candidates"], 13);
        assert_eq!(after["chain"], 1);
        assert!(u.is_empty(), "{u:?}");
    }
    intact(&d);
}

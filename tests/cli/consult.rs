//! Every consultation of sealed test rows is counted, through the binary: sealed rows used as
//! development rows of another run, partitions that refuse that, test partitions that were
//! developed on before, reveals at the same moment in each mode, seals that a copied spec
//! cannot loosen, and mechanisms whose exact scores no listing shows.
//!
//! Data: the diabetes data of Efron et al. (2004) and the breast cancer data of Street, Wolberg
//! & Mangasarian (1993), as vendored in tests/reference (README there).

use crate::util::{Dir, reference};
use serde_json::Value;
use std::io::{BufRead, BufReader};
use std::process::{Command, Stdio};

/// diabetes.csv (its `part` column ignored) and a spec with `split` and `guard` as given.
fn diabetes(name: &str, specs: &[(&str, &str, &str)]) -> Dir {
    let d = Dir::new(name);
    d.copy(&reference("diabetes.csv"), "diabetes.csv");
    for (file, split, guard) in specs {
        d.write(
            file,
            &format!(
                "name = \"d\"\ntask = \"regression\"\n[data]\npath = \"diabetes.csv\"\ntarget = \"y\"\nignore = [\"part\"]\n[split]\n{split}\n{guard}\n[[model]]\nkind = \"ridge\"\nlambda = [1.0, 10.0]\n"
            ),
        );
    }
    d
}

fn warnings(j: &Value) -> Vec<String> {
    j["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap().to_string())
        .collect()
}

fn partition_of(d: &Dir, run: &str) -> String {
    d.probity(&["show", run, "--json"]).expect(0).json()["partition"]["id"]
        .as_str()
        .unwrap()
        .to_string()
}

/// A copied spec that turns `test = 0.2` into `validation = 0.2` on the same file and seed
/// scores every candidate on exactly the sealed rows: its validation score is, bit for bit,
/// what the reveal later prints. So the run is stored as one consultation of that partition,
/// with a warning; audit lists it apart from the reveals and counts it against the budget; the
/// reveal reports it.
#[test]
fn a_validation_split_on_sealed_rows_is_a_counted_consultation() {
    let d = diabetes(
        "val-over-test",
        &[
            (
                "sealed.toml",
                "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
                "",
            ),
            (
                "copy.toml",
                "method = \"random\"\nseed = 7\nvalidation = 0.2",
                "",
            ),
        ],
    );
    d.probity(&["run", "sealed.toml"]).expect(0);
    let p = partition_of(&d, "1");
    let r = d.probity(&["run", "copy.toml", "--json"]).expect(0);
    let copy = r.json();
    let w = warnings(&copy);
    assert!(
        w.iter().any(|w| w
            .starts_with("88 of 442 development rows are sealed test rows of partition")
            && w.contains(&p)
            && w.contains("(1 of its budget of 1)")),
        "{w:?}"
    );
    assert!(r.stderr().contains("sealed test rows"), "{}", r.stderr());
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    let part = a["partitions"]
        .as_array()
        .unwrap()
        .iter()
        .find(|x| x["id"] == p.as_str())
        .unwrap()
        .clone();
    assert_eq!(part["reveals"], 0);
    assert_eq!(
        part["development_uses"],
        serde_json::json!([{"run": 2, "rows": 88}])
    );
    assert_eq!(part["consultations"], 1);
    assert_eq!(part["status"], "within budget");
    let text = d.probity(&["audit"]).expect(0).stdout();
    assert!(
        text.contains(&format!(
            "partition {p}: used in development by run 2 (88 rows)"
        )),
        "{text}"
    );

    // The first reveal reports the earlier use and goes over the budget of 1.
    let r = d
        .probity(&["reveal", "1", "--candidate", "2", "--yes", "--json"])
        .expect(0);
    let rv = r.json();
    assert_eq!(rv["reveals"], 1);
    assert_eq!(rv["consultations"], 2);
    assert_eq!(
        rv["development_uses"],
        serde_json::json!([{"run": 2, "rows": 88}])
    );
    assert_eq!(rv["over_budget"], true);
    assert!(
        r.stderr()
            .contains("used in development by run 2 (88 rows)"),
        "{}",
        r.stderr()
    );
    // What was counted was a real look: the copy's validation score of the same candidate is the
    // revealed test score (the same rows fitted and scored; only the order in which the fit
    // sums its rows differs, which moves the last few bits).
    let val = copy["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["id"] == 2)
        .unwrap()["validation"]["rmse"]
        .as_f64()
        .unwrap();
    let test = rv["test"]["rmse"].as_f64().unwrap();
    assert!(((val - test) / test).abs() < 1e-12, "{val} vs {test}");
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    assert_eq!(a["partitions"][0]["over_budget"], true);
    d.probity(&["audit", "--verify"]).expect(0);
}

/// `overlap = "refuse"` in the sealing run's spec: a later run that would fit or score on its
/// test rows is refused before its grid (exit 2, naming the partition and the rows), and
/// nothing of it is stored. The sealing spec itself runs again as before.
#[test]
fn a_partition_sealed_with_refuse_turns_overlapping_runs_away() {
    let d = diabetes(
        "refuse",
        &[
            (
                "sealed.toml",
                "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
                "[guard]\noverlap = \"refuse\"",
            ),
            (
                "reseed.toml",
                "method = \"random\"\nseed = 8\ntest = 0.2\nfolds = 5",
                "",
            ),
        ],
    );
    d.probity(&["run", "sealed.toml"]).expect(0);
    let p = partition_of(&d, "1");
    let before = d.counts();
    let r = d.probity(&["run", "reseed.toml"]).expect(2);
    let e = r.stderr();
    assert!(
        e.contains(&format!("sealed test rows of partition {p} (run 1)"))
            && e.contains("overlap = \"refuse\"")
            && e.contains("of this run's 354 development rows"),
        "{e}"
    );
    assert_eq!(e.lines().count(), 1, "one message: {e}");
    let after = d.counts();
    for ((t, a), (_, b)) in before.iter().zip(&after) {
        if t != "run_starts" {
            assert_eq!(a, b, "{t} changed");
        }
    }
    assert_eq!(
        d.probity(&["history", "--json"]).expect(0).json()["unfinished"],
        serde_json::json!([])
    );
    d.probity(&["run", "sealed.toml"]).expect(0);
    d.probity(&["audit"]).expect(0);
}

/// The reverse direction: a test partition whose rows earlier runs fitted and scored on is
/// not fresh, and the new run says so, naming the runs.
#[test]
fn a_test_partition_developed_on_before_is_not_fresh() {
    let d = diabetes(
        "not-fresh",
        &[
            (
                "explore.toml",
                "method = \"random\"\nseed = 7\nfolds = 5",
                "",
            ),
            (
                "sealed.toml",
                "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
                "",
            ),
        ],
    );
    d.probity(&["run", "explore.toml"]).expect(0);
    let p = partition_of(&d, "1");
    let j = d
        .probity(&["run", "sealed.toml", "--json"])
        .expect(0)
        .json();
    let w = warnings(&j);
    assert!(
        w.iter().any(|w| w
            .contains("88 of this run's 88 test rows were development rows of earlier runs")
            && w.contains(&format!("88 in partition {p} (run(s) 1)"))
            && w.contains("not fresh")),
        "{w:?}"
    );
    // Not a consultation of the new partition: nothing is counted, only said.
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    for part in a["partitions"].as_array().unwrap() {
        assert_eq!(part["consultations"], 0, "{part}");
    }
}

/// A copy of the sealing spec with a larger budget shares the partition, but not the budget:
/// the seal's rules apply, and the run says so.
#[test]
fn a_copied_spec_cannot_raise_the_budget() {
    let d = diabetes(
        "seal",
        &[
            (
                "sealed.toml",
                "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
                "",
            ),
            (
                "generous.toml",
                "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
                "[guard]\nreveals = 10",
            ),
        ],
    );
    d.probity(&["run", "sealed.toml"]).expect(0);
    let j = d
        .probity(&["run", "generous.toml", "--json"])
        .expect(0)
        .json();
    assert_eq!(partition_of(&d, "1"), partition_of(&d, "2"));
    assert!(
        warnings(&j)
            .iter()
            .any(|w| w.contains("was sealed by run 1")
                && w.contains("\"reveals\":1")
                && w.contains("those rules apply")),
        "{:?}",
        warnings(&j)
    );
    d.probity(&["reveal", "2", "--yes"]).expect(0);
    let r = d.probity(&["reveal", "2", "--yes", "--json"]).expect(0);
    assert_eq!(r.json()["budget"], 1);
    assert_eq!(r.json()["over_budget"], true);
    d.probity(&["audit"]).expect(3);
}

/// Start `reveal` processes that all stop just before their transaction, then release them
/// together; returns each one's JSON document.
fn reveals_at_once(d: &Dir, n: usize, extra: &[&str]) -> Vec<Value> {
    let go = d.path.join("go");
    let _ = std::fs::remove_file(&go);
    let mut children = Vec::new();
    for _ in 0..n {
        let mut args = vec!["reveal", "1", "--yes", "--json"];
        args.extend_from_slice(extra);
        let mut c = Command::new(assert_cmd::cargo::cargo_bin("probity"))
            .current_dir(&d.path)
            .args(&args)
            .env_remove("PROBITY_LEDGER")
            .env("PROBITY_PAUSE_AT", "reveal:consult")
            .env("PROBITY_RESUME_ON", &go)
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let mut err = BufReader::new(c.stderr.take().unwrap());
        let mut line = String::new();
        loop {
            line.clear();
            assert!(
                err.read_line(&mut line).unwrap() > 0,
                "ended before pausing"
            );
            if line.trim_end() == "probity: paused at reveal:consult" {
                break;
            }
        }
        children.push((c, err));
    }
    // Every process has scored its candidate and waits at the door of its transaction.
    std::fs::write(&go, "").unwrap();
    children
        .into_iter()
        .map(|(c, mut err)| {
            let out = c.wait_with_output().unwrap();
            let mut rest = String::new();
            std::io::Read::read_to_string(&mut err, &mut rest).unwrap();
            assert!(out.status.success(), "{rest}");
            serde_json::from_slice(&out.stdout).unwrap()
        })
        .collect()
}

#[test]
fn simultaneous_reveals_in_count_mode_each_print_their_true_position() {
    let d = diabetes(
        "race-count",
        &[(
            "s.toml",
            "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
            "",
        )],
    );
    d.probity(&["run", "s.toml"]).expect(0);
    let docs = reveals_at_once(&d, 3, &[]);
    let mut positions: Vec<i64> = docs
        .iter()
        .map(|j| j["reveals"].as_i64().unwrap())
        .collect();
    positions.sort();
    assert_eq!(positions, vec![1, 2, 3]);
    for j in &docs {
        let first = j["reveals"] == 1;
        assert_eq!(j["over_budget"], !first, "{j}");
    }
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    assert_eq!(a["partitions"][0]["reveals"], 3);
    d.probity(&["audit", "--verify"]).expect(0);
}

#[test]
fn simultaneous_reveals_in_ladder_mode_see_each_other() {
    let d = diabetes(
        "race-ladder",
        &[(
            "s.toml",
            "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
            "[guard]\nmode = \"ladder\"\nstep = 0.5\nreveals = 5",
        )],
    );
    d.probity(&["run", "s.toml"]).expect(0);
    // The same candidate twice: only one of them can be a new best.
    let docs = reveals_at_once(&d, 2, &[]);
    let mut kinds: Vec<&str> = docs
        .iter()
        .map(|j| j["answer"]["kind"].as_str().unwrap())
        .collect();
    kinds.sort();
    assert_eq!(kinds, vec!["ladder-new", "ladder-previous"]);
    assert_eq!(docs[0]["answer"]["value"], docs[1]["answer"]["value"]);
    let mut positions: Vec<i64> = docs
        .iter()
        .map(|j| j["reveals"].as_i64().unwrap())
        .collect();
    positions.sort();
    assert_eq!(positions, vec![1, 2]);
}

/// breast_cancer.csv with accuracy, in reusable mode with a threshold so small that every
/// answer comes from the test rows; budget 1.
fn reusable_dir(name: &str) -> Dir {
    let d = Dir::new(name);
    d.copy(&reference("breast_cancer.csv"), "bc.csv");
    d.write(
        "r.toml",
        "name = \"bc\"\ntask = \"classification\"\n[data]\npath = \"bc.csv\"\ntarget = \"diagnosis\"\nignore = [\"part\"]\n[split]\nmethod = \"stratified\"\nseed = 3\ntest = 0.25\nfolds = 3\n[select]\nmetric = \"accuracy\"\n[guard]\nmode = \"reusable\"\nreveals = 1\nthreshold = 0.000001\nnoise = 0.0000001\n[[model]]\nkind = \"logistic\"\nlambda = [1.0]\n",
    );
    d
}

#[test]
fn simultaneous_reveals_in_reusable_mode_get_one_answer_per_budget_unit() {
    let d = reusable_dir("race-reusable");
    d.probity(&["run", "r.toml"]).expect(0);
    let docs = reveals_at_once(&d, 2, &[]);
    let mut kinds: Vec<&str> = docs
        .iter()
        .map(|j| j["answer"]["kind"].as_str().unwrap())
        .collect();
    kinds.sort();
    assert_eq!(kinds, vec!["refused", "test+noise"]);
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    assert_eq!(a["partitions"][0]["over_budget"], true);
    d.probity(&["audit", "--verify"]).expect(0);
}

/// The exact test score stored for a reveal (what a mechanism withholds).
fn exact_score(d: &Dir, reveal: i64, metric: &str) -> f64 {
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    c.query_row(
        "SELECT value FROM reveal_scores WHERE reveal_id = ?1 AND metric = ?2",
        rusqlite::params![reveal, metric],
        |r| r.get(0),
    )
    .unwrap()
}

/// The reveals plot's listed points (its metadata), by reveal id: the plotted test score.
fn plotted(d: &Dir) -> Vec<(i64, Option<f64>)> {
    d.probity(&["plot", "1", "--kind", "reveals", "--out", "p.svg"])
        .expect(0);
    let svg = std::fs::read_to_string(d.path.join("p.svg")).unwrap();
    let doc = roxmltree::Document::parse(&svg).unwrap();
    let meta: Value = serde_json::from_str(
        doc.descendants()
            .find(|n| n.has_tag_name("metadata"))
            .and_then(|n| n.text())
            .unwrap(),
    )
    .unwrap();
    meta["points"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| (p["reveal"].as_i64().unwrap(), p["test"].as_f64()))
        .collect()
}

/// Under a mechanism, the listings show what it released: the reveals plot (drawn and listed)
/// and the HTML report carry the released answer and never the exact test score; exact
/// predictions of the sealed rows are refused even with --allow-sealed, before and after the
/// budget is spent.
#[test]
fn mechanisms_release_only_their_answers_everywhere() {
    let d = diabetes(
        "modes-leak",
        &[(
            "s.toml",
            "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
            "[guard]\nmode = \"ladder\"\nstep = 5.0\nreveals = 3",
        )],
    );
    d.probity(&["run", "s.toml"]).expect(0);
    let j = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    let released = j["answer"]["value"].as_f64().unwrap();
    let exact = exact_score(&d, 1, "rmse");
    assert_ne!(released, exact);
    assert_eq!(plotted(&d), vec![(1, Some(released))]);
    d.probity(&["report", "1", "--out", "r.html"]).expect(0);
    let html = std::fs::read_to_string(d.path.join("r.html")).unwrap();
    let shown = probity::report::num(Some(exact));
    assert!(
        !html.contains(&shown),
        "the report shows the exact score {shown}"
    );
    assert!(html.contains(&probity::report::num(Some(released))));
    let before = d.counts();
    let r = d
        .probity(&[
            "predict",
            "1",
            "--input",
            "diabetes.csv",
            "--output",
            "p.csv",
            "--allow-sealed",
        ])
        .expect(2);
    assert!(
        r.stderr().contains("sealed in ladder mode"),
        "{}",
        r.stderr()
    );
    assert_eq!(d.counts(), before);
    assert!(!d.path.join("p.csv").exists());

    let d = reusable_dir("modes-reusable");
    d.probity(&["run", "r.toml"]).expect(0);
    let first = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(first["answer"]["kind"], "test+noise");
    let j = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(j["answer"]["kind"], "refused", "the budget of 1 is spent");
    let r = d
        .probity(&[
            "predict",
            "1",
            "--input",
            "bc.csv",
            "--output",
            "p.csv",
            "--allow-sealed",
        ])
        .expect(2);
    assert!(
        r.stderr().contains("sealed in reusable mode"),
        "{}",
        r.stderr()
    );
    // The noisy answer is plotted; the refused one has nothing to plot.
    let noisy = first["answer"]["value"].as_f64().unwrap();
    assert_ne!(noisy, exact_score(&d, 1, "accuracy"));
    assert_eq!(plotted(&d), vec![(1, Some(noisy))]);
}

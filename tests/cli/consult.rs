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
    // The sealing run's review page says so too.
    d.probity(&["report", "1", "--out", "r.html"]).expect(0);
    let html = std::fs::read_to_string(d.path.join("r.html")).unwrap();
    assert!(
        html.contains(
            "<p id=\"development-uses\" class=\"warn\">Used in development by run 2 (88 rows)"
        ),
        "{html}"
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
/// `probity ARGS` started with the pause point `reveal:consult` armed to go on once `go`
/// exists, returned once it has paused there, with its stderr still to read.
fn paused_reveal(
    d: &Dir,
    args: &[&str],
    go: &std::path::Path,
) -> (std::process::Child, BufReader<std::process::ChildStderr>) {
    let mut c = Command::new(assert_cmd::cargo::cargo_bin("probity"))
        .current_dir(&d.path)
        .args(args)
        .env_remove("PROBITY_LEDGER")
        .env("PROBITY_PAUSE_AT", "reveal:consult")
        .env("PROBITY_RESUME_ON", go)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut err = BufReader::new(c.stderr.take().unwrap());
    let mut line = String::new();
    while line.trim_end() != "probity: paused at reveal:consult" {
        line.clear();
        assert!(
            err.read_line(&mut line).unwrap() > 0,
            "ended before pausing"
        );
    }
    (c, err)
}

fn reveals_at_once(d: &Dir, n: usize, extra: &[&str]) -> Vec<Value> {
    let go = d.path.join("go");
    let _ = std::fs::remove_file(&go);
    let mut children = Vec::new();
    for _ in 0..n {
        let mut args = vec!["reveal", "1", "--yes", "--json"];
        args.extend_from_slice(extra);
        children.push(paused_reveal(d, &args, &go));
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
    if !crate::util::pauses_compiled(
        "simultaneous_reveals_in_count_mode_each_print_their_true_position",
    ) {
        return;
    }
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
    if !crate::util::pauses_compiled("simultaneous_reveals_in_ladder_mode_see_each_other") {
        return;
    }
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
    if !crate::util::pauses_compiled(
        "simultaneous_reveals_in_reusable_mode_get_one_answer_per_budget_unit",
    ) {
        return;
    }
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

/// A small CSV editor for the evasion cases: the header and the rows as cells.
#[derive(Clone)]
struct Csv {
    header: Vec<String>,
    rows: Vec<Vec<String>>,
}

impl Csv {
    fn read(text: &str) -> Csv {
        let mut lines = text.lines();
        let split = |l: &str| l.split(',').map(str::to_string).collect::<Vec<_>>();
        let header = split(lines.next().unwrap());
        Csv {
            header,
            rows: lines.map(split).collect(),
        }
    }
    fn text(&self) -> String {
        let mut out = self.header.join(",") + "\n";
        for r in &self.rows {
            out.push_str(&r.join(","));
            out.push('\n');
        }
        out
    }
    fn at(&self, name: &str) -> usize {
        self.header.iter().position(|h| h == name).unwrap()
    }
    fn drop(mut self, name: &str) -> Csv {
        let i = self.at(name);
        self.header.remove(i);
        for r in &mut self.rows {
            r.remove(i);
        }
        self
    }
    fn rename(mut self, from: &str, to: &str) -> Csv {
        let i = self.at(from);
        self.header[i] = to.into();
        self
    }
    fn map(mut self, name: &str, f: impl Fn(&str) -> String) -> Csv {
        let i = self.at(name);
        for r in &mut self.rows {
            r[i] = f(&r[i]);
        }
        self
    }
    fn add(mut self, name: &str, f: impl Fn(usize) -> String) -> Csv {
        self.header.push(name.into());
        for (n, r) in self.rows.iter_mut().enumerate() {
            r.push(f(n));
        }
        self
    }
    fn keep(mut self, f: impl Fn(&Csv, &[String]) -> bool) -> Csv {
        let rows = std::mem::take(&mut self.rows);
        self.rows = rows.into_iter().filter(|r| f(&self, r)).collect();
        self
    }
}

/// diabetes.csv with a key column `patient` (P0001 ...), the reference's `part` column kept.
fn keyed_diabetes() -> Csv {
    Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap())
        .add("patient", |n| format!("P{:04}", n + 1))
}

fn spec(data: &str, key: Option<&str>, split: &str) -> String {
    format!(
        "name = \"d\"\ntask = \"regression\"\n[data]\npath = \"{data}\"\ntarget = \"y\"\n{}ignore = [\"part\"]\n[split]\n{split}\n[[model]]\nkind = \"ridge\"\nlambda = [1.0, 10.0]\n",
        key.map_or(String::new(), |k| format!("key = \"{k}\"\n"))
    )
}

/// Run 1 on `csv` (already written) with `spec(csv, key, ...)`: ridge, 20 % sealed, seed 7,
/// five folds; its partition.
fn sealed_run(d: &Dir, csv: &str, key: Option<&str>) -> String {
    let toml = csv.replace(".csv", ".toml");
    d.write(
        &toml,
        &spec(
            csv,
            key,
            "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
        ),
    );
    d.probity(&["run", &toml]).expect(0);
    partition_of(d, "1")
}

/// Run 1: ridge on keyed_diabetes() (key `patient`, 20 % sealed, seed 7), and its partition.
fn keyed_run(name: &str) -> (Dir, String) {
    let d = Dir::new(name);
    d.write("k.csv", &keyed_diabetes().text());
    let p = sealed_run(&d, "k.csv", Some("patient"));
    (d, p)
}

/// Run `csv` (already written) with run 1's seed and fraction as validation rows
/// (`spec(csv, key, ...)` edited by `edit`), and assert it counts its 88 sealed rows against
/// partition `p`.
fn counted_as_validation(
    d: &Dir,
    csv: &str,
    key: Option<&str>,
    p: &str,
    edit: &dyn Fn(String) -> String,
) {
    let toml = csv.replace(".csv", ".toml");
    d.write(
        &toml,
        &edit(spec(
            csv,
            key,
            "method = \"random\"\nseed = 7\nvalidation = 0.2\nfolds = 5",
        )),
    );
    let j = d.probity(&["run", &toml, "--json"]).expect(0).json();
    assert!(
        warnings(&j).iter().any(|w| w.starts_with("88 of ")
            && w.contains(&format!("sealed test rows of partition {p}"))),
        "{csv} {key:?}: {:?}",
        warnings(&j)
    );
}

/// The sealed test rows of run 1, as rows of the file it ran on (from its stored assignment).
fn sealed_rows_of(d: &Dir, csv: &Csv) -> Csv {
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    let assignment: Vec<u8> = c
        .query_row(
            "SELECT p.assignment FROM partitions p JOIN runs r ON r.partition_id = p.id WHERE r.id = 1",
            [],
            |r| r.get(0),
        )
        .unwrap();
    Csv {
        header: csv.header.clone(),
        rows: csv
            .rows
            .iter()
            .enumerate()
            .filter(|(n, _)| assignment[*n] == b't')
            .map(|(_, r)| r.clone())
            .collect(),
    }
}

/// `predict` of run 1 on `file` must be refused, naming the partition and its 88 rows.
fn refused(d: &Dir, file: &str, partition: &str, case: &str) {
    let before = d.counts();
    let r = d.probity(&["predict", "1", "--input", file, "--output", "p.csv"]);
    assert_eq!(r.code(), 2, "{case}: {}", r.stderr());
    assert!(
        r.stderr().contains(&format!(
            "88 rows are test rows of sealed partition {partition}"
        )),
        "{case}: {}",
        r.stderr()
    );
    assert!(!d.path.join("p.csv").exists(), "{case}");
    assert_eq!(d.counts(), before, "{case}");
}

/// With a key, `predict` recognises the sealed rows whatever the file does to the target
/// column, the key column or the keys' spelling: by the key when the file has it (found by
/// the spec's key name, normalised), by the feature cells otherwise.
#[test]
fn predict_recognises_keyed_sealed_rows_through_ordinary_edits() {
    let (d, p) = keyed_run("predict-keyed");
    let sealed = || sealed_rows_of(&d, &keyed_diabetes());
    let cases: Vec<(&str, Csv)> = vec![
        ("the target dropped", sealed().drop("y")),
        (
            "the key and the target dropped",
            sealed().drop("y").drop("patient"),
        ),
        ("the target renamed", sealed().rename("y", "Yield_kg")),
        (
            "the keys in lower case",
            sealed().drop("y").map("patient", |k| k.to_lowercase()),
        ),
        (
            "the keys prefixed",
            sealed().drop("y").map("patient", |k| format!("2027-{k}")),
        ),
        (
            "the key column renamed",
            sealed().drop("y").rename("patient", "patient_id"),
        ),
    ];
    for (case, file) in cases {
        d.write("edited.csv", &file.text());
        refused(&d, "edited.csv", &p, case);
    }
}

/// Without a key, `predict` recognises the sealed rows by their feature cells: a junk column,
/// a dropped non-feature column, a renamed or nudged target, or a feature nudged by 1e-12 (far
/// below the ten significant digits a number is compared to) changes nothing.
#[test]
fn predict_recognises_unkeyed_sealed_rows_through_ordinary_edits() {
    let d = Dir::new("predict-unkeyed");
    d.copy(&reference("diabetes.csv"), "d.csv");
    let p = sealed_run(&d, "d.csv", None);
    let base = || Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap());
    let sealed = || sealed_rows_of(&d, &base());
    let nudge = |by: f64| move |v: &str| format!("{}", v.parse::<f64>().unwrap() + by);
    let cases: Vec<(&str, Csv)> = vec![
        ("bmi + 1e-12", sealed().map("bmi", nudge(1e-12))),
        (
            "a junk column",
            sealed().add("junk", |n| format!("{}", n % 7)),
        ),
        ("the ignored column dropped", sealed().drop("part")),
        ("the target renamed", sealed().rename("y", "Y")),
        ("the target + 1e-9", sealed().map("y", nudge(1e-9))),
        ("the target dropped", sealed().drop("y")),
    ];
    for (case, file) in cases {
        d.write("edited.csv", &file.text());
        refused(&d, "edited.csv", &p, case);
    }
    // What it does not catch, by design: a feature changed in its first digits is another row.
    let moved = sealed().map("bmi", nudge(0.5));
    d.write("moved.csv", &moved.text());
    d.probity(&["predict", "1", "--input", "moved.csv", "--output", "p.csv"])
        .expect(0);
}

/// Edits that a later run makes to the file do not reset the sealed rows' exposure: renaming
/// the key column, prefixing the keys or adding a constant column, the later run on a new seed
/// still develops on the sealed rows, and is counted.
#[test]
fn edited_files_do_not_reset_exposure() {
    type Edit = Box<dyn Fn(Csv) -> Csv>;
    let edits: Vec<(&str, Edit, &str)> = vec![
        (
            "the key column renamed",
            Box::new(|c| c.rename("patient", "pid")),
            "pid",
        ),
        (
            "the keys prefixed",
            Box::new(|c| c.map("patient", |k| format!("X-{k}"))),
            "patient",
        ),
        (
            "a constant column added",
            Box::new(|c| c.add("site", |_| "north".into())),
            "patient",
        ),
    ];
    for (case, edit, key) in edits {
        let (d, p) = keyed_run("exposure-edits");
        d.write("e.csv", &edit(keyed_diabetes()).text());
        let mut text = spec(
            "e.csv",
            Some(key),
            "method = \"random\"\nseed = 8\ntest = 0.2\nfolds = 5",
        );
        if case == "a constant column added" {
            text = text.replace("ignore = [\"part\"]", "ignore = [\"part\", \"site\"]");
        }
        d.write("e.toml", &text);
        let j = d.probity(&["run", "e.toml", "--json"]).expect(0).json();
        let found = warnings(&j)
            .iter()
            .find(|w| {
                w.contains(&format!(
                    "development rows are sealed test rows of partition {p}"
                ))
            })
            .cloned()
            .unwrap_or_else(|| panic!("{case}: no development use in {:?}", warnings(&j)));
        let n: usize = found.split(' ').next().unwrap().parse().unwrap();
        // Seed 8 puts about four fifths of run 1's 88 test rows among its development rows.
        assert!(n > 50 && n < 88, "{case}: {found}");
        let a = d.probity(&["audit", "--json"]).expect(0).json();
        let part = a["partitions"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["id"] == p.as_str())
            .unwrap()
            .clone();
        assert_eq!(part["development_uses"][0]["run"], 2, "{case}");
    }
}

/// The column-split form of the same look: a copy of the file whose `part` column turns the
/// sealed rows' `test` into `validation` is another file, and its rows are still recognised
/// (by their feature cells: the split column is not a feature).
#[test]
fn a_column_split_that_relabels_sealed_rows_is_counted() {
    let d = Dir::new("column-relabel");
    let csv = Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap())
        .keep(|c, r| r[c.at("part")] != "test");
    let sealed = csv.map("part", |p| {
        if p == "validation" {
            "test".into()
        } else {
            p.into()
        }
    });
    d.write("s.csv", &sealed.text());
    let relabelled = Csv::read(&sealed.text()).map("part", |p| {
        if p == "test" {
            "validation".into()
        } else {
            p.into()
        }
    });
    d.write("v.csv", &relabelled.text());
    let column = |file: &str| {
        format!(
            "name = \"d\"\ntask = \"regression\"\n[data]\npath = \"{file}\"\ntarget = \"y\"\n[split]\nmethod = \"column\"\ncolumn = \"part\"\nfolds = 5\n[[model]]\nkind = \"ridge\"\nlambda = [10.0]\n"
        )
    };
    d.write("s.toml", &column("s.csv"));
    d.write("v.toml", &column("v.csv"));
    d.probity(&["run", "s.toml"]).expect(0);
    let p = partition_of(&d, "1");
    let j = d.probity(&["run", "v.toml", "--json"]).expect(0).json();
    assert!(
        warnings(&j).iter().any(|w| w.starts_with(&format!(
            "88 of 354 development rows are sealed test rows of partition {p}"
        ))),
        "{:?}",
        warnings(&j)
    );
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["partitions"][0]["development_uses"][0]["rows"], 88);
}

/// Two of the co-operative's demo files share a column (`temp_day`) and a target name: the
/// heating trial's rows are told apart by that one feature, and one bay's week happens to
/// agree with a trial plot on both temperature and yield. Chance explains that, so the bay
/// model's run neither counts a use of the trial's partition nor calls its own test rows
/// developed on.
#[test]
fn records_that_agree_by_chance_are_not_sealed_rows() {
    let d = Dir::new("chance");
    let ex = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    for f in [
        "heating-trial.csv",
        "heating-trial.toml",
        "bays.csv",
        "bay-yield.toml",
    ] {
        d.copy(&ex.join(f), f);
    }
    d.probity(&["run", "heating-trial.toml"]).expect(0);
    let trial = partition_of(&d, "1");
    let j = d
        .probity(&["run", "bay-yield.toml", "--json"])
        .expect(0)
        .json();
    assert!(
        warnings(&j).iter().all(|w| !w.contains(&trial)),
        "{:?}",
        warnings(&j)
    );
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    for p in a["partitions"].as_array().unwrap() {
        assert_eq!(p["consultations"], 0, "{p}");
    }
}

/// A nested run and a merged one go through the same count: the nested run's development
/// rows include the sealed rows, and its use travels in a bundle with it, so the receiving
/// ledger counts it against the same partition.
#[test]
fn nested_and_merged_runs_count_the_same() {
    let d = diabetes(
        "nested-merged",
        &[
            (
                "sealed.toml",
                "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 3",
                "",
            ),
            (
                "nested.toml",
                "method = \"random\"\nseed = 9\ntest = 0.2\nfolds = 3\n[select]\nnested = true",
                "",
            ),
        ],
    );
    d.probity(&["run", "sealed.toml"]).expect(0);
    let p = partition_of(&d, "1");
    let j = d
        .probity(&["run", "nested.toml", "--json"])
        .expect(0)
        .json();
    assert!(j["nested"].is_object());
    assert!(
        warnings(&j).iter().any(|w| w.contains(&format!(
            "development rows are sealed test rows of partition {p}"
        ))),
        "{:?}",
        warnings(&j)
    );
    let other = Dir::new("nested-merged-receiver");
    other.trusts(&d, "d");
    d.probity(&["pack", "1", "2", "--out", "b.json"]).expect(0);
    other.copy(&d.path.join("b.json"), "b.json");
    other.probity(&["merge", "b.json"]).expect(0);
    for dir in [&d, &other] {
        let a = dir.probity(&["audit", "--json"]).expect(0).json();
        let part = a["partitions"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["id"] == p.as_str())
            .unwrap()
            .clone();
        assert_eq!(part["consultations"], 1, "{part}");
        assert_eq!(part["development_uses"][0]["run"], 2, "{part}");
        dir.probity(&["audit", "--verify"]).expect(0);
    }
}

/// A split that differs only in what does not move a test row (other folds, a `missing` rule
/// with nothing missing) is another partition over the same test rows: a reveal there is a
/// look at the first partition's rows too, counted there; and when the first is under a
/// mechanism, the exact reveal is refused.
#[test]
fn another_partition_over_the_same_test_rows_is_counted_and_cannot_undo_a_mechanism() {
    let split = "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5";
    let d = diabetes(
        "same-test-rows",
        &[
            ("s.toml", split, ""),
            (
                "folds.toml",
                &split.replace("folds = 5", "folds = 4"),
                "[guard]\nreveals = 10",
            ),
        ],
    );
    d.probity(&["run", "s.toml"]).expect(0);
    d.probity(&["run", "folds.toml"]).expect(0);
    let (p1, p2) = (partition_of(&d, "1"), partition_of(&d, "2"));
    assert_ne!(p1, p2);
    let r = d.probity(&["reveal", "2", "--yes", "--json"]).expect(0);
    assert!(
        r.stderr().contains(&format!(
            "88 of these test rows are test rows of partition {p1} too: counted there as one consultation (1 of its budget of 1)"
        )),
        "{}",
        r.stderr()
    );
    d.probity(&["reveal", "1", "--yes"]).expect(0);
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    let part = |id: &str| {
        a["partitions"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["id"] == id)
            .unwrap()
            .clone()
    };
    assert_eq!(part(&p1)["reveals"], 2);
    assert_eq!(part(&p1)["over_budget"], true);
    // The second partition counts the first one's reveal too.
    assert_eq!(part(&p2)["reveals"], 2);

    // Under a mechanism: the copy's exact reveal is refused, nothing recorded.
    let d = diabetes(
        "same-test-rows-ladder",
        &[
            ("s.toml", split, "[guard]\nmode = \"ladder\"\nstep = 5.0"),
            ("mean.toml", &format!("{split}\n"), "[guard]\nreveals = 10"),
        ],
    );
    d.write(
        "mean.toml",
        &std::fs::read_to_string(d.path.join("mean.toml"))
            .unwrap()
            .replace(
                "ignore = [\"part\"]",
                "ignore = [\"part\"]\nmissing = \"mean\"",
            ),
    );
    d.probity(&["run", "s.toml"]).expect(0);
    d.probity(&["run", "mean.toml"]).expect(0);
    assert_ne!(partition_of(&d, "1"), partition_of(&d, "2"));
    let before = d.counts();
    let r = d.probity(&["reveal", "2", "--yes"]).expect(2);
    assert!(
        r.stderr().contains("sealed in ladder mode")
            && r.stderr().contains("Reveal a run of that partition"),
        "{}",
        r.stderr()
    );
    assert!(!r.stdout().contains("rmse"), "{}", r.stdout());
    assert_eq!(d.counts(), before);
}

/// A partition over the same test rows, stored while a reveal is between finding the
/// partitions it touches and recording itself, is counted too: the reveal finds them again
/// inside its transaction's view.
#[test]
fn a_partition_stored_during_a_reveal_is_counted_by_it() {
    if !crate::util::pauses_compiled("a_partition_stored_during_a_reveal_is_counted_by_it") {
        return;
    }
    let split = "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5";
    let d = diabetes(
        "partner-race",
        &[
            ("s.toml", split, ""),
            ("folds.toml", &split.replace("folds = 5", "folds = 4"), ""),
        ],
    );
    d.probity(&["run", "s.toml"]).expect(0);
    let go = d.path.join("go");
    let (c, mut err) = paused_reveal(&d, &["reveal", "1", "--yes", "--json"], &go);
    // The reveal has found no other partition; now one is stored over the same test rows.
    d.probity(&["run", "folds.toml"]).expect(0);
    let p2 = partition_of(&d, "2");
    std::fs::write(&go, "").unwrap();
    let out = c.wait_with_output().unwrap();
    let mut rest = String::new();
    std::io::Read::read_to_string(&mut err, &mut rest).unwrap();
    assert!(out.status.success(), "{rest}");
    assert!(
        rest.contains(&format!(
            "88 of these test rows are test rows of partition {p2} too"
        )),
        "{rest}"
    );
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    let part = a["partitions"]
        .as_array()
        .unwrap()
        .iter()
        .find(|x| x["id"] == p2.as_str())
        .unwrap()
        .clone();
    assert_eq!(part["reveals"], 1, "{part}");
}

/// Under a mechanism nothing derived from the exact scores is shown: not the bootstrap's
/// standard error either (with a proportion it gives the score back).
#[test]
fn a_mechanism_withholds_the_standard_error() {
    let d = reusable_dir("no-se");
    d.write(
        "l.toml",
        &std::fs::read_to_string(d.path.join("r.toml"))
            .unwrap()
            .replace(
                "mode = \"reusable\"\nreveals = 1\nthreshold = 0.000001\nnoise = 0.0000001",
                "mode = \"ladder\"\nstep = 0.1",
            ),
    );
    d.probity(&["run", "l.toml"]).expect(0);
    let j = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(j["mode"], "ladder");
    assert!(j["optimism"]["se"].is_null(), "{}", j["optimism"]);
    assert!(j["optimism"]["estimate"].is_null(), "{}", j["optimism"]);
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    assert!(a["partitions"][0]["optimism"]["se"].is_null());
}

/// A run on the same partition that reads fewer features keeps the test rows' identities
/// under its own features: its model's predictions of the sealed rows (without the feature it
/// does not read) are refused. A model that reads a column the partition never had (a constant
/// added to a copy of the development rows) predicts the sealed rows by their features all the
/// same: a file that holds them all is recognised.
#[test]
fn predict_recognises_sealed_rows_whatever_features_the_model_reads() {
    let split = "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5";
    let d = diabetes("predict-features", &[("s.toml", split, "")]);
    d.write(
        "nos6.toml",
        &spec("diabetes.csv", None, split)
            .replace("ignore = [\"part\"]", "ignore = [\"part\", \"s6\"]"),
    );
    d.probity(&["run", "s.toml"]).expect(0);
    d.probity(&["run", "nos6.toml"]).expect(0);
    let p = partition_of(&d, "1");
    assert_eq!(partition_of(&d, "2"), p);
    let base = || Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap());
    d.write("nos6.csv", &sealed_rows_of(&d, &base()).drop("s6").text());
    let r = d
        .probity(&["predict", "2", "--input", "nos6.csv", "--output", "p.csv"])
        .expect(2);
    assert!(
        r.stderr()
            .contains(&format!("88 rows are test rows of sealed partition {p}")),
        "{}",
        r.stderr()
    );
    // A model with an extra constant column, fitted on a copy of the development rows alone.
    let dev = {
        let c = base();
        let sealed = sealed_rows_of(&d, &base());
        c.keep(|_, r| !sealed.rows.contains(&r.to_vec()))
            .add("z", |_| "1".into())
    };
    assert_eq!(dev.rows.len(), 354);
    d.write("dev.csv", &dev.text());
    d.write(
        "z.toml",
        &spec("dev.csv", None, "method = \"random\"\nseed = 3\nfolds = 5"),
    );
    d.probity(&["run", "z.toml"]).expect(0);
    d.write(
        "sealed-z.csv",
        &sealed_rows_of(&d, &base())
            .drop("y")
            .add("z", |_| "1".into())
            .text(),
    );
    let r = d
        .probity(&[
            "predict",
            "3",
            "--input",
            "sealed-z.csv",
            "--output",
            "p.csv",
        ])
        .expect(2);
    assert!(
        r.stderr()
            .contains(&format!("88 rows are test rows of sealed partition {p}")),
        "{}",
        r.stderr()
    );
}

/// A copied file whose split column puts the sealed rows among the validation rows, padded
/// with copies of one development row, is still counted: the odds of chance come from the
/// sealed partition, not from the file. And a file that holds the sealed rows but sends only
/// two of them to validation (the rest to its own test rows) is recognised as a copy, so the
/// two count.
#[test]
fn padding_or_trickling_sealed_rows_is_counted() {
    let d = Dir::new("padding");
    d.copy(&reference("diabetes.csv"), "d.csv");
    let p = sealed_run(&d, "d.csv", None);
    let base = Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap());
    let sealed = sealed_rows_of(&d, &base);
    let is_sealed = |r: &[String]| sealed.rows.contains(&r.to_vec());
    let column = |file: &str| {
        format!(
            "name = \"d\"\ntask = \"regression\"\n[data]\npath = \"{file}\"\ntarget = \"y\"\nignore = [\"part\"]\n[split]\nmethod = \"column\"\ncolumn = \"p2\"\nfolds = 5\n[[model]]\nkind = \"ridge\"\nlambda = [10.0]\n"
        )
    };
    // Padded: the sealed rows as validation, plus 18 copies of one development row.
    let mut padded = Csv {
        header: base.header.clone(),
        rows: base.rows.clone(),
    };
    let first_dev = padded.rows.iter().find(|r| !is_sealed(r)).unwrap().clone();
    for _ in 0..18 {
        padded.rows.push(first_dev.clone());
    }
    let n = padded.rows.len();
    let padded = padded.add("p2", |i| {
        if i >= n - 18 {
            "validation".into()
        } else {
            String::new()
        }
    });
    let padded = Csv {
        rows: padded
            .rows
            .iter()
            .map(|r| {
                let mut r = r.clone();
                let last = r.len() - 1;
                if r[last].is_empty() {
                    r[last] = if is_sealed(&r[..last]) {
                        "validation"
                    } else {
                        "train"
                    }
                    .into();
                }
                r
            })
            .collect(),
        header: padded.header,
    };
    d.write("padded.csv", &padded.text());
    d.write("padded.toml", &column("padded.csv"));
    let j = d
        .probity(&["run", "padded.toml", "--json"])
        .expect(0)
        .json();
    assert!(
        warnings(&j).iter().any(|w| w.starts_with("88 of ")
            && w.contains(&format!("sealed test rows of partition {p}"))),
        "{:?}",
        warnings(&j)
    );
    // Trickled: two sealed rows to validation, the other 86 to the file's own test rows.
    let mut k = 0;
    let trickled = base.add("p2", |_| String::new());
    let trickled = Csv {
        rows: trickled
            .rows
            .iter()
            .map(|r| {
                let mut r = r.clone();
                let last = r.len() - 1;
                r[last] = if is_sealed(&r[..last]) {
                    k += 1;
                    if k <= 2 { "validation" } else { "test" }
                } else {
                    "train"
                }
                .into();
                r
            })
            .collect(),
        header: trickled.header,
    };
    d.write("trickled.csv", &trickled.text());
    d.write("trickled.toml", &column("trickled.csv"));
    let j = d
        .probity(&["run", "trickled.toml", "--json"])
        .expect(0)
        .json();
    assert!(
        warnings(&j)
            .iter()
            .any(|w| w.starts_with("2 of ")
                && w.contains(&format!("sealed test rows of partition {p}"))),
        "{:?}",
        warnings(&j)
    );
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    let part = a["partitions"]
        .as_array()
        .unwrap()
        .iter()
        .find(|x| x["id"] == p.as_str())
        .unwrap()
        .clone();
    assert_eq!(part["consultations"], 2, "{part}");
}

/// With a key, the key decides: sealed records whose every feature and target was changed
/// beyond the tenth significant digit (so their cells match nothing stored) are still refused
/// by `predict`, with or without the target, and a run on such a copy counts them as
/// development use, because the file holds the partition's key column and its features.
#[test]
fn with_a_key_the_key_decides_whatever_the_cells_say() {
    let (d, p) = keyed_run("key-decides");
    let nudged = |csv: Csv| {
        let mut csv = csv;
        for c in [
            "age", "sex", "bmi", "bp", "s1", "s2", "s3", "s4", "s5", "s6", "y",
        ] {
            csv = csv.map(c, |v| {
                format!("{}", v.parse::<f64>().unwrap() * 1.001 + 0.001)
            });
        }
        csv
    };
    let sealed = nudged(sealed_rows_of(&d, &keyed_diabetes()));
    d.write("n.csv", &sealed.clone().drop("y").text());
    refused(&d, "n.csv", &p, "every feature nudged, the target dropped");
    d.write("nt.csv", &sealed.rename("y", "yield").text());
    refused(&d, "nt.csv", &p, "every cell nudged, the target renamed");
    // The whole file nudged, every row a development row: the 88 sealed records among them.
    d.write("all.csv", &nudged(keyed_diabetes()).text());
    counted_as_validation(&d, "all.csv", Some("patient"), &p, &|s| s);
}

/// Two unrelated files keyed by an `id` numbered from 1 but sharing no feature are not
/// confused: the second file's run counts no use of the first's partition. A batch for the
/// first model with new ids is predicted; one whose numbering starts again at 1 is refused,
/// since its keys name sealed records.
#[test]
fn unrelated_files_that_share_key_numbers_are_not_confused() {
    let d = Dir::new("shared-ids");
    let mut a = String::from("id,x1,x2,y\n");
    for i in 1..=200 {
        let (x1, x2) = ((i * 37 % 101) as f64 / 7.0, (i * 53 % 89) as f64 / 3.0);
        a.push_str(&format!("{i},{x1:.3},{x2:.3},{:.3}\n", 2.0 * x1 - x2 / 4.0));
    }
    let mut b = String::from("id,pressure,flow,y\n");
    for i in 1..=300 {
        let (p, f) = (900.0 + (i * 29 % 97) as f64, (i * 17 % 43) as f64 / 5.0);
        b.push_str(&format!("{i},{p:.1},{f:.2},{:.2}\n", p / 100.0 + f));
    }
    let batch = |from: usize| {
        let mut batch = String::from("id,x1,x2\n");
        for i in 1..=50 {
            batch.push_str(&format!(
                "{},{:.3},{:.3}\n",
                from + i,
                i as f64 / 9.0 + 0.0101,
                i as f64 / 5.0 + 0.0203
            ));
        }
        batch
    };
    d.write("a.csv", &a);
    d.write("b.csv", &b);
    d.write("batch.csv", &batch(1000));
    d.write("again.csv", &batch(0));
    let keyed = |file: &str| {
        format!(
            "name = \"k\"\ntask = \"regression\"\n[data]\npath = \"{file}\"\ntarget = \"y\"\nkey = \"id\"\n[split]\nmethod = \"random\"\nseed = 2\ntest = 0.2\nfolds = 4\n[[model]]\nkind = \"ridge\"\nlambda = [1.0]\n"
        )
    };
    d.write("a.toml", &keyed("a.csv"));
    d.write("b.toml", &keyed("b.csv"));
    d.probity(&["run", "a.toml"]).expect(0);
    let j = d.probity(&["run", "b.toml", "--json"]).expect(0).json();
    assert!(warnings(&j).is_empty(), "{:?}", warnings(&j));
    d.probity(&["predict", "1", "--input", "batch.csv", "--output", "p.csv"])
        .expect(0);
    let again = d.probity(&["predict", "1", "--input", "again.csv", "--output", "q.csv"]);
    assert_eq!(again.code(), 2, "{}", again.stderr());
    assert!(
        again.stderr().contains(&format!(
            "test rows of sealed partition {}",
            partition_of(&d, "1")
        )),
        "{}",
        again.stderr()
    );
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    for p in a["partitions"].as_array().unwrap() {
        assert_eq!(p["consultations"], 0, "{p}");
    }
}

/// `probity run SPEC` paused at `run:grid` (until killed, or until `go` exists), returned once
/// its partition, which is stored beside the grid, holds its pending seal; with its stderr.
// The caller waits for the child, or kills it; a failed assertion here ends the test.
#[allow(clippy::zombie_processes)]
pub(crate) fn paused_run(
    d: &Dir,
    spec: &str,
    go: Option<&std::path::Path>,
) -> (std::process::Child, BufReader<std::process::ChildStderr>) {
    let mut c = Command::new(assert_cmd::cargo::cargo_bin("probity"));
    c.current_dir(&d.path)
        .args(["run", spec])
        .env_remove("PROBITY_LEDGER")
        .env("PROBITY_PAUSE_AT", "run:grid")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    if let Some(go) = go {
        c.env("PROBITY_RESUME_ON", go);
    }
    let mut c = c.spawn().unwrap();
    let mut err = BufReader::new(c.stderr.take().unwrap());
    let mut line = String::new();
    while line.trim_end() != "probity: paused at run:grid" {
        line.clear();
        assert!(
            err.read_line(&mut line).unwrap() > 0,
            "ended before pausing"
        );
    }
    let t = std::time::Instant::now();
    loop {
        let pending = rusqlite::Connection::open(d.ledger())
            .and_then(|c| {
                c.query_row("SELECT count(*) FROM pending_seals", [], |r| {
                    r.get::<_, i64>(0)
                })
            })
            .unwrap_or(0);
        if pending == 1 {
            // The reader is kept: a closed pipe would end the run at its next message.
            return (c, err);
        }
        assert!(t.elapsed().as_secs() < 60, "the partition was never stored");
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
}

/// The rules of a partition are fixed when its first run starts (before its grid): a run
/// on it stored earlier with other rules, and a reveal meanwhile, follow them, and the first
/// run's storing changes nothing.
#[test]
fn rules_cannot_change_after_a_reveal_followed_them() {
    if !crate::util::pauses_compiled("rules_cannot_change_after_a_reveal_followed_them") {
        return;
    }
    let split = "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5";
    let d = diabetes(
        "seal-order",
        &[
            (
                "ladder.toml",
                split,
                "[guard]\nmode = \"ladder\"\nstep = 5.0",
            ),
            ("count.toml", split, "[guard]\nreveals = 10"),
        ],
    );
    let go = d.path.join("go");
    let (mut slow, _err) = paused_run(&d, "ladder.toml", Some(&go));
    let copied = d.probity(&["run", "count.toml"]).expect(0);
    assert!(
        copied.stderr().contains("was sealed with [guard]")
            && copied.stderr().contains("\"ladder\""),
        "{}",
        copied.stderr()
    );
    let j = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(j["mode"], "ladder");
    std::fs::write(&go, "").unwrap();
    assert!(slow.wait().unwrap().success());
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["partitions"][0]["mode"], "ladder");
    assert_eq!(a["partitions"][0]["budget"], 1);
    // The ladder run sealed it; it was stored second.
    assert_eq!(a["partitions"][0]["sealed_by_run"], 2);
    let v = d.probity(&["audit", "--verify"]).expect(0);
    assert!(v.stdout().contains("intact"), "{}", v.stdout());
}

/// A partition's rules hold from its first run's start, before its grid, and stay when that
/// run is killed: `overlap = "refuse"` turns an overlapping run away meanwhile and afterwards,
/// and a budget of 3 counts a development use as 1 of 3, not 1 of the default 1. The first
/// thing chained about the partition (here the overlapping run's use) chains its seal first.
#[test]
fn rules_hold_from_the_first_runs_start_even_when_it_is_killed() {
    if !crate::util::pauses_compiled("rules_hold_from_the_first_runs_start_even_when_it_is_killed")
    {
        return;
    }
    let split = |seed: u32, part: &str| {
        format!("method = \"random\"\nseed = {seed}\n{part} = 0.2\nfolds = 5")
    };

    let d = diabetes(
        "seal-start-refuse",
        &[
            (
                "refuse.toml",
                &split(7, "test"),
                "[guard]\noverlap = \"refuse\"",
            ),
            ("copy7.toml", &split(7, "validation"), ""),
        ],
    );
    let (mut first, _err) = paused_run(&d, "refuse.toml", None);
    let r = d.probity(&["run", "copy7.toml"]).expect(2);
    assert!(
        r.stderr().contains("overlap = \"refuse\""),
        "{}",
        r.stderr()
    );
    first.kill().unwrap();
    first.wait().unwrap();
    let r = d.probity(&["run", "copy7.toml"]).expect(2);
    assert!(
        r.stderr().contains("overlap = \"refuse\""),
        "{}",
        r.stderr()
    );

    let d = diabetes(
        "seal-start-budget",
        &[
            ("three.toml", &split(9, "test"), "[guard]\nreveals = 3"),
            ("copy9.toml", &split(9, "validation"), ""),
        ],
    );
    let (mut first, _err) = paused_run(&d, "three.toml", None);
    first.kill().unwrap();
    first.wait().unwrap();
    let r = d.probity(&["run", "copy9.toml"]).expect(0);
    assert!(
        r.stderr().contains("(1 of its budget of 3)"),
        "{}",
        r.stderr()
    );
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    let p = a["partitions"]
        .as_array()
        .unwrap()
        .iter()
        .find(|p| p["consultations"] == 1)
        .unwrap();
    assert_eq!(p["budget"], 3, "{p}");
    assert_eq!(p["sealed_by_run"], Value::Null, "{p}");
    // The seal of three.toml's partition, then the overlapping run (its own partition sealed
    // before it).
    assert_eq!(a["chain"]["entries"], 3, "{a}");
    assert_eq!(a["chain"]["intact"], true);
    assert_eq!(a["unfinished"].as_array().unwrap().len(), 1, "{a}");
}

/// A partition known only through consultations under the default rules (its first run
/// interrupted, with no pending seal, as an older probity left it) keeps those defaults: a
/// bundle bringing a looser seal for it changes nothing.
#[test]
fn a_partition_consulted_under_the_defaults_keeps_them() {
    if !crate::util::pauses_compiled("a_partition_consulted_under_the_defaults_keeps_them") {
        return;
    }
    let split = |part: &str| format!("method = \"random\"\nseed = 7\n{part} = 0.2\nfolds = 5");
    let d = diabetes(
        "defaults-kept",
        &[
            ("first.toml", &split("test"), "[guard]\nreveals = 1000"),
            ("copy.toml", &split("validation"), ""),
        ],
    );
    let (mut first, _err) = paused_run(&d, "first.toml", None);
    first.kill().unwrap();
    first.wait().unwrap();
    rusqlite::Connection::open(d.ledger())
        .unwrap()
        .execute("DELETE FROM pending_seals", [])
        .unwrap();
    d.probity(&["run", "copy.toml"]).expect(0);
    // A colleague ran the first spec to the end: its bundle brings a seal with 1000.
    let other = diabetes(
        "defaults-other",
        &[("first.toml", &split("test"), "[guard]\nreveals = 1000")],
    );
    other.probity(&["run", "first.toml"]).expect(0);
    other
        .probity(&["pack", "1", "--unsigned", "--out", "b.json"])
        .expect(0);
    d.copy(&other.path.join("b.json"), "b.json");
    d.probity(&["merge", "b.json", "--allow-unverified"])
        .expect(0);
    let r = d.probity(&["run", "copy.toml"]).expect(0);
    assert!(r.stderr().contains("budget of 1)"), "{}", r.stderr());
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    assert_eq!(a["chain"]["intact"], true, "{a}");
}

/// `audit`'s table and JSON after a development use, pinned (the chain's head, which depends on
/// the time of each run, is left out).
#[test]
fn audit_with_a_development_use_matches_golden() {
    let d = diabetes(
        "audit-golden",
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
    d.probity(&["run", "copy.toml"]).expect(0);
    let table: String = d
        .probity(&["audit"])
        .expect(0)
        .stdout()
        .lines()
        .filter(|l| !l.starts_with("chain: "))
        .map(|l| format!("{l}\n"))
        .collect();
    crate::util::check_golden("audit-development-use.txt", &table);
    let mut j = d.probity(&["audit", "--json"]).expect(0).json();
    j["chain"]["head"] = Value::String("<head>".into());
    crate::util::check_golden(
        "audit-development-use.json",
        &format!("{}\n", serde_json::to_string_pretty(&j).unwrap()),
    );
}

/// Header and label spellings a model does not care about do not make rows new: a copy whose
/// `bmi` column is headed `BMI` (a run on it, and a prediction of the sealed rows by a model
/// fitted on such a copy), and classes written `BENIGN` for `benign`.
#[test]
fn recased_headers_and_labels_are_the_same_rows() {
    let d = Dir::new("recased");
    d.copy(&reference("diabetes.csv"), "d.csv");
    let split = "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5";
    d.write("d.toml", &spec("d.csv", None, split));
    d.probity(&["run", "d.toml"]).expect(0);
    let p = partition_of(&d, "1");
    let base = || Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap());
    d.write("upper.csv", &base().rename("bmi", "BMI").text());
    d.write(
        "upper.toml",
        &spec("upper.csv", None, &split.replace("seed = 7", "seed = 8")),
    );
    let j = d.probity(&["run", "upper.toml", "--json"]).expect(0).json();
    assert!(
        warnings(&j).iter().any(|w| w.contains(&format!(
            "development rows are sealed test rows of partition {p}"
        ))),
        "{:?}",
        warnings(&j)
    );
    // A model fitted on the development rows alone, headed `BMI`, predicting the sealed rows.
    let sealed = sealed_rows_of(&d, &base());
    let dev = base().keep(|_, r| !sealed.rows.contains(&r.to_vec()));
    d.write("dev.csv", &dev.rename("bmi", "BMI").text());
    d.write(
        "dev.toml",
        &spec("dev.csv", None, "method = \"random\"\nseed = 3\nfolds = 5"),
    );
    d.probity(&["run", "dev.toml"]).expect(0);
    d.write(
        "ask.csv",
        &sealed_rows_of(&d, &base()).rename("bmi", "BMI").text(),
    );
    let r = d
        .probity(&["predict", "3", "--input", "ask.csv", "--output", "p.csv"])
        .expect(2);
    assert!(
        r.stderr()
            .contains(&format!("88 rows are test rows of sealed partition {p}")),
        "{}",
        r.stderr()
    );

    // Classes recased in a copy that sends the sealed rows to validation.
    let d = reusable_dir("recased-labels");
    d.write(
        "c.toml",
        &std::fs::read_to_string(d.path.join("r.toml"))
            .unwrap()
            .replace(
                "[guard]\nmode = \"reusable\"\nreveals = 1\nthreshold = 0.000001\nnoise = 0.0000001\n",
                "",
            ),
    );
    d.probity(&["run", "c.toml"]).expect(0);
    let p = partition_of(&d, "1");
    let bc = Csv::read(&std::fs::read_to_string(d.path.join("bc.csv")).unwrap());
    let sealed = sealed_rows_of(&d, &bc);
    let relabelled = bc
        .map("diagnosis", |v| v.to_uppercase())
        .add("p2", |_| String::new());
    let upper_sealed: Vec<Vec<String>> = sealed
        .rows
        .iter()
        .map(|r| {
            let mut r = r.clone();
            let at = sealed.at("diagnosis");
            r[at] = r[at].to_uppercase();
            r
        })
        .collect();
    let relabelled = Csv {
        rows: relabelled
            .rows
            .iter()
            .map(|r| {
                let mut r = r.clone();
                let last = r.len() - 1;
                r[last] = if upper_sealed.contains(&r[..last].to_vec()) {
                    "validation"
                } else {
                    "train"
                }
                .into();
                r
            })
            .collect(),
        header: relabelled.header,
    };
    d.write("upper.csv", &relabelled.text());
    d.write(
        "upper.toml",
        "name = \"bc\"\ntask = \"classification\"\n[data]\npath = \"upper.csv\"\ntarget = \"diagnosis\"\nignore = [\"part\"]\n[split]\nmethod = \"column\"\ncolumn = \"p2\"\nfolds = 3\n[select]\nmetric = \"accuracy\"\n[[model]]\nkind = \"logistic\"\nlambda = [1.0]\n",
    );
    let j = d.probity(&["run", "upper.toml", "--json"]).expect(0).json();
    let n = sealed.rows.len();
    assert!(
        warnings(&j)
            .iter()
            .any(|w| w.starts_with(&format!("{n} of "))
                && w.contains(&format!("sealed test rows of partition {p}"))),
        "{:?}",
        warnings(&j)
    );
}

/// A file with two columns named alike (`BMI` before `bmi`) is refused: identities would read
/// one while a model reads the other.
#[test]
fn columns_named_alike_are_refused() {
    let d = Dir::new("alike");
    d.copy(&reference("diabetes.csv"), "d.csv");
    d.write(
        "d.toml",
        &spec(
            "d.csv",
            None,
            "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5",
        ),
    );
    d.probity(&["run", "d.toml"]).expect(0);
    let base = Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap());
    let shadow = Csv {
        header: std::iter::once("BMI".to_string())
            .chain(base.header.iter().cloned())
            .collect(),
        rows: base
            .rows
            .iter()
            .enumerate()
            .map(|(i, r)| {
                std::iter::once(format!("{}", (i * 7919) % 1000))
                    .chain(r.iter().cloned())
                    .collect()
            })
            .collect(),
    };
    d.write("shadow.csv", &shadow.text());
    let before = d.counts();
    let r = d
        .probity(&["predict", "1", "--input", "shadow.csv", "--output", "p.csv"])
        .expect(2);
    assert!(
        r.stderr().contains("shadow.csv")
            && r.stderr()
                .contains("columns 'BMI' and 'bmi' differ only in case"),
        "{}",
        r.stderr()
    );
    d.write(
        "shadow.toml",
        &spec(
            "shadow.csv",
            None,
            "method = \"random\"\nseed = 8\ntest = 0.2\nfolds = 5",
        )
        .replace("ignore = [\"part\"]", "ignore = [\"part\", \"BMI\"]"),
    );
    let r = d.probity(&["run", "shadow.toml"]).expect(2);
    assert!(r.stderr().contains("differ only in case"), "{}", r.stderr());
    assert_eq!(d.counts(), before);
}

/// Another partition over the same test rows cannot answer for a partition under a mechanism,
/// even under a mechanism of its own with a step too small to hide anything.
#[test]
fn a_mechanism_of_ones_own_cannot_answer_for_anothers_rows() {
    let split = "method = \"random\"\nseed = 7\ntest = 0.2\nfolds = 5";
    let d = diabetes(
        "fine-ladder",
        &[
            ("s.toml", split, "[guard]\nmode = \"ladder\"\nstep = 5.0"),
            (
                "fine.toml",
                &split.replace("folds = 5", "folds = 4"),
                "[guard]\nmode = \"ladder\"\nstep = 0.000000000001\nreveals = 1000",
            ),
        ],
    );
    d.probity(&["run", "s.toml"]).expect(0);
    d.probity(&["run", "fine.toml"]).expect(0);
    let before = d.counts();
    let r = d.probity(&["reveal", "2", "--yes"]).expect(2);
    assert!(
        r.stderr().contains("sealed in ladder mode"),
        "{}",
        r.stderr()
    );
    assert_eq!(d.counts(), before);
}

/// A sealed partition that holds one record entered twice still has no odds of chance: a
/// copy that sends its rows to validation, padded with thousands of rows that match nothing,
/// is counted.
#[test]
fn padding_with_unmatched_rows_does_not_hide_sealed_rows() {
    let d = Dir::new("unmatched-padding");
    let base = Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap());
    let mut with_twin = Csv {
        header: base.header.clone(),
        rows: base.rows.clone(),
    };
    for i in 0..22 {
        with_twin.rows.push(base.rows[i * 20].clone());
    }
    d.write("d.csv", &with_twin.text());
    let p = sealed_run(&d, "d.csv", None);
    let sealed = sealed_rows_of(&d, &with_twin);
    let n = sealed.rows.len();
    let mut padded = with_twin.add("p2", |_| "train".into());
    let at = padded.header.len() - 1;
    for r in &mut padded.rows {
        if sealed.rows.contains(&r[..at].to_vec()) {
            r[at] = "validation".into();
        }
    }
    for i in 0..6000 {
        let mut r: Vec<String> = (0..at)
            .map(|c| {
                if padded.header[c] == "part" {
                    "train".into()
                } else {
                    format!("{}", 1000 + (i * 31 + c * 17) % 9973)
                }
            })
            .collect();
        r.push("test".into());
        padded.rows.push(r);
    }
    d.write("padded.csv", &padded.text());
    d.write(
        "padded.toml",
        "name = \"d\"\ntask = \"regression\"\n[data]\npath = \"padded.csv\"\ntarget = \"y\"\nignore = [\"part\"]\n[split]\nmethod = \"column\"\ncolumn = \"p2\"\nfolds = 5\n[[model]]\nkind = \"ridge\"\nlambda = [10.0]\n",
    );
    let j = d
        .probity(&["run", "padded.toml", "--json"])
        .expect(0)
        .json();
    assert!(
        warnings(&j).iter().any(
            |w| w.contains(&format!("sealed test rows of partition {p}"))
                && w.split(' ').next().unwrap().parse::<usize>().unwrap() + 1 >= n
        ),
        "{:?}",
        warnings(&j)
    );
}

/// Records of a few categories: a new member looks like a sealed one to every model, so a
/// prediction of new members is not refused, while the sealed members (by key) are.
#[test]
fn coarse_records_are_told_apart_by_key() {
    let d = Dir::new("coarse");
    let mut csv = String::from("member,plan,region,channel,claimed\n");
    for i in 0..600 {
        let plan = ["basic", "plus", "gold"][i % 3];
        let region = ["north", "south"][(i / 3) % 2];
        let channel = ["web", "phone"][(i / 7) % 2];
        let claimed = if (i * 37) % 5 < 2 { "yes" } else { "no" };
        csv.push_str(&format!("M{i:05},{plan},{region},{channel},{claimed}\n"));
    }
    d.write("claims.csv", &csv);
    d.write(
        "c.toml",
        "name = \"c\"\ntask = \"classification\"\n[data]\npath = \"claims.csv\"\ntarget = \"claimed\"\nkey = \"member\"\n[split]\nmethod = \"random\"\nseed = 4\ntest = 0.2\nfolds = 4\n[[model]]\nkind = \"logistic\"\nlambda = [1.0]\n",
    );
    d.probity(&["run", "c.toml"]).expect(0);
    let mut next = String::from("member,plan,region,channel\n");
    for i in 0..50 {
        next.push_str(&format!(
            "M{:05},{},{},{}\n",
            5000 + i,
            ["basic", "plus", "gold"][i % 3],
            ["north", "south"][i % 2],
            ["web", "phone"][(i / 2) % 2]
        ));
    }
    d.write("next.csv", &next);
    d.probity(&["predict", "1", "--input", "next.csv", "--output", "p.csv"])
        .expect(0);
    let c = Csv::read(&csv);
    let sealed = sealed_rows_of(&d, &c).drop("claimed");
    d.write("sealed.csv", &sealed.text());
    let r = d
        .probity(&["predict", "1", "--input", "sealed.csv", "--output", "p.csv"])
        .expect(2);
    assert!(
        r.stderr().contains("120 rows are test rows"),
        "{}",
        r.stderr()
    );
}

/// Partly coarse records (ages to five years, whole BMI points: 88 sealed rows, 78 distinct)
/// without a key: the run's own data file is refused by position, and a copy with a column
/// added by content, since it matches the sealed rows far beyond chance.
#[test]
fn coarse_records_without_a_key_are_refused_in_the_runs_own_file_and_its_copies() {
    let d = Dir::new("coarse-unkeyed");
    let coarse = Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap())
        .drop("bp")
        .drop("s1")
        .drop("s2")
        .drop("s3")
        .drop("s4")
        .drop("s5")
        .drop("s6")
        .map("age", |v| {
            format!("{}", (v.parse::<f64>().unwrap() / 5.0).round() * 5.0)
        })
        .map("bmi", |v| format!("{}", v.parse::<f64>().unwrap().round()));
    d.write("c.csv", &coarse.text());
    let p = sealed_run(&d, "c.csv", None);
    let sealed = sealed_rows_of(&d, &coarse);
    let mut distinct: Vec<Vec<String>> = sealed
        .clone()
        .drop("y")
        .drop("part")
        .rows
        .into_iter()
        .collect();
    distinct.sort();
    distinct.dedup();
    assert!(
        distinct.len() < 84,
        "{} distinct: not coarse",
        distinct.len()
    );
    d.write("copy.csv", &coarse.add("site", |_| "east".into()).text());
    // Every look-alike of a sealed row is refused with it (it gets the sealed row's
    // prediction), so more rows than the 88 sealed ones.
    for file in ["c.csv", "copy.csv"] {
        let r = d.probity(&["predict", "1", "--input", file, "--output", "p.csv"]);
        assert_eq!(r.code(), 2, "{file}: {}", r.stderr());
        let n: usize = r
            .stderr()
            .split(&format!("{file}: "))
            .nth(1)
            .and_then(|t| t.split(' ').next())
            .and_then(|n| n.parse().ok())
            .unwrap_or(0);
        assert!(
            n >= 88
                && r.stderr()
                    .contains(&format!("rows are test rows of sealed partition {p}")),
            "{file}: {}",
            r.stderr()
        );
    }
    assert_eq!(
        d.probity(&["audit", "--json"]).expect(0).json()["partitions"][0]["consultations"],
        0
    );
}

/// Two keyed files that share the key's name and values and one feature's name (of the
/// first's ten) are two projects: the second's runs and predictions charge nothing to the
/// first's partition.
#[test]
fn a_shared_key_and_one_shared_feature_name_do_not_make_files_kin() {
    let (d, p) = keyed_run("kin-false-alarm");
    let mut b = String::from("patient,age,income,rooms,y\n");
    for i in 0..300 {
        let (age, income, rooms) = (20 + i * 7 % 50, 30 + i * 13 % 70, 1 + i % 6);
        b.push_str(&format!(
            "P{:04},{age},{income},{rooms},{}\n",
            i + 1,
            income * 3 + rooms * 10 - age
        ));
    }
    d.write("b.csv", &b);
    d.write(
        "b.toml",
        &spec(
            "b.csv",
            Some("patient"),
            "method = \"random\"\nseed = 11\nvalidation = 0.2\nfolds = 5",
        )
        .replace("ignore = [\"part\"]\n", ""),
    );
    let j = d.probity(&["run", "b.toml", "--json"]).expect(0).json();
    assert!(warnings(&j).is_empty(), "{:?}", warnings(&j));
    let mut new = String::from("patient,age,income,rooms\n");
    for i in 0..20 {
        new.push_str(&format!(
            "P{:04},{},{},{}\n",
            i + 1,
            30 + i,
            50 + i,
            1 + i % 4
        ));
    }
    d.write("new.csv", &new);
    d.probity(&["predict", "2", "--input", "new.csv", "--output", "p.csv"])
        .expect(0);
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    let part = a["partitions"]
        .as_array()
        .unwrap()
        .iter()
        .find(|x| x["id"] == p.as_str())
        .unwrap()
        .clone();
    assert_eq!(part["consultations"], 0, "{part}");
}

/// The sealed target in another form, in a copy of the data whose sealed rows are validation
/// rows: renamed, copied into a new column, rescaled (grams for the same numbers), renamed
/// with something else put under its old name, or copied in as a feature of a run for an
/// unrelated target. Each is counted, keyed or not, with the reason.
/// An unrelated new target on the same copy is not (nor is one on the same file:
/// `another_target_on_the_same_rows_consults_nothing`).
#[test]
fn a_target_in_another_form_is_still_the_sealed_target() {
    for key in [None, Some("patient")] {
        let d = Dir::new("target-forms");
        let base = match key {
            Some(_) => keyed_diabetes(),
            None => Csv::read(&std::fs::read_to_string(reference("diabetes.csv")).unwrap()),
        };
        d.write("d.csv", &base.text());
        let p = sealed_run(&d, "d.csv", key);
        let y = base.at("y");
        let copy = base.clone();
        let copied = copy.clone().add("harvest", |n| copy.rows[n][y].clone());
        let rescaled = copy
            .clone()
            .add("harvest", |n| format!("{}000", copy.rows[n][y]));
        let swapped = copy.clone().rename("y", "harvest").add("y", |_| "0".into());
        // A count of visits that has nothing to do with the outcome.
        let visits = copy
            .clone()
            .add("harvest", |n| ((n * 7919) % 13).to_string());
        // The unrelated target again, with the outcome copied in as a feature under a new name.
        let as_feature = visits.clone().add("ykg", |n| copy.rows[n][y].clone());
        for (case, csv, counted) in [
            ("renamed", copy.clone().rename("y", "harvest"), true),
            ("a feature", as_feature, true),
            ("copied", copied, true),
            ("rescaled", rescaled, true),
            ("swapped", swapped, true),
            ("unrelated", visits, false),
        ] {
            d.write("r.csv", &csv.text());
            d.write(
                "r.toml",
                &spec(
                    "r.csv",
                    key,
                    "method = \"random\"\nseed = 7\nvalidation = 0.2\nfolds = 5",
                )
                .replace("target = \"y\"", "target = \"harvest\"")
                .replace(
                    "ignore = [\"part\"]",
                    if case == "renamed" {
                        "ignore = [\"part\"]"
                    } else {
                        "ignore = [\"part\", \"y\"]"
                    },
                ),
            );
            let j = d.probity(&["run", "r.toml", "--json"]).expect(0).json();
            let w = warnings(&j);
            let found = w.iter().any(|w| {
                w.starts_with("88 of ")
                    && w.contains(&format!("sealed test rows of partition {p}"))
                    && w.contains("Counted though this run's target is another column")
            });
            assert_eq!(found, counted, "{key:?} {case}: {w:?}");
        }
    }
}

/// A slim extract that keeps the key, the target and a few of the features (three of ten),
/// split with the sealed rows as validation rows: the key still names the sealed records.
#[test]
fn a_slim_extract_that_keeps_the_key_is_followed() {
    let (d, p) = keyed_run("slim-extract");
    let mut slim = keyed_diabetes();
    for c in ["bp", "s1", "s2", "s3", "s4", "s5", "s6"] {
        slim = slim.drop(c);
    }
    // And every kept feature nudged, so that no row's content is the sealed row's.
    let slim = slim.map("bmi", |v| format!("{v}1"));
    d.write("slim.csv", &slim.text());
    counted_as_validation(&d, "slim.csv", Some("patient"), &p, &|s| s);
}

/// Small partitions: two projects keyed by `id` from 1 whose two features share one name are
/// not the same records.
#[test]
fn two_small_projects_sharing_a_key_and_a_feature_name_are_not_kin() {
    let d = Dir::new("kin-small");
    let file = |cols: &str, f: &dyn Fn(usize) -> (usize, usize)| {
        let mut t = format!("id,{cols},y\n");
        for i in 1..=300 {
            let (a, b) = f(i);
            t.push_str(&format!("{i},{a},{b},{}\n", a * 2 + b * 3));
        }
        t
    };
    d.write(
        "a.csv",
        &file("age,income", &|i| (20 + i * 7 % 50, 30 + i * 13 % 70)),
    );
    d.write(
        "b.csv",
        &file("age,rooms", &|i| (18 + i * 11 % 60, 1 + i % 6)),
    );
    // Other seeds, so that the second's development rows hold the first's test ids.
    let run = |csv: &str, seed: u64| {
        let toml = csv.replace(".csv", ".toml");
        d.write(
            &toml,
            &spec(
                csv,
                Some("id"),
                &format!("method = \"random\"\nseed = {seed}\ntest = 0.2\nfolds = 5"),
            )
            .replace("ignore = [\"part\"]\n", ""),
        );
        d.probity(&["run", &toml, "--json"]).expect(0).json()
    };
    run("a.csv", 3);
    let j = run("b.csv", 11);
    assert!(warnings(&j).is_empty(), "{:?}", warnings(&j));
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    for p in a["partitions"].as_array().unwrap() {
        assert_eq!(p["consultations"], 0, "{p}");
    }
}

/// The demo specs on the co-operative's bays: a run for another target (outbreaks, which does
/// not read the yield) on the same rows consults no yield partition, and running every demo in
/// turn leaves `audit` passing.
#[test]
fn another_target_on_the_same_rows_consults_nothing() {
    let d = Dir::new("demos");
    let ex = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    for f in [
        "bays.csv",
        "bay-yield.toml",
        "bay-yield-hash.toml",
        "outbreak.toml",
    ] {
        d.copy(&ex.join(f), f);
    }
    d.probity(&["run", "bay-yield.toml"]).expect(0);
    let j = d
        .probity(&["run", "outbreak.toml", "--json"])
        .expect(0)
        .json();
    assert!(
        warnings(&j).iter().all(|w| !w.contains("sealed test rows")),
        "{:?}",
        warnings(&j)
    );
    d.probity(&["run", "bay-yield-hash.toml"]).expect(0);
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    let uses: Vec<i64> = a["partitions"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|p| {
            p["development_uses"]
                .as_array()
                .unwrap()
                .iter()
                .map(|u| u["run"].as_i64().unwrap())
        })
        .collect();
    assert_eq!(
        uses,
        vec![3],
        "only the yield run on the same rows counts: {a}"
    );
}

//! The sealed test partition through the binary: reveals, budgets, exposure, predict's guard,
//! audit, guard modes, nested cross-validation.

use crate::fixtures::{SMALL_SPEC, small_dir};
use crate::util::{Dir, reference};
use serde_json::Value;

/// Diabetes with the reference's validation rows as the sealed test rows: the development rows
/// are exactly the reference fitting rows, so a reveal must reproduce the reference validation
/// scores (exact or 50-digit values, scikit-learn 1.9.1 cross-checked; tests/reference/README.md).
fn diabetes_dir(name: &str, extra: &str) -> Dir {
    let d = Dir::new(name);
    let text = std::fs::read_to_string(reference("diabetes.csv")).unwrap();
    // Reference validation rows become test; reference test rows are dropped from play.
    let relabelled: String = text
        .lines()
        .filter(|l| !l.ends_with(",test"))
        .map(|l| format!("{}\n", l.replace(",validation", ",test")))
        .collect();
    d.write("diabetes.csv", &relabelled);
    d.write(
        "d.toml",
        &format!(
            "name = \"d\"\ntask = \"regression\"\n[data]\npath = \"diabetes.csv\"\ntarget = \"y\"\n[split]\nmethod = \"column\"\ncolumn = \"part\"\nfolds = 5\n{extra}\n[[model]]\nkind = \"ridge\"\nlambda = [10.0]\n[[model]]\nkind = \"knn\"\nk = [5]\n"
        ),
    );
    d
}

fn expected(case_id: &str) -> Value {
    let exp: Value = serde_json::from_str(
        &std::fs::read_to_string(reference("diabetes.expected.json")).unwrap(),
    )
    .unwrap();
    exp["cases"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["id"] == case_id)
        .unwrap()
        .clone()
}

#[test]
fn reveal_scores_the_test_rows_once_and_counts() {
    let d = diabetes_dir("reveal", "");
    d.probity(&["run", "d.toml"]).expect(0);
    // Without a terminal and without --yes: refused, nothing recorded.
    let before = d.counts();
    let r = d.probity(&["reveal", "1", "--candidate", "2"]).expect(2);
    assert!(r.stderr().contains("pass --yes"), "{}", r.stderr());
    assert_eq!(d.counts(), before);

    let j = d
        .probity(&["reveal", "1", "--candidate", "2", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(j["reveal"], 1);
    assert_eq!(j["run"], 1);
    assert_eq!(j["candidate"], 2);
    assert_eq!(j["rows"], 88);
    assert_eq!(j["reveals"], 1);
    assert_eq!(j["budget"], 1);
    assert_eq!(j["over_budget"], false);
    let case = expected("ridge(lambda=10.0)");
    for m in ["rmse", "mae", "r2"] {
        let (got, want) = (
            j["test"][m].as_f64().unwrap(),
            case["metrics"][m].as_f64().unwrap(),
        );
        assert!(((got - want) / want).abs() < 1e-8, "{m}: {got} vs {want}");
        let iv = &j["interval"][m];
        assert!(
            iv[0].as_f64().unwrap() <= got && got <= iv[1].as_f64().unwrap(),
            "{m} interval {iv} misses {got}"
        );
    }
    // One candidate revealed: no selection optimism yet.
    assert_eq!(j["optimism"]["k"], 1);
    assert_eq!(j["optimism"]["estimate"], 0.0);
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["partitions"][0]["reveals"], 1);
    assert_eq!(a["partitions"][0]["over_budget"], false);

    // A second, different candidate: over the budget of 1, optimism for k = 2, audit fails.
    let r = d
        .probity(&["reveal", "1", "--candidate", "3", "--yes", "--json"])
        .expect(0);
    let j2 = r.json();
    assert_eq!(j2["reveals"], 2);
    assert_eq!(j2["over_budget"], true);
    assert!(
        r.stderr().contains("over its budget of 1"),
        "{}",
        r.stderr()
    );
    let case = expected("knn(k=5)");
    let got = j2["test"]["rmse"].as_f64().unwrap();
    assert!(((got - case["metrics"]["rmse"].as_f64().unwrap()) / got).abs() < 1e-8);
    assert_eq!(j2["optimism"]["k"], 2);
    // se x E[max of 2 normals] = se / sqrt(pi) (METHODS.md section 3 closed form).
    let se = j2["optimism"]["se"].as_f64().unwrap();
    assert!(
        (j2["optimism"]["estimate"].as_f64().unwrap() - se / std::f64::consts::PI.sqrt()).abs()
            < 1e-9
    );
    let r = d.probity(&["audit"]).expect(3);
    assert!(r.stdout().contains("OVER BUDGET"), "{}", r.stdout());
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    assert_eq!(a["partitions"][0]["over_budget"], true);
    assert_eq!(a["partitions"][0]["candidates_revealed"], 2);
}

#[test]
fn the_same_reveal_gives_the_same_interval() {
    let d = diabetes_dir("reveal-seed", "[guard]\nreveals = 5");
    d.probity(&["run", "d.toml"]).expect(0);
    let a = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    let b = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(
        a["interval"], b["interval"],
        "bootstrap resamples are seeded from the run seed"
    );
    assert_eq!(a["bootstrap_seed"], b["bootstrap_seed"]);
    assert_eq!(b["reveals"], 2);
    assert_eq!(b["over_budget"], false);
    // The same candidate twice is still one distinct candidate.
    assert_eq!(b["optimism"]["k"], 1);
}

/// The revealed rows a run's exposure warnings count: among its development rows (a warning
/// there is required) plus among its test rows.
fn revealed_rows_found(run: &Value) -> usize {
    let warnings: Vec<&str> = run["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap())
        .collect();
    let num = |w: &str| -> usize { w.split(' ').next().unwrap().parse().unwrap() };
    let dev = warnings
        .iter()
        .find(|w| w.contains("development rows are sealed test rows of partition"))
        .expect("a development use warning");
    let test = warnings
        .iter()
        .find(|w| w.contains("test rows were already revealed in another partition"));
    num(dev) + test.map_or(0, |t| num(t))
}

#[test]
fn exposure_survives_a_new_seed() {
    let d = small_dir("exposure");
    d.probity(&["run", "small.toml"]).expect(0);
    d.probity(&["reveal", "1", "--yes"]).expect(0);
    d.write("seed.toml", &SMALL_SPEC.replace("seed = 5", "seed = 6"));
    let r = d.probity(&["run", "seed.toml", "--json"]).expect(0);
    // The new partition reshuffles the 40 rows: some of the 10 revealed rows are now development
    // rows, and some are test rows again; the counts must add up to 10.
    assert_eq!(revealed_rows_found(&r.json()), 10);
    assert!(
        r.stderr()
            .contains("development rows are sealed test rows of partition"),
        "{}",
        r.stderr()
    );
    // The same seed again: its own partition was revealed once and developed on once (by the
    // second run), which is over its budget of 1.
    let j = d.probity(&["run", "small.toml", "--json"]).expect(0).json();
    assert!(
        j["warnings"].as_array().unwrap().iter().any(|w| w
            .as_str()
            .unwrap()
            .contains("has already been consulted 2 time(s)")),
        "{}",
        j["warnings"]
    );
    let a = d.probity(&["audit", "--json"]).expect(3).json();
    assert_eq!(a["partitions"][0]["reveals"], 1);
    assert_eq!(a["partitions"][0]["development_uses"][0]["run"], 2);
    assert_eq!(a["partitions"][0]["consultations"], 2);
    assert!(
        !a["warnings"].as_array().unwrap().is_empty(),
        "audit reports the overlap: {a}"
    );
}

/// A ledger made before row identity version 2 (its partitions name no version) keeps its
/// version-1 partitions as they are, and a new partition in it is version 3: each partition
/// compares a file's rows the way it identifies its own, so exposure, predict's guard and
/// audit work across old and new partitions. (The old ledger is made with the library, as the
/// release before version 2 made it.) Content identities: the fixture's key column is ignored
/// instead.
#[test]
fn an_old_ledger_keeps_its_version_one_partitions_beside_new_ones() {
    use probity::data::Identity;
    let d = small_dir("identity-v1");
    let spec_text = SMALL_SPEC.replace("key = \"id\"\n", "").replace(
        "ignore = [\"bay\", \"week\"]",
        "ignore = [\"bay\", \"week\", \"id\"]",
    );
    assert!(!spec_text.contains("key ="));
    d.write("v.toml", &spec_text);
    d.write("v6.toml", &spec_text.replace("seed = 5", "seed = 6"));
    let old = d.path.join("old.sqlite");
    let old_partition = crate::fixtures::library_run(&d, "v.toml", &old, Identity::V1);
    let ledger = probity::ledger::Ledger::open(&old, false).unwrap();
    assert_eq!(
        ledger.partition_identity(&old_partition).unwrap(),
        Some(Identity::V1)
    );
    drop(ledger);
    let l = ["--ledger", "old.sqlite"];
    d.probity(&[&["reveal", "1", "--yes"][..], &l].concat())
        .expect(0);
    // A new seed: a version-3 partition beside the version-1 one; the revealed rows are found
    // among its development rows (by position: the same file) and its test rows (by the old
    // partition's own identities): 10 in all.
    let j = d
        .probity(&[&["run", "v6.toml", "--json"][..], &l].concat())
        .expect(0)
        .json();
    assert_eq!(revealed_rows_found(&j), 10);
    let new_partition = j["partition"]["id"].as_str().unwrap().to_string();
    let ledger = probity::ledger::Ledger::open(&d.path.join("old.sqlite"), false).unwrap();
    assert_eq!(
        ledger.partition_identity(&old_partition).unwrap(),
        Some(Identity::V1)
    );
    assert_eq!(
        ledger.partition_identity(&new_partition).unwrap(),
        Some(Identity::V3)
    );
    drop(ledger);
    // predict's guard finds the sealed rows of both partitions.
    let r = d
        .probity(
            &[
                &["predict", "2", "--input", "small.csv", "--output", "p.csv"][..],
                &l,
            ]
            .concat(),
        )
        .expect(2);
    assert!(
        r.stderr()
            .contains("rows are test rows of sealed partition")
            && r.stderr().contains("and rows of 1 more partition(s)"),
        "{}",
        r.stderr()
    );
    // The new seed's run developed on the revealed partition's test rows: one more
    // consultation, past its budget of 1.
    let a = d
        .probity(&[&["audit", "--json"][..], &l].concat())
        .expect(3)
        .json();
    assert_eq!(a["partitions"][0]["development_uses"][0]["run"], 2);
    assert!(
        !a["warnings"].as_array().unwrap().is_empty(),
        "audit reports the overlap: {a}"
    );
    d.probity(&[&["audit", "--verify"][..], &l].concat())
        .expect(0);
}

#[test]
fn predict_cannot_score_sealed_rows_by_hand() {
    let d = small_dir("predict-guard");
    d.probity(&["run", "small.toml"]).expect(0);
    // The whole data file, targets included: its test rows are sealed.
    let r = d
        .probity(&["predict", "1", "--input", "small.csv", "--output", "p.csv"])
        .expect(2);
    assert!(
        r.stderr()
            .contains("10 rows are test rows of sealed partition")
            && r.stderr().contains("probity reveal"),
        "{}",
        r.stderr()
    );
    assert!(!d.path.join("p.csv").exists());
    // Without the target column it is still a look at the sealed rows (the data file scores
    // the predictions): refused too.
    let no_target: String = crate::fixtures::small_csv()
        .lines()
        .map(|l| format!("{}\n", l.rsplit_once(',').unwrap().0))
        .collect();
    d.write("nt.csv", &no_target);
    let r = d
        .probity(&["predict", "1", "--input", "nt.csv", "--output", "p.csv"])
        .expect(2);
    assert!(
        r.stderr()
            .contains("10 rows are test rows of sealed partition"),
        "{}",
        r.stderr()
    );
    // New rows (new keys, new values) are an ordinary prediction.
    d.write(
        "new.csv",
        "id,x1,x2,shade,bay,week\nn1,3.25,4,low,B1,11\nn2,7.75,9,high,B2,11\n",
    );
    d.probity(&["predict", "1", "--input", "new.csv", "--output", "p.csv"])
        .expect(0);
    // --allow-sealed records it as a reveal.
    let r = d
        .probity(&[
            "predict",
            "1",
            "--input",
            "small.csv",
            "--output",
            "p.csv",
            "--allow-sealed",
        ])
        .expect(0);
    assert!(
        r.stderr().contains("recorded as reveal 1"),
        "{}",
        r.stderr()
    );
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["partitions"][0]["reveals"], 1);
}

#[test]
fn ladder_mode_reports_only_real_improvements() {
    let d = diabetes_dir(
        "ladder",
        "[guard]\nmode = \"ladder\"\nstep = 1.0\nreveals = 10",
    );
    d.probity(&["run", "d.toml"]).expect(0);
    // ridge(10) test rmse 48.1..., knn(5) about 57: the second is worse and repeats the first.
    let a = d
        .probity(&["reveal", "1", "--candidate", "2", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(a["answer"]["kind"], "ladder-new");
    let rmse = expected("ridge(lambda=10.0)")["metrics"]["rmse"]
        .as_f64()
        .unwrap();
    assert_eq!(a["answer"]["value"].as_f64().unwrap(), rmse.round());
    assert!(
        a["interval"].as_object().unwrap().is_empty(),
        "ladder mode withholds the exact scores"
    );
    let b = d
        .probity(&["reveal", "1", "--candidate", "3", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(b["answer"]["kind"], "ladder-previous");
    assert_eq!(b["answer"]["value"], a["answer"]["value"]);
    assert_eq!(b["test"]["rmse"], a["answer"]["value"]);
}

#[test]
fn reusable_mode_needs_a_bounded_metric() {
    let d = small_dir("reusable");
    d.write(
        "r.toml",
        &format!("{SMALL_SPEC}\n[guard]\nmode = \"reusable\"\n"),
    );
    let r = d.probity(&["run", "r.toml"]).expect(2);
    assert!(
        r.stderr().contains("r.toml:25:8") && r.stderr().contains("bounded in [0, 1]"),
        "{}",
        r.stderr()
    );
}

#[test]
fn reveal_refuses_a_changed_data_file_and_a_run_without_test_rows() {
    let d = small_dir("reveal-bad");
    d.probity(&["run", "small.toml"]).expect(0);
    d.write(
        "small.csv",
        &crate::fixtures::small_csv().replace("r0,", "r00,"),
    );
    let r = d.probity(&["reveal", "1", "--yes"]).expect(2);
    assert!(
        r.stderr().contains("has SHA-256") && r.stderr().contains("but run 1 used"),
        "{}",
        r.stderr()
    );
    let d = small_dir("reveal-notest");
    d.write("n.toml", &SMALL_SPEC.replace("test = 0.25\n", ""));
    d.probity(&["run", "n.toml"]).expect(0);
    let r = d.probity(&["reveal", "1", "--yes"]).expect(2);
    assert!(r.stderr().contains("no test partition"), "{}", r.stderr());
}

#[test]
fn nested_cross_validation_estimates_the_whole_procedure() {
    let d = small_dir("nested");
    d.write(
        "n.toml",
        &SMALL_SPEC.replace("folds = 4", "folds = 3\n[select]\nnested = true"),
    );
    let j = d.probity(&["run", "n.toml", "--json"]).expect(0).json();
    let n = &j["nested"];
    assert_eq!(n["outer_folds"], 3);
    assert_eq!(n["selections"].as_array().unwrap().len(), 3);
    assert!(
        n["estimate"].as_f64().unwrap() > 0.0 && n["se"].is_number(),
        "{n}"
    );
    // Same spec without nesting: the same candidates, and no nested block.
    let plain = d.probity(&["run", "small.toml", "--json"]).expect(0).json();
    assert!(plain["nested"].is_null());
    assert!(j["development"]["candidates"].as_i64().unwrap() >= 6);
}

/// On a terminal (a pseudo-terminal from util-linux `script`), reveal shows what was spent and
/// asks; "n" records nothing, "y" records the reveal.
#[test]
fn reveal_asks_on_a_terminal() {
    let d = small_dir("tty");
    d.probity(&["run", "small.toml"]).expect(0);
    let ask = |answer: &str| {
        let cmd = format!(
            "'{}' reveal 1 --ledger '{}'",
            env!("CARGO_BIN_EXE_probity"),
            d.ledger().display()
        );
        let mut child = std::process::Command::new("script")
            .args(["-q", "-e", "-c", &cmd, "/dev/null"])
            .current_dir(&d.path)
            .stdin(std::process::Stdio::piped())
            .stdout(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .expect("util-linux `script` provides the pseudo-terminal");
        use std::io::Write;
        child
            .stdin
            .take()
            .unwrap()
            .write_all(answer.as_bytes())
            .unwrap();
        let out = child.wait_with_output().unwrap();
        (
            out.status.code(),
            String::from_utf8_lossy(&out.stdout).into_owned(),
        )
    };
    let before = d.counts();
    let (code, text) = ask("n\n");
    assert_eq!(code, Some(2), "{text}");
    assert!(
        text.contains("consulted 0 time(s) so far (0 reveal(s), 0 development use(s)), budget 1")
            && text.contains("[y/N]"),
        "{text}"
    );
    assert!(text.contains("nothing was recorded"), "{text}");
    assert_eq!(d.counts(), before);
    let (code, text) = ask("y\n");
    assert_eq!(code, Some(0), "{text}");
    assert!(
        text.contains("reveals of this partition: 1 of a budget of 1"),
        "{text}"
    );
}

/// A test partition larger than one insert statement's batch (500 identities): every test row's
/// identity is stored once, and the stored set is exactly the run's test rows.
#[test]
fn large_test_partitions_store_every_row_identity() {
    let d = crate::util::Dir::new("many-test-rows");
    let mut csv = String::from("x,y\n");
    for i in 0..2400 {
        let x = i as f64 * 0.01;
        csv.push_str(&format!("{x},{}\n", 3.0 * x + ((i * 7) % 13) as f64 * 0.1));
    }
    d.write("many.csv", &csv);
    d.write(
        "many.toml",
        "name = \"many\"\ntask = \"regression\"\n[data]\npath = \"many.csv\"\ntarget = \"y\"\n[split]\nmethod = \"random\"\nseed = 3\ntest = 0.45\nfolds = 3\n[[model]]\nkind = \"ridge\"\nlambda = [0.1, 1.0]\n",
    );
    let j = d.probity(&["run", "many.toml", "--json"]).expect(0).json();
    let n_test = j["partition"]["test"].as_i64().unwrap();
    assert!(n_test > 1000, "{n_test}");
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    let (rows, distinct): (i64, i64) = c
        .query_row(
            "SELECT count(*), count(DISTINCT row_key) FROM partition_rows",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((rows, distinct), (n_test, n_test));
    d.probity(&["audit", "--verify"]).expect(0);
}

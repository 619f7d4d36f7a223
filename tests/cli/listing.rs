//! `history` filters and `export`: what they list is what the ledger holds.

use crate::fixtures::{SMALL_SPEC, small_dir};
use serde_json::Value;

/// Two experiments in one ledger: small (run 1, 3) and other (run 2).
fn three_runs() -> crate::util::Dir {
    let d = small_dir("listing");
    d.write(
        "other.toml",
        &SMALL_SPEC.replace("name = \"small\"", "name = \"other\""),
    );
    d.probity(&["run", "small.toml"]).expect(0);
    d.probity(&["run", "other.toml"]).expect(0);
    d.probity(&["run", "small.toml", "--note", "again"])
        .expect(0);
    d
}

fn run_ids(j: &Value) -> Vec<i64> {
    j["runs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["run"].as_i64().unwrap())
        .collect()
}

#[test]
fn history_filters_by_experiment_and_start_time() {
    let d = three_runs();
    let all = d.probity(&["history", "--json"]).expect(0).json();
    assert_eq!(run_ids(&all), vec![1, 2, 3]);
    let small = d
        .probity(&["history", "--experiment", "small", "--json"])
        .expect(0)
        .json();
    assert_eq!(run_ids(&small), vec![1, 3]);
    // From the second run's start time on (its stored text, with an offset written another way).
    let start = all["runs"][1]["started_at"].as_str().unwrap().to_string();
    let since = d
        .probity(&["history", "--since", &start, "--json"])
        .expect(0)
        .json();
    assert_eq!(run_ids(&since), vec![2, 3]);
    let shifted = start.replace('Z', "+00:00");
    let since2 = d
        .probity(&["history", "--since", &shifted, "--json"])
        .expect(0)
        .json();
    assert_eq!(run_ids(&since2), vec![2, 3]);
    let both = d
        .probity(&[
            "history",
            "--since",
            &start,
            "--experiment",
            "small",
            "--json",
        ])
        .expect(0)
        .json();
    assert_eq!(run_ids(&both), vec![3]);
    let none = d.probity(&["history", "--since", "2999-01-01"]).expect(0);
    assert_eq!(none.stdout().trim(), "no run matches");
    // A misspelt experiment is a usage error with a suggestion; so is an unreadable time.
    let r = d.probity(&["history", "--experiment", "smal"]).expect(2);
    assert!(
        r.stderr().contains("did you mean 'small'"),
        "{}",
        r.stderr()
    );
    let r = d.probity(&["history", "--since", "yesterday"]).expect(2);
    assert!(
        r.stderr().contains("not a date or a time"),
        "{}",
        r.stderr()
    );
}

/// A CSV document as header -> column of cells.
fn read_csv(text: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let mut r = csv::Reader::from_reader(text.as_bytes());
    let header = r.headers().unwrap().iter().map(String::from).collect();
    let rows = r
        .records()
        .map(|rec| rec.unwrap().iter().map(String::from).collect())
        .collect();
    (header, rows)
}

#[test]
fn export_writes_what_the_ledger_holds() {
    let d = three_runs();
    // Candidates: every validation mean and standard error, exactly as `show --json` has it.
    let csv_text = d
        .probity(&["export", "candidates", "--run", "2"])
        .expect(0)
        .stdout();
    let (header, rows) = read_csv(&csv_text);
    let col = |name: &str| header.iter().position(|h| h == name).unwrap();
    let show = d.probity(&["show", "2", "--json"]).expect(0).json();
    let cands = show["candidates"].as_array().unwrap();
    assert_eq!(rows.len(), cands.len());
    for (row, c) in rows.iter().zip(cands) {
        assert_eq!(row[col("run")], "2");
        assert_eq!(row[col("candidate")], c["id"].to_string());
        for m in ["rmse", "mae", "r2"] {
            let want = c["validation"][m].as_f64().unwrap();
            let got: f64 = row[col(&format!("validation_{m}"))].parse().unwrap();
            assert_eq!(got.to_bits(), want.to_bits(), "candidate {} {m}", c["id"]);
            let want_se = c["validation_se"][m].as_f64().unwrap();
            let got_se: f64 = row[col(&format!("validation_{m}_se"))].parse().unwrap();
            assert_eq!(got_se.to_bits(), want_se.to_bits());
        }
        let selected = c["id"] == show["selected"];
        assert_eq!(row[col("selected")], selected.to_string());
    }
    // The same candidates as JSON.
    let j = d
        .probity(&["export", "candidates", "--run", "2", "--format", "json"])
        .expect(0)
        .json();
    let jc = j["candidates"].as_array().unwrap();
    assert_eq!(jc.len(), cands.len());
    assert_eq!(
        jc[1]["validation"]["rmse"]["mean"],
        cands[1]["validation"]["rmse"]
    );
    // Runs: the filters apply, and the columns hold the run's facts.
    let (header, rows) = read_csv(
        &d.probity(&["export", "runs", "--experiment", "small"])
            .expect(0)
            .stdout(),
    );
    let col = |name: &str| header.iter().position(|h| h == name).unwrap();
    assert_eq!(rows.len(), 2);
    assert_eq!(rows[1][col("run")], "3");
    assert_eq!(rows[1][col("note")], "again");
    assert_eq!(rows[1][col("n_test")], "10");
    // Folds: one line per stored fold score, to a file.
    let out = d.path.join("folds.csv");
    d.probity(&[
        "export",
        "folds",
        "--run",
        "1",
        "--out",
        out.to_str().unwrap(),
    ])
    .expect(0);
    let (header, rows) = read_csv(&std::fs::read_to_string(&out).unwrap());
    assert_eq!(
        header,
        [
            "run",
            "candidate",
            "repeat",
            "fold",
            "part",
            "metric",
            "value"
        ]
    );
    let counts: std::collections::BTreeMap<String, i64> = d.counts().into_iter().collect();
    // The three runs score the same grid on the same folds: a third of the fold scores are
    // run 1's.
    let per_run = counts["fold_scores"] / 3;
    assert_eq!(rows.len() as i64, per_run);
    // An unknown run is a usage error.
    let r = d.probity(&["export", "runs", "--run", "9"]).expect(2);
    assert!(r.stderr().contains("no such run"), "{}", r.stderr());
}

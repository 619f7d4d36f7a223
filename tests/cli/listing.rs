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

/// Validation scores of `metric` per (repeat, fold) of one candidate, from `export folds`.
fn fold_scores(d: &crate::util::Dir, run: i64, candidate: i64, metric: &str) -> Vec<f64> {
    let text = d
        .probity(&["export", "folds", "--run", &run.to_string()])
        .expect(0)
        .stdout();
    let (_, rows) = read_csv(&text);
    rows.iter()
        .filter(|r| r[1] == candidate.to_string() && r[4] == "validation" && r[5] == metric)
        .map(|r| r[6].parse().unwrap())
        .collect()
}

/// Run 1: the small spec. Run 2: the same split with another grid (ridge 10 dropped, ridge 100
/// added).
fn same_split_two_grids(name: &str) -> crate::util::Dir {
    let d = small_dir(name);
    d.write(
        "wider.toml",
        &SMALL_SPEC.replace("lambda = [0.1, 1, 10]", "lambda = [0.1, 1, 100]"),
    );
    d.probity(&["run", "small.toml"]).expect(0);
    d.probity(&["run", "wider.toml"]).expect(0);
    d
}

#[test]
fn compare_tests_two_candidates_on_the_same_folds() {
    let d = same_split_two_grids("compare");
    let j = d.probity(&["compare", "1", "2", "--json"]).expect(0).json();
    assert_eq!(j["same_folds"], true);
    let fields = j["fields"].as_array().unwrap();
    let field = |name: &str| fields.iter().find(|f| f["name"] == name).unwrap().clone();
    assert_eq!(field("data sha256")["same"], true);
    assert_eq!(field("partition")["same"], true);
    assert_eq!(field("grid")["same"], false);
    let diff = j["spec_diff"].as_array().unwrap();
    assert_eq!(diff.len(), 2, "{diff:?}");
    assert_eq!(diff[0]["side"], "a");
    assert!(diff[1]["line"].as_str().unwrap().contains("100"));
    // mean, ridge 0.1, ridge 1, knn 1, knn 3 in both; ridge 10 only in A, ridge 100 only in B.
    assert_eq!(j["matched"].as_array().unwrap().len(), 5);
    assert_eq!(j["only_a"][0]["params"]["lambda"], 10.0);
    assert_eq!(j["only_b"][0]["params"]["lambda"], 100.0);

    // The paired test of the mean baseline (A's 1) against ridge 0.1 (B's 2), recomputed here
    // from the exported fold scores and the fold sizes that `check` reports.
    let t = d
        .probity(&["compare", "1", "2", "--candidates", "1", "2", "--json"])
        .expect(0)
        .json();
    let a = fold_scores(&d, 1, 1, "rmse");
    let b = fold_scores(&d, 2, 2, "rmse");
    assert_eq!(a.len(), 4);
    let diffs: Vec<f64> = a.iter().zip(&b).map(|(x, y)| y - x).collect();
    let n = diffs.len() as f64;
    let mean = diffs.iter().sum::<f64>() / n;
    let var = diffs.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    let check = d
        .probity(&["check", "small.toml", "--json"])
        .expect(0)
        .json();
    let folds = check["folds"].as_array().unwrap();
    let fit: f64 = folds.iter().map(|f| f["fit"].as_f64().unwrap()).sum();
    let score: f64 = folds.iter().map(|f| f["score"].as_f64().unwrap()).sum();
    let want_t = mean / ((1.0 / n + score / fit) * var).sqrt();
    let test = &t["test"];
    let got_t = test["t"].as_f64().unwrap();
    assert!(
        (got_t - want_t).abs() <= 1e-12 * want_t.abs(),
        "{got_t} vs {want_t}"
    );
    assert_eq!(test["df"], 3);
    // Ridge is far better than the mean on this data: a clear verdict for B.
    assert!(test["p"].as_f64().unwrap() < 0.05, "{test}");
    assert!(
        t["verdict"]
            .as_str()
            .unwrap()
            .starts_with("B's candidate 2 is better"),
        "{}",
        t["verdict"]
    );
    // One run against itself: its selected candidate against the runner-up.
    let same = d.probity(&["compare", "1", "1", "--json"]).expect(0).json();
    let show = d.probity(&["show", "1", "--json"]).expect(0).json();
    assert_eq!(same["test"]["a"], show["selected"]);
    assert_ne!(same["test"]["b"], show["selected"]);
    // Another split: no pairing, and the table says why.
    d.write("other.toml", &SMALL_SPEC.replace("seed = 5", "seed = 6"));
    d.probity(&["run", "other.toml"]).expect(0);
    let j = d.probity(&["compare", "1", "3", "--json"]).expect(0).json();
    assert_eq!(j["same_folds"], false);
    assert!(j["test"].is_null());
    let text = d.probity(&["compare", "1", "3"]).expect(0).stdout();
    assert!(
        text.contains("no paired test: the runs did not score the same folds"),
        "{text}"
    );
    // Bad candidates and metrics are usage errors.
    let r = d
        .probity(&["compare", "1", "2", "--candidates", "1", "99"])
        .expect(2);
    assert!(r.stderr().contains("no candidate 99"), "{}", r.stderr());
    let r = d
        .probity(&["compare", "1", "2", "--metric", "auc"])
        .expect(2);
    assert!(
        r.stderr().contains("no such validation score"),
        "{}",
        r.stderr()
    );
}

#[test]
fn compare_table_matches_golden() {
    let d = same_split_two_grids("compare-golden");
    let out = d.probity(&["compare", "1", "2"]).expect(0).stdout();
    // The tool version row changes with every release; the rest is fixed by the data and seeds.
    let table: String = out
        .lines()
        .filter(|l| !l.contains("┆ tool "))
        .map(|l| format!("{l}\n"))
        .collect();
    crate::util::check_golden("small-compare.txt", &table);
}

/// Cells are exact by default; `--spreadsheet-safe` defuses text that a spreadsheet would run as
/// a formula (a note `=2+3`, a key `@SUM`) and leaves numbers alone.
#[test]
fn spreadsheet_safe_output_defuses_formulas_and_keeps_numbers() {
    let d = crate::fixtures::small_dir("sheet-safe");
    d.probity(&["run", "small.toml", "--note", "=2+3"])
        .expect(0);
    let exact = d.probity(&["export", "runs"]).expect(0).stdout();
    assert!(exact.contains(",=2+3"), "{exact}");
    let safe = d
        .probity(&["export", "runs", "--spreadsheet-safe"])
        .expect(0)
        .stdout();
    assert!(safe.contains("'=2+3") && !safe.contains(",=2+3"), "{safe}");
    // Numbers are kept: the same count of minus signs outside the defused cell.
    assert_eq!(
        exact.matches(",-").count(),
        safe.matches(",-").count(),
        "{exact}\n{safe}"
    );
    // Predictions: the demo's bays, next week's first record keyed like a formula.
    let ex = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    for f in ["bays.csv", "bay-yield.toml"] {
        d.copy(&ex.join(f), f);
    }
    let next = std::fs::read_to_string(ex.join("bays-next-week.csv")).unwrap();
    let mut lines: Vec<String> = next.lines().map(str::to_string).collect();
    let first = lines[1].split_once(',').unwrap().1.to_string();
    lines[1] = format!("@SUM(A1),{first}");
    d.write("next.csv", &(lines.join("\n") + "\n"));
    d.probity(&["run", "bay-yield.toml"]).expect(0);
    for (flag, cell) in [
        (None, "\n@SUM(A1),"),
        (Some("--spreadsheet-safe"), "\n'@SUM(A1),"),
    ] {
        let mut args = vec!["predict", "2", "--input", "next.csv", "--output", "p.csv"];
        args.extend(flag);
        d.probity(&args).expect(0);
        let p = std::fs::read_to_string(d.path.join("p.csv")).unwrap();
        assert!(p.contains(cell), "{flag:?}: {p}");
    }
    // The header too (a key column named like a formula). A cell led by a tab reaches the
    // output without it (the reader trims cells), and is defused as `=...`.
    let spec = std::fs::read_to_string(ex.join("bay-yield.toml"))
        .unwrap()
        .replace("key = \"record\"", "key = \"-record\"")
        .lines()
        .filter(|l| !l.starts_with("sha256"))
        .collect::<Vec<_>>()
        .join("\n");
    d.write("odd.toml", &spec);
    let bays = std::fs::read_to_string(ex.join("bays.csv")).unwrap();
    let (head, rest) = bays.split_once('\n').unwrap();
    d.write(
        "bays.csv",
        &format!("{}\n{rest}", head.replace("record", "-record")),
    );
    lines[0] = lines[0].replace("record", "-record");
    lines[1] = format!("\"\t=1+1\",{first}");
    d.write("next.csv", &(lines.join("\n") + "\n"));
    d.probity(&["run", "odd.toml"]).expect(0);
    d.probity(&[
        "predict",
        "3",
        "--input",
        "next.csv",
        "--output",
        "p.csv",
        "--spreadsheet-safe",
    ])
    .expect(0);
    let p = std::fs::read_to_string(d.path.join("p.csv")).unwrap();
    assert!(p.starts_with("'-record,prediction\n'=1+1,"), "{p}");
}

/// `key list`: the trusted keys as a table and as JSON (`{"trusted_keys": [{name, public_key,
/// added_at, added_by}]}`, by name), the JSON pinned by a golden file with the time and the user masked.
#[test]
fn trusted_keys_list_matches_golden() {
    let d = crate::fixtures::small_dir("key-list");
    let r = d.probity(&["key", "list"]).expect(2);
    assert!(r.stderr().contains("no ledger found"), "{}", r.stderr());
    // Two public keys from RFC 8032, section 7.1 (TESTs 1 and 2): fixed, so the files are too.
    d.probity(&[
        "key",
        "trust",
        "bram",
        "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c",
    ])
    .expect(0);
    d.probity(&[
        "key",
        "trust",
        "ada",
        "D75A980182B10AB7D54BFED3C964073A0EE172F3DAA62325AF021A68F707511A",
    ])
    .expect(0);
    let r = d
        .probity(&[
            "key",
            "trust",
            "ada-again",
            "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a",
        ])
        .expect(2);
    assert!(
        r.stderr().contains("trusted already, as \"ada\""),
        "{}",
        r.stderr()
    );
    d.probity(&["key", "trust", "x", "00"]).expect(2);
    let mut j = d.probity(&["key", "list", "--json"]).expect(0).json();
    for k in j["trusted_keys"].as_array_mut().unwrap() {
        assert!(k["added_at"].as_str().unwrap().ends_with('Z'));
        assert!(k["added_by"].as_str().unwrap().contains('@'));
        k["added_at"] = serde_json::json!("<time>");
        k["added_by"] = serde_json::json!("<user@host>");
    }
    crate::util::check_golden(
        "key-list.json",
        &(serde_json::to_string_pretty(&j).unwrap() + "\n"),
    );
    // The table's widths follow the user and host names, so its lines are checked, not pinned.
    let table = d.probity(&["key", "list"]).expect(0).stdout();
    let rows: Vec<&str> = table.lines().filter(|l| l.contains('┆')).collect();
    assert_eq!(rows.len(), 3, "{table}");
    assert!(
        rows[0].contains("name")
            && rows[0].contains("public key")
            && rows[0].contains("added (UTC)")
    );
    assert!(rows[1].contains("ada") && rows[1].contains("d75a9801") && rows[2].contains("bram"));
}

/// A run, a reveal and a note record the operating system's name for the user (what `id -un`
/// prints), not what a login variable claims; `PROBITY_USER` names the person on purpose.
#[test]
fn the_person_is_the_systems_user_unless_named() {
    let d = crate::fixtures::small_dir("who");
    let os = std::process::Command::new("id")
        .arg("-un")
        .output()
        .unwrap();
    let os = String::from_utf8(os.stdout).unwrap().trim().to_string();
    let lie = [("USER", "mallory"), ("LOGNAME", "mallory")];
    d.probity_env(&["run", "small.toml"], &lie).expect(0);
    d.probity_env(&["reveal", "1", "--yes"], &lie).expect(0);
    let named = [("PROBITY_USER", "Ana Ferreira"), ("USER", "mallory")];
    d.probity_env(&["note", "1", "checked"], &named).expect(0);
    d.probity_env(&["run", "small.toml"], &named).expect(0);
    let user = |run: &str| {
        d.probity(&["show", run, "--json"]).expect(0).json()["user"]
            .as_str()
            .unwrap()
            .to_string()
    };
    assert_eq!(user("1"), os);
    assert_eq!(user("2"), "Ana Ferreira");
    let s = d.probity(&["show", "1", "--json"]).expect(0).json();
    assert_eq!(s["notes"][0]["user"], "Ana Ferreira", "{s}");
    let a = d.probity(&["audit", "--json"]).expect(0).json();
    let people = a["partitions"][0]["people"].to_string();
    assert!(
        people.contains(&os) && !people.contains("mallory"),
        "{people}"
    );
}

//! End-to-end runs through the binary: the demo, storage, determinism, selection, prediction,
//! ledger discovery.

use crate::fixtures::{SMALL_SPEC, small_dir};
use crate::util::{Dir, reference};
use serde_json::Value;
use std::path::Path;

fn demo(d: &Dir, name: &str) {
    let ex = Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    d.copy(&ex.join(format!("{name}.toml")), &format!("{name}.toml"));
    for csv in ["heating-trial.csv", "bays.csv"] {
        d.copy(&ex.join(csv), csv);
    }
}

#[test]
fn demo_experiment_runs_and_stores_every_score() {
    let d = Dir::new("demo");
    demo(&d, "heating-trial");
    let r = d
        .probity(&[
            "run",
            "heating-trial.toml",
            "--json",
            "--note",
            "first look",
        ])
        .expect(0);
    let j = r.json();
    assert_eq!(j["run"], 1);
    assert_eq!(j["experiment"], "heating-trial");
    assert_eq!(j["data"]["rows"], 60);
    assert_eq!(
        j["data"]["sha256"],
        "a7bfeabfec6c600432c57da6a9043088834789eb61f28597139bdec94149820a"
    );
    assert_eq!(
        (
            j["partition"]["train"].as_i64(),
            j["partition"]["test"].as_i64()
        ),
        (Some(48), Some(12))
    );
    assert_eq!(j["partition"]["folds"], 15);
    let cands = j["candidates"].as_array().unwrap();
    // mean baseline + 12 degrees + 5 k values
    assert_eq!(cands.len(), 18);
    assert_eq!(cands[0]["model"], "mean");
    for c in cands {
        for m in ["rmse", "mse", "mae", "r2"] {
            assert!(
                c["validation"][m].is_number()
                    && c["train"][m].is_number()
                    && c["validation_se"][m].is_number(),
                "{c}"
            );
        }
    }
    // The overfitting picture: training error of the degree-12 polynomial is below degree 2's,
    // its cross-validated error far above.
    let by = |deg: i64| {
        cands
            .iter()
            .find(|c| c["model"] == "poly" && c["params"]["degree"] == deg)
            .unwrap()
            .clone()
    };
    let (d2, d12) = (by(2), by(12));
    assert!(d12["train"]["rmse"].as_f64() < d2["train"]["rmse"].as_f64());
    assert!(
        d12["validation"]["rmse"].as_f64().unwrap()
            > 2.0 * d2["validation"]["rmse"].as_f64().unwrap()
    );
    // Every score is in the ledger: 18 candidates x 15 folds x 2 parts x 4 metrics.
    let counts: std::collections::BTreeMap<String, i64> = d.counts().into_iter().collect();
    assert_eq!(counts["fold_scores"], 18 * 15 * 2 * 4);
    assert_eq!(counts["scores"], 18 * 2 * 4);
    assert_eq!(counts["runs"], 1);
    // show --json repeats the stored numbers exactly; history lists the run with its note.
    let s = d.probity(&["show", "1", "--json"]).expect(0).json();
    assert_eq!(s["candidates"], j["candidates"]);
    assert_eq!(s["note"], "first look");
    assert!(
        s["spec"]["text"]
            .as_str()
            .unwrap()
            .contains("name = \"heating-trial\"")
    );
    let h = d.probity(&["history", "--json"]).expect(0).json();
    assert_eq!(h["runs"][0]["run"], 1);
    assert_eq!(h["runs"][0]["selected"], j["selected"]);
    let table = d.probity(&["history"]).expect(0).stdout();
    assert!(
        table.contains("heating-trial") && table.contains("first look"),
        "{table}"
    );
}

#[test]
fn every_demo_spec_runs() {
    let d = Dir::new("demos");
    for name in ["heating-trial", "bay-yield", "bay-yield-hash"] {
        demo(&d, name);
        let j = d
            .probity(&["run", &format!("{name}.toml"), "--json"])
            .expect(0)
            .json();
        assert_eq!(j["experiment"], name);
        assert!(j["selected"].as_i64().unwrap() >= 1);
    }
    let j = d.probity(&["show", "2", "--json"]).expect(0).json();
    // bay-yield keeps bays whole: 6 of 24 bays (624 rows) sealed.
    assert_eq!(j["partition"]["test"], 624);
}

fn scores_only(j: &Value) -> Value {
    Value::Array(
        j["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| {
                serde_json::json!([c["train"], c["validation"], c["validation_se"], c["seed"]])
            })
            .collect(),
    )
}

#[test]
fn one_thread_and_many_give_identical_bits() {
    let d = Dir::new("threads");
    demo(&d, "bay-yield");
    let one = d
        .probity(&["run", "bay-yield.toml", "--json", "--threads", "1"])
        .expect(0)
        .json();
    let many = d
        .probity(&["run", "bay-yield.toml", "--json", "--threads", "7"])
        .expect(0)
        .json();
    // serde_json keeps f64 exactly, so equality here is bit equality.
    assert_eq!(scores_only(&one), scores_only(&many));
    assert_eq!(one["selected"], many["selected"]);
    assert_eq!(one["partition"]["id"], many["partition"]["id"]);
    let l = probity::ledger::Ledger::open(&d.ledger(), false).unwrap();
    for c in 1..=5 {
        assert_eq!(l.fold_scores(1, c).unwrap(), l.fold_scores(2, c).unwrap());
    }
    let (a, b) = (l.run(1).unwrap().unwrap(), l.run(2).unwrap().unwrap());
    assert_eq!(
        a.model_json, b.model_json,
        "the refitted model is the same bits"
    );
}

/// Diabetes with `part` as the split column: the fixed validation partition's scores must equal
/// the reference values (fit on part == train, score part == validation; scikit-learn 1.9.1
/// cross-checked, see tests/reference/README.md) through the whole binary.
#[test]
fn column_split_reproduces_reference_scores_end_to_end() {
    let d = Dir::new("diabetes");
    d.copy(&reference("diabetes.csv"), "diabetes.csv");
    d.write(
        "diabetes.toml",
        r#"name = "diabetes"
task = "regression"
[data]
path = "diabetes.csv"
target = "y"
[split]
method = "column"
column = "part"
[[model]]
kind = "ols"
[[model]]
kind = "ridge"
lambda = [0.1, 1.0, 10.0, 100.0]
[[model]]
kind = "lasso"
lambda = [0.01, 0.1, 1.0, 5.0]
[[model]]
kind = "knn"
k = [1, 5, 15]
[[model]]
kind = "poly"
feature = "bmi"
degree = [2, 3, 6]
"#,
    );
    let j = d
        .probity(&["run", "diabetes.toml", "--json"])
        .expect(0)
        .json();
    assert_eq!(
        (
            j["partition"]["train"].as_i64(),
            j["partition"]["validation"].as_i64(),
            j["partition"]["test"].as_i64()
        ),
        (Some(266), Some(88), Some(88))
    );
    assert_eq!(j["partition"]["holdout"], true);
    let exp: Value = serde_json::from_str(
        &std::fs::read_to_string(reference("diabetes.expected.json")).unwrap(),
    )
    .unwrap();
    let mut matched = 0;
    for case in exp["cases"].as_array().unwrap() {
        let c = j["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| {
                c["model"] == case["model"]
                    && ["lambda", "k", "degree", "feature"].iter().all(|p| {
                        case.get(*p).is_none_or(|v| {
                            c["params"][*p]
                                .as_f64()
                                .map_or(c["params"][*p] == *v, |x| Some(x) == v.as_f64())
                        })
                    })
            })
            .unwrap_or_else(|| panic!("no candidate for {}", case["id"]));
        let tol = if case["model"] == "lasso" { 1e-6 } else { 1e-8 };
        for m in ["rmse", "mae", "r2"] {
            let (got, want) = (
                c["validation"][m].as_f64().unwrap(),
                case["metrics"][m].as_f64().unwrap(),
            );
            assert!(
                ((got - want) / want).abs() <= tol,
                "{} {m}: {got} vs {want}",
                case["id"]
            );
            // A fixed validation partition has no standard error.
            assert!(c["validation_se"][m].is_null());
        }
        matched += 1;
    }
    assert_eq!(matched, 16);
}

/// With the reference's validation rows relabelled as test, the development rows are exactly
/// the reference fitting rows, so the refitted model's predictions on them must match.
#[test]
fn predict_applies_the_refitted_model() {
    let d = Dir::new("predict");
    let text = std::fs::read_to_string(reference("diabetes.csv"))
        .unwrap()
        .replace(",validation\n", ",test\n");
    d.write("diabetes.csv", &text);
    let valid: String = std::fs::read_to_string(reference("diabetes.csv"))
        .unwrap()
        .lines()
        .enumerate()
        .filter(|(i, l)| *i == 0 || l.ends_with(",validation"))
        .map(|(_, l)| format!("{l}\n"))
        .collect();
    d.write("new.csv", &valid);
    d.write(
        "d.toml",
        "name = \"d\"\ntask = \"regression\"\n[data]\npath = \"diabetes.csv\"\ntarget = \"y\"\n[split]\nmethod = \"column\"\ncolumn = \"part\"\nfolds = 5\n[[model]]\nkind = \"ridge\"\nlambda = [10.0]\n[[model]]\nkind = \"knn\"\nk = [5]\n",
    );
    let j = d.probity(&["run", "d.toml", "--json"]).expect(0).json();
    assert_eq!(j["partition"]["train"], 266);
    let exp: Value = serde_json::from_str(
        &std::fs::read_to_string(reference("diabetes.expected.json")).unwrap(),
    )
    .unwrap();
    // The reference's validation rows are this run's sealed test rows (fitted on the 266
    // train rows, as the reference was): predicting them is a counted consultation.
    for (n, (cand, case_id)) in [("2", "ridge(lambda=10.0)"), ("3", "knn(k=5)")]
        .into_iter()
        .enumerate()
    {
        let r = d
            .probity(&[
                "predict",
                "1",
                "--input",
                "new.csv",
                "--output",
                "out.csv",
                "--candidate",
                cand,
                "--allow-sealed",
            ])
            .expect(0);
        assert!(
            r.stderr().contains("wrote 88 predictions")
                && r.stderr()
                    .contains(&format!("recorded as reveal {}", n + 1)),
            "{}",
            r.stderr()
        );
        let out = std::fs::read_to_string(d.path.join("out.csv")).unwrap();
        let mut lines = out.lines();
        assert_eq!(lines.next(), Some("prediction"));
        let got: Vec<f64> = lines.map(|l| l.parse().unwrap()).collect();
        assert_eq!(got.len(), 88);
        let case = exp["cases"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["id"] == case_id)
            .unwrap();
        for (i, want) in case["first_10_predictions"]
            .as_array()
            .unwrap()
            .iter()
            .enumerate()
        {
            let want = want.as_f64().unwrap();
            assert!(
                ((got[i] - want) / want).abs() < 1e-8,
                "{case_id} row {i}: {} vs {want}",
                got[i]
            );
        }
    }
    // Without --candidate, the stored selected model is used, with the key column when given.
    d.probity(&[
        "predict",
        "1",
        "--input",
        "new.csv",
        "--output",
        "sel.csv",
        "--allow-sealed",
    ])
    .expect(0);
    assert_eq!(
        std::fs::read_to_string(d.path.join("sel.csv"))
            .unwrap()
            .lines()
            .count(),
        89
    );
    let e = d
        .probity(&[
            "predict",
            "1",
            "--input",
            "new.csv",
            "--output",
            "x.csv",
            "--candidate",
            "99",
        ])
        .expect(2);
    assert!(e.stderr().contains("no candidate 99"), "{}", e.stderr());
}

#[test]
fn predict_writes_keys_and_handles_unseen_levels() {
    let d = small_dir("predict-key");
    d.probity(&["run", "small.toml"]).expect(0);
    d.write("new.csv", "id,x1,x2,shade\nn1,3,4,high\nn2,1.5,2,violet\n");
    let r = d
        .probity(&["predict", "1", "--input", "new.csv", "--output", "p.csv"])
        .expect(0);
    assert!(r.stderr().contains("level not seen"), "{}", r.stderr());
    let out = std::fs::read_to_string(d.path.join("p.csv")).unwrap();
    let lines: Vec<&str> = out.lines().collect();
    assert_eq!(lines[0], "id,prediction");
    assert!(
        lines[1].starts_with("n1,") && lines[2].starts_with("n2,"),
        "{out}"
    );
    let e = d.probity(&["predict", "1", "--input", "small.toml", "--output", "p.csv"]);
    assert_eq!(e.code(), 2, "{}", e.stderr());
}

#[test]
fn leave_one_out_reports_r2_as_absent() {
    let d = small_dir("loo");
    d.write(
        "loo.toml",
        &SMALL_SPEC
            .replace("folds = 4", "folds = \"loo\"")
            .replace("name = \"small\"", "name = \"loo\""),
    );
    let j = d.probity(&["run", "loo.toml", "--json"]).expect(0).json();
    assert_eq!(j["partition"]["folds"], 30);
    for c in j["candidates"].as_array().unwrap() {
        assert!(
            c["validation"]["r2"].is_null(),
            "r2 is undefined on one-row folds: {c}"
        );
        assert!(c["validation"]["rmse"].is_number());
    }
    let e = d.probity(&["run", "loo.toml"]);
    assert_eq!(e.code(), 0);
    d.write(
        "loo-r2.toml",
        &SMALL_SPEC
            .replace("folds = 4", "folds = \"loo\"\n[select]\nmetric = \"r2\"")
            .replace("name = \"small\"", "name = \"loo\""),
    );
    let e = d.probity(&["run", "loo-r2.toml"]).expect(2);
    assert!(e.stderr().contains("r2 is undefined"), "{}", e.stderr());
}

#[test]
fn one_se_rule_picks_the_simplest_within_one_standard_error() {
    let d = Dir::new("onese");
    demo(&d, "heating-trial");
    let j = d
        .probity(&["run", "heating-trial.toml", "--json"])
        .expect(0)
        .json();
    let cands = j["candidates"].as_array().unwrap();
    let get = |id: &Value| cands.iter().find(|c| c["id"] == *id).unwrap();
    let (best, sel) = (get(&j["best"]), get(&j["selected"]));
    let limit = best["validation"]["rmse"].as_f64().unwrap()
        + best["validation_se"]["rmse"].as_f64().unwrap();
    assert!(sel["validation"]["rmse"].as_f64().unwrap() <= limit);
    assert_eq!(sel["model"], best["model"]);
    // No simpler candidate of the family is inside the band.
    for c in cands.iter().filter(|c| c["model"] == "poly") {
        if c["params"]["degree"].as_i64() < sel["params"]["degree"].as_i64() {
            assert!(c["validation"]["rmse"].as_f64().unwrap() > limit, "{c}");
        }
    }
}

#[test]
fn ledger_is_found_upwards_and_can_be_overridden() {
    let d = small_dir("locate");
    d.probity(&["run", "small.toml"]).expect(0);
    assert!(d.ledger().exists());
    std::fs::create_dir_all(d.path.join("sub/deeper")).unwrap();
    let mut cmd = std::process::Command::new(env!("CARGO_BIN_EXE_probity"));
    let out = cmd
        .current_dir(d.path.join("sub/deeper"))
        .args(["history", "--json"])
        .env_remove("PROBITY_LEDGER")
        .output()
        .unwrap();
    let j: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(j["runs"].as_array().unwrap().len(), 1);
    // --ledger and PROBITY_LEDGER point elsewhere.
    d.probity(&["run", "small.toml", "--ledger", "other.sqlite"])
        .expect(0);
    assert!(d.path.join("other.sqlite").exists());
    let mut cmd = std::process::Command::new(env!("CARGO_BIN_EXE_probity"));
    let out = cmd
        .current_dir(&d.path)
        .args(["history", "--json"])
        .env("PROBITY_LEDGER", d.path.join("other.sqlite"))
        .output()
        .unwrap();
    let j: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(j["runs"].as_array().unwrap().len(), 1);
}

#[test]
fn check_validates_and_writes_nothing() {
    let d = small_dir("check");
    let r = d.probity(&["check", "small.toml"]).expect(0);
    let out = r.stdout();
    assert!(
        out.contains("train 30") && out.contains("test 10") && out.contains("fold"),
        "{out}"
    );
    assert!(
        !d.path.join(".probity").exists(),
        "check must not create a ledger"
    );
    let j = d
        .probity(&["check", "small.toml", "--json"])
        .expect(0)
        .json();
    assert_eq!(j["partition"]["test"], 10);
    assert_eq!(j["folds"].as_array().unwrap().len(), 4);
    assert_eq!(j["candidates"], 6);
    assert_eq!(j["features"][2]["kind"], "categorical");
}

/// The benchmark's parse floor (`PROBITY_TIMINGS=parse-only`) reads and parses the data, prints
/// the time and stores nothing; `PROBITY_TIMINGS=1` times every phase of a real run.
#[test]
fn parse_only_timing_reads_the_data_and_stores_nothing() {
    let d = small_dir("parse-only");
    let run = |v: &str| {
        let mut cmd = assert_cmd::Command::cargo_bin("probity").unwrap();
        cmd.current_dir(&d.path)
            .args(["run", "small.toml"])
            .env_remove("PROBITY_LEDGER")
            .env("PROBITY_TIMINGS", v);
        cmd.output().unwrap()
    };
    let out = run("parse-only");
    let err = String::from_utf8_lossy(&out.stderr).to_string();
    assert_eq!(out.status.code(), Some(0), "{err}");
    assert!(
        err.contains("timing parse: ") && err.contains("parsed 40 rows x "),
        "{err}"
    );
    assert!(!err.contains("timing run"), "{err}");
    assert!(out.stdout.is_empty());
    assert!(!d.path.join(".probity").exists(), "nothing is stored");
    let out = run("1");
    let err = String::from_utf8_lossy(&out.stderr).to_string();
    assert_eq!(out.status.code(), Some(0), "{err}");
    for phase in ["load", "run", "ledger"] {
        assert!(err.contains(&format!("timing {phase}: ")), "{err}");
    }
    assert!(d.path.join(".probity").exists());
}

#[test]
fn history_and_show_need_a_ledger() {
    let d = Dir::new("noledger");
    let e = d.probity(&["history"]).expect(2);
    assert!(e.stderr().contains("no ledger found"), "{}", e.stderr());
    let d = small_dir("showmissing");
    d.probity(&["run", "small.toml"]).expect(0);
    let e = d.probity(&["show", "9"]).expect(2);
    assert!(e.stderr().contains("no run 9"), "{}", e.stderr());
}

#[test]
fn missing_values_are_imputed_per_fold_or_dropped() {
    let d = small_dir("missing");
    let csv = crate::fixtures::small_csv().replacen("r6,3,", "r6,,", 1);
    d.write("small.csv", &csv);
    let e = d.probity(&["run", "small.toml"]).expect(2);
    assert!(
        e.stderr().contains("missing value") && e.stderr().contains("column 'x1'"),
        "{}",
        e.stderr()
    );
    d.write(
        "mean.toml",
        &SMALL_SPEC.replace(
            "ignore = [\"bay\", \"week\"]",
            "ignore = [\"bay\", \"week\"]\nmissing = \"mean\"",
        ),
    );
    d.probity(&["run", "mean.toml"]).expect(0);
    d.write(
        "drop.toml",
        &SMALL_SPEC.replace(
            "ignore = [\"bay\", \"week\"]",
            "ignore = [\"bay\", \"week\"]\nmissing = \"drop-rows\"",
        ),
    );
    let r = d.probity(&["run", "drop.toml", "--json"]).expect(0);
    assert_eq!(r.json()["data"]["rows_used"], 39);
    assert!(
        r.stderr().contains("1 of 40 rows dropped"),
        "{}",
        r.stderr()
    );
}

#[test]
fn csv_with_bom_crlf_and_quoted_fields_runs() {
    let d = small_dir("bom");
    let csv = crate::fixtures::small_csv()
        .replace("low", "\"low, shaded\nbay\"")
        .replace('\n', "\r\n");
    d.write("small.csv", &format!("\u{feff}{csv}"));
    d.probity(&["run", "small.toml"]).expect(0);
}

/// The leaderboard a user reads, pinned as text: a change in formatting, ranking or any score's
/// printed digits shows up as a diff.
#[test]
fn leaderboard_matches_golden() {
    let d = Dir::new("golden");
    demo(&d, "heating-trial");
    d.probity(&["run", "heating-trial.toml"]).expect(0);
    let out = d.probity(&["show", "1", "--all"]).expect(0).stdout();
    let table: String = out
        .lines()
        .skip_while(|l| !l.starts_with('┌'))
        .map(|l| format!("{l}\n"))
        .collect();
    crate::util::check_golden("heating-trial-leaderboard.txt", &table);
}

#[test]
fn default_features_leave_out_target_key_split_and_ignored_columns() {
    let d = small_dir("features");
    d.write(
        "g.toml",
        &SMALL_SPEC
            .replace("ignore = [\"bay\", \"week\"]", "ignore = [\"week\"]")
            .replace("method = \"random\"", "method = \"group\"\ngroup = \"bay\""),
    );
    let j = d.probity(&["check", "g.toml", "--json"]).expect(0).json();
    let names: Vec<&str> = j["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["name"].as_str().unwrap())
        .collect();
    assert_eq!(names, ["x1", "x2", "shade"]);
    d.write(
        "f.toml",
        &SMALL_SPEC.replace(
            "ignore = [\"bay\", \"week\"]",
            "features = [\"x2\", \"week\"]",
        ),
    );
    let j = d.probity(&["check", "f.toml", "--json"]).expect(0).json();
    let names: Vec<&str> = j["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["name"].as_str().unwrap())
        .collect();
    assert_eq!(names, ["x2", "week"]);
}

/// Test rows never reach a fit or a score in `run`: two files that differ only in the test rows'
/// targets (and features) give bit-identical candidates, selection and refitted model.
#[test]
fn test_rows_never_enter_a_run() {
    let d = Dir::new("isolation");
    let original = std::fs::read_to_string(reference("diabetes.csv")).unwrap();
    let scrambled: String = original
        .lines()
        .map(|l| {
            if l.ends_with(",test") {
                // Wild values in every numeric field of a test row, target included.
                let fields: Vec<String> = l
                    .split(',')
                    .map(|f| {
                        if f == "test" {
                            f.to_string()
                        } else {
                            "99999".to_string()
                        }
                    })
                    .collect();
                format!("{}\n", fields.join(","))
            } else {
                format!("{l}\n")
            }
        })
        .collect();
    assert_ne!(original, scrambled);
    let spec = |file: &str| {
        format!(
            "name = \"iso\"\ntask = \"regression\"\n[data]\npath = \"{file}\"\ntarget = \"y\"\n[split]\nmethod = \"column\"\ncolumn = \"part\"\n[[model]]\nkind = \"ridge\"\nlambda = [1.0, 10.0]\n[[model]]\nkind = \"knn\"\nk = [3]\n[[model]]\nkind = \"poly\"\nfeature = \"bmi\"\ndegree = [2]\n"
        )
    };
    d.write("a.csv", &original);
    d.write("b.csv", &scrambled);
    d.write("a.toml", &spec("a.csv"));
    d.write("b.toml", &spec("b.csv"));
    let a = d.probity(&["run", "a.toml", "--json"]).expect(0).json();
    let b = d.probity(&["run", "b.toml", "--json"]).expect(0).json();
    assert_ne!(a["data"]["sha256"], b["data"]["sha256"]);
    assert_eq!(a["candidates"], b["candidates"]);
    assert_eq!(a["selected"], b["selected"]);
    let l = probity::ledger::Ledger::open(&d.ledger(), false).unwrap();
    assert_eq!(
        l.run(1).unwrap().unwrap().model_json,
        l.run(2).unwrap().unwrap().model_json
    );
}

/// Progress is drawn only on a terminal: a run whose stderr is a pipe (scripts, CI, this test)
/// gets no bar, no spinner and no carriage returns, whether or not it asks for JSON.
#[test]
fn progress_stays_off_a_pipe() {
    let d = small_dir("quiet");
    for args in [
        &["run", "small.toml"][..],
        &["run", "small.toml", "--json"][..],
    ] {
        let r = d.probity(args).expect(0);
        let err = r.stderr();
        assert!(
            !err.contains('\r') && !err.contains("fitting") && !err.contains("reading the data"),
            "{err:?}"
        );
    }
}

/// The sufficient-statistics path for ridge cuts a large grid into one chunk of fits per thread;
/// the scores must not depend on the cut (1, 2 and 3 threads on a 24-point grid).
#[test]
fn ridge_grid_chunks_change_no_bit() {
    let d = Dir::new("ridge-chunks");
    let mut csv = String::from("a,b,c,y\n");
    for i in 0..300 {
        let (a, b, c) = (
            i as f64 * 0.37 % 11.0,
            ((i * 7) % 13) as f64 * 1.5,
            (i as f64).sqrt(),
        );
        csv.push_str(&format!(
            "{a},{b},{c},{}\n",
            2.0 * a - b + 0.3 * c + ((i * 5) % 7) as f64 * 0.2
        ));
    }
    d.write("g.csv", &csv);
    d.write(
        "g.toml",
        "name = \"g\"\ntask = \"regression\"\n[data]\npath = \"g.csv\"\ntarget = \"y\"\n[split]\nmethod = \"random\"\nseed = 5\ntest = 0.2\nfolds = 4\n[[model]]\nkind = \"ridge\"\nlambda = { from = 0.001, to = 1000, steps = 24, scale = \"log\" }\n",
    );
    let runs: Vec<Value> = ["1", "2", "3"]
        .iter()
        .map(|t| {
            d.probity(&["run", "g.toml", "--json", "--threads", t])
                .expect(0)
                .json()
        })
        .collect();
    assert_eq!(runs[0]["candidates"].as_array().unwrap().len(), 25);
    for r in &runs[1..] {
        assert_eq!(scores_only(r), scores_only(&runs[0]));
        assert_eq!(r["selected"], runs[0]["selected"]);
    }
}

#[test]
fn a_run_that_fails_after_its_partition_was_stored_leaves_nothing_behind() {
    // The partition is stored beside the grid. Here the outer folds pass every check (k = 20 of
    // about 22 fitting rows), but nested cross-validation's inner folds have about 16 fitting
    // rows, which only the run finds: the partition it brought in must go again.
    let d = small_dir("late-failure");
    d.probity(&["run", "small.toml"]).expect(0);
    let before = d.counts();
    d.write(
        "nested.toml",
        &SMALL_SPEC
            .replace("seed = 5", "seed = 6")
            .replace("k = [1, 3]", "k = [1, 20]")
            .replace("folds = 4", "folds = 4\n[select]\nnested = true"),
    );
    let r = d.probity(&["run", "nested.toml"]).expect(2);
    assert!(
        r.stderr().contains("k = 20 is larger than"),
        "{}",
        r.stderr()
    );
    assert_eq!(d.counts(), before, "the failed run left rows behind");
}

#[test]
fn check_finds_a_fold_without_a_class() {
    // One row of class 'rare', kept out of the test rows by this seed: the fold that holds it
    // out has no 'rare' row to fit. `check` says so before any run.
    let d = Dir::new("rare-class");
    let mut csv = String::from("x,label\n");
    for i in 0..30 {
        csv.push_str(&format!(
            "{},{}\n",
            i as f64 * 0.5,
            if i % 2 == 1 { "a" } else { "b" }
        ));
    }
    csv.push_str("7.25,rare\n");
    d.write("rare.csv", &csv);
    d.write(
        "rare.toml",
        "name = \"rare\"\ntask = \"classification\"\n\n[data]\npath = \"rare.csv\"\ntarget = \"label\"\n\n[split]\nmethod = \"random\"\nseed = 1\ntest = 0.2\nfolds = 3\n\n[[model]]\nkind = \"knn\"\nk = [1, 3]\n",
    );
    for cmd in ["check", "run"] {
        let r = d.probity(&[cmd, "rare.toml"]).expect(2);
        assert!(
            r.stderr().contains("hold no row of class 'rare'"),
            "{cmd}: {}",
            r.stderr()
        );
    }
    assert!(
        !d.path.join(".probity").exists(),
        "a refused run made a ledger"
    );
}

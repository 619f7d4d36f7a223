//! Classification reference checks and end-to-end runs.
//!
//! Fixtures: tests/reference/make_classification.py (scikit-learn 1.9.1, numpy 2.4.6, scipy
//! 1.17.1; the versions are also recorded in classification.expected.json) on the Wisconsin
//! breast cancer and the wine data that scikit-learn ships. Logistic probabilities must match
//! to 1e-6 (the tolerance; scikit-learn's newton-cholesky solver at tol 1e-12), knn
//! vote fractions exactly.

use crate::util::{Dir, reference};
use probity::data::load;
use probity::models::encode::{Encoder, Notes};
use probity::models::{Design, model_for};
use probity::spec::{Family, ModelSpec, ParamValue};
use serde_json::Value;

fn expected() -> Value {
    serde_json::from_str(
        &std::fs::read_to_string(reference("classification.expected.json")).unwrap(),
    )
    .unwrap()
}

/// Fit on part == train and return the validation probabilities (row-major), through the
/// library exactly as the runner does.
fn probabilities(
    file: &str,
    target: &str,
    classes: &[String],
    family: Family,
    params: Vec<(String, ParamValue)>,
) -> Vec<f64> {
    let table = load(&reference(file), &[], 2).unwrap();
    let part = table.column("part").unwrap();
    let rows =
        |w: &str| -> Vec<usize> { (0..table.n_rows()).filter(|&r| part.text(r) == w).collect() };
    let (train, valid) = (rows("train"), rows("validation"));
    let t = table.column(target).unwrap();
    let y: Vec<f64> = train
        .iter()
        .map(|&r| classes.iter().position(|c| *c == t.text(r)).unwrap() as f64)
        .collect();
    let features: Vec<usize> = (0..table.columns.len())
        .filter(|&c| table.columns[c].name != target && table.columns[c].name != "part")
        .collect();
    let spec = ModelSpec {
        family,
        standardize: true,
        grid: Vec::new(),
        loc: Default::default(),
        command: None,
    };
    let model = model_for(&spec, classes.len());
    let enc = Encoder::fit(&table, &features, &train, model.drops_first_level(), false);
    let mut notes = Notes::new();
    let x = Design {
        x: enc.transform(&table, &train, &mut notes).unwrap(),
        names: enc.names(),
    };
    let fitted = model.fit(&x, &y, &params, &mut notes).unwrap();
    assert!(notes.is_empty(), "{notes:?}");
    fitted.predict(&enc.transform(&table, &valid, &mut notes).unwrap())
}

#[test]
fn probabilities_match_scikit_learn() {
    let exp = expected();
    let mut worst = 0.0f64;
    for (file, ds) in exp["datasets"].as_object().unwrap() {
        let target = ds["target"].as_str().unwrap();
        let classes: Vec<String> = ds["classes"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| c.as_str().unwrap().to_string())
            .collect();
        for case in ds["cases"].as_array().unwrap() {
            let (family, params) = match case["model"].as_str().unwrap() {
                "mean" => (Family::Mean, vec![]),
                "logistic" => (
                    Family::Logistic,
                    vec![(
                        "lambda".to_string(),
                        ParamValue::Float(case["lambda"].as_f64().unwrap()),
                    )],
                ),
                "knn" => (
                    Family::Knn,
                    vec![(
                        "k".to_string(),
                        ParamValue::Int(case["k"].as_u64().unwrap()),
                    )],
                ),
                other => panic!("{other}"),
            };
            let got = probabilities(file, target, &classes, family, params);
            let want: Vec<f64> = case["probabilities"]
                .as_array()
                .unwrap()
                .iter()
                .flat_map(|r| r.as_array().unwrap().iter().map(|v| v.as_f64().unwrap()))
                .collect();
            assert_eq!(got.len(), want.len(), "{file} {}", case["id"]);
            for (g, w) in got.iter().zip(&want) {
                let d = (g - w).abs();
                if family == Family::Logistic {
                    worst = worst.max(d);
                    assert!(d <= 1e-6, "{file} {}: {g} vs {w}", case["id"]);
                } else {
                    assert!(
                        d <= 1e-15,
                        "{file} {}: {g} vs {w} (vote fractions and priors are exact)",
                        case["id"]
                    );
                }
            }
        }
    }
    eprintln!(
        "classification: largest logistic probability difference from scikit-learn {worst:.1e}"
    );
}

/// The fixed validation partition's scores through the binary equal the reference metrics.
#[test]
fn validation_metrics_match_the_reference_end_to_end() {
    let exp = expected();
    for (file, ds) in exp["datasets"].as_object().unwrap() {
        let d = Dir::new("class-ref");
        d.copy(&reference(file), file);
        let target = ds["target"].as_str().unwrap();
        d.write(
            "c.toml",
            &format!(
                "name = \"c\"\ntask = \"classification\"\n[data]\npath = \"{file}\"\ntarget = \"{target}\"\n[split]\nmethod = \"column\"\ncolumn = \"part\"\n[[model]]\nkind = \"logistic\"\nlambda = [0.1, 1.0, 10.0]\n[[model]]\nkind = \"knn\"\nk = [1, 5, 15]\n"
            ),
        );
        let j = d.probity(&["run", "c.toml", "--json"]).expect(0).json();
        assert_eq!(j["metric"], "log_loss");
        for case in ds["cases"].as_array().unwrap() {
            let model = case["model"].as_str().unwrap();
            let c = j["candidates"]
                .as_array()
                .unwrap()
                .iter()
                .find(|c| {
                    c["model"] == model
                        && ["lambda", "k"].iter().all(|p| {
                            case.get(*p)
                                .is_none_or(|v| c["params"][*p].as_f64() == v.as_f64())
                        })
                })
                .unwrap_or_else(|| panic!("no candidate for {}", case["id"]));
            for (m, want) in case["metrics"].as_object().unwrap() {
                let got = &c["validation"][m];
                match want.as_f64() {
                    None => assert!(got.is_null(), "{file} {} {m}: {got}", case["id"]),
                    Some(w) => {
                        let g = got.as_f64().unwrap();
                        assert!(
                            (g - w).abs() <= 1e-6 * w.abs().max(1.0),
                            "{file} {} {m}: {g} vs {w}",
                            case["id"]
                        );
                    }
                }
            }
        }
    }
}

fn outbreak_dir(name: &str) -> Dir {
    let d = Dir::new(name);
    let ex = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    d.copy(&ex.join("bays.csv"), "bays.csv");
    d.copy(&ex.join("outbreak.toml"), "outbreak.toml");
    d
}

#[test]
fn the_outbreak_demo_runs_reveals_and_predicts_probabilities() {
    let d = outbreak_dir("outbreak");
    let j = d
        .probity(&["run", "outbreak.toml", "--json"])
        .expect(0)
        .json();
    assert_eq!(j["metric"], "log_loss");
    let c0 = &j["candidates"][0];
    for m in ["accuracy", "balanced_accuracy", "log_loss", "brier", "auc"] {
        assert!(c0["validation"][m].is_number(), "{m}: {c0}");
    }
    // The stratified split keeps the outbreak share in the test partition within one row.
    let r = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert!(r["test"]["auc"].as_f64().unwrap() > 0.5, "{r}");
    assert!(
        r["interval"]["accuracy"][0].as_f64().unwrap() <= r["test"]["accuracy"].as_f64().unwrap()
    );
    // predict writes the class and one probability column per class.
    let text = std::fs::read_to_string(d.path.join("bays.csv")).unwrap();
    let no_target: String = text
        .lines()
        .map(|l| format!("{}\n", l.split(',').take(10).collect::<Vec<_>>().join(",")))
        .collect();
    d.write("new.csv", &no_target);
    // The file holds the sealed test rows: without their targets, predicting them is still a
    // look at the test set (the data file scores the predictions), so it is refused...
    let r = d
        .probity(&["predict", "1", "--input", "new.csv", "--output", "p.csv"])
        .expect(2);
    assert!(
        r.stderr()
            .contains("rows are test rows of sealed partition"),
        "{}",
        r.stderr()
    );
    assert!(!d.path.join("p.csv").exists());
    // ...and with --allow-sealed it is one more consultation of the partition.
    let r = d
        .probity(&[
            "predict",
            "1",
            "--input",
            "new.csv",
            "--output",
            "p.csv",
            "--allow-sealed",
        ])
        .expect(0);
    assert!(
        r.stderr().contains("recorded as reveal 2"),
        "{}",
        r.stderr()
    );
    let out = std::fs::read_to_string(d.path.join("p.csv")).unwrap();
    let mut lines = out.lines();
    assert_eq!(lines.next(), Some("record,prediction,p_no,p_yes"));
    for l in lines.take(50) {
        let f: Vec<&str> = l.split(',').collect();
        let (p0, p1): (f64, f64) = (f[2].parse().unwrap(), f[3].parse().unwrap());
        assert!((p0 + p1 - 1.0).abs() < 1e-12, "{l}");
        assert_eq!(f[1], if p1 > p0 { "yes" } else { "no" }, "{l}");
    }
    d.probity(&["replay", "1"]).expect(0);
}

#[test]
fn class_problems_get_clear_messages() {
    let d = outbreak_dir("class-bad");
    // A positive class that is not a label.
    d.write(
        "p.toml",
        &std::fs::read_to_string(d.path.join("outbreak.toml"))
            .unwrap()
            .replace("positive = \"yes\"", "positive = \"maybe\""),
    );
    let r = d.probity(&["run", "p.toml"]).expect(2);
    assert!(
        r.stderr().contains(
            "positive class 'maybe' is not a value of the target; its classes are no, yes"
        ),
        "{}",
        r.stderr()
    );
    // A class with one row under stratification, and a class only in test rows.
    let mut rows: Vec<String> = std::fs::read_to_string(d.path.join("bays.csv"))
        .unwrap()
        .lines()
        .map(String::from)
        .collect();
    rows[5] = format!("{},rare", rows[5].rsplit_once(',').unwrap().0);
    d.write("bays.csv", &(rows.join("\n") + "\n"));
    let unpinned: String = std::fs::read_to_string(d.path.join("outbreak.toml"))
        .unwrap()
        .lines()
        .filter(|l| !l.starts_with("sha256") && !l.starts_with("positive"))
        .map(|l| format!("{l}\n"))
        .collect();
    d.write("rare.toml", &unpinned);
    let r = d.probity(&["run", "rare.toml"]);
    assert_eq!(r.code(), 2, "{}", r.stderr());
    assert!(r.stderr().contains("'rare'"), "{}", r.stderr());
    assert!(r.stderr().contains("class 'rare' has 1 row(s); a stratified split into 5 folds and a test partition needs at least 6"), "{}", r.stderr());
    // Without stratification the same class fails on the fold that misses it, by name.
    d.write(
        "rand.toml",
        &unpinned.replace("method = \"stratified\"", "method = \"random\""),
    );
    let r = d.probity(&["run", "rand.toml"]).expect(2);
    assert!(
        r.stderr().contains("no row of class 'rare'")
            || r.stderr()
                .contains("class 'rare' appears only in test rows"),
        "{}",
        r.stderr()
    );
}

#[test]
fn stratified_group_split_keeps_bays_whole() {
    let d = outbreak_dir("strat-group");
    d.write(
        "g.toml",
        &std::fs::read_to_string(d.path.join("outbreak.toml"))
            .unwrap()
            .replace(
                "method = \"stratified\"",
                "method = \"stratified\"\ngroup = \"bay\"",
            ),
    );
    let j = d.probity(&["check", "g.toml", "--json"]).expect(0).json();
    let names: Vec<&str> = j["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["name"].as_str().unwrap())
        .collect();
    assert!(
        !names.contains(&"bay"),
        "the group column is not a feature: {names:?}"
    );
    // 24 bays of 104 rows: the test partition holds whole bays.
    assert_eq!(j["partition"]["test"].as_i64().unwrap() % 104, 0, "{j}");
    d.probity(&["run", "g.toml"]).expect(0);
}

/// The reusable holdout (Thresholdout) through the binary on a bounded metric: each answer is
/// either the development estimate (no budget spent) or the noisy test score (budget spent),
/// and the same reveal with the same seed gives the same answer.
#[test]
fn reusable_mode_answers_with_thresholdout() {
    let d = outbreak_dir("reusable-class");
    let spec = std::fs::read_to_string(d.path.join("outbreak.toml"))
        .unwrap()
        .replace("metric = \"log_loss\"", "metric = \"accuracy\"")
        .replace(
            "[[model]]\nkind = \"logistic\"",
            "[guard]\nmode = \"reusable\"\nreveals = 2\n\n[[model]]\nkind = \"logistic\"",
        );
    d.write("r.toml", &spec);
    let j = d.probity(&["run", "r.toml", "--json"]).expect(0).json();
    let sel = j["selected"].as_i64().unwrap();
    let dev = j["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["id"] == sel)
        .unwrap()["validation"]["accuracy"]
        .as_f64()
        .unwrap();
    let a = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert!(
        a["interval"].as_object().unwrap().is_empty(),
        "exact test scores stay hidden"
    );
    match a["answer"]["kind"].as_str().unwrap() {
        "development" => assert_eq!(a["answer"]["value"].as_f64().unwrap(), dev),
        "test+noise" => assert_ne!(a["answer"]["value"].as_f64().unwrap(), dev),
        other => panic!("unexpected answer kind {other}"),
    }
    assert_eq!(a["test"]["accuracy"], a["answer"]["value"]);
    assert!(
        a["optimism"]["hoeffding_union"].is_number() && a["optimism"]["adaptive_scale"].is_number(),
        "bounded metric bounds: {a}"
    );
}

//! Spec parsing and validation tests: positions in messages, suggestions, defaults, ranges and
//! the canonical hash.

use super::*;
use std::path::Path;

const GOOD: &str = r#"
name = "bay-yield"
task = "regression"
description = "weekly yield per bay"

[data]
path = "bays.csv"
target = "yield_kg"
ignore = ["note"]

[split]
method = "random"
seed = 7
test = 0.2

[[model]]
kind = "ridge"
lambda = { from = 0.01, to = 100, steps = 5, scale = "log" }

[[model]]
kind = "knn"
k = [1, 5]
"#;

fn p(text: &str) -> Result<Spec> {
    parse(text, Path::new("exp.toml"), Path::new("/base"))
}

fn err(text: &str) -> String {
    p(text).unwrap_err().to_string()
}

#[test]
fn parses_with_defaults() {
    let s = p(GOOD).unwrap();
    assert_eq!(s.name, "bay-yield");
    assert_eq!(s.data.path, Path::new("/base/bays.csv"));
    assert_eq!(s.data.missing, Missing::Error);
    assert_eq!(s.split.folds, crate::split::Folds::K(5));
    assert_eq!(s.split.repeats, 1);
    assert_eq!(s.split.validation, 0.0);
    assert_eq!(s.select.metric, crate::metrics::Metric::Rmse);
    assert_eq!(s.select.rule, Rule::Min);
    assert!(s.models[0].standardize);
    // Decades come out exact.
    let lambdas: Vec<f64> = s.models[0].grid[0]
        .1
        .iter()
        .map(ParamValue::as_f64)
        .collect();
    assert_eq!(lambdas, vec![0.01, 0.1, 1.0, 10.0, 100.0]);
    assert_eq!(s.models[1].expand().len(), 2);
}

#[test]
fn unknown_key_names_line_column_and_nearest_key() {
    let e = err(&GOOD.replace("kind = \"knn\"\nk = [1, 5]", "kind = \"knn\"\nkk = [1, 5]"));
    assert!(
        e.starts_with("exp.toml:22:1: unknown key 'kk' (did you mean 'k'?)"),
        "{e}"
    );
    let e = err(&GOOD.replace("seed = 7", "sed = 7"));
    assert!(
        e.contains("exp.toml:13:1") && e.contains("did you mean 'seed'?"),
        "{e}"
    );
}

#[test]
fn wrong_type_and_bad_values_are_located() {
    let e = err(&GOOD.replace("test = 0.2", "test = \"fifth\""));
    assert!(e.starts_with("exp.toml:14:8:"), "{e}");
    let e = err(&GOOD.replace("test = 0.2", "test = 1.5"));
    assert!(
        e.starts_with("exp.toml:14:8:") && e.contains("fraction"),
        "{e}"
    );
    let e = err(&GOOD.replace("k = [1, 5]", "k = [0]"));
    assert!(
        e.contains("exp.toml:22:5") && e.contains("k values must be integers >= 1"),
        "{e}"
    );
    let e = err(&GOOD.replace("method = \"random\"", "method = \"randm\""));
    assert!(e.contains("did you mean 'random'?"), "{e}");
    let e = err(&GOOD.replace("name = \"bay-yield\"", "name = \"Bay Yield\""));
    assert!(e.contains("lowercase letters, digits and dashes"), "{e}");
}

#[test]
fn grids_must_be_real() {
    let e = err(&GOOD.replace("k = [1, 5]", "k = []"));
    assert!(e.contains("no values"), "{e}");
    let e = err(&GOOD.replace("k = [1, 5]", "k = [5, 5]"));
    assert!(e.contains("twice"), "{e}");
    let dup = format!("{GOOD}\n[[model]]\nkind = \"knn\"\nk = [1, 5]\n");
    let e = err(&dup);
    assert!(e.contains("repeats the knn entry at line 20"), "{e}");
    let none: String = GOOD.split("[[model]]").next().unwrap().to_string();
    assert!(err(&none).contains("no [[model]] table"));
    let e = err(&GOOD.replace("kind = \"knn\"\nk = [1, 5]", "kind = \"knn\"\nlambda = [1]"));
    assert!(
        e.contains("'lambda' is not a parameter of knn; it takes k"),
        "{e}"
    );
    let e = err(&GOOD.replace("kind = \"knn\"", "kind = \"forest\""));
    assert!(e.contains("unknown model kind 'forest'"), "{e}");
}

#[test]
fn classification_takes_its_own_families_and_metrics() {
    let e = err(&GOOD.replace("task = \"regression\"", "task = \"classification\""));
    assert!(
        e.starts_with("exp.toml:16:1:")
            && e.contains(
                "ridge does not serve a classification task; use one of mean, knn, logistic"
            ),
        "{e}"
    );
    let c = GOOD
        .replace("task = \"regression\"", "task = \"classification\"")
        .replace("kind = \"ridge\"", "kind = \"logistic\"");
    let s = p(&c).unwrap();
    assert_eq!(s.task, Task::Classification);
    assert_eq!(
        s.select.metric,
        crate::metrics::Metric::LogLoss,
        "log_loss is the default for classification"
    );
    let e = err(&c.replace("[split]", "[select]\nmetric = \"rmse\"\n[split]"));
    assert!(
        e.contains("metric 'rmse' is not a classification metric"),
        "{e}"
    );
    let e = err(&GOOD.replace("[split]", "[select]\nmetric = \"accuracy\"\n[split]"));
    assert!(
        e.contains("metric 'accuracy' is not a regression metric"),
        "{e}"
    );
    let e = err(&GOOD.replace(
        "target = \"yield_kg\"",
        "target = \"yield_kg\"\npositive = \"yes\"",
    ));
    assert!(
        e.contains("'positive' names the positive class of a classification task"),
        "{e}"
    );
    let e = err(&GOOD.replace("kind = \"ridge\"", "kind = \"logistic\""));
    assert!(
        e.contains("logistic does not serve a regression task"),
        "{e}"
    );
}

#[test]
fn split_rules() {
    let e = err(&GOOD.replace("seed = 7\n", ""));
    assert!(e.contains("add seed = <integer>"), "{e}");
    let e = err(&GOOD.replace("method = \"random\"", "method = \"group\""));
    assert!(e.contains("needs group = \"<column>\""), "{e}");
    let e = err(&GOOD.replace("test = 0.2", "test = 0.6\nvalidation = 0.4"));
    assert!(e.contains("leaves no training rows"), "{e}");
    let e = err(&GOOD.replace("test = 0.2", "test = 0.2\nrepeats = 3\nvalidation = 0.2"));
    assert!(e.contains("repeats applies to k-fold"), "{e}");
    let s = p(&GOOD.replace("test = 0.2", "test = 0.2\nfolds = \"loo\"")).unwrap();
    assert_eq!(s.split.folds, crate::split::Folds::LeaveOneOut);
    let e = err(&GOOD.replace("test = 0.2", "test = 0.2\nfolds = 1"));
    assert!(e.contains("folds must be an integer of at least 2"), "{e}");
    let e = err(&GOOD.replace(
        "test = 0.2",
        "test = 0.2\nvalidation = 0.2\n[select]\nrule = \"one-se\"",
    ));
    assert!(e.contains("one-se"), "{e}");
}

#[test]
fn canonical_hash_ignores_layout_and_description_only() {
    let a = p(GOOD).unwrap();
    let b = p(&GOOD
        .replace(
            "description = \"weekly yield per bay\"",
            "# a comment\ndescription = \"other words\"",
        )
        .replace("test = 0.2", "test   =   0.2"))
    .unwrap();
    assert_eq!(a.canonical_hash(), b.canonical_hash());
    let c = p(&GOOD.replace("seed = 7", "seed = 8")).unwrap();
    assert_ne!(a.canonical_hash(), c.canonical_hash());
    // Defaults written out equal defaults left implicit.
    let d = p(&GOOD.replace(
        "test = 0.2",
        "test = 0.2\nfolds = 5\nrepeats = 1\nvalidation = 0",
    ))
    .unwrap();
    assert_eq!(a.canonical_hash(), d.canonical_hash());
}

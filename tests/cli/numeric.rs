//! Numerical edge cases through the binary: none may panic, store a NaN or an infinity, or
//! change a score silently. The checks compare against identities that hold exactly in exact
//! arithmetic (common practice, no source): scaling the features and the target by c scales
//! RMSE and MAE by c and leaves R2 and every choice unchanged; a collinear or constant column
//! adds nothing to a least-squares fit's column space; k nearest neighbours with k = all
//! fitting rows predicts their mean.

use crate::util::Dir;
use serde_json::Value;

/// Rows of (key, x1, x2, shade, y) with a known relation and a deterministic wobble; `scale`
/// multiplies x1, x2 and y. `extra` appends columns computed from (i, x1).
/// A column computed from (row number, x1).
type Extra<'a> = (&'a str, fn(usize, f64) -> f64);

fn rows(n: usize, scale: f64, extra: &[Extra]) -> String {
    let mut s = String::from("id,x1,x2,shade");
    for (name, _) in extra {
        s.push_str(&format!(",{name}"));
    }
    s.push_str(",y\n");
    for i in 0..n {
        let x1 = i as f64 * 0.5;
        // The quadratic drift keeps neighbour distances free of ties (the nearest two
        // distances of any row differ by at least 1e-5 relative), which rounding in different,
        // equally exact sums could otherwise break either way.
        let x2 = ((i * 7) % 11) as f64 + (i * i) as f64 * 0.0013;
        let shade = ["low", "mid", "high"][i % 3];
        let wobble = ((i * 13) % 5) as f64 * 0.1;
        let y = 2.0 * x1 - 0.5 * x2 + if shade == "high" { 1.0 } else { 0.0 } + wobble;
        s.push_str(&format!("r{i},{:e},{:e},{shade}", x1 * scale, x2 * scale));
        for (_, f) in extra {
            s.push_str(&format!(",{:e}", f(i, x1)));
        }
        s.push_str(&format!(",{:e}\n", y * scale));
    }
    s
}

fn spec(path: &str, models: &str, folds: usize) -> String {
    format!(
        r#"name = "edge"
task = "regression"

[data]
path = "{path}"
target = "y"
key = "id"

[split]
method = "random"
seed = 11
test = 0.25
folds = {folds}
{models}"#
    )
}

fn candidates(run: &Value) -> Vec<Value> {
    run["candidates"].as_array().unwrap().clone()
}

fn score(c: &Value, part: &str, metric: &str) -> Option<f64> {
    c[part][metric].as_f64()
}

/// Every stored score and standard error is a finite number or absent (never NaN or infinity:
/// JSON cannot carry those, so they would arrive as null where a number belongs).
fn all_finite(run: &Value) {
    for c in candidates(run) {
        assert!(c["failure"].is_null(), "{c}");
        for part in ["train", "validation", "train_se", "validation_se"] {
            for (m, v) in c[part].as_object().unwrap() {
                if let Some(x) = v.as_f64() {
                    assert!(x.is_finite(), "{part} {m} {x} of {c}");
                }
            }
            for m in ["rmse", "mae"] {
                assert!(c[part][m].is_f64(), "{part} {m} absent: {c}");
            }
        }
    }
}

fn close(what: &str, a: f64, b: f64, tol: f64) {
    let d = (a - b).abs() / b.abs().max(1e-300);
    assert!(d <= tol, "{what}: {a} vs {b} (relative {d:e})");
}

const GRID: &str = r#"
[[model]]
kind = "ols"

[[model]]
kind = "ridge"
lambda = [0, 1, 10]

[[model]]
kind = "knn"
k = [1, 3]

[[model]]
kind = "poly"
feature = "x1"
degree = [2, 3]
"#;

#[test]
fn values_near_1e300_score_like_ordinary_values() {
    let d = Dir::new("huge");
    // 2^990, about 1e298: a power of two scales every value exactly, so exact ties between
    // neighbours stay ties and the only differences left are those of the overflow-safe sums.
    let c = 2f64.powi(990);
    d.write("plain.csv", &rows(40, 1.0, &[]));
    d.write("huge.csv", &rows(40, c, &[]));
    d.write("plain.toml", &spec("plain.csv", GRID, 4));
    d.write("huge.toml", &spec("huge.csv", GRID, 4));
    let plain = d
        .probity(&["run", "plain.toml", "--json", "--ledger", "p.sqlite"])
        .expect(0)
        .json();
    let huge = d
        .probity(&["run", "huge.toml", "--json", "--ledger", "h.sqlite"])
        .expect(0)
        .json();
    all_finite(&huge);
    assert_eq!(plain["selected"], huge["selected"], "the same choice");
    for (a, b) in candidates(&plain).iter().zip(&candidates(&huge)) {
        assert_eq!(a["params"], b["params"]);
        let what = format!("{} {}", b["model"], b["params"]);
        for part in ["train", "validation"] {
            for m in ["rmse", "mae"] {
                let (p, h) = (score(a, part, m).unwrap(), score(b, part, m).unwrap());
                close(&format!("{what} {part} {m}"), h / c, p, 1e-9);
            }
            // Squared errors near 1e598 exceed the largest f64: the MSE is absent, not
            // infinite (unless every error is zero, as knn with k = 1 on its own rows).
            let exact = score(a, part, "mse") == Some(0.0) && score(b, part, "mse") == Some(0.0);
            assert!(
                b[part]["mse"].is_null() || exact || (c * c).is_finite(),
                "{what}: {}",
                b[part]
            );
            if let (Some(p), Some(h)) = (score(a, part, "r2"), score(b, part, "r2")) {
                assert!((p - h).abs() <= 1e-9, "{what} {part} r2: {h} vs {p}");
            }
        }
        for m in ["rmse", "mae"] {
            let (p, h) = (
                a["validation_se"][m].as_f64().unwrap(),
                b["validation_se"][m].as_f64().unwrap(),
            );
            close(&format!("{what} se {m}"), h / c, p, 1e-8);
        }
    }
    // The test rows too, and a replay of the huge run keeps every bit.
    let rp = d
        .probity(&["reveal", "1", "--yes", "--json", "--ledger", "p.sqlite"])
        .expect(0)
        .json();
    let rh = d
        .probity(&["reveal", "1", "--yes", "--json", "--ledger", "h.sqlite"])
        .expect(0)
        .json();
    close(
        "test rmse",
        rh["test"]["rmse"].as_f64().unwrap() / c,
        rp["test"]["rmse"].as_f64().unwrap(),
        1e-9,
    );
    let lo = rh["interval"]["rmse"][0].as_f64().unwrap();
    assert!(lo.is_finite() && lo > 0.0, "{}", rh["interval"]);
    d.probity(&["replay", "1", "--ledger", "h.sqlite"])
        .expect(0);
}

#[test]
fn collinear_and_constant_columns_give_the_reduced_fit_with_a_warning() {
    let d = Dir::new("collinear");
    let twice: fn(usize, f64) -> f64 = |_, x1| 2.0 * x1;
    let constant: fn(usize, f64) -> f64 = |_, _| 7.0;
    d.write("reduced.csv", &rows(40, 1.0, &[]));
    d.write(
        "full.csv",
        &rows(40, 1.0, &[("twice", twice), ("still", constant)]),
    );
    let grid = "\n[[model]]\nkind = \"ols\"\n\n[[model]]\nkind = \"ridge\"\nlambda = [0]\n";
    d.write("reduced.toml", &spec("reduced.csv", grid, 4));
    d.write("full.toml", &spec("full.csv", grid, 4));
    let reduced = d
        .probity(&["run", "reduced.toml", "--json", "--ledger", "r.sqlite"])
        .expect(0)
        .json();
    let r = d
        .probity(&["run", "full.toml", "--json", "--ledger", "f.sqlite"])
        .expect(0);
    let err = r.stderr();
    assert!(
        err.contains("ols: the design has rank") && err.contains("minimum-norm"),
        "{err}"
    );
    assert!(err.contains("ridge with lambda = 0"), "{err}");
    let full = r.json();
    all_finite(&full);
    let warnings = full["warnings"].to_string();
    assert!(warnings.contains("minimum-norm"), "{warnings}");
    // Same column space, so the same fitted values: every score agrees to rounding.
    for (a, b) in candidates(&reduced).iter().zip(&candidates(&full)) {
        for part in ["train", "validation"] {
            for m in ["rmse", "mae", "r2"] {
                close(
                    &format!("{} {part} {m}", b["model"]),
                    score(b, part, m).unwrap(),
                    score(a, part, m).unwrap(),
                    1e-9,
                );
            }
        }
    }
}

#[test]
fn one_row_folds_single_feature_and_k_equal_to_the_fitting_rows() {
    let d = Dir::new("tiny");
    // 8 rows, 6 of them for development, 6 folds: each validation fold holds one row and
    // each fold fits on 5; only x1 is a feature.
    let mut csv = String::from("id,x1,y\n");
    for i in 0..8 {
        let x = i as f64 * 0.5;
        csv.push_str(&format!(
            "r{i},{x},{}\n",
            2.0 * x + ((i * 13) % 5) as f64 * 0.1
        ));
    }
    d.write("tiny.csv", &csv);
    let grid = r#"
[[model]]
kind = "ols"

[[model]]
kind = "ridge"
lambda = [0, 1]

[[model]]
kind = "lasso"
lambda = [0.1]

[[model]]
kind = "knn"
k = [1, 5]

[[model]]
kind = "poly"
feature = "x1"
degree = [2]
"#;
    d.write("tiny.toml", &spec("tiny.csv", grid, 6));
    let run = d.probity(&["run", "tiny.toml", "--json"]).expect(0).json();
    all_finite(&run);
    let cands = candidates(&run);
    let by = |model: &str, params: &str| {
        cands
            .iter()
            .find(|c| c["model"] == model && c["params"].to_string().contains(params))
            .unwrap_or_else(|| panic!("no {model} {params}"))
            .clone()
    };
    for c in &cands {
        // R2 is undefined on one row: absent, never NaN.
        assert!(c["validation"]["r2"].is_null(), "{c}");
    }
    // k = 5 = every fitting row: the mean of the fitting rows, as the mean baseline predicts.
    let (knn, mean) = (by("knn", "5"), by("mean", ""));
    for m in ["rmse", "mae"] {
        close(
            &format!("knn k=5 {m}"),
            score(&knn, "validation", m).unwrap(),
            score(&mean, "validation", m).unwrap(),
            1e-12,
        );
    }
    // lambda = 0 is least squares.
    close(
        "ridge lambda=0",
        score(&by("ridge", "0.0"), "validation", "rmse").unwrap(),
        score(&by("ols", ""), "validation", "rmse").unwrap(),
        1e-9,
    );
    d.probity(&["replay", "1"]).expect(0);
}

//! Reference checks against published values.
//!
//! - NIST StRD "Longley" certified values (J. W. Longley 1967, JASA 62(319); certified values
//!   of the NIST Statistical Reference Datasets, linear least squares, higher difficulty),
//!   from tests/reference/longley.expected.json.
//! - The diabetes data of Efron, Hastie, Johnstone & Tibshirani (2004, Ann. Statist. 32(2)),
//!   with expected values computed in exact rational or 50-digit arithmetic and cross-checked
//!   with scikit-learn 1.9.1 (numpy 2.4.6, scipy 1.17.1), from
//!   tests/reference/diabetes.expected.json; tests/reference/README.md gives the conventions
//!   and make_reference.py regenerates the files.

use crate::util::reference;
use probity::data::{Table, load};
use probity::models::encode::{Encoder, Notes};
use probity::models::{Design, Fitted, model_for};
use probity::spec::{Family, ModelSpec, ParamValue};
use serde_json::Value;

thread_local! {
    /// Largest relative error seen per case, printed for the record (`--nocapture`).
    static WORST: std::cell::RefCell<std::collections::BTreeMap<String, f64>> = Default::default();
}

fn json(name: &str) -> Value {
    serde_json::from_str(&std::fs::read_to_string(reference(name)).unwrap()).unwrap()
}

fn rel(a: f64, b: f64) -> f64 {
    if b == 0.0 {
        a.abs()
    } else {
        ((a - b) / b).abs()
    }
}

fn assert_rel(what: &str, got: f64, want: f64, tol: f64) {
    WORST.with(|w| {
        let mut w = w.borrow_mut();
        let key = what.split(' ').next().unwrap_or("").to_string();
        let e = w.entry(key).or_insert(0.0);
        *e = e.max(rel(got, want));
    });
    assert!(
        rel(got, want) <= tol,
        "{what}: got {got:e}, want {want:e} (relative error {:e} > {tol:e})",
        rel(got, want)
    );
}

/// Log relative error, NIST's measure of agreement in significant digits.
fn lre(est: f64, cert: f64) -> f64 {
    let r = rel(est, cert);
    if r == 0.0 { 16.0 } else { -r.log10() }
}

fn fit(
    table: &Table,
    features: &[usize],
    rows: &[usize],
    y: &[f64],
    family: Family,
    params: Vec<(String, ParamValue)>,
) -> (Fitted, Encoder) {
    let spec = ModelSpec {
        family,
        standardize: true,
        grid: Vec::new(),
        loc: Default::default(),
        command: None,
    };
    let model = model_for(&spec, 0);
    let enc = Encoder::fit(table, features, rows, model.drops_first_level(), false);
    let mut notes = Notes::new();
    let x = Design {
        x: enc.transform(table, rows, &mut notes).unwrap(),
        names: enc.names(),
    };
    (model.fit(&x, y, &params, &mut notes).unwrap(), enc)
}

fn column(table: &Table, name: &str) -> Vec<f64> {
    match &table.column(name).unwrap().values {
        probity::data::Values::Numeric(v) => v.clone(),
        _ => panic!("{name} is not numeric"),
    }
}

#[test]
fn longley_ols_matches_nist_certified_values() {
    let table = load(&reference("longley.csv"), &[], 2).unwrap();
    let exp = json("longley.expected.json");
    let cert = &exp["certified"];
    let y = column(&table, "y");
    let rows: Vec<usize> = (0..table.n_rows()).collect();
    let features: Vec<usize> = (1..=6).collect();
    let (f, enc) = fit(&table, &features, &rows, &y, Family::Ols, vec![]);
    let Fitted::Linear {
        intercept, weights, ..
    } = &f
    else {
        panic!("ols gives a linear model")
    };
    let mut worst = lre(*intercept, cert["intercept"].as_f64().unwrap());
    for (j, name) in ["x1", "x2", "x3", "x4", "x5", "x6"].iter().enumerate() {
        worst = worst.min(lre(
            weights[j],
            cert["coefficients"][name].as_f64().unwrap(),
        ));
    }
    // The issue asks for 7 significant digits; QR + Jacobi SVD on scaled columns gives more.
    eprintln!("longley: smallest log relative error over the 7 coefficients = {worst:.2}");
    assert!(
        worst >= 9.0,
        "smallest log relative error over the 7 coefficients is {worst:.2}"
    );
    let mut notes = Notes::new();
    let pred = f.predict(&enc.transform(&table, &rows, &mut notes).unwrap());
    let ssr: f64 = y.iter().zip(&pred).map(|(a, b)| (a - b) * (a - b)).sum();
    let mean = y.iter().sum::<f64>() / 16.0;
    let sst: f64 = y.iter().map(|v| (v - mean) * (v - mean)).sum();
    let resid_sd = (ssr / 9.0).sqrt();
    let r2 = 1.0 - ssr / sst;
    assert!(
        lre(resid_sd, cert["residual_sd"].as_f64().unwrap()) >= 9.0,
        "residual sd {resid_sd}"
    );
    assert!(
        lre(r2, cert["r_squared"].as_f64().unwrap()) >= 12.0,
        "r2 {r2}"
    );
}

fn diabetes() -> (Table, Value) {
    (
        load(&reference("diabetes.csv"), &[], 2).unwrap(),
        json("diabetes.expected.json"),
    )
}

/// Rows whose `part` column equals `which`, in file order.
fn rows_of(table: &Table, which: &str) -> Vec<usize> {
    let part = table.column("part").unwrap();
    (0..table.n_rows())
        .filter(|&r| part.text(r) == which)
        .collect()
}

/// Every diabetes case: fit on part == train, score part == validation.
#[test]
fn diabetes_cases_match_reference_values() {
    let (table, exp) = diabetes();
    let train = rows_of(&table, "train");
    let valid = rows_of(&table, "validation");
    assert_eq!(train.len() as u64, exp["n_fit"].as_u64().unwrap());
    assert_eq!(valid.len() as u64, exp["n_scored"].as_u64().unwrap());
    let yall = column(&table, "y");
    let y: Vec<f64> = train.iter().map(|&r| yall[r]).collect();
    let yv: Vec<f64> = valid.iter().map(|&r| yall[r]).collect();
    let names: Vec<String> = exp["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect();
    let features: Vec<usize> = names.iter().map(|n| table.index_of(n).unwrap()).collect();
    let mut checked = 0;
    for case in exp["cases"].as_array().unwrap() {
        let id = case["id"].as_str().unwrap();
        let (family, params) = match case["model"].as_str().unwrap() {
            "mean" => (Family::Mean, vec![]),
            "ols" => (Family::Ols, vec![]),
            "ridge" => (
                Family::Ridge,
                vec![(
                    "lambda".into(),
                    ParamValue::Float(case["lambda"].as_f64().unwrap()),
                )],
            ),
            "lasso" => (
                Family::Lasso,
                vec![(
                    "lambda".into(),
                    ParamValue::Float(case["lambda"].as_f64().unwrap()),
                )],
            ),
            "knn" => (
                Family::Knn,
                vec![("k".into(), ParamValue::Int(case["k"].as_u64().unwrap()))],
            ),
            "poly" => (
                Family::Poly,
                vec![
                    (
                        "degree".into(),
                        ParamValue::Int(case["degree"].as_u64().unwrap()),
                    ),
                    (
                        "feature".into(),
                        ParamValue::Text(case["feature"].as_str().unwrap().into()),
                    ),
                ],
            ),
            other => panic!("unknown case model {other}"),
        };
        // The tolerances: 1e-8 relative, lasso 1e-6.
        let tol = if family == Family::Lasso { 1e-6 } else { 1e-8 };
        let (f, enc) = fit(&table, &features, &train, &y, family, params);
        let mut notes = Notes::new();
        let pred = f.predict(&enc.transform(&table, &valid, &mut notes).unwrap());
        check_predictions(id, &pred, case, tol);
        for (m, metric) in [
            ("rmse", probity::metrics::Metric::Rmse),
            ("mae", probity::metrics::Metric::Mae),
            ("r2", probity::metrics::Metric::R2),
        ] {
            let got = metric.score(&yv, &pred, 0).unwrap();
            assert_rel(
                &format!("{id} {m}"),
                got,
                case["metrics"][m].as_f64().unwrap(),
                tol,
            );
        }
        // Coefficients in original units (linear families), degree-6 raw-power coefficients
        // included: they are ill-determined on the raw powers (condition number ~2e12, reference
        // README), but powers of the centred and scaled feature keep 1e-8 within reach.
        if let Some(b) = case["intercept"].as_f64() {
            let (intercept, coefs) = original_coefficients(&f, &names, case);
            let ctol = tol;
            assert_rel(&format!("{id} intercept"), intercept, b, ctol);
            for (name, want) in case["coefficients"].as_object().unwrap() {
                let got = coefs
                    .iter()
                    .find(|(n, _)| n == name)
                    .map(|(_, v)| *v)
                    .unwrap_or_else(|| panic!("{id}: no coefficient {name}"));
                let want = want.as_f64().unwrap();
                // An exact zero (lasso) must come out as zero.
                if want == 0.0 {
                    assert_eq!(got, 0.0, "{id} {name} must be exactly zero");
                } else {
                    assert_rel(&format!("{id} coefficient {name}"), got, want, ctol);
                }
            }
        }
        checked += 1;
    }
    assert_eq!(checked, 16, "every reference case ran");
    WORST.with(|w| {
        for (case, e) in w.borrow().iter() {
            eprintln!("diabetes {case}: largest relative error {e:.1e}");
        }
    });
}

/// (intercept, [(name, coefficient)]) in original units; poly terms named `bmi^2` and so on.
fn original_coefficients(f: &Fitted, names: &[String], case: &Value) -> (f64, Vec<(String, f64)>) {
    match f {
        Fitted::Mean { value } => (*value, vec![]),
        Fitted::Linear {
            intercept,
            weights,
            poly: None,
        } => (
            *intercept,
            names.iter().cloned().zip(weights.iter().copied()).collect(),
        ),
        Fitted::Linear {
            weights,
            poly: Some(t),
            ..
        } => {
            let (b, powers) = probity::models::poly::original_coefficients(f).unwrap();
            let feature = case["feature"].as_str().unwrap();
            let mut out = Vec::new();
            for (j, n) in names.iter().enumerate() {
                if j == t.column {
                    for (d, c) in powers.iter().enumerate() {
                        out.push((
                            if d == 0 {
                                feature.to_string()
                            } else {
                                format!("{feature}^{}", d + 1)
                            },
                            *c,
                        ));
                    }
                } else {
                    let idx = if j < t.column { j } else { j + t.degree - 1 };
                    out.push((n.clone(), weights[idx]));
                }
            }
            (b, out)
        }
        _ => (f64::NAN, vec![]),
    }
}

#[test]
fn standardisation_uses_fitting_rows_population_sd() {
    let (table, exp) = diabetes();
    let train = rows_of(&table, "train");
    let names: Vec<String> = exp["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect();
    let cols: Vec<Vec<f64>> = names
        .iter()
        .map(|n| {
            let c = column(&table, n);
            train.iter().map(|&r| c[r]).collect()
        })
        .collect();
    let x = probity::models::linalg::Matrix::from_cols(train.len(), &cols);
    let (mean, sd) = probity::models::linalg::mean_sd(&x);
    let s = &exp["standardization_on_fit_rows"];
    for (j, n) in names.iter().enumerate() {
        assert_rel(
            &format!("mean {n}"),
            mean[j],
            s["mean"][n].as_f64().unwrap(),
            1e-14,
        );
        assert_rel(
            &format!("sd {n}"),
            sd[j],
            s["population_sd"][n].as_f64().unwrap(),
            1e-13,
        );
    }
}

/// The sufficient-statistics path for ridge (`models::gram`, used by the runner for standardised
/// ridge grids) against the same reference values as the SVD path, on every ridge case: the
/// diabetes data set, reference values from scikit-learn 1.9.1 as above, tolerance 1e-8. Its
/// error sums must also give exactly the scores `Metric::score` gives on its predictions.
#[test]
fn diabetes_ridge_by_sufficient_statistics_matches_reference_values() {
    use probity::data::Values;
    use probity::metrics::{Metric, Truth};
    use probity::models::gram::{Gram, Source, error_sums};
    let (table, exp) = diabetes();
    let train = rows_of(&table, "train");
    let valid = rows_of(&table, "validation");
    let yall = column(&table, "y");
    let yv: Vec<f64> = valid.iter().map(|&r| yall[r]).collect();
    let names: Vec<String> = exp["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect();
    let columns: Vec<&[f64]> = names
        .iter()
        .map(|n| match &table.column(n).unwrap().values {
            Values::Numeric(v) => v.as_slice(),
            Values::Text { .. } => panic!("{n} is not numeric"),
        })
        .collect();
    let identity: Vec<usize> = (0..table.n_rows()).collect();
    let src = Source {
        columns: &columns,
        target: &yall,
        table_row: &identity,
    };
    let gram = Gram::of(&src, &train);
    let mut checked = 0;
    for case in exp["cases"].as_array().unwrap() {
        if case["model"].as_str() != Some("ridge") {
            continue;
        }
        let id = case["id"].as_str().unwrap();
        let lambda = case["lambda"].as_f64().unwrap();
        let fits = gram.solve(&[lambda]).expect("well conditioned");
        let (intercept, weights) = fits[0].clone();
        let fitted = Fitted::Linear {
            intercept,
            weights,
            poly: None,
        };
        let mut notes = Notes::new();
        let enc = Encoder::fit(&table, &features_of(&table, &names), &train, true, false);
        let pred = fitted.predict(&enc.transform(&table, &valid, &mut notes).unwrap());
        check_predictions(&format!("gram {id}"), &pred, case, 1e-8);
        let (b, coefs) = original_coefficients(&fitted, &names, case);
        assert_rel(
            &format!("gram {id} intercept"),
            b,
            case["intercept"].as_f64().unwrap(),
            1e-8,
        );
        for (name, want) in case["coefficients"].as_object().unwrap() {
            let got = coefs
                .iter()
                .find(|(n, _)| n == name)
                .map(|(_, v)| *v)
                .unwrap();
            assert_rel(
                &format!("gram {id} coefficient {name}"),
                got,
                want.as_f64().unwrap(),
                1e-8,
            );
        }
        let (sse, sae) = error_sums(&src, &valid, &fits)[0];
        let truth = Truth::of(&yv);
        for (m, metric) in [
            ("rmse", Metric::Rmse),
            ("mae", Metric::Mae),
            ("r2", Metric::R2),
        ] {
            let direct = metric.score(&yv, &pred, 0).unwrap();
            let summed = truth.score(metric, sse, sae).unwrap();
            assert_eq!(
                summed.to_bits(),
                direct.to_bits(),
                "gram {id} {m}: sums {summed} vs scores {direct}"
            );
            assert_rel(
                &format!("gram {id} {m}"),
                summed,
                case["metrics"][m].as_f64().unwrap(),
                1e-8,
            );
        }
        checked += 1;
    }
    assert!(
        checked >= 2,
        "the reference file holds ridge cases ({checked})"
    );
}

fn features_of(table: &Table, names: &[String]) -> Vec<usize> {
    names.iter().map(|n| table.index_of(n).unwrap()).collect()
}

/// The first ten validation predictions of a reference case.
fn check_predictions(id: &str, pred: &[f64], case: &Value, tol: f64) {
    for (i, want) in case["first_10_predictions"]
        .as_array()
        .unwrap()
        .iter()
        .enumerate()
    {
        assert_rel(
            &format!("{id} prediction {i}"),
            pred[i],
            want.as_f64().unwrap(),
            tol,
        );
    }
}

//! Model tests on small hand-made data: exact answers where one exists, and the contracts
//! (grid fits equal one-at-a-time fits, ties, rank deficiency).

use super::encode::Encoder;
use super::*;
use crate::spec::{Family, ModelSpec, ParamValue};

fn design(cols: &[Vec<f64>]) -> Design {
    let n = cols[0].len();
    Design {
        x: Matrix::from_cols(n, cols),
        names: (0..cols.len()).map(|i| format!("x{i}")).collect(),
    }
}

fn spec(family: Family) -> ModelSpec {
    ModelSpec {
        family,
        standardize: true,
        grid: Vec::new(),
        loc: Default::default(),
        command: None,
    }
}

fn p(name: &str, v: ParamValue) -> Params {
    vec![(name.to_string(), v)]
}

#[test]
fn ols_recovers_an_exact_plane() {
    let x1 = vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0];
    let x2 = vec![2.0, -1.0, 0.5, 3.0, 1.0, 0.0];
    let y: Vec<f64> = x1
        .iter()
        .zip(&x2)
        .map(|(a, b)| 3.0 + 2.0 * a - 1.5 * b)
        .collect();
    let f = model_for(&spec(Family::Ols), 0)
        .fit(&design(&[x1, x2]), &y, &vec![], &mut Notes::new())
        .unwrap();
    let Fitted::Linear {
        intercept, weights, ..
    } = f
    else {
        panic!()
    };
    assert!(
        (intercept - 3.0).abs() < 1e-12
            && (weights[0] - 2.0).abs() < 1e-13
            && (weights[1] + 1.5).abs() < 1e-13
    );
}

#[test]
fn collinear_columns_give_minimum_norm_and_a_warning() {
    let x1 = vec![1.0, 2.0, 3.0, 4.0];
    let y = vec![2.0, 4.0, 6.0, 8.0];
    let mut notes = Notes::new();
    let f = model_for(&spec(Family::Ols), 0)
        .fit(
            &design(&[x1.clone(), x1.clone(), vec![7.0; 4]]),
            &y,
            &vec![],
            &mut notes,
        )
        .unwrap();
    let Fitted::Linear { weights, .. } = f else {
        panic!()
    };
    // Two equal columns share the slope 2; the constant column gets nothing.
    assert!(
        (weights[0] - 1.0).abs() < 1e-12
            && (weights[1] - 1.0).abs() < 1e-12
            && weights[2].abs() < 1e-12,
        "{weights:?}"
    );
    assert!(
        notes.keys().any(|k| k.contains("rank 1 for 3 columns")),
        "{notes:?}"
    );
}

#[test]
fn grid_fits_equal_single_fits() {
    let x1: Vec<f64> = (0..30).map(|i| (i as f64 * 0.37).sin() * 3.0).collect();
    let x2: Vec<f64> = (0..30).map(|i| ((i * 7 % 13) as f64) - 6.0).collect();
    let y: Vec<f64> = (0..30)
        .map(|i| x1[i] * 1.5 - x2[i] * 0.3 + ((i * 5 % 7) as f64) * 0.2)
        .collect();
    let d = design(&[x1, x2]);
    for (family, name, values) in [
        (
            Family::Ridge,
            "lambda",
            vec![
                ParamValue::Float(0.0),
                ParamValue::Float(3.0),
                ParamValue::Float(30.0),
            ],
        ),
        (
            Family::Lasso,
            "lambda",
            vec![
                ParamValue::Float(0.5),
                ParamValue::Float(0.01),
                ParamValue::Float(0.1),
            ],
        ),
        (
            Family::Knn,
            "k",
            vec![ParamValue::Int(1), ParamValue::Int(4), ParamValue::Int(9)],
        ),
    ] {
        let m = model_for(&spec(family), 0);
        let grid: Vec<Params> = values.iter().map(|v| p(name, v.clone())).collect();
        let all = m
            .fit_predict_grid(&d, &y, &grid, &[&d.x], &mut Notes::new())
            .unwrap();
        for (g, params) in grid.iter().enumerate() {
            let single = m
                .fit(&d, &y, params, &mut Notes::new())
                .unwrap()
                .predict(&d.x);
            for (a, b) in all[g][0].iter().zip(&single) {
                // Lasso's path uses warm starts; both converge to the same optimum.
                assert!(
                    (a - b).abs() <= 1e-9 * (1.0 + b.abs()),
                    "{family:?} {params:?}: {a} vs {b}"
                );
            }
        }
    }
}

#[test]
fn knn_ties_go_to_the_lower_row() {
    // Query at 0: rows 1 and 2 are both at distance 1; k = 2 takes rows 0 and 1.
    let x = vec![0.0, 1.0, -1.0, 5.0];
    let y = vec![10.0, 20.0, 30.0, 40.0];
    let m = knn::Knn {
        standardize: false,
        classes: 0,
    };
    let f = m
        .fit(
            &design(&[x]),
            &y,
            &p("k", ParamValue::Int(2)),
            &mut Notes::new(),
        )
        .unwrap();
    let q = Matrix::from_cols(1, &[vec![0.0]]);
    assert_eq!(f.predict(&q), vec![15.0]);
    let e = m
        .fit(
            &design(&[vec![1.0, 2.0]]),
            &[1.0, 2.0],
            &p("k", ParamValue::Int(3)),
            &mut Notes::new(),
        )
        .unwrap_err();
    assert!(
        e.to_string()
            .contains("k = 3 is larger than the 2 fitting rows")
    );
}

#[test]
fn lasso_zeroes_everything_above_lambda_max() {
    // lambda_max = max |Z^T y| / n on standardized Z; above it every coefficient is zero.
    let x1: Vec<f64> = (0..20).map(|i| i as f64).collect();
    let y: Vec<f64> = x1.iter().map(|v| 0.5 * v + 1.0).collect();
    let f = model_for(&spec(Family::Lasso), 0)
        .fit(
            &design(&[x1]),
            &y,
            &p("lambda", ParamValue::Float(1e6)),
            &mut Notes::new(),
        )
        .unwrap();
    let Fitted::Linear {
        weights, intercept, ..
    } = f
    else {
        panic!()
    };
    assert_eq!(weights, vec![0.0]);
    assert!((intercept - 5.75).abs() < 1e-12);
}

#[test]
fn poly_predictions_do_not_depend_on_scaling_and_coefficients_expand_back() {
    let x: Vec<f64> = (0..25).map(|i| 100.0 + i as f64 * 0.8).collect();
    let y: Vec<f64> = x.iter().map(|v| 2.0 - 0.5 * v + 0.01 * v * v).collect();
    let f = model_for(&spec(Family::Poly), 0)
        .fit(
            &design(std::slice::from_ref(&x)),
            &y,
            &vec![
                ("degree".into(), ParamValue::Int(2)),
                ("feature".into(), ParamValue::Text("x0".into())),
            ],
            &mut Notes::new(),
        )
        .unwrap();
    let pred = f.predict(&Matrix::from_cols(25, &[x]));
    for (a, b) in pred.iter().zip(&y) {
        assert!((a - b).abs() < 1e-9, "{a} vs {b}");
    }
    let (b0, c) = poly::original_coefficients(&f).unwrap();
    assert!(
        (b0 - 2.0).abs() < 1e-6 && (c[0] + 0.5).abs() < 1e-8 && (c[1] - 0.01).abs() < 1e-10,
        "{b0} {c:?}"
    );
}

#[test]
fn huge_values_do_not_overflow() {
    let x: Vec<f64> = (0..10).map(|i| 1e300 * (1.0 + i as f64 / 10.0)).collect();
    let y: Vec<f64> = (0..10).map(|i| 1e299 * (i as f64)).collect();
    for family in [
        Family::Ols,
        Family::Ridge,
        Family::Lasso,
        Family::Knn,
        Family::Mean,
    ] {
        let params = match family {
            Family::Ridge => p("lambda", ParamValue::Float(1.0)),
            Family::Lasso => p("lambda", ParamValue::Float(1e290)),
            Family::Knn => p("k", ParamValue::Int(3)),
            _ => vec![],
        };
        let f = model_for(&spec(family), 0)
            .fit(
                &design(std::slice::from_ref(&x)),
                &y,
                &params,
                &mut Notes::new(),
            )
            .unwrap();
        let pred = f.predict(&Matrix::from_cols(10, std::slice::from_ref(&x)));
        assert!(pred.iter().all(|v| v.is_finite()), "{family:?}: {pred:?}");
        if family == Family::Ols {
            // y = x - 1e300 exactly: least squares must find it, not treat x as constant
            // (its squared deviations overflow unless scaled first).
            for (p, t) in pred.iter().zip(&y) {
                assert!((p - t).abs() <= 1e-9 * 1e300, "{p} vs {t}");
            }
        }
    }
}

#[test]
fn encoder_learns_only_from_its_fitting_rows() {
    use crate::data::parse;
    let t = parse(
        b"shade,x\nlow,1\nmid,3\nhigh,\nviolet,1000\n",
        std::path::Path::new("t.csv"),
        String::new(),
        &[],
    )
    .unwrap();
    // Fit on rows 0..3: 'violet' and 1000 are outside the fitting rows and must not be seen.
    let enc = Encoder::fit(&t, &[0, 1], &[0, 1, 2], false, true);
    assert_eq!(enc.names(), ["shade=high", "shade=low", "shade=mid", "x"]);
    let mut notes = Notes::new();
    let m = enc.transform(&t, &[2, 3], &mut notes).unwrap();
    // Row 2's missing x takes the fitting rows' mean (1 + 3) / 2, not a mean that includes 1000.
    assert_eq!(m.get(0, 3), 2.0);
    // 'violet' was never seen: an all-zero row and one note.
    assert_eq!(
        (0..3).map(|j| m.get(1, j)).collect::<Vec<_>>(),
        [0.0, 0.0, 0.0]
    );
    assert_eq!(notes.len(), 1);
    // Linear models drop the first level, which then encodes as zeros without a note.
    let lin = Encoder::fit(&t, &[0], &[0, 1, 2], true, true);
    assert_eq!(lin.names(), ["shade=low", "shade=mid"]);
    let mut notes = Notes::new();
    let m = lin.transform(&t, &[2], &mut notes).unwrap();
    assert_eq!((m.get(0, 0), m.get(0, 1)), (0.0, 0.0));
    assert!(notes.is_empty());
}

#[test]
fn logistic_warm_started_path_equals_single_fits() {
    // Two overlapping classes on two features.
    let x1: Vec<f64> = (0..80).map(|i| ((i * 37 % 101) as f64) / 10.0).collect();
    let x2: Vec<f64> = (0..80).map(|i| ((i * 53 % 89) as f64) / 9.0).collect();
    let y: Vec<f64> = (0..80)
        .map(|i| f64::from(x1[i] + 0.5 * x2[i] + ((i * 7 % 11) as f64) > 12.0))
        .collect();
    let d = design(&[x1, x2]);
    let m = model_for(&spec(Family::Logistic), 2);
    let grid: Vec<Params> = [0.01, 10.0, 1.0]
        .iter()
        .map(|l| p("lambda", ParamValue::Float(*l)))
        .collect();
    let all = m
        .fit_predict_grid(&d, &y, &grid, &[&d.x], &mut Notes::new())
        .unwrap();
    for (g, params) in grid.iter().enumerate() {
        let single = m
            .fit(&d, &y, params, &mut Notes::new())
            .unwrap()
            .predict(&d.x);
        for (a, b) in all[g][0].iter().zip(&single) {
            assert!((a - b).abs() < 1e-9, "{params:?}: {a} vs {b}");
        }
    }
}

//! `poly`: one feature replaced by its powers x, x^2 .. x^d, the other features linear, then
//! ordinary least squares. The feature is centred and scaled on the fitting rows before the
//! powers are taken, for conditioning; predictions do not depend on that choice.

use super::encode::Notes;
use super::linalg::{Matrix, mean_sd};
use super::{Design, Fitted, Model, Params, PolyTerm, ols::least_squares, param};
use crate::error::{Error, Result};

pub struct Poly;

/// The design with column `t.column` replaced, in place, by z, z^2 .. z^degree.
pub fn expand(x: &Matrix, t: &PolyTerm) -> Matrix {
    let mut cols: Vec<Vec<f64>> = Vec::with_capacity(x.cols + t.degree - 1);
    for j in 0..x.cols {
        if j == t.column {
            let z: Vec<f64> = x.col(j).iter().map(|v| (v - t.center) / t.scale).collect();
            let mut pow = z.clone();
            cols.push(z.clone());
            for _ in 2..=t.degree {
                pow = pow.iter().zip(&z).map(|(a, b)| a * b).collect();
                cols.push(pow.clone());
            }
        } else {
            cols.push(x.col(j).to_vec());
        }
    }
    Matrix::from_cols(x.rows, &cols)
}

impl Model for Poly {
    fn fit(&self, x: &Design, y: &[f64], params: &Params, notes: &mut Notes) -> Result<Fitted> {
        let feature = param(params, "feature")
            .map(|v| v.as_text().to_string())
            .unwrap_or_default();
        let degree = param(params, "degree").map_or(1, |v| v.as_usize());
        let column = x.names.iter().position(|n| *n == feature).ok_or_else(|| {
            Error::Input(format!(
                "poly: feature '{feature}' is not a numeric feature of this experiment"
            ))
        })?;
        let single = Matrix::from_cols(x.x.rows, &[x.x.col(column).to_vec()]);
        let (m, s) = mean_sd(&single);
        let term = PolyTerm {
            column,
            center: m[0],
            scale: s[0],
            degree,
        };
        let expanded = expand(&x.x, &term);
        let (intercept, weights) = least_squares(&expanded, y, "poly", notes);
        Ok(Fitted::Linear {
            intercept,
            weights,
            poly: Some(term),
        })
    }
    fn drops_first_level(&self) -> bool {
        true
    }
    fn complexity(&self, params: &Params) -> f64 {
        param(params, "degree").map_or(0.0, |v| v.as_f64())
    }
}

/// The polynomial's coefficients on x^1 .. x^d in original units, and the intercept, for a
/// fitted poly model (other features' weights are unchanged). Expands
/// sum_d a_d ((x - m)/s)^d with the binomial theorem.
pub fn original_coefficients(f: &Fitted) -> Option<(f64, Vec<f64>)> {
    let Fitted::Linear {
        intercept,
        weights,
        poly: Some(t),
    } = f
    else {
        return None;
    };
    let a = &weights[t.column..t.column + t.degree];
    let mut coef = vec![0.0; t.degree + 1];
    for d in 1..=t.degree {
        let ad = a[d - 1] / t.scale.powi(d as i32);
        let mut binom = 1.0;
        for (i, c) in coef.iter_mut().enumerate().take(d + 1) {
            *c += ad * binom * (-t.center).powi((d - i) as i32);
            binom = binom * (d - i) as f64 / (i + 1) as f64;
        }
    }
    Some((intercept + coef[0], coef[1..].to_vec()))
}

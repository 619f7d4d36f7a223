//! `ols`: ordinary least squares with an unpenalised intercept, solved by QR and SVD (never the
//! normal equations); a rank-deficient design gets the minimum-norm solution and a warning.

use super::encode::{Notes, note};
use super::linalg::{Matrix, svd_solve_owned};
use super::{Design, Fitted, Model, Params, center_scale, center_target, unscale};
use crate::error::Result;

pub struct Ols;

/// Least squares on `x` with an intercept: (intercept, weights). `label` names the family in
/// the rank warning.
pub fn least_squares(x: &Matrix, y: &[f64], label: &str, notes: &mut Notes) -> (f64, Vec<f64>) {
    let (ymean, yscale, yc) = center_target(y);
    // Scaling columns to unit sd improves the conditioning; the solution is the same when the
    // design has full rank.
    let (xmean, xsd, z) = center_scale(x, true);
    let svd = svd_solve_owned(z, &yc);
    let rank = svd.rank();
    if rank < x.cols {
        note(
            notes,
            format!(
                "{label}: the design has rank {rank} for {} columns (collinear or constant features); used the minimum-norm least-squares solution",
                x.cols
            ),
        );
        // Minimum norm in the original units, as the users' coefficients are read.
        let (xmean, ones, zc) = center_scale(x, false);
        let svd = svd_solve_owned(zc, &yc);
        return unscale(&svd.solve(0.0), ymean, yscale, &xmean, &ones);
    }
    unscale(&svd.solve(0.0), ymean, yscale, &xmean, &xsd)
}

impl Model for Ols {
    fn fit(&self, x: &Design, y: &[f64], _params: &Params, notes: &mut Notes) -> Result<Fitted> {
        let (intercept, weights) = least_squares(&x.x, y, "ols", notes);
        Ok(Fitted::Linear {
            intercept,
            weights,
            poly: None,
        })
    }
    fn drops_first_level(&self) -> bool {
        true
    }
    fn complexity(&self, _params: &Params) -> f64 {
        0.0
    }
}

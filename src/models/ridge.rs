//! `ridge`: minimise sum (y - b - Zv)^2 + lambda ||v||^2 on standardised features Z, intercept
//! unpenalised. One SVD per fold serves every lambda of the grid.

use super::encode::{Notes, note};
use super::linalg::{Matrix, svd_solve_owned};
use super::{Design, Fitted, Model, Params, center_scale, center_target, param, unscale};
use crate::error::Result;

pub struct Ridge {
    pub standardize: bool,
}

impl Ridge {
    fn fit_all(&self, x: &Matrix, y: &[f64], lambdas: &[f64], notes: &mut Notes) -> Vec<Fitted> {
        let (ymean, yscale, yc) = center_target(y);
        let (xmean, xscale, z) = center_scale(x, self.standardize);
        let svd = svd_solve_owned(z, &yc);
        lambdas
            .iter()
            .map(|&l| {
                if l == 0.0 && svd.rank() < x.cols {
                    note(notes, format!("ridge with lambda = 0: the design has rank {} for {} columns; used the minimum-norm solution", svd.rank(), x.cols));
                }
                let (intercept, weights) = unscale(&svd.solve(l), ymean, yscale, &xmean, &xscale);
                Fitted::Linear { intercept, weights, poly: None }
            })
            .collect()
    }
}

fn lambda(p: &Params) -> f64 {
    param(p, "lambda").map_or(0.0, |v| v.as_f64())
}

impl Model for Ridge {
    fn fit(&self, x: &Design, y: &[f64], params: &Params, notes: &mut Notes) -> Result<Fitted> {
        Ok(self.fit_all(&x.x, y, &[lambda(params)], notes).remove(0))
    }
    fn fit_predict_grid(
        &self,
        x: &Design,
        y: &[f64],
        grid: &[Params],
        targets: &[&Matrix],
        notes: &mut Notes,
    ) -> Result<Vec<Vec<Vec<f64>>>> {
        super::collect(grid.len(), |each| {
            self.fit_predict_each(x, y, grid, targets, notes, each)
        })
    }
    fn fit_predict_each(
        &self,
        x: &Design,
        y: &[f64],
        grid: &[Params],
        targets: &[&Matrix],
        notes: &mut Notes,
        each: &mut dyn FnMut(usize, Vec<Vec<f64>>) -> Result<()>,
    ) -> Result<()> {
        let lambdas: Vec<f64> = grid.iter().map(lambda).collect();
        // The fits are coefficient vectors: keep them all, predict one grid point at a time.
        super::emit(&self.fit_all(&x.x, y, &lambdas, notes), targets, each)
    }
    fn drops_first_level(&self) -> bool {
        true
    }
    fn complexity(&self, params: &Params) -> f64 {
        -lambda(params)
    }
}

//! `lasso`: minimise (1/(2n)) sum (y - b - Zv)^2 + lambda ||v||_1 on standardised features,
//! intercept unpenalised, by cyclic coordinate descent with covariance updates and warm starts
//! along a decreasing lambda path (Friedman, Hastie & Tibshirani 2010, J. Stat. Software 33(1)).
//! Converged when the duality gap is below 1e-12 of the scaled objective and no coordinate
//! moves by more than 1e-13.

use super::encode::{Notes, note};
use super::linalg::Matrix;
use super::{Design, Fitted, Model, Params, center_scale, center_target, param, unscale};
use crate::error::Result;

pub struct Lasso {
    pub standardize: bool,
}

const MAX_SWEEPS: usize = 200_000;

fn soft(x: f64, t: f64) -> f64 {
    if x > t {
        x - t
    } else if x < -t {
        x + t
    } else {
        0.0
    }
}

/// The Gram form of the problem: G = Z^T Z / n, c = Z^T y / n, yy = y.y / n.
struct Gram {
    p: usize,
    g: Vec<f64>,
    c: Vec<f64>,
    yy: f64,
}

impl Gram {
    fn new(z: &Matrix, y: &[f64]) -> Gram {
        let (n, p) = (z.rows as f64, z.cols);
        let mut g = vec![0.0; p * p];
        for i in 0..p {
            for j in i..p {
                let v = z
                    .col(i)
                    .iter()
                    .zip(z.col(j))
                    .map(|(a, b)| a * b)
                    .sum::<f64>()
                    / n;
                g[i * p + j] = v;
                g[j * p + i] = v;
            }
        }
        let c = (0..p)
            .map(|j| z.col(j).iter().zip(y).map(|(a, b)| a * b).sum::<f64>() / n)
            .collect();
        let yy = y.iter().map(|v| v * v).sum::<f64>() / n;
        Gram { p, g, c, yy }
    }

    /// Duality gap of v for penalty l (see the module doc for the dual point).
    fn gap(&self, v: &[f64], l: f64) -> f64 {
        let p = self.p;
        let gv: Vec<f64> = (0..p)
            .map(|i| (0..p).map(|j| self.g[i * p + j] * v[j]).sum())
            .collect();
        let cv: f64 = self.c.iter().zip(v).map(|(a, b)| a * b).sum();
        let vgv: f64 = v.iter().zip(&gv).map(|(a, b)| a * b).sum();
        let l1: f64 = v.iter().map(|x| x.abs()).sum();
        let rr = (self.yy - 2.0 * cv + vgv).max(0.0);
        let rho_max = self
            .c
            .iter()
            .zip(&gv)
            .fold(0.0f64, |m, (c, g)| m.max((c - g).abs()));
        let s = if rho_max > l && rho_max > 0.0 {
            l / rho_max
        } else {
            1.0
        };
        let primal = 0.5 * rr + l * l1;
        let dual = -0.5 * s * s * rr + s * (self.yy - cv);
        primal - dual
    }

    /// Coordinate descent from `v` for penalty `l`; returns whether it converged.
    fn descend(&self, v: &mut [f64], l: f64) -> bool {
        let p = self.p;
        // rho = c - G v, kept up to date as coordinates move.
        let mut rho: Vec<f64> = (0..p)
            .map(|i| self.c[i] - (0..p).map(|j| self.g[i * p + j] * v[j]).sum::<f64>())
            .collect();
        let tol = 1e-12 * self.yy.max(f64::MIN_POSITIVE);
        for sweep in 0..MAX_SWEEPS {
            let mut moved = 0.0f64;
            for j in 0..p {
                let gjj = self.g[j * p + j];
                if gjj <= 0.0 {
                    continue;
                }
                let old = v[j];
                let new = soft(rho[j] + gjj * old, l) / gjj;
                if new != old {
                    let d = new - old;
                    v[j] = new;
                    // G is symmetric: column j is row j.
                    for (r, g) in rho.iter_mut().zip(&self.g[j * p..(j + 1) * p]) {
                        *r -= g * d;
                    }
                    moved = moved.max(d.abs() * gjj.sqrt());
                }
            }
            if moved <= 1e-13 && (sweep % 8 == 7 || moved == 0.0) && self.gap(v, l) <= tol {
                return true;
            }
        }
        self.gap(v, l) <= tol
    }
}

impl Lasso {
    fn fit_path(&self, x: &Matrix, y: &[f64], lambdas: &[f64], notes: &mut Notes) -> Vec<Fitted> {
        let (ymean, yscale, yc) = center_target(y);
        let (xmean, xscale, z) = center_scale(x, self.standardize);
        let gram = Gram::new(&z, &yc);
        // Largest lambda first, each start from the previous solution.
        let mut order: Vec<usize> = (0..lambdas.len()).collect();
        order.sort_by(|&a, &b| lambdas[b].total_cmp(&lambdas[a]).then(a.cmp(&b)));
        let mut v = vec![0.0; x.cols];
        let mut out = vec![None; lambdas.len()];
        for i in order {
            // The objective is on the scaled target, so the penalty scales with it.
            let l = lambdas[i] / yscale;
            if !gram.descend(&mut v, l) {
                note(
                    notes,
                    format!(
                        "lasso with lambda = {}: coordinate descent stopped after {MAX_SWEEPS} sweeps before the duality gap reached 1e-12",
                        lambdas[i]
                    ),
                );
            }
            let (intercept, weights) = unscale(&v, ymean, yscale, &xmean, &xscale);
            out[i] = Some(Fitted::Linear {
                intercept,
                weights,
                poly: None,
            });
        }
        out.into_iter()
            .map(|f| f.unwrap_or(Fitted::Mean { value: ymean }))
            .collect()
    }
}

fn lambda(p: &Params) -> f64 {
    param(p, "lambda").map_or(0.0, |v| v.as_f64())
}

impl Model for Lasso {
    fn fit(&self, x: &Design, y: &[f64], params: &Params, notes: &mut Notes) -> Result<Fitted> {
        Ok(self.fit_path(&x.x, y, &[lambda(params)], notes).remove(0))
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
        super::emit(&self.fit_path(&x.x, y, &lambdas, notes), targets, each)
    }
    fn drops_first_level(&self) -> bool {
        true
    }
    fn complexity(&self, params: &Params) -> f64 {
        -lambda(params)
    }
}

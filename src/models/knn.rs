//! `knn`: the mean target (regression) or the class vote fractions (classification) of the k
//! nearest fitting rows, Euclidean distance on standardised features; distance ties go to the
//! lower fitting row, and the predicted class is the first of the most voted. One neighbour search per fold serves
//! every k of the grid.

use super::encode::Notes;
use super::linalg::{Matrix, mean_sd, standardize};
use super::{Design, Fitted, Model, Params, param};
use crate::error::{Error, Result};

pub struct Knn {
    pub standardize: bool,
    /// 0 for regression, else the number of classes.
    pub classes: usize,
}

fn k_of(p: &Params) -> usize {
    param(p, "k").map_or(1, |v| v.as_usize())
}

/// Row-major copy of a column-major matrix.
fn row_major(x: &Matrix) -> Vec<f64> {
    let mut out = vec![0.0; x.rows * x.cols];
    for j in 0..x.cols {
        for (i, v) in x.col(j).iter().enumerate() {
            out[i * x.cols + j] = *v;
        }
    }
    out
}

/// Predictions for every query row (standardized) and every k in `ks`: `[k][row]` (regression)
/// or `[k][row * classes + class]` vote fractions (classification).
pub fn predict_many(
    points: &[f64],
    targets: &[f64],
    p: usize,
    queries: &Matrix,
    ks: &[usize],
    classes: usize,
) -> Vec<Vec<f64>> {
    let n = targets.len();
    let kmax = ks.iter().copied().max().unwrap_or(1).min(n);
    let q = row_major(queries);
    let mut out = vec![Vec::with_capacity(queries.rows); ks.len()];
    let mut dist: Vec<(f64, usize)> = Vec::with_capacity(n);
    for r in 0..queries.rows {
        let qr = &q[r * p..(r + 1) * p];
        dist.clear();
        for i in 0..n {
            let pt = &points[i * p..(i + 1) * p];
            let d: f64 = pt.iter().zip(qr).map(|(a, b)| (a - b) * (a - b)).sum();
            dist.push((d, i));
        }
        // (distance, row) is a total order, so the neighbour set is the same however the
        // selection proceeds.
        let cmp = |a: &(f64, usize), b: &(f64, usize)| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1));
        if kmax < n {
            dist.select_nth_unstable_by(kmax - 1, cmp);
        }
        let near = &mut dist[..kmax];
        near.sort_unstable_by(cmp);
        for (slot, &k) in ks.iter().enumerate() {
            let k = k.min(n);
            if classes > 0 {
                let mut votes = vec![0.0; classes];
                for &(_, i) in &near[..k] {
                    votes[targets[i] as usize] += 1.0;
                }
                out[slot].extend(votes.iter().map(|v| v / k as f64));
            } else {
                let s: f64 = near[..k].iter().map(|&(_, i)| targets[i]).sum();
                out[slot].push(s / k as f64);
            }
        }
    }
    out
}

impl Knn {
    fn prepare(&self, x: &Matrix) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
        let (center, scale) = if self.standardize {
            mean_sd(x)
        } else {
            (vec![0.0; x.cols], vec![1.0; x.cols])
        };
        let z = standardize(x, &center, &scale);
        (center, scale, row_major(&z))
    }

    fn check_k(&self, k: usize, n: usize) -> Result<()> {
        if k > n {
            return Err(Error::Input(format!(
                "knn: k = {k} is larger than the {n} fitting rows; lower k or use fewer folds"
            )));
        }
        Ok(())
    }
}

impl Model for Knn {
    fn fit(&self, x: &Design, y: &[f64], params: &Params, _notes: &mut Notes) -> Result<Fitted> {
        let k = k_of(params);
        self.check_k(k, y.len())?;
        let (center, scale, points) = self.prepare(&x.x);
        Ok(Fitted::Knn {
            k,
            center,
            scale,
            points,
            targets: y.to_vec(),
            classes: self.classes,
        })
    }
    fn fit_predict_grid(
        &self,
        x: &Design,
        y: &[f64],
        grid: &[Params],
        targets: &[&Matrix],
        _notes: &mut Notes,
    ) -> Result<Vec<Vec<Vec<f64>>>> {
        let ks: Vec<usize> = grid.iter().map(k_of).collect();
        for &k in &ks {
            self.check_k(k, y.len())?;
        }
        let (center, scale, points) = self.prepare(&x.x);
        let mut out: Vec<Vec<Vec<f64>>> = vec![Vec::new(); ks.len()];
        for t in targets {
            let q = standardize(t, &center, &scale);
            for (slot, preds) in predict_many(&points, y, x.x.cols, &q, &ks, self.classes)
                .into_iter()
                .enumerate()
            {
                out[slot].push(preds);
            }
        }
        Ok(out)
    }
    fn drops_first_level(&self) -> bool {
        false
    }
    fn complexity(&self, params: &Params) -> f64 {
        // Larger k averages more rows: a smoother, simpler fit.
        -(k_of(params) as f64)
    }
}

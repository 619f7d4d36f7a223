//! `knn`: the mean target (regression) or the class vote fractions (classification) of the k
//! nearest fitting rows, Euclidean distance on standardised features; distance ties go to the
//! lower fitting row, and the predicted class is the first of the most voted. One neighbour search per fold serves
//! every k of the grid.

use super::encode::Notes;
use super::linalg::{Matrix, mean_sd, standardize};
use super::{Design, Fitted, Model, Params, param};
use crate::error::{Error, Result};

/// Training scores are taken on at most this many evenly spaced fitting rows: predicting every
/// fitting row from all the others is quadratic in the fold size.
pub const TRAIN_SCORE_ROWS: usize = 2000;

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

/// Squared Euclidean distance with four partial sums, which the compiler can keep in vector
/// registers (a fixed order, so the same bits on every run).
#[inline(always)]
fn sq_dist(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0f64; 4];
    let (ca, cb) = (a.chunks_exact(4), b.chunks_exact(4));
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        for l in 0..4 {
            let t = x[l] - y[l];
            acc[l] += t * t;
        }
    }
    let mut tail = 0.0;
    for (x, y) in ra.iter().zip(rb) {
        let t = x - y;
        tail += t * t;
    }
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + tail
}

pub fn predict_many(
    points: &[f64],
    targets: &[f64],
    p: usize,
    queries: &Matrix,
    ks: &[usize],
    classes: usize,
) -> Vec<Vec<f64>> {
    predict_wide(points, targets, p, queries, ks, classes)
}

widest!(
    predict_wide,
    fn(
        points: &[f64],
        targets: &[f64],
        p: usize,
        queries: &Matrix,
        ks: &[usize],
        classes: usize,
    ) -> Vec<Vec<f64>>,
    predict_body
);

#[inline(always)]
fn predict_body(
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
    // The kmax nearest so far per query, sorted by (distance, row): a point enters only when it
    // beats the worst kept one. Rows are scanned in order, so an equal distance never displaces
    // an earlier row: the same neighbours as a full sort by (distance, row). Queries go in
    // blocks of 8 per pass over the points, so each point is read from memory once per block.
    const BLOCK: usize = 8;
    let mut nears: Vec<Vec<(f64, usize)>> =
        (0..BLOCK).map(|_| Vec::with_capacity(kmax + 1)).collect();
    for r0 in (0..queries.rows).step_by(BLOCK) {
        let r1 = (r0 + BLOCK).min(queries.rows);
        for near in nears.iter_mut() {
            near.clear();
        }
        for i in 0..n {
            let pt = &points[i * p..(i + 1) * p];
            for (b, r) in (r0..r1).enumerate() {
                let d = sq_dist(pt, &q[r * p..(r + 1) * p]);
                let near = &mut nears[b];
                if near.len() == kmax {
                    if d >= near[kmax - 1].0 {
                        continue;
                    }
                    near.pop();
                }
                // Insert after every kept entry with a distance <= d (earlier rows win ties).
                let at = near.partition_point(|e| e.0 <= d);
                near.insert(at, (d, i));
            }
        }
        for near in &nears[..r1 - r0] {
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
    fn train_rows_limit(&self) -> Option<usize> {
        Some(TRAIN_SCORE_ROWS)
    }
    fn complexity(&self, params: &Params) -> f64 {
        // Larger k averages more rows: a smoother, simpler fit.
        -(k_of(params) as f64)
    }
}

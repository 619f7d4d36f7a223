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

/// Points per tile of the distance kernel (one AVX-512 register of distances).
const TILE: usize = 8;

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

/// Squared Euclidean distance with four partial sums in a fixed order: the definition the tiled
/// kernel of `predict_many` repeats lane by lane (the test below holds them equal).
#[cfg(test)]
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
    let n = targets.len();
    // Points in tiles of TILE, stored feature by feature, so one query's distances to a whole
    // tile are computed lane by lane; each lane repeats `sq_dist`'s operations exactly.
    let tiles = n.div_ceil(TILE);
    let mut tiled = vec![[0.0f64; TILE]; tiles * p];
    for i in 0..n {
        for j in 0..p {
            tiled[(i / TILE) * p + j][i % TILE] = points[i * p + j];
        }
    }
    let q = row_major(queries);
    // Queries are independent: jobs of QUERY_JOB rows, on the calling thread and any lent
    // cores (`par`), joined in order; a query's neighbours do not depend on its job.
    let nq = queries.rows;
    let parts = crate::par::chunks(nq.div_ceil(QUERY_JOB), |c| {
        let (lo, hi) = (c * QUERY_JOB, ((c + 1) * QUERY_JOB).min(nq));
        predict_wide(&tiled, targets, p, &q[lo * p..hi * p], hi - lo, ks, classes)
    });
    let mut out = vec![Vec::with_capacity(nq * classes.max(1)); ks.len()];
    for part in parts {
        for (slot, preds) in out.iter_mut().zip(part) {
            slot.extend(preds);
        }
    }
    out
}

/// Queries per job of `predict_many` (a multiple of the kernel's blocks of 8).
const QUERY_JOB: usize = 256;

widest!(
    predict_wide,
    fn(
        tiled: &[[f64; TILE]],
        targets: &[f64],
        p: usize,
        q: &[f64],
        nq: usize,
        ks: &[usize],
        classes: usize,
    ) -> Vec<Vec<f64>>,
    predict_body
);

/// Predictions for `nq` row-major queries `q` from the tiled points, per k.
#[inline(always)]
fn predict_body(
    tiled: &[[f64; TILE]],
    targets: &[f64],
    p: usize,
    q: &[f64],
    nq: usize,
    ks: &[usize],
    classes: usize,
) -> Vec<Vec<f64>> {
    let n = targets.len();
    let kmax = ks.iter().copied().max().unwrap_or(1).min(n);
    let mut out = vec![Vec::with_capacity(nq); ks.len()];
    // The kmax nearest so far per query, sorted by (distance, row): a point enters only when it
    // beats the worst kept one. Rows are scanned in order, so an equal distance never displaces
    // an earlier row: the same neighbours as a full sort by (distance, row). Queries go in
    // blocks of 8 per pass over the points, so each point is read from memory once per block.
    const BLOCK: usize = 8;
    let mut nears: Vec<Vec<(f64, usize)>> =
        (0..BLOCK).map(|_| Vec::with_capacity(kmax + 1)).collect();
    let tiles = n.div_ceil(TILE);
    let quads = p / 4;
    for r0 in (0..nq).step_by(BLOCK) {
        let r1 = (r0 + BLOCK).min(nq);
        for near in nears.iter_mut() {
            near.clear();
        }
        for t in 0..tiles {
            let tile = &tiled[t * p..(t + 1) * p];
            let lanes = (n - t * TILE).min(TILE);
            for (b, r) in (r0..r1).enumerate() {
                let qr = &q[r * p..(r + 1) * p];
                let mut acc = [[0.0f64; TILE]; 4];
                for c in 0..quads {
                    for (l4, a) in acc.iter_mut().enumerate() {
                        let (col, qv) = (&tile[c * 4 + l4], qr[c * 4 + l4]);
                        for ln in 0..TILE {
                            let d = col[ln] - qv;
                            a[ln] += d * d;
                        }
                    }
                }
                let mut tail = [0.0f64; TILE];
                for j in quads * 4..p {
                    let (col, qv) = (&tile[j], qr[j]);
                    for ln in 0..TILE {
                        let d = col[ln] - qv;
                        tail[ln] += d * d;
                    }
                }
                let mut dist = [0.0f64; TILE];
                for ln in 0..TILE {
                    dist[ln] = (acc[0][ln] + acc[1][ln]) + (acc[2][ln] + acc[3][ln]) + tail[ln];
                }
                let near = &mut nears[b];
                // Most tiles hold no point nearer than the worst kept one: one test skips them.
                if near.len() == kmax {
                    let worst = near[kmax - 1].0;
                    let any = dist[..lanes].iter().fold(false, |h, &v| h | (v < worst));
                    if !any {
                        continue;
                    }
                }
                for (ln, &d) in dist[..lanes].iter().enumerate() {
                    if near.len() == kmax {
                        if d >= near[kmax - 1].0 {
                            continue;
                        }
                        near.pop();
                    }
                    // Insert after every kept entry with a distance <= d (earlier rows win ties).
                    let at = near.partition_point(|e| e.0 <= d);
                    near.insert(at, (d, t * TILE + ln));
                }
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

#[cfg(test)]
mod tests {
    use super::*;

    /// The tiled kernel against the definition: every distance by `sq_dist`, a full sort by
    /// (distance, row), the mean of the first k. Ties are planted (duplicated points), the point
    /// count is not a multiple of the tile and the feature count not a multiple of four.
    #[test]
    fn tiled_kernel_equals_sorting_every_distance() {
        for (n, p) in [(37, 7), (64, 4), (9, 1), (100, 20)] {
            let mut rng = crate::testgen::Lcg(12345 + n as u64);
            let mut next = || (rng.unit() - 0.5) * 4.0;
            let mut points: Vec<f64> = (0..n * p).map(|_| next()).collect();
            for j in 0..p {
                points[5 * p + j] = points[2 * p + j];
            }
            let targets: Vec<f64> = (0..n).map(|_| next()).collect();
            // More queries than one job (QUERY_JOB), with cores lent: jobs run side by side.
            let nq = if n == 100 { 600 } else { 13 };
            let qcols: Vec<Vec<f64>> = (0..p).map(|_| (0..nq).map(|_| next()).collect()).collect();
            let queries = Matrix::from_cols(nq, &qcols);
            let ks = [1, 2, 3, 8];
            let got = crate::par::lend(2, || predict_many(&points, &targets, p, &queries, &ks, 0));
            for r in 0..nq {
                let q: Vec<f64> = (0..p).map(|j| qcols[j][r]).collect();
                let mut all: Vec<(f64, usize)> = (0..n)
                    .map(|i| (sq_dist(&points[i * p..(i + 1) * p], &q), i))
                    .collect();
                all.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
                for (slot, &k) in ks.iter().enumerate() {
                    let want: f64 =
                        all[..k].iter().map(|&(_, i)| targets[i]).sum::<f64>() / k as f64;
                    assert_eq!(
                        got[slot][r].to_bits(),
                        want.to_bits(),
                        "n {n} p {p} query {r} k {k}"
                    );
                }
            }
        }
    }
}

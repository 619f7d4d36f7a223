//! Sufficient statistics for standardised ridge: one pass over the fitting rows builds the
//! cross-product matrix of [x, y] (about a shift, so sums do not cancel), one symmetric
//! eigendecomposition of the standardised Gram matrix then gives every penalty of a grid at
//! O(p^2) each, and one more pass predicts every penalty at once and sums the errors. Grams
//! about the same shift add and subtract, so the runner forms each fold's fitting-row Gram as
//! the development total minus the fold's held-out rows (one pass for all folds).
//!
//! Forming X'X squares the condition number, which is harmless with standardised columns and a
//! positive penalty (the penalty bounds the condition number), and wrong for plain least squares
//! on ill-conditioned data; so this path is only taken for ridge with every penalty > 0, and
//! `solve` refuses (the caller then takes the SVD path) when (largest eigenvalue + lambda) /
//! (smallest + lambda) exceeds `MAX_CONDITION`.
//!
//! Sums run in a fixed order (blocks of rows in row order, fixed accumulator lanes), so the
//! results depend only on the rows, never on threads. Predictions are formed exactly as
//! `Fitted::predict` forms them (intercept, then each weight times its column, in column order)
//! and the error sums are taken in row order, so the scores equal `metrics::score_all` on those
//! predictions, bit for bit.

/// Largest accepted (largest eigenvalue + lambda) / (smallest + lambda): a relative error of
/// at most about 1e-8 in the worst-conditioned direction.
pub const MAX_CONDITION: f64 = 1e8;

/// Rows per block of the passes.
const BLOCK: usize = 256;

/// Fits predicted together in the error sweep (one AVX-512 register of predictions).
pub const FITS: usize = 8;

/// Rows predicted together in the error sweep (BLOCK is a multiple of it): eight independent
/// chains of additions per group of fits, enough to hide the addition's latency on a core with
/// separate multiply and add pipes. Rows are independent, so this changes no bit.
const ROWS: usize = 8;

/// Accumulator lanes of the dot products (fixed, so the sums do not depend on the machine).
const LANES: usize = 8;

/// Where the passes read: feature columns by table row, the target by kept-row position, and
/// the table row of each kept-row position.
pub struct Source<'a> {
    pub columns: &'a [&'a [f64]],
    pub target: &'a [f64],
    pub table_row: &'a [usize],
}

/// Cross-products of [x, y] about `shift` over a set of rows.
#[derive(Debug, Clone)]
pub struct Gram {
    pub n: usize,
    /// p + 1 (the features, then the target).
    pub dim: usize,
    pub shift: Vec<f64>,
    /// Sum of (v - shift) per column.
    pub sum: Vec<f64>,
    /// Sum of (v - shift)(v - shift)' (dim x dim, row-major, symmetric).
    pub cross: Vec<f64>,
}

/// Gather `rows` into a column-major block (dim columns of BLOCK).
#[inline(always)]
fn gather(src: &Source, rows: &[usize], block: &mut [f64], with_target: bool) {
    let p = src.columns.len();
    for (j, col) in src.columns.iter().enumerate() {
        let out = &mut block[j * BLOCK..j * BLOCK + rows.len()];
        for (o, &i) in out.iter_mut().zip(rows) {
            *o = col[src.table_row[i]];
        }
    }
    if with_target {
        let out = &mut block[p * BLOCK..p * BLOCK + rows.len()];
        for (o, &i) in out.iter_mut().zip(rows) {
            *o = src.target[i];
        }
    }
}

/// Dot product in LANES fixed accumulators, combined in lane order.
#[inline(always)]
pub(crate) fn dot(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0f64; LANES];
    let (ca, cb) = (a.chunks_exact(LANES), b.chunks_exact(LANES));
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        for l in 0..LANES {
            acc[l] += x[l] * y[l];
        }
    }
    for (l, (x, y)) in ra.iter().zip(rb).enumerate() {
        acc[l] += x * y;
    }
    acc.iter().sum()
}

widest!(
    gram_of,
    fn(src: &Source, rows: &[usize], shift: &[f64]) -> Gram,
    gram_of_body
);
widest!(
    sums_of,
    fn(
        src: &Source,
        a: &[usize],
        b: &[usize],
        merge: bool,
        fits: &[(f64, Vec<f64>)],
    ) -> Vec<(f64, f64)>,
    error_sums_body
);

impl Gram {
    /// One pass over `rows` (kept-row positions, in order).
    pub fn of(src: &Source, rows: &[usize]) -> Gram {
        // The first row as the shift: sums then hold deviations of the order of the spread.
        let shift = rows
            .first()
            .map_or_else(|| vec![0.0; src.columns.len() + 1], |&i| Gram::row(src, i));
        gram_of(src, rows, &shift)
    }

    /// One pass over `rows` about a given shift (Grams that will be added or subtracted must
    /// share theirs).
    pub fn of_shifted(src: &Source, rows: &[usize], shift: &[f64]) -> Gram {
        gram_of(src, rows, shift)
    }

    /// [x, y] of one kept row.
    pub fn row(src: &Source, i: usize) -> Vec<f64> {
        src.columns
            .iter()
            .map(|c| c[src.table_row[i]])
            .chain([src.target[i]])
            .collect()
    }

    /// The sum of Grams over disjoint row sets (same shift), added in the order given.
    pub fn total(parts: &[Gram]) -> Option<Gram> {
        let mut out = parts.first()?.clone();
        for g in &parts[1..] {
            out.n += g.n;
            out.sum.iter_mut().zip(&g.sum).for_each(|(a, b)| *a += b);
            out.cross
                .iter_mut()
                .zip(&g.cross)
                .for_each(|(a, b)| *a += b);
        }
        Some(out)
    }

    /// The Gram of the rows of `self` that are not in `part` (a subset, same shift): the fitting
    /// rows of a fold as all rows minus the held-out ones.
    pub fn minus(&self, part: &Gram) -> Gram {
        let mut out = self.clone();
        out.n -= part.n;
        out.sum.iter_mut().zip(&part.sum).for_each(|(a, b)| *a -= b);
        out.cross
            .iter_mut()
            .zip(&part.cross)
            .for_each(|(a, b)| *a -= b);
        out
    }

    /// The mean of each column (features, then the target).
    pub fn means(&self) -> Vec<f64> {
        let n = self.n as f64;
        (0..self.dim)
            .map(|j| self.shift[j] + self.sum[j] / n)
            .collect()
    }

    /// (intercept, weights) in the original units for each lambda, as `ridge` defines them
    /// (features centred and scaled by their population standard deviation, intercept not
    /// penalised); `None` when the problem is too ill-conditioned for this path.
    pub fn solve(&self, lambdas: &[f64]) -> Option<Vec<(f64, Vec<f64>)>> {
        let (dim, n) = (self.dim, self.n as f64);
        let p = dim - 1;
        if self.n == 0 || lambdas.iter().any(|&l| !(l > 0.0 && l.is_finite())) {
            return None;
        }
        let mean = self.means();
        // Centred cross-products.
        let c = |j: usize, k: usize| self.cross[j * dim + k] - self.sum[j] * self.sum[k] / n;
        let sd: Vec<f64> = (0..p)
            .map(|j| {
                let s = (c(j, j).max(0.0) / n).sqrt();
                if s > 0.0 && s.is_finite() { s } else { 1.0 }
            })
            .collect();
        let mut a = vec![0.0; p * p];
        for j in 0..p {
            for k in 0..p {
                a[j * p + k] = c(j, k) / (sd[j] * sd[k]);
            }
        }
        let b: Vec<f64> = (0..p).map(|j| c(j, p) / sd[j]).collect();
        let (values, vectors) = sym_eigen(a, p);
        let (lo, hi) = values
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
                (lo.min(v), hi.max(v))
            });
        let lmin = lambdas.iter().copied().fold(f64::INFINITY, f64::min);
        if p > 0 && !((hi + lmin) / (lo + lmin) <= MAX_CONDITION && lo + lmin > 0.0) {
            return None;
        }
        // Q'b, once.
        let qb: Vec<f64> = (0..p)
            .map(|k| (0..p).map(|j| vectors[j * p + k] * b[j]).sum())
            .collect();
        Some(
            lambdas
                .iter()
                .map(|&l| {
                    let g: Vec<f64> = (0..p).map(|k| qb[k] / (values[k] + l)).collect();
                    let weights: Vec<f64> = (0..p)
                        .map(|j| (0..p).map(|k| vectors[j * p + k] * g[k]).sum::<f64>() / sd[j])
                        .collect();
                    let intercept =
                        mean[p] - weights.iter().zip(&mean).map(|(w, m)| w * m).sum::<f64>();
                    (intercept, weights)
                })
                .collect(),
        )
    }
}

/// Running sums of one Gram (about its shift).
struct Acc {
    n: usize,
    sum: Vec<f64>,
    cross: Vec<f64>,
}

impl Acc {
    fn new(dim: usize) -> Acc {
        Acc {
            n: 0,
            sum: vec![0.0; dim],
            cross: vec![0.0; dim * dim],
        }
    }

    /// Add the first `nb` rows of a gathered block (column-major, BLOCK per column).
    #[inline(always)]
    fn add(&mut self, block: &mut [f64], nb: usize, shift: &[f64]) {
        let dim = shift.len();
        self.n += nb;
        for j in 0..dim {
            let col = &mut block[j * BLOCK..j * BLOCK + nb];
            col.iter_mut().for_each(|v| *v -= shift[j]);
            self.sum[j] += col.iter().sum::<f64>();
        }
        for j in 0..dim {
            for k in j..dim {
                self.cross[j * dim + k] += dot(
                    &block[j * BLOCK..j * BLOCK + nb],
                    &block[k * BLOCK..k * BLOCK + nb],
                );
            }
        }
    }

    fn finish(mut self, shift: &[f64]) -> Gram {
        let dim = shift.len();
        for j in 0..dim {
            for k in 0..j {
                self.cross[j * dim + k] = self.cross[k * dim + j];
            }
        }
        Gram {
            n: self.n,
            dim,
            shift: shift.to_vec(),
            sum: self.sum,
            cross: self.cross,
        }
    }
}

#[inline(always)]
fn gram_of_body(src: &Source, rows: &[usize], shift: &[f64]) -> Gram {
    let dim = src.columns.len() + 1;
    let mut acc = Acc::new(dim);
    let mut block = vec![0.0; dim * BLOCK];
    for chunk in rows.chunks(BLOCK) {
        gather(src, chunk, &mut block, true);
        acc.add(&mut block, chunk.len(), shift);
    }
    acc.finish(shift)
}

/// The Grams of disjoint row sets `sets` (a range of set numbers) in one pass over `rows`
/// (sorted kept-row positions): row `rows[k]` belongs to set `owner[k]`, and rows of sets outside
/// the range are skipped. Each set's rows are taken in blocks of BLOCK of its
/// own rows, in row order, so set `s` gets the bits of `Gram::of_shifted` on its rows; but the
/// columns are read once for all sets instead of once per set.
pub fn of_sets(
    src: &Source,
    rows: &[usize],
    owner: &[u32],
    sets: std::ops::Range<u32>,
    shift: &[f64],
) -> Vec<Gram> {
    gram_sets(src, rows, owner, sets, shift)
}

widest!(
    gram_sets,
    fn(
        src: &Source,
        rows: &[usize],
        owner: &[u32],
        sets: std::ops::Range<u32>,
        shift: &[f64],
    ) -> Vec<Gram>,
    gram_sets_body
);

#[inline(always)]
fn gram_sets_body(
    src: &Source,
    rows: &[usize],
    owner: &[u32],
    range: std::ops::Range<u32>,
    shift: &[f64],
) -> Vec<Gram> {
    let sets = range.len();
    let p = src.columns.len();
    let dim = p + 1;
    let mut accs: Vec<Acc> = (0..sets).map(|_| Acc::new(dim)).collect();
    let mut blocks: Vec<Vec<f64>> = (0..sets).map(|_| vec![0.0; dim * BLOCK]).collect();
    let mut fill = vec![0usize; sets];
    for (&i, &o) in rows.iter().zip(owner) {
        if !range.contains(&o) {
            continue;
        }
        let s = (o - range.start) as usize;
        let (b, at) = (&mut blocks[s], fill[s]);
        let t = src.table_row[i];
        for (j, col) in src.columns.iter().enumerate() {
            b[j * BLOCK + at] = col[t];
        }
        b[p * BLOCK + at] = src.target[i];
        fill[s] += 1;
        if fill[s] == BLOCK {
            accs[s].add(b, BLOCK, shift);
            fill[s] = 0;
        }
    }
    accs.into_iter()
        .zip(blocks.iter_mut())
        .zip(fill)
        .map(|((mut acc, b), nb)| {
            if nb > 0 {
                acc.add(b, nb, shift);
            }
            acc.finish(shift)
        })
        .collect()
}

/// Eigenvalues and eigenvectors (columns of the row-major p x p result) of a symmetric matrix,
/// by cyclic Jacobi rotations: accurate to the last bits for the small matrices met here.
pub fn sym_eigen(mut a: Vec<f64>, p: usize) -> (Vec<f64>, Vec<f64>) {
    let mut v = vec![0.0; p * p];
    for i in 0..p {
        v[i * p + i] = 1.0;
    }
    for _sweep in 0..64 {
        let off: f64 = (0..p)
            .flat_map(|i| (i + 1..p).map(move |j| (i, j)))
            .map(|(i, j)| a[i * p + j] * a[i * p + j])
            .sum();
        let diag: f64 = (0..p).map(|i| a[i * p + i] * a[i * p + i]).sum();
        if off <= diag * 1e-32 || off == 0.0 {
            break;
        }
        for r in 0..p {
            for q in r + 1..p {
                let apq = a[r * p + q];
                if apq == 0.0 {
                    continue;
                }
                let (app, aqq) = (a[r * p + r], a[q * p + q]);
                let theta = (aqq - app) / (2.0 * apq);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..p {
                    let (akr, akq) = (a[k * p + r], a[k * p + q]);
                    a[k * p + r] = c * akr - s * akq;
                    a[k * p + q] = s * akr + c * akq;
                }
                for k in 0..p {
                    let (ark, aqk) = (a[r * p + k], a[q * p + k]);
                    a[r * p + k] = c * ark - s * aqk;
                    a[q * p + k] = s * ark + c * aqk;
                }
                for k in 0..p {
                    let (vkr, vkq) = (v[k * p + r], v[k * p + q]);
                    v[k * p + r] = c * vkr - s * vkq;
                    v[k * p + q] = s * vkr + c * vkq;
                }
            }
        }
    }
    ((0..p).map(|i| a[i * p + i]).collect(), v)
}

/// Sums of squared and absolute errors over `rows` for every fit (intercept, weights): all
/// fits predicted together, block by block. Each sum runs in row order.
/// (sum of squared errors, sum of absolute errors) per fit.
pub type ErrorSums = Vec<(f64, f64)>;

/// Error sums on two sets of rows at once (a fold's fitting and held-out rows): one pass in row
/// order when both lists are sorted, each list's own order kept either way.
pub fn error_sums_both(
    src: &Source,
    a: &[usize],
    b: &[usize],
    fits: &[(f64, Vec<f64>)],
) -> (ErrorSums, ErrorSums) {
    let sorted = |v: &[usize]| v.windows(2).all(|w| w[0] < w[1]);
    let merge = sorted(a) && sorted(b);
    let mut sums = sums_of(src, a, b, merge, fits);
    let second = sums.split_off(fits.len());
    (sums, second)
}

/// Error sums over `rows` for every fit.
pub fn error_sums(src: &Source, rows: &[usize], fits: &[(f64, Vec<f64>)]) -> Vec<(f64, f64)> {
    let mut sums = sums_of(src, rows, &[], false, fits);
    sums.truncate(fits.len());
    sums
}

/// The next up to BLOCK rows of `a` (tagged false) and `b` (tagged true): merged in row order
/// when `merge`, else all of `a` then all of `b`. Returns false when both are used up.
#[inline(always)]
fn next_rows(
    a: &[usize],
    b: &[usize],
    merge: bool,
    at: &mut (usize, usize),
    out: &mut Vec<(usize, bool)>,
) -> bool {
    out.clear();
    while out.len() < BLOCK && (at.0 < a.len() || at.1 < b.len()) {
        let from_a = at.1 == b.len() || (at.0 < a.len() && (!merge || a[at.0] < b[at.1]));
        if from_a {
            out.push((a[at.0], false));
            at.0 += 1;
        } else {
            out.push((b[at.1], true));
            at.1 += 1;
        }
    }
    !out.is_empty()
}

/// The predictions of FITS fits (lanes) for the ROWS gathered rows from `r` on: as
/// `Fitted::predict` forms them, the intercept, then each weight times its feature in column
/// order. (`Fitted::predict` skips a zero weight; adding its +-0 product changes at most the
/// sign of a zero prediction, which no error sum can see.) Shared by both sweeps, so their
/// arithmetic is the same by construction.
#[inline(always)]
fn predict_rows(
    intercepts: [f64; FITS],
    weights: &[[f64; FITS]],
    block: &[f64],
    r: usize,
) -> [[f64; FITS]; ROWS] {
    let mut acc = [intercepts; ROWS];
    for (j, wj) in weights.iter().enumerate() {
        let xs = &block[j * BLOCK + r..j * BLOCK + r + ROWS];
        for (a, &xv) in acc.iter_mut().zip(xs) {
            for l in 0..FITS {
                a[l] += wj[l] * xv;
            }
        }
    }
    acc
}

/// Sums per fit for the rows tagged false, then for those tagged true.
#[inline(always)]
fn error_sums_body(
    src: &Source,
    a: &[usize],
    b: &[usize],
    merge: bool,
    fits: &[(f64, Vec<f64>)],
) -> Vec<(f64, f64)> {
    let p = src.columns.len();
    let nf = fits.len();
    // Fits in groups of FITS lanes (the last group padded with zero fits), each group's
    // predictions kept in registers while the features stream past.
    let groups = nf.div_ceil(FITS);
    let mut w = vec![[0.0f64; FITS]; groups * p];
    let mut intercepts = vec![[0.0f64; FITS]; groups];
    for (k, (b, wk)) in fits.iter().enumerate() {
        let (g, l) = (k / FITS, k % FITS);
        intercepts[g][l] = *b;
        for j in 0..p {
            w[g * p + j][l] = wk[j];
        }
    }
    let mut block = vec![0.0; (p + 1) * BLOCK];
    // Per group: sums for the rows tagged false, then for those tagged true.
    let mut sse = vec![[0.0f64; FITS]; 2 * groups];
    let mut sae = vec![[0.0f64; FITS]; 2 * groups];
    let mut idx = Vec::with_capacity(BLOCK);
    let (mut at, mut chunk) = ((0, 0), Vec::with_capacity(BLOCK));
    while next_rows(a, b, merge, &mut at, &mut chunk) {
        let nb = chunk.len();
        idx.clear();
        idx.extend(chunk.iter().map(|r| r.0));
        gather(src, &idx, &mut block, true);
        // ROWS rows at a time: their predictions are independent chains of additions, so the
        // processor overlaps them; each row's errors still enter the sums in row order.
        let mut r = 0;
        while r < nb {
            let take = (nb - r).min(ROWS);
            for g in 0..groups {
                let acc = predict_rows(intercepts[g], &w[g * p..(g + 1) * p], &block, r);
                for (rr, a) in acc.iter().enumerate().take(take) {
                    let y = block[p * BLOCK + r + rr];
                    let side = usize::from(chunk[r + rr].1);
                    let (q, s) = (&mut sse[2 * g + side], &mut sae[2 * g + side]);
                    for l in 0..FITS {
                        let e = y - a[l];
                        q[l] += e * e;
                        s[l] += e.abs();
                    }
                }
            }
            r += take;
        }
    }
    let flat = |side: usize| -> Vec<(f64, f64)> {
        (0..nf)
            .map(|k| {
                let (g, l) = (k / FITS, k % FITS);
                (sse[2 * g + side][l], sae[2 * g + side][l])
            })
            .collect()
    };
    let mut out = flat(0);
    out.extend(flat(1));
    out
}

/// The fits of one fold, FITS at a time (the last group padded with zero fits): the lanes of
/// `fold_error_sums`.
#[derive(Debug, Clone)]
pub struct LaneGroup {
    /// The fold's bit in a row's held-out mask.
    pub bit: u32,
    pub intercepts: [f64; FITS],
    /// One entry per feature.
    pub weights: Vec<[f64; FITS]>,
}

impl LaneGroup {
    /// The fits of the fold with mask bit `bit`, in groups of FITS.
    pub fn of(bit: u32, fits: &[(f64, Vec<f64>)], p: usize) -> Vec<LaneGroup> {
        fits.chunks(FITS)
            .map(|chunk| {
                let mut g = LaneGroup {
                    bit,
                    intercepts: [0.0; FITS],
                    weights: vec![[0.0; FITS]; p],
                };
                for (l, (b, w)) in chunk.iter().enumerate() {
                    g.intercepts[l] = *b;
                    for (j, wj) in w.iter().enumerate().take(p) {
                        g.weights[j][l] = *wj;
                    }
                }
                g
            })
            .collect()
    }
}

/// Per lane: [squared errors on the fitting rows, absolute errors on the fitting rows,
/// squared errors on the held-out rows, absolute errors on the held-out rows].
pub type LaneSums = [[f64; FITS]; 4];

/// Error sums of many folds' fits in one pass over `rows` (sorted kept-row positions, each row
/// a fitting row of every fold that does not hold it out): `held[k]` has bit `b` set when the
/// fold of bit `b` holds `rows[k]` out. Each row is read once for every fold instead of once
/// per fold. Per lane the arithmetic and the row order are those of `error_sums_both` on that
/// fold's (sorted) fitting and held-out rows, so the sums are the same bits.
pub fn fold_error_sums(
    src: &Source,
    rows: &[usize],
    held: &[u64],
    groups: &[LaneGroup],
) -> Vec<LaneSums> {
    let mut out: Vec<LaneSums> = vec![[[0.0; FITS]; 4]; groups.len()];
    fold_sums_of(src, rows, held, groups, &mut out);
    out
}

/// Rows between two points where a thread of `fold_error_sums_shared` may hand over groups.
const STEP: usize = 16 * BLOCK;

/// `fold_error_sums` on `threads` threads, each starting with an equal share of the lane
/// groups. A thread that runs out of work takes over half the groups of the thread with the
/// most left, with their sums so far, at one of that thread's step boundaries: a thread slowed
/// by other work (the partition being stored beside the grid) no longer leaves the others
/// idle at the end. Each group's rows still go through in order, in the same arithmetic, so
/// the sums are the bits of `fold_error_sums` whatever the thread count and whoever takes what.
pub fn fold_error_sums_shared(
    src: &Source,
    rows: &[usize],
    held: &[u64],
    groups: &[LaneGroup],
    threads: usize,
) -> Vec<LaneSums> {
    let k = threads.clamp(1, groups.len().max(1));
    let bounds: Vec<usize> = (0..=k).map(|w| w * groups.len() / k).collect();
    shared_sweep(src, rows, held, groups, &bounds).0
}

fn lock(m: &std::sync::Mutex<Slot>) -> std::sync::MutexGuard<'_, Slot> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

/// One thread's place in `shared_sweep`, under its lock.
struct Slot {
    lo: usize,
    hi: usize,
    /// The next step it will sweep.
    step: usize,
    done: bool,
    /// Another thread asks for half its groups.
    asked: bool,
    /// The answer, until the asking thread takes it: the groups handed over, or `None`
    /// (nothing to split). No other thread may ask meanwhile.
    given: Option<Option<Handover>>,
}

/// Groups `lo..hi` from step `step` on, with their sums over the steps before.
struct Handover {
    lo: usize,
    hi: usize,
    step: usize,
    sums: Vec<LaneSums>,
}

/// Leaving (at the end, or by a panic): answer a pending request so no thread waits on this
/// one.
struct Leave<'a>(&'a (std::sync::Mutex<Slot>, std::sync::Condvar));

impl Drop for Leave<'_> {
    fn drop(&mut self) {
        let mut s = lock(&self.0.0);
        s.done = true;
        if s.asked {
            s.asked = false;
            s.given = Some(None);
        }
        self.0.1.notify_all();
    }
}

/// The sweep of `fold_error_sums_shared`, thread `w` starting with groups
/// `bounds[w]..bounds[w + 1]`; also returns how many handovers took place.
fn shared_sweep(
    src: &Source,
    rows: &[usize],
    held: &[u64],
    groups: &[LaneGroup],
    bounds: &[usize],
) -> (Vec<LaneSums>, usize) {
    use std::sync::{Condvar, Mutex, PoisonError};
    let k = bounds.len() - 1;
    let steps = rows.len().div_ceil(STEP);
    let slots: Vec<(Mutex<Slot>, Condvar)> = (0..k)
        .map(|w| {
            let slot = Slot {
                lo: bounds[w],
                hi: bounds[w + 1],
                step: 0,
                done: false,
                asked: false,
                given: None,
            };
            (Mutex::new(slot), Condvar::new())
        })
        .collect();
    let results: Mutex<Vec<Option<LaneSums>>> = Mutex::new(vec![None; groups.len()]);
    let handovers = std::sync::atomic::AtomicUsize::new(0);
    // Ask the thread with the most work left for half its groups; `None` when no thread has
    // two groups and a step left.
    let take = |me: usize| -> Option<Handover> {
        loop {
            let mut best: Option<(usize, usize)> = None;
            for (w, (m, _)) in slots.iter().enumerate().filter(|(w, _)| *w != me) {
                let s = lock(m);
                let left = (s.hi - s.lo) * steps.saturating_sub(s.step);
                let free = !s.done && !s.asked && s.given.is_none();
                let splits = s.hi - s.lo >= 2 && s.step < steps;
                if free && splits && best.is_none_or(|(_, b)| left > b) {
                    best = Some((w, left));
                }
            }
            let (victim, _) = best?;
            let (m, cv) = &slots[victim];
            let mut s = lock(m);
            if s.done || s.asked || s.given.is_some() {
                continue;
            }
            s.asked = true;
            let mut s = cv
                .wait_while(s, |s| s.given.is_none())
                .unwrap_or_else(PoisonError::into_inner);
            if let Some(Some(h)) = s.given.take() {
                return Some(h);
            }
        }
    };
    let work = |me: usize| {
        let _leave = Leave(&slots[me]);
        let (mut lo, mut hi, mut step) = (bounds[me], bounds[me + 1], 0);
        let mut sums: Vec<LaneSums> = vec![[[0.0; FITS]; 4]; hi - lo];
        loop {
            {
                // A step boundary: answer a request, and show where this thread is.
                let (m, cv) = &slots[me];
                let mut s = lock(m);
                if s.asked {
                    s.asked = false;
                    let split = hi - lo >= 2 && step < steps;
                    s.given = Some(split.then(|| {
                        let mid = lo + (hi - lo) / 2;
                        let theirs = sums.split_off(mid - lo);
                        let h = Handover {
                            lo: mid,
                            hi,
                            step,
                            sums: theirs,
                        };
                        hi = mid;
                        h
                    }));
                    cv.notify_all();
                }
                (s.lo, s.hi, s.step) = (lo, hi, step);
                s.done = step >= steps;
            }
            if step < steps {
                let (a, b) = (step * STEP, rows.len().min((step + 1) * STEP));
                fold_sums_of(src, &rows[a..b], &held[a..b], &groups[lo..hi], &mut sums);
                step += 1;
                continue;
            }
            {
                let mut r = results.lock().unwrap_or_else(PoisonError::into_inner);
                for (g, s) in (lo..hi).zip(sums.drain(..)) {
                    r[g] = Some(s);
                }
            }
            let Some(h) = take(me) else {
                break;
            };
            handovers.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
            (lo, hi, step, sums) = (h.lo, h.hi, h.step, h.sums);
            let mut s = lock(&slots[me].0);
            (s.lo, s.hi, s.step, s.done) = (lo, hi, step, false);
        }
    };
    std::thread::scope(|s| {
        for w in 1..k {
            let work = &work;
            s.spawn(move || work(w));
        }
        work(0);
    });
    let out = results
        .into_inner()
        .unwrap_or_else(PoisonError::into_inner)
        .into_iter()
        .flatten()
        .collect();
    (out, handovers.into_inner())
}

widest!(
    fold_sums_of,
    fn(
        src: &Source,
        rows: &[usize],
        held: &[u64],
        groups: &[LaneGroup],
        out: &mut [LaneSums],
    ) -> (),
    fold_sums_body
);

/// Adds the rows' errors to `out` (one entry per group), continuing its sums.
#[inline(always)]
fn fold_sums_body(
    src: &Source,
    rows: &[usize],
    held: &[u64],
    groups: &[LaneGroup],
    out: &mut [LaneSums],
) {
    let p = src.columns.len();
    let mut block = vec![0.0; (p + 1) * BLOCK];
    for (chunk, masks) in rows.chunks(BLOCK).zip(held.chunks(BLOCK)) {
        let nb = chunk.len();
        gather(src, chunk, &mut block, true);
        for (grp, sums) in groups.iter().zip(out.iter_mut()) {
            let mut s = *sums;
            let mut r = 0;
            while r < nb {
                let take = (nb - r).min(ROWS);
                let acc = predict_rows(grp.intercepts, &grp.weights, &block, r);
                for (rr, a) in acc.iter().enumerate().take(take) {
                    let y = block[p * BLOCK + r + rr];
                    // All ones when the row is held out, else zero: each error goes to one
                    // side's sums and +0 to the other's, which leaves a sum of non-negative
                    // terms (never -0) bit for bit as it was. No branch and no indexed side,
                    // so the four sums stay in registers.
                    let held = ((masks[r + rr] >> grp.bit) & 1).wrapping_neg();
                    let [fq, fa, hq, ha] = &mut s;
                    for l in 0..FITS {
                        let e = y - a[l];
                        let (q, t) = ((e * e).to_bits(), e.abs().to_bits());
                        fq[l] += f64::from_bits(q & !held);
                        fa[l] += f64::from_bits(t & !held);
                        hq[l] += f64::from_bits(q & held);
                        ha[l] += f64::from_bits(t & held);
                    }
                }
                r += take;
            }
            *sums = s;
        }
    }
}

/// A linear model's predictions on `rows`, formed exactly as `Fitted::predict` forms them
/// (intercept, then each non-zero weight times its column, in column order), without building
/// the design matrix.
/// Rows are independent, so they go in fixed jobs that lent cores may take (`par::chunks`).
pub fn predictions(src: &Source, rows: &[usize], intercept: f64, weights: &[f64]) -> Vec<f64> {
    const JOB: usize = 1 << 15;
    crate::par::chunks(rows.len().div_ceil(JOB), |c| {
        let part = &rows[c * JOB..rows.len().min((c + 1) * JOB)];
        predictions_of(src, part, intercept, weights)
    })
    .concat()
}

fn predictions_of(src: &Source, rows: &[usize], intercept: f64, weights: &[f64]) -> Vec<f64> {
    let mut out = vec![intercept; rows.len()];
    for (col, &w) in src.columns.iter().zip(weights) {
        if w != 0.0 {
            for (o, &i) in out.iter_mut().zip(rows) {
                *o += w * col[src.table_row[i]];
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn jacobi_reconstructs_a_symmetric_matrix() {
        let p = 5;
        let mut a = vec![0.0; p * p];
        for i in 0..p {
            for j in 0..p {
                a[i * p + j] = 1.0 / (1.0 + i as f64 + j as f64) + if i == j { 0.5 } else { 0.0 };
            }
        }
        let (vals, v) = sym_eigen(a.clone(), p);
        for i in 0..p {
            for j in 0..p {
                let r: f64 = (0..p).map(|k| v[i * p + k] * vals[k] * v[j * p + k]).sum();
                assert!((r - a[i * p + j]).abs() < 1e-14, "{i} {j}: {r}");
                let o: f64 = (0..p).map(|k| v[k * p + i] * v[k * p + j]).sum();
                assert!((o - if i == j { 1.0 } else { 0.0 }).abs() < 1e-14);
            }
        }
    }

    /// Rows from a fixed generator: 3 columns on different scales, a target, a table that
    /// holds the rows out of order (so `table_row` matters), and 3 folds of uneven sizes.
    struct Fixture {
        cols: Vec<Vec<f64>>,
        y: Vec<f64>,
        table_row: Vec<usize>,
        owner: Vec<u32>,
    }

    impl Fixture {
        fn refs(&self) -> Vec<&[f64]> {
            self.cols.iter().map(|c| c.as_slice()).collect()
        }

        fn source<'a>(&'a self, refs: &'a [&'a [f64]]) -> Source<'a> {
            Source {
                columns: refs,
                target: &self.y,
                table_row: &self.table_row,
            }
        }
    }

    fn fixture(n: usize) -> Fixture {
        let mut rng = crate::testgen::Lcg(11);
        let mut next = || rng.unit();
        let cols: Vec<Vec<f64>> = (0..3)
            .map(|j| {
                (0..n)
                    .map(|_| 10.0 * j as f64 + next() * (1.0 + j as f64))
                    .collect()
            })
            .collect();
        let y = (0..n)
            .map(|i| cols[1][i] - 0.5 * cols[2][i] + next())
            .collect();
        let table_row = (0..n).map(|i| (i * 7) % n).collect();
        let owner = (0..n).map(|_| (next() * 3.0) as u32).collect();
        Fixture {
            cols,
            y,
            table_row,
            owner,
        }
    }

    /// `of_sets` gives each set the bits of `of_shifted` on that set's rows, whatever range of
    /// sets one pass serves (n = 1,000 rows: blocks of 256 fill and flush per set).
    #[test]
    fn one_pass_over_sets_equals_one_pass_per_set() {
        let n = 1000; // coprime with 7, so table_row is a permutation
        let fx = fixture(n);
        let refs = fx.refs();
        let src = fx.source(&refs);
        let rows: Vec<usize> = (0..n).collect();
        let shift = Gram::row(&src, 0);
        let all = of_sets(&src, &rows, &fx.owner, 0..3, &shift);
        let last = of_sets(&src, &rows, &fx.owner, 2..3, &shift);
        for f in 0..3u32 {
            let mine: Vec<usize> = (0..n).filter(|&i| fx.owner[i] == f).collect();
            let direct = Gram::of_shifted(&src, &mine, &shift);
            let got = &all[f as usize];
            assert_eq!(got.n, direct.n);
            assert_eq!(got.sum, direct.sum, "fold {f}");
            assert_eq!(got.cross, direct.cross, "fold {f}");
        }
        assert_eq!(last[0].cross, all[2].cross);
    }

    /// `fold_error_sums` (every fold's fits in one pass, lanes padded) gives the bits of
    /// `error_sums_both` on each fold's fitting and held-out rows.
    #[test]
    fn one_sweep_for_all_folds_equals_one_sweep_per_fold() {
        let n = 1000;
        let fx = fixture(n);
        let refs = fx.refs();
        let src = fx.source(&refs);
        let rows: Vec<usize> = (0..n).collect();
        let held: Vec<u64> = fx.owner.iter().map(|&o| 1u64 << o).collect();
        // 11 fits per fold: one full group of 8 and one padded group.
        let fits: Vec<Vec<(f64, Vec<f64>)>> = (0..3)
            .map(|f| {
                let fit: Vec<usize> = (0..n).filter(|&i| fx.owner[i] != f).collect();
                let lambdas: Vec<f64> = (0..11).map(|k| 0.01 * 3f64.powi(k)).collect();
                Gram::of(&src, &fit).solve(&lambdas).unwrap()
            })
            .collect();
        let groups: Vec<LaneGroup> = fits
            .iter()
            .enumerate()
            .flat_map(|(f, fs)| LaneGroup::of(f as u32, fs, 3))
            .collect();
        assert_eq!(groups.len(), 6);
        let sums = fold_error_sums(&src, &rows, &held, &groups);
        for (f, fs) in fits.iter().enumerate() {
            let fit: Vec<usize> = (0..n).filter(|&i| fx.owner[i] != f as u32).collect();
            let score: Vec<usize> = (0..n).filter(|&i| fx.owner[i] == f as u32).collect();
            let (on_fit, on_score) = error_sums_both(&src, &fit, &score, fs);
            for k in 0..fs.len() {
                let s = &sums[2 * f + k / FITS];
                let l = k % FITS;
                assert_eq!((s[0][l], s[1][l]), on_fit[k], "fold {f} fit {k}");
                assert_eq!((s[2][l], s[3][l]), on_score[k], "fold {f} fit {k}");
                assert!(on_score[k].0 > 0.0);
            }
        }
    }

    /// The shared sweep gives the bits of the one-thread sweep, for any thread count and any
    /// first split of the groups, whichever thread ends up sweeping which group from which step
    /// on. A thread that starts with no group must take groups over (the test sees that
    /// handovers happen).
    #[test]
    fn a_shared_sweep_with_handovers_equals_one_sweep() {
        let n = 20_001; // five steps, the last one short; coprime with 7 (table_row)
        let fx = fixture(n);
        let refs = fx.refs();
        let src = fx.source(&refs);
        let rows: Vec<usize> = (0..n).filter(|i| i % 5 != 0).collect();
        let held: Vec<u64> = rows.iter().map(|&i| 1u64 << fx.owner[i]).collect();
        let groups: Vec<LaneGroup> = (0..3u32)
            .flat_map(|f| {
                let fit: Vec<usize> = rows.iter().copied().filter(|&i| fx.owner[i] != f).collect();
                let lambdas: Vec<f64> = (0..11).map(|k| 0.01 * 3f64.powi(k)).collect();
                let fits = Gram::of(&src, &fit).solve(&lambdas).unwrap();
                LaneGroup::of(f, &fits, 3)
            })
            .collect();
        assert_eq!(groups.len(), 6);
        let want = fold_error_sums(&src, &rows, &held, &groups);
        let bits = |v: &[LaneSums]| -> Vec<u64> {
            v.iter().flatten().flatten().map(|x| x.to_bits()).collect()
        };
        for threads in 1..=4 {
            let got = fold_error_sums_shared(&src, &rows, &held, &groups, threads);
            assert_eq!(bits(&got), bits(&want), "{threads} threads");
        }
        let mut handovers = 0;
        for _ in 0..10 {
            for bounds in [&[0, 0, 6][..], &[0, 1, 6], &[0, 0, 0, 6], &[0, 5, 6, 6]] {
                let (got, h) = shared_sweep(&src, &rows, &held, &groups, bounds);
                assert_eq!(bits(&got), bits(&want), "bounds {bounds:?}");
                handovers += h;
            }
        }
        assert!(handovers > 0);
    }

    /// A fold's fitting-row Gram as all rows minus its held-out rows solves to the same
    /// coefficients as a direct pass over its fitting rows (to rounding).
    #[test]
    fn total_minus_fold_equals_a_direct_pass() {
        let n = 600;
        let mut rng = crate::testgen::Lcg(7);
        let mut next = || rng.unit();
        let cols: Vec<Vec<f64>> = (0..3)
            .map(|j| {
                (0..n)
                    .map(|_| 50.0 * j as f64 + next() * (1.0 + j as f64))
                    .collect()
            })
            .collect();
        let y: Vec<f64> = (0..n)
            .map(|i| cols[0][i] - 2.0 * cols[2][i] + next())
            .collect();
        let refs: Vec<&[f64]> = cols.iter().map(|c| c.as_slice()).collect();
        let ident: Vec<usize> = (0..n).collect();
        let src = Source {
            columns: &refs,
            target: &y,
            table_row: &ident,
        };
        let folds: Vec<Vec<usize>> = (0..3)
            .map(|f| (0..n).filter(|i| i % 3 == f).collect())
            .collect();
        let shift = Gram::row(&src, 0);
        let held: Vec<Gram> = folds
            .iter()
            .map(|r| Gram::of_shifted(&src, r, &shift))
            .collect();
        let total = Gram::total(&held).unwrap();
        assert_eq!(total.n, n);
        for (f, h) in held.iter().enumerate() {
            let fit: Vec<usize> = (0..n).filter(|i| i % 3 != f).collect();
            let a = total.minus(h).solve(&[0.5, 10.0]).unwrap();
            let b = Gram::of(&src, &fit).solve(&[0.5, 10.0]).unwrap();
            for ((ia, wa), (ib, wb)) in a.iter().zip(&b) {
                assert!((ia - ib).abs() <= 1e-10 * ib.abs().max(1.0), "{ia} {ib}");
                for (x, z) in wa.iter().zip(wb) {
                    assert!((x - z).abs() <= 1e-10 * z.abs().max(1e-3), "{x} {z}");
                }
            }
        }
    }
}

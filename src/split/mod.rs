//! Partition assignment (train, validation, test) and fold generation.
//!
//! Everything here is a pure function of (rows, split settings, seed): no data values other
//! than the columns the method needs, no clock, no global randomness. Row indices refer to the
//! rows kept after missing-value handling, in file order.

pub mod rng;

use crate::error::{Error, Result};
use rng::{Domain, shuffle, stream};
use sha2::{Digest, Sha256};

/// Which partition a row belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Part {
    Train,
    Validation,
    Test,
}

impl Part {
    /// One byte per row in the ledger's compact assignment.
    pub fn code(self) -> u8 {
        match self {
            Part::Train => b'r',
            Part::Validation => b'v',
            Part::Test => b't',
        }
    }
}

/// How many folds of the development rows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Folds {
    K(usize),
    LeaveOneOut,
}

/// The split method, with the columns it needs already resolved to per-row values.
#[derive(Debug, Clone)]
pub enum Method {
    Random,
    /// Target binned into `bins` quantile bins (regression), or by class when `by_class` (the
    /// target then holds class indices), and kept in proportion.
    Stratified {
        bins: usize,
        by_class: bool,
    },
    /// Whole groups, chosen so each partition and fold gets close to its share of every stratum
    /// (class, or quantile bin of the target when `bins` > 0).
    StratifiedGroup {
        groups: Vec<u32>,
        bins: usize,
    },
    /// Per-row group codes; a group never straddles partitions or folds.
    Group {
        groups: Vec<u32>,
    },
    /// Per-row order values; the last rows are test, folds chain forward.
    Time {
        order: Vec<f64>,
    },
    /// Per-row keys; test membership by a keyed hash, stable when rows are appended.
    Hash {
        keys: Vec<String>,
    },
    /// Per-row assignment read from a column.
    Column {
        parts: Vec<Part>,
    },
}

/// Everything the split needs.
#[derive(Debug, Clone)]
pub struct SplitInput<'a> {
    pub method: Method,
    pub seed: u64,
    pub test: f64,
    pub validation: f64,
    pub folds: Folds,
    pub repeats: usize,
    /// Target values (used by `stratified` only).
    pub target: &'a [f64],
}

/// One fitting/scoring pair of row sets.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Fold {
    /// 0-based repeat.
    pub repeat: usize,
    /// 0-based fold within the repeat.
    pub index: usize,
    pub fit: Vec<usize>,
    pub score: Vec<usize>,
}

/// The result of a split.
#[derive(Debug, Clone)]
pub struct Partition {
    pub parts: Vec<Part>,
    pub folds: Vec<Fold>,
    /// True when a fixed validation partition is scored (no averaging over folds).
    pub holdout: bool,
}

impl Partition {
    pub fn rows_in(&self, p: Part) -> Vec<usize> {
        (0..self.parts.len())
            .filter(|&i| self.parts[i] == p)
            .collect()
    }
    pub fn count(&self, p: Part) -> usize {
        self.parts.iter().filter(|&&q| q == p).count()
    }
    /// Development rows: train and validation, in row order.
    pub fn development(&self) -> Vec<usize> {
        (0..self.parts.len())
            .filter(|&i| self.parts[i] != Part::Test)
            .collect()
    }
}

/// Assign partitions and build folds.
pub fn split(input: &SplitInput) -> Result<Partition> {
    let n = input.target.len();
    if n == 0 {
        return Err(Error::Input("the data has no rows to split".into()));
    }
    // A random split's fold order depends only on the number of development rows, known before
    // the assignment: its shuffles run beside the assignment's own.
    let early = match (&input.method, input.folds) {
        (Method::Random, Folds::K(k)) if input.validation == 0.0 => {
            let m = n - count_of(input.test, n);
            (k >= 2 && m > k).then_some((m, input.repeats))
        }
        _ => None,
    };
    let (parts, perms) = std::thread::scope(|s| {
        let perms = early.map(|(m, repeats)| {
            s.spawn(move || {
                (0..repeats)
                    .map(|r| shuffled_range(m, &mut stream(input.seed, Domain::Folds, r as u32)))
                    .collect::<Vec<_>>()
            })
        });
        let parts = assign(input, n);
        // A panic there is a bug: carry it on.
        let perms = perms.map(|h| h.join().unwrap_or_else(|e| std::panic::resume_unwind(e)));
        (parts, perms)
    });
    let parts = parts?;
    let test_n = parts.iter().filter(|&&p| p == Part::Test).count();
    if input.test > 0.0 && test_n == 0 {
        return Err(Error::Input(format!(
            "split: test = {} of {n} rows leaves no test row; raise test or set test = 0 to work without a sealed partition",
            input.test
        )));
    }
    let val: Vec<usize> = (0..n).filter(|&i| parts[i] == Part::Validation).collect();
    let train: Vec<usize> = (0..n).filter(|&i| parts[i] == Part::Train).collect();
    if train.is_empty() {
        return Err(Error::Input(
            "split: no training rows are left; lower test or validation".into(),
        ));
    }
    if !val.is_empty() {
        let folds = vec![Fold {
            repeat: 0,
            index: 0,
            fit: train,
            score: val,
        }];
        return Ok(Partition {
            parts,
            folds,
            holdout: true,
        });
    }
    if input.validation > 0.0 {
        return Err(Error::Input(format!(
            "split: validation = {} of {n} rows leaves no validation row; raise validation or set validation = 0 for k-fold cross-validation",
            input.validation
        )));
    }
    let folds = folds_with(input, &train, Domain::Folds, 0, perms)?;
    Ok(Partition {
        parts,
        folds,
        holdout: false,
    })
}

/// The (fit, score) row lists of folds `which`, in one pass over the rows.
fn fold_lists(
    dev: &[usize],
    fold_of: &[usize],
    sizes: &[usize],
    which: std::ops::Range<usize>,
) -> Vec<(Vec<usize>, Vec<usize>)> {
    let m = dev.len();
    let mut lists: Vec<(Vec<usize>, Vec<usize>)> = sizes[which.clone()]
        .iter()
        .map(|&s| (Vec::with_capacity(m - s), Vec::with_capacity(s)))
        .collect();
    for (&row, &f) in dev.iter().zip(fold_of) {
        for (g, (fit, score)) in (which.start..).zip(lists.iter_mut()) {
            if g == f {
                score.push(row);
            } else {
                fit.push(row);
            }
        }
    }
    lists
}

/// Exactly `c` of `n` positions, spread evenly (systematic selection): position `i` is taken when
/// `floor((i+1)c/n) > floor(ic/n)`. Any run of consecutive positions gets its share within one.
fn systematic(n: usize, c: usize) -> Vec<bool> {
    (0..n).map(|i| (i + 1) * c / n > i * c / n).collect()
}

fn count_of(frac: f64, n: usize) -> usize {
    ((frac * n as f64).round() as usize).min(n)
}

/// 0..n shuffled (`rng::shuffle`). The same swaps on 32-bit indices when they fit: half the
/// memory for the random accesses of a large shuffle, the same order.
fn shuffled_range(n: usize, rng: &mut rand_chacha::ChaCha20Rng) -> Vec<usize> {
    match u32::try_from(n) {
        Ok(n32) => {
            let mut order: Vec<u32> = (0..n32).collect();
            shuffle(rng, &mut order);
            order.into_iter().map(|i| i as usize).collect()
        }
        Err(_) => {
            let mut order: Vec<usize> = (0..n).collect();
            shuffle(rng, &mut order);
            order
        }
    }
}

fn assign(input: &SplitInput, n: usize) -> Result<Vec<Part>> {
    let n_test = count_of(input.test, n);
    let n_val = count_of(input.validation, n).min(n - n_test);
    let mut parts = vec![Part::Train; n];
    match &input.method {
        Method::Random => {
            let order = shuffled_range(n, &mut stream(input.seed, Domain::Partition, 0));
            for (pos, row) in order.into_iter().enumerate() {
                parts[row] = if pos < n_test {
                    Part::Test
                } else if pos < n_test + n_val {
                    Part::Validation
                } else {
                    Part::Train
                };
            }
        }
        Method::Stratified { bins, by_class } => {
            let order = strata_order(
                input.target,
                if *by_class { 0 } else { *bins },
                input.seed,
                Domain::Partition,
                0,
                &(0..n).collect::<Vec<_>>(),
            );
            let take_test = systematic(n, n_test);
            let rest: Vec<usize> = order
                .iter()
                .zip(&take_test)
                .filter(|(_, t)| !**t)
                .map(|(r, _)| *r)
                .collect();
            for (row, t) in order.iter().zip(&take_test) {
                if *t {
                    parts[*row] = Part::Test;
                }
            }
            for (row, v) in rest.iter().zip(systematic(rest.len(), n_val)) {
                if v {
                    parts[*row] = Part::Validation;
                }
            }
        }
        Method::StratifiedGroup { groups, bins } => {
            let strata = strata_of(input.target, *bins, &(0..n).collect::<Vec<_>>());
            let fracs = [
                input.test,
                input.validation,
                1.0 - input.test - input.validation,
            ];
            let bucket = balanced_groups(
                groups,
                &strata,
                &(0..n).collect::<Vec<_>>(),
                &fracs,
                input.seed,
                Domain::Partition,
                0,
            );
            for i in 0..n {
                parts[i] = [Part::Test, Part::Validation, Part::Train][bucket[groups[i] as usize]];
            }
        }
        Method::Group { groups } => {
            let order = shuffled_groups(
                groups,
                input.seed,
                Domain::Partition,
                0,
                &(0..n).collect::<Vec<_>>(),
            );
            let sizes = group_sizes(groups);
            let mut to_test = Vec::new();
            let mut to_val = Vec::new();
            let (mut t, mut v) = (0usize, 0usize);
            for &g in &order {
                let s = sizes[g as usize];
                // Take a group when that brings the count closer to the target, never further.
                if 2 * (t + s) <= 2 * n_test + s && n_test > 0 {
                    t += s;
                    to_test.push(g);
                } else if 2 * (v + s) <= 2 * n_val + s && n_val > 0 {
                    v += s;
                    to_val.push(g);
                }
            }
            let mut which = vec![Part::Train; sizes.len()];
            for g in to_test {
                which[g as usize] = Part::Test;
            }
            for g in to_val {
                which[g as usize] = Part::Validation;
            }
            for i in 0..n {
                parts[i] = which[groups[i] as usize];
            }
        }
        Method::Time { order } => {
            let sorted = time_order(order, &(0..n).collect::<Vec<_>>());
            let test_start = if n_test == 0 {
                n
            } else {
                snap(order, &sorted, n - n_test, "test")?
            };
            let val_start = if n_val == 0 {
                test_start
            } else {
                snap(
                    order,
                    &sorted,
                    test_start.saturating_sub(n_val),
                    "validation",
                )?
            };
            for (pos, &row) in sorted.iter().enumerate() {
                parts[row] = if pos >= test_start {
                    Part::Test
                } else if pos >= val_start {
                    Part::Validation
                } else {
                    Part::Train
                };
            }
        }
        Method::Hash { keys } => {
            for (i, key) in keys.iter().enumerate() {
                let u = key_unit(input.seed, key);
                parts[i] = if u < input.test {
                    Part::Test
                } else if u < input.test + input.validation {
                    Part::Validation
                } else {
                    Part::Train
                };
            }
        }
        Method::Column { parts: given } => parts.clone_from(given),
    }
    Ok(parts)
}

/// A keyed hash of (seed, key) as a number in [0, 1): the first 8 bytes of
/// SHA-256("probity-hash-split" || seed (8 bytes LE) || key), over 2^64.
pub fn key_unit(seed: u64, key: &str) -> f64 {
    let mut h = Sha256::new();
    h.update(b"probity-hash-split");
    h.update(seed.to_le_bytes());
    h.update(key.as_bytes());
    let d = h.finalize();
    let mut b = [0u8; 8];
    b.copy_from_slice(&d[..8]);
    // 53 high bits give an exactly representable value in [0, 1).
    (u64::from_be_bytes(b) >> 11) as f64 / (1u64 << 53) as f64
}

/// Rows ordered by (quantile bin of target, shuffled position): the order that systematic
/// selection and round-robin dealing turn into stratified sets. `bins` = 0 takes the target
/// itself (a class index) as the stratum.
fn strata_order(
    target: &[f64],
    bins: usize,
    seed: u64,
    domain: Domain,
    index: u32,
    rows: &[usize],
) -> Vec<usize> {
    let mut shuffled = rows.to_vec();
    shuffle(&mut stream(seed, domain, index), &mut shuffled);
    let mut by_value = rows.to_vec();
    by_value.sort_by(|&a, &b| target[a].total_cmp(&target[b]).then(a.cmp(&b)));
    let m = rows.len();
    let mut bin_of = std::collections::BTreeMap::new();
    for (rank, &row) in by_value.iter().enumerate() {
        bin_of.insert(
            row,
            if bins == 0 {
                target[row] as usize
            } else {
                rank * bins / m.max(1)
            },
        );
    }
    let mut keyed: Vec<(usize, usize, usize)> = shuffled
        .iter()
        .enumerate()
        .map(|(pos, &row)| (bin_of[&row], pos, row))
        .collect();
    keyed.sort_unstable();
    keyed.into_iter().map(|(_, _, row)| row).collect()
}

/// Stratum of each row (indexed by row; rows outside `rows` get 0): the class index when
/// `bins` = 0, else the quantile bin of the target among `rows`.
fn strata_of(target: &[f64], bins: usize, rows: &[usize]) -> Vec<usize> {
    let mut out = vec![0usize; target.len()];
    if bins == 0 {
        for &r in rows {
            out[r] = target[r] as usize;
        }
        return out;
    }
    let mut by_value = rows.to_vec();
    by_value.sort_by(|&a, &b| target[a].total_cmp(&target[b]).then(a.cmp(&b)));
    for (rank, &r) in by_value.iter().enumerate() {
        out[r] = rank * bins / rows.len().max(1);
    }
    out
}

/// Assign whole groups (among `rows`) to buckets with target shares `fracs`: groups largest
/// first (ties in seeded order), each to the bucket where it most reduces the squared gap
/// between the bucket's per-stratum counts and their targets (ties to the lower bucket).
/// Returns the bucket of each group code.
fn balanced_groups(
    groups: &[u32],
    strata: &[usize],
    rows: &[usize],
    fracs: &[f64],
    seed: u64,
    domain: Domain,
    index: u32,
) -> Vec<usize> {
    let order = shuffled_groups(groups, seed, domain, index, rows);
    let ngroups = groups.iter().copied().max().map_or(0, |g| g as usize + 1);
    let nstrata = rows.iter().map(|&r| strata[r] + 1).max().unwrap_or(1);
    let mut counts = vec![vec![0f64; nstrata]; ngroups];
    let mut totals = vec![0f64; nstrata];
    for &r in rows {
        counts[groups[r] as usize][strata[r]] += 1.0;
        totals[strata[r]] += 1.0;
    }
    let size = |g: u32| counts[g as usize].iter().sum::<f64>();
    let mut by_size = order.clone();
    by_size.sort_by(|a, b| size(*b).total_cmp(&size(*a)));
    let mut load = vec![vec![0f64; nstrata]; fracs.len()];
    let mut bucket = vec![usize::MAX; ngroups];
    for g in by_size {
        let gc = &counts[g as usize];
        let mut best = (f64::INFINITY, 0usize);
        for (b, f) in fracs.iter().enumerate() {
            if *f <= 0.0 {
                continue;
            }
            let delta: f64 = (0..nstrata)
                .map(|c| {
                    let t = f * totals[c];
                    (load[b][c] + gc[c] - t).powi(2) - (load[b][c] - t).powi(2)
                })
                .sum();
            if delta < best.0 {
                best = (delta, b);
            }
        }
        bucket[g as usize] = best.1;
        for c in 0..nstrata {
            load[best.1][c] += gc[c];
        }
    }
    bucket
}

fn group_sizes(groups: &[u32]) -> Vec<usize> {
    let max = groups.iter().copied().max().map_or(0, |g| g as usize + 1);
    let mut sizes = vec![0usize; max];
    for &g in groups {
        sizes[g as usize] += 1;
    }
    sizes
}

/// The distinct groups present among `rows`, in a seeded random order.
fn shuffled_groups(
    groups: &[u32],
    seed: u64,
    domain: Domain,
    index: u32,
    rows: &[usize],
) -> Vec<u32> {
    let mut present: Vec<u32> = rows.iter().map(|&r| groups[r]).collect();
    present.sort_unstable();
    present.dedup();
    shuffle(&mut stream(seed, domain, index), &mut present);
    present
}

/// Rows sorted by order value, ties by row index.
fn time_order(order: &[f64], rows: &[usize]) -> Vec<usize> {
    let mut sorted = rows.to_vec();
    sorted.sort_by(|&a, &b| order[a].total_cmp(&order[b]).then(a.cmp(&b)));
    sorted
}

/// Move a cut in time-sorted rows to the nearest boundary between distinct order values, so rows
/// that share a time stay on one side (ties go to the later side when equally near).
fn snap(order: &[f64], sorted: &[usize], cut: usize, what: &str) -> Result<usize> {
    let n = sorted.len();
    let boundary = |c: usize| c > 0 && c < n && order[sorted[c - 1]] != order[sorted[c]];
    if cut == 0 || cut >= n || boundary(cut) {
        return Ok(cut);
    }
    for d in 1..n {
        if cut + d < n && boundary(cut + d) {
            return Ok(cut + d);
        }
        if cut >= d && boundary(cut - d) {
            return Ok(cut - d);
        }
    }
    Err(Error::Input(format!(
        "split: every row has the same order value, so {what} cannot be cut in time; use another method or order column"
    )))
}

/// Sizes of `k` near-equal contiguous chunks of `m` items (the first `m % k` get one more).
fn chunk_sizes(m: usize, k: usize) -> Vec<usize> {
    (0..k).map(|i| m / k + usize::from(i < m % k)).collect()
}

/// Folds over `dev` (row indices) by the input's method; repeat r draws from the stream
/// `(seed, domain, index + r)`. The run's folds use `Domain::Folds`; nested cross-validation's
/// inner folds use their own domain.
pub fn folds_of(
    input: &SplitInput,
    dev: &[usize],
    domain: Domain,
    index: u32,
) -> Result<Vec<Fold>> {
    folds_with(input, dev, domain, index, None)
}

/// `folds_of`, with the exchangeable methods' shuffles of `0..dev.len()` per repeat already made
/// (`split` makes them beside the assignment); they are used only when they are those.
fn folds_with(
    input: &SplitInput,
    dev: &[usize],
    domain: Domain,
    index: u32,
    mut perms: Option<Vec<Vec<usize>>>,
) -> Result<Vec<Fold>> {
    let m = dev.len();
    let k = match input.folds {
        Folds::K(k) => k,
        Folds::LeaveOneOut => m,
    };
    if k < 2 {
        return Err(Error::Input(format!(
            "split: folds = {k}; cross-validation needs at least 2 folds"
        )));
    }
    if m < k {
        return Err(Error::Input(format!(
            "split: {m} development rows are fewer than the {k} folds; lower folds (or use folds = \"loo\")"
        )));
    }
    let loo = k == m;
    let repeats = if loo { 1 } else { input.repeats };
    let mut folds = Vec::new();
    for r in 0..repeats {
        let ridx = index + r as u32;
        // fold_of[pos in dev] for the exchangeable methods; time builds its own.
        let fold_of: Vec<usize> = match &input.method {
            Method::Time { order } => {
                let sorted = time_order(order, dev);
                let mut bounds = vec![0];
                let mut at = 0;
                for s in chunk_sizes(m, k + 1) {
                    at += s;
                    bounds.push(at);
                }
                for b in bounds.iter_mut().take(k + 1).skip(1) {
                    *b = snap(order, &sorted, *b, "a fold")?;
                }
                if bounds.windows(2).any(|w| w[0] >= w[1]) {
                    return Err(Error::Input(format!(
                        "split: the development rows have too few distinct order values for {k} forward-chaining folds; lower folds"
                    )));
                }
                let blocks: Vec<Vec<usize>> = bounds
                    .windows(2)
                    .map(|w| sorted[w[0]..w[1]].to_vec())
                    .collect();
                for i in 1..=k {
                    let mut fit: Vec<usize> = blocks[..i].concat();
                    fit.sort_unstable();
                    let mut score = blocks[i].clone();
                    score.sort_unstable();
                    folds.push(Fold {
                        repeat: r,
                        index: i - 1,
                        fit,
                        score,
                    });
                }
                continue;
            }
            Method::Stratified { bins, by_class } => {
                let order = strata_order(
                    input.target,
                    if *by_class { 0 } else { *bins },
                    input.seed,
                    domain,
                    ridx,
                    dev,
                );
                let mut f = std::collections::BTreeMap::new();
                for (pos, row) in order.into_iter().enumerate() {
                    f.insert(row, pos % k);
                }
                dev.iter().map(|r| f[r]).collect()
            }
            Method::StratifiedGroup { groups, bins } => {
                let present = shuffled_groups(groups, input.seed, domain, ridx, dev).len();
                if present < k {
                    return Err(Error::Input(format!(
                        "split: the development rows hold {present} groups, fewer than the {k} folds; lower folds or use another method"
                    )));
                }
                let strata = strata_of(input.target, *bins, dev);
                let fracs = vec![1.0 / k as f64; k];
                let bucket =
                    balanced_groups(groups, &strata, dev, &fracs, input.seed, domain, ridx);
                dev.iter().map(|&r| bucket[groups[r] as usize]).collect()
            }
            Method::Group { groups } => {
                let order = shuffled_groups(groups, input.seed, domain, ridx, dev);
                if order.len() < k {
                    return Err(Error::Input(format!(
                        "split: the development rows hold {} groups, fewer than the {k} folds; lower folds or use another method",
                        order.len()
                    )));
                }
                let sizes = group_sizes(groups);
                let mut by_size = order.clone();
                // Largest groups first (stable, so ties keep the seeded order), each to the
                // lightest fold so far, ties to the lower fold.
                by_size.sort_by(|a, b| sizes[*b as usize].cmp(&sizes[*a as usize]));
                let mut load = vec![0usize; k];
                let mut fold_of_group = vec![usize::MAX; sizes.len()];
                for g in by_size {
                    let f = (0..k).min_by_key(|&f| (load[f], f)).unwrap_or(0);
                    load[f] += sizes[g as usize];
                    fold_of_group[g as usize] = f;
                }
                dev.iter()
                    .map(|&r| fold_of_group[groups[r] as usize])
                    .collect()
            }
            _ => {
                let made = perms
                    .as_mut()
                    .filter(|p| {
                        domain == Domain::Folds
                            && index == 0
                            && p.len() == repeats
                            && p[r].len() == m
                    })
                    .map(|p| std::mem::take(&mut p[r]));
                let perm: Vec<usize> = if loo {
                    (0..m).collect()
                } else if let Some(perm) = made {
                    perm
                } else {
                    shuffled_range(m, &mut stream(input.seed, domain, ridx))
                };
                let mut f = vec![0usize; m];
                let mut pos = 0;
                for (fold, size) in chunk_sizes(m, k).into_iter().enumerate() {
                    for &p in &perm[pos..pos + size] {
                        f[p] = fold;
                    }
                    pos += size;
                }
                f
            }
        };
        let mut sizes = vec![0usize; k];
        fold_of.iter().for_each(|&f| sizes[f] += 1);
        // Each fold's lists, the folds in two halves on two threads for a large split (the
        // same lists; a million-row split spent most of its time here).
        let lists = if m >= 100_000 {
            std::thread::scope(|s| {
                let high = s.spawn(|| fold_lists(dev, &fold_of, &sizes, k / 2..k));
                let mut low = fold_lists(dev, &fold_of, &sizes, 0..k / 2);
                // A panic there is a bug: carry it on.
                low.extend(high.join().unwrap_or_else(|e| std::panic::resume_unwind(e)));
                low
            })
        } else {
            fold_lists(dev, &fold_of, &sizes, 0..k)
        };
        for (fold, (fit, score)) in lists.into_iter().enumerate() {
            if score.is_empty() {
                return Err(Error::Input(format!(
                    "split: fold {} of repeat {} has no rows; lower folds",
                    fold + 1,
                    r + 1
                )));
            }
            folds.push(Fold {
                repeat: r,
                index: fold,
                fit,
                score,
            });
        }
    }
    Ok(folds)
}

#[cfg(test)]
mod tests;

//! Numbers that say how far a test score can be trusted: the percentile bootstrap, the expected
//! maximum of k standard normals, and the Hoeffding-plus-union width; and how closely one
//! column follows another (whether a run's target is a sealed target under another name).
//! Pure functions; the bootstrap draws from the seeded ChaCha20 stream it is given.

use crate::split::rng::bounded;
use rand_chacha::ChaCha20Rng;

/// Standard normal density.
fn phi(x: f64) -> f64 {
    (-0.5 * x * x).exp() / (2.0 * std::f64::consts::PI).sqrt()
}

/// E[max of k independent standard normals] = integral of x k phi(x) Phi(x)^(k-1) dx, by
/// composite Simpson on [-12, 12] with Phi accumulated by Simpson on the same grid (Tippett 1925;
/// Harter 1961 tabulates it). Exact to about 1e-10; 0 for k <= 1.
pub fn expected_max_normal(k: usize) -> f64 {
    if k <= 1 {
        return 0.0;
    }
    const STEPS: usize = 24_000; // h = 0.001
    let (a, b) = (-12.0f64, 12.0f64);
    let h = (b - a) / STEPS as f64;
    // Phi at each grid point: Phi(a) is below 1e-32, so start from 0.
    let mut cdf = vec![0.0f64; STEPS + 1];
    for i in 1..=STEPS {
        let x0 = a + (i - 1) as f64 * h;
        let x1 = x0 + h;
        cdf[i] = cdf[i - 1] + h / 6.0 * (phi(x0) + 4.0 * phi(0.5 * (x0 + x1)) + phi(x1));
    }
    let km1 = (k - 1) as i32;
    let f = |i: usize| {
        let x = a + i as f64 * h;
        x * k as f64 * phi(x) * cdf[i].min(1.0).powi(km1)
    };
    let mut sum = f(0) + f(STEPS);
    for i in 1..STEPS {
        sum += if i % 2 == 1 { 4.0 * f(i) } else { 2.0 * f(i) };
    }
    sum * h / 3.0
}

/// Simultaneous two-sided width for k fixed candidates on n rows of a metric in [0, 1] at
/// confidence 1 - delta: sqrt(ln(2k/delta) / (2n)) (Hoeffding 1963 with a union bound).
pub fn hoeffding_union(n: usize, k: usize, delta: f64) -> f64 {
    ((2.0 * k.max(1) as f64 / delta).ln() / (2.0 * n as f64)).sqrt()
}

/// The scale sqrt(k/n) at which k adaptively chosen reveals can overfit n rows (Blum & Hardt
/// 2015, the boosting attack).
pub fn adaptive_scale(n: usize, k: usize) -> f64 {
    (k as f64 / n as f64).sqrt()
}

/// Bootstrap replicates: `resamples` draws of n row positions with replacement (our own bounded
/// draw over the ChaCha20 stream), each passed to `stat`, which returns one value per statistic
/// (None where undefined). Returns `[statistic][replicate]` of the defined values.
pub fn bootstrap(
    n: usize,
    resamples: usize,
    rng: &mut ChaCha20Rng,
    stats: usize,
    stat: impl Fn(&[usize]) -> Vec<Option<f64>>,
) -> Vec<Vec<f64>> {
    let mut out = vec![Vec::with_capacity(resamples); stats];
    let mut idx = vec![0usize; n];
    for _ in 0..resamples {
        for slot in idx.iter_mut() {
            *slot = bounded(rng, n as u64) as usize;
        }
        for (s, v) in stat(&idx).into_iter().enumerate() {
            if let Some(v) = v {
                out[s].push(v);
            }
        }
    }
    out
}

/// Percentile interval at `confidence` (Efron & Tibshirani 1993, sec. 13.3): with B sorted
/// replicates and a = (1 - confidence)/2, the ceil(B a)-th and ceil(B (1 - a))-th values
/// (1-based); B = 2000 and 95% give the 50th and the 1950th. Also the bootstrap standard error
/// (sd with B - 1). `None` with fewer than two replicates.
pub fn percentile_interval(mut reps: Vec<f64>, confidence: f64) -> Option<(f64, f64, f64)> {
    let b = reps.len();
    if b < 2 {
        return None;
    }
    reps.sort_by(f64::total_cmp);
    let a = (1.0 - confidence) / 2.0;
    // A small guard keeps 2000 * 0.025 = 50 from landing on 51 through rounding.
    let lo = ((b as f64 * a) - 1e-9).ceil().max(1.0) as usize;
    let hi = ((b as f64 * (1.0 - a)) - 1e-9).ceil().clamp(1.0, b as f64) as usize;
    let mut mean = reps.iter().sum::<f64>() / b as f64;
    if !mean.is_finite() {
        // The sum overflowed (values near the largest f64); the mean itself is in range.
        mean = reps.iter().map(|v| v / b as f64).sum::<f64>();
    }
    let (var, scale) = crate::metrics::scaled_variance(&reps, mean, b as f64 - 1.0);
    Some((reps[lo - 1], reps[hi - 1], scale * var.sqrt()))
}

/// Laplace(0, scale) from a uniform u in (0, 1) by the inverse CDF:
/// scale ln(2u) for u < 1/2, -scale ln(2(1 - u)) otherwise.
pub fn laplace(u: f64, scale: f64) -> f64 {
    if u < 0.5 {
        scale * (2.0 * u).ln()
    } else {
        -scale * (2.0 * (1.0 - u)).ln()
    }
}

/// A uniform in (0, 1), never 0 or 1: the top 53 bits of a draw, plus half a step.
pub fn unit_open(rng: &mut ChaCha20Rng) -> f64 {
    use rand_core::Rng;
    ((rng.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::split::rng::{Domain, stream};

    /// Check values from ../shared/METHODS.md section 3 (computed there by numerical integration;
    /// k = 2 and 3 match the closed forms 1/sqrt(pi) and 3/(2 sqrt(pi))).
    #[test]
    fn expected_maximum_matches_tabulated_values() {
        for (k, want) in [
            (2, 0.564190),
            (3, 0.846284),
            (5, 1.162964),
            (10, 1.538753),
            (20, 1.867475),
            (50, 2.249074),
            (100, 2.507594),
            (1000, 3.241436),
        ] {
            let got = expected_max_normal(k);
            assert!((got - want).abs() < 5e-7, "k = {k}: {got} vs {want}");
        }
        assert!((expected_max_normal(2) - 1.0 / std::f64::consts::PI.sqrt()).abs() < 1e-10);
        assert!((expected_max_normal(3) - 1.5 / std::f64::consts::PI.sqrt()).abs() < 1e-10);
        assert_eq!(expected_max_normal(1), 0.0);
    }

    /// METHODS.md section 3 table: eps(n, k, delta) two-sided.
    #[test]
    fn hoeffding_union_widths() {
        for (n, k, want) in [
            (1000, 1, 0.042947),
            (1000, 20, 0.057813),
            (1000, 100, 0.064397),
            (1000, 1000, 0.072790),
            (5000, 20, 0.025855),
            (10000, 20, 0.018282),
        ] {
            let got = hoeffding_union(n, k, 0.05);
            assert!(
                (got - want).abs() < 5e-7,
                "n = {n}, k = {k}: {got} vs {want}"
            );
        }
        // Independently: sqrt(ln 800 / 2000), ln 800 = 6.684612 (METHODS.md).
        assert!((hoeffding_union(1000, 20, 0.05) - (800f64.ln() / 2000.0).sqrt()).abs() < 1e-15);
        assert!((adaptive_scale(400, 4) - 0.1).abs() < 1e-15);
    }

    /// METHODS.md section 1: Laplace inverse-CDF check values for b = 0.01.
    #[test]
    fn laplace_inverse_cdf() {
        for (u, want) in [
            (0.25, -0.00693147),
            (0.75, 0.00693147),
            (0.9, 0.01609438),
            (0.1, -0.01609438),
            (0.5, 0.0),
        ] {
            assert!((laplace(u, 0.01) - want).abs() < 5e-9, "u = {u}");
        }
    }

    /// For a 0/1 statistic the ideal bootstrap is Binomial(n, p)/n (METHODS.md section 6):
    /// n = 100, p = 0.85 gives SE 0.035707 and 95% limits [0.780, 0.920]. A seeded run of 2000
    /// resamples must land near them (RNG-dependent, so with a tolerance).
    #[test]
    fn bootstrap_of_a_proportion_matches_the_binomial() {
        let x: Vec<f64> = (0..100).map(|i| if i < 85 { 1.0 } else { 0.0 }).collect();
        let mut rng = stream(9, Domain::Bootstrap, 0);
        let reps = bootstrap(100, 2000, &mut rng, 1, |idx| {
            vec![Some(idx.iter().map(|&i| x[i]).sum::<f64>() / 100.0)]
        });
        let (lo, hi, se) = percentile_interval(reps[0].clone(), 0.95).unwrap();
        assert!((se - 0.035707).abs() < 0.003, "se {se}");
        assert!(
            (lo - 0.78).abs() <= 0.0101 && (hi - 0.92).abs() <= 0.0101,
            "[{lo}, {hi}]"
        );
        // Same seed, same replicates.
        let mut rng2 = stream(9, Domain::Bootstrap, 0);
        let again = bootstrap(100, 2000, &mut rng2, 1, |idx| {
            vec![Some(idx.iter().map(|&i| x[i]).sum::<f64>() / 100.0)]
        });
        assert_eq!(reps, again);
    }

    #[test]
    fn percentile_positions_follow_efron_tibshirani() {
        let reps: Vec<f64> = (1..=2000).map(f64::from).collect();
        let (lo, hi, _) = percentile_interval(reps, 0.95).unwrap();
        assert_eq!((lo, hi), (50.0, 1950.0));
        let reps: Vec<f64> = (1..=1000).rev().map(f64::from).collect();
        let (lo, hi, _) = percentile_interval(reps, 0.95).unwrap();
        assert_eq!((lo, hi), (25.0, 975.0));
    }
}

/// P(|T| < t) for Student's t with `df` (a whole number >= 1) degrees of freedom, by the finite
/// series in theta = atan(t / sqrt(df)) (Abramowitz & Stegun 1964, 26.7.3 for odd and 26.7.4 for
/// even df). Exact up to rounding for every df; no special function is needed.
pub fn student_t_central(t: f64, df: u64) -> f64 {
    if t.is_nan() || df == 0 {
        return f64::NAN;
    }
    let t = t.abs();
    if t.is_infinite() {
        return 1.0;
    }
    let theta = (t / (df as f64).sqrt()).atan();
    let (s, c) = theta.sin_cos();
    let c2 = c * c;
    if df % 2 == 1 {
        // (2/pi) [theta + sin cos (1 + (2/3) cos^2 + (2 4)/(3 5) cos^4 + ...)], df - 2 terms' worth
        let mut term = 1.0;
        let mut sum = if df > 1 { 1.0 } else { 0.0 };
        let mut k = 1u64;
        while 2 * k + 1 < df {
            term *= (2 * k) as f64 / (2 * k + 1) as f64 * c2;
            sum += term;
            k += 1;
        }
        (2.0 / std::f64::consts::PI * (theta + s * c * sum)).min(1.0)
    } else {
        // sin [1 + (1/2) cos^2 + (1 3)/(2 4) cos^4 + ...]
        let mut term = 1.0;
        let mut sum = 1.0;
        let mut k = 1u64;
        while 2 * k < df {
            term *= (2 * k - 1) as f64 / (2 * k) as f64 * c2;
            sum += term;
            k += 1;
        }
        (s * sum).min(1.0)
    }
}

/// Two-sided p-value of Student's t: P(|T| >= |t|).
pub fn student_t_two_sided_p(t: f64, df: u64) -> f64 {
    (1.0 - student_t_central(t, df)).max(0.0)
}

/// The t with P(|T| < t) = `central` (for example 0.95 for a 95 % interval), by bisection to
/// the last bit.
pub fn student_t_quantile(central: f64, df: u64) -> f64 {
    if !(central > 0.0 && central < 1.0) || df == 0 {
        return f64::NAN;
    }
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    while student_t_central(hi, df) < central {
        hi *= 2.0;
        if hi > 1e300 {
            return f64::INFINITY;
        }
    }
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if mid <= lo || mid >= hi {
            break;
        }
        if student_t_central(mid, df) < central {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

/// The corrected resampled t-test of two models scored on the same J resamples (Nadeau & Bengio
/// 2003, Machine Learning 52; the repeated k-fold form of Bouckaert & Frank 2004).
#[derive(Debug, Clone, PartialEq)]
pub struct ResampledT {
    /// Number of paired differences J.
    pub resamples: usize,
    /// Mean difference (first minus second).
    pub mean: f64,
    /// Sample variance of the differences (J - 1 denominator).
    pub variance: f64,
    /// Scored rows over fitting rows per resample, n2 / n1.
    pub ratio: f64,
    /// sqrt((1/J + n2/n1) s^2): the corrected standard error of the mean difference.
    pub se: f64,
    pub t: f64,
    pub df: u64,
    /// Two-sided.
    pub p: f64,
    /// 95 % interval of the mean difference: mean -/+ t(0.975, df) se.
    pub low: f64,
    pub high: f64,
}

/// `None` with fewer than two differences, a non-finite one, or no spread (every difference
/// equal: the test is undefined).
pub fn resampled_t(diffs: &[f64], ratio: f64) -> Option<ResampledT> {
    let j = diffs.len();
    if j < 2
        || !diffs.iter().all(|d| d.is_finite())
        || diffs.iter().all(|d| *d == diffs[0])
        || ratio.is_nan()
        || ratio < 0.0
    {
        return None;
    }
    let mean = diffs.iter().sum::<f64>() / j as f64;
    let variance = diffs.iter().map(|d| (d - mean) * (d - mean)).sum::<f64>() / (j - 1) as f64;
    if variance.is_nan() || variance <= 0.0 {
        return None;
    }
    let se = ((1.0 / j as f64 + ratio) * variance).sqrt();
    let t = mean / se;
    let df = (j - 1) as u64;
    let q = student_t_quantile(0.95, df);
    Some(ResampledT {
        resamples: j,
        mean,
        variance,
        ratio,
        se,
        t,
        df,
        p: student_t_two_sided_p(t, df),
        low: mean - q * se,
        high: mean + q * se,
    })
}

/// Average ranks (1-based; tied values share the mean of their ranks), in `v`'s order.
fn average_ranks(v: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..v.len()).collect();
    order.sort_by(|&i, &j| v[i].total_cmp(&v[j]).then(i.cmp(&j)));
    let mut ranks = vec![0.0; v.len()];
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && v[order[end]].total_cmp(&v[order[start]]).is_eq() {
            end += 1;
        }
        // Positions start..end (0-based) hold equal values: ranks start+1..=end.
        let mean = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = mean;
        }
        start = end;
    }
    ranks
}

/// Spearman's rank correlation (Spearman 1904, "The proof and measurement of association
/// between two things"; cited from memory): Pearson's correlation of the average ranks.
/// `None` when either column is constant (no ranking to compare) or the lengths differ.
pub fn spearman(a: &[f64], b: &[f64]) -> Option<f64> {
    if a.len() != b.len() || a.len() < 2 {
        return None;
    }
    let (ra, rb) = (average_ranks(a), average_ranks(b));
    let n = a.len() as f64;
    let (ma, mb) = (ra.iter().sum::<f64>() / n, rb.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in ra.iter().zip(&rb) {
        let (dx, dy) = (x - ma, y - mb);
        sab += dx * dy;
        saa += dx * dx;
        sbb += dy * dy;
    }
    (saa > 0.0 && sbb > 0.0).then(|| (sab / (saa * sbb).sqrt()).clamp(-1.0, 1.0))
}

/// The distinct values of `v` in order, and each row's index among them.
fn classes(v: &[f64]) -> (usize, Vec<usize>) {
    let mut levels = v.to_vec();
    levels.sort_by(f64::total_cmp);
    levels.dedup_by(|x, y| x.total_cmp(y).is_eq());
    let codes = v
        .iter()
        .map(|x| levels.partition_point(|l| l.total_cmp(x).is_lt()))
        .collect();
    (levels.len(), codes)
}

/// Cramér's V of the two columns' contingency table (Cramér 1946, Mathematical Methods of
/// Statistics; cited from memory; checked against scipy's implementation), without a
/// continuity correction: sqrt(chi^2 / (n (min(r, c) - 1))), 1 when each value of one column
/// goes with one value of the other. The table is kept sparse (its occupied cells, at most one
/// per row), using chi^2 = n (sum of O^2 / (row total x column total) - 1). `None` when either
/// column is constant.
pub fn cramer_v(a: &[f64], b: &[f64]) -> Option<f64> {
    if a.len() != b.len() || a.is_empty() {
        return None;
    }
    let ((r, ca), (c, cb)) = (classes(a), classes(b));
    if r < 2 || c < 2 {
        return None;
    }
    let mut rows = vec![0.0f64; r];
    let mut cols = vec![0.0f64; c];
    for (&i, &j) in ca.iter().zip(&cb) {
        rows[i] += 1.0;
        cols[j] += 1.0;
    }
    let mut cells: Vec<(usize, usize)> = ca.into_iter().zip(cb).collect();
    cells.sort_unstable();
    let mut sum = 0.0;
    let mut at = 0;
    while at < cells.len() {
        let mut end = at + 1;
        while end < cells.len() && cells[end] == cells[at] {
            end += 1;
        }
        let (i, j) = cells[at];
        let o = (end - at) as f64;
        sum += o * o / (rows[i] * cols[j]);
        at = end;
    }
    let n = a.len() as f64;
    let chi2 = (n * (sum - 1.0)).max(0.0);
    Some((chi2 / (n * (r.min(c) - 1) as f64)).sqrt().min(1.0))
}

/// Below this many rows an association is noise (a few honest rows agree in rank by chance
/// often enough, and a feature that tracks the target at 0.8 reaches 0.95 on 20 rows about
/// one time in twenty): only an exact relation counts there.
pub const MIN_ROWS: usize = 50;

/// Below this many rows nothing can be told apart (five honest rows fall in the same order by
/// chance one time in sixty, and far more often when they track the target loosely): a run
/// for another target on so few of a partition's test rows counts.
pub const FEW_ROWS: usize = 10;

/// From `FEW_ROWS` to `MIN_ROWS` rows, a rank correlation this close to 1 is an exact monotone
/// relation (a change of units, a logarithm, rounding that merges a tie or two). A feature
/// that tracks the target at 0.9 reaches it on 10 rows about one time in 250 (simulated with
/// scipy's spearmanr; our own figure).
pub const EXACT: f64 = 0.99;

/// At most this many distinct values make a column of classes whose labels can be swapped.
pub const FEW_CLASSES: usize = 50;

/// How closely column `b` follows column `a` over the same rows, from 0 (not at all) to 1 (one
/// is the other, renamed, rescaled or relabelled):
/// - below `FEW_ROWS` rows, 1: too few to tell;
/// - two constant columns follow each other (1); one constant beside a varying one does not
///   (0);
/// - from `MIN_ROWS` rows, the larger of |Spearman's rho| and, when the columns may be
///   classes (`classes`: a classification target or a text column on either side) with as
///   many values on each side (at most `FEW_CLASSES`, two rows or more a value), Cramér's V,
///   which sees labels swapped out of order. Columns of many values, or of unequal counts,
///   are not compared as classes: one value per group on both sides (a patient's outcome and
///   cost over repeated visits), or a class beside a per-group column, makes a table that is
///   one-sided or one-to-one by construction;
/// - in between, 1 for an exact relation (|rho| from `EXACT`, or three or more classes
///   relabelled one to one), else 0.
///
/// Each column is a number per row in an order that means something for it (text by its
/// levels' byte order); no missing values.
pub fn association(a: &[f64], b: &[f64], classes: bool) -> f64 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    if n < FEW_ROWS {
        return 1.0;
    }
    let (da, db) = (classes_of(a), classes_of(b));
    match (da, db) {
        (1, 1) => return 1.0,
        (1, _) | (_, 1) => return 0.0,
        _ => {}
    }
    let rho = spearman(a, b).map_or(0.0, f64::abs);
    let relabel = classes && da == db && da <= FEW_CLASSES && 2 * da <= n;
    if n < MIN_ROWS {
        let exact = rho >= EXACT || (relabel && da >= 3 && one_to_one(a, b));
        return if exact { 1.0 } else { 0.0 };
    }
    let v = if relabel {
        cramer_v(a, b).unwrap_or(0.0)
    } else {
        0.0
    };
    // A few classes of `b` over many values of `a`: a coarsened copy whatever the labels' order
    // (`low`, `medium`, `high` sort as `high`, `low`, `medium`).
    let eta = if classes && db < da && db <= FEW_CLASSES && 5 * db <= n {
        correlation_ratio(a, b)
    } else {
        0.0
    };
    rho.max(v).max(eta)
}

/// The correlation ratio eta of `a` grouped by the values of `b` (Pearson 1903; cited from
/// memory): sqrt(between-group sum of squares / total sum of squares), 1 when `b`'s classes
/// hold one value of `a` each, whatever order their labels sort in. 0 when `a` is constant.
pub fn correlation_ratio(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    if n == 0 {
        return 0.0;
    }
    let (k, codes) = classes(&b[..n]);
    let mean = a[..n].iter().sum::<f64>() / n as f64;
    let (mut sums, mut counts) = (vec![0.0; k], vec![0.0; k]);
    for (x, &c) in a[..n].iter().zip(&codes) {
        sums[c] += x;
        counts[c] += 1.0;
    }
    let total: f64 = a[..n].iter().map(|x| (x - mean) * (x - mean)).sum();
    if total == 0.0 {
        return 0.0;
    }
    let between: f64 = sums
        .iter()
        .zip(&counts)
        .map(|(s, c)| c * (s / c - mean) * (s / c - mean))
        .sum();
    (between / total).clamp(0.0, 1.0).sqrt()
}

/// Whether each value of `a` goes with one value of `b` and each value of `b` with one of `a`.
fn one_to_one(a: &[f64], b: &[f64]) -> bool {
    let mut pairs: Vec<(f64, f64)> = a.iter().copied().zip(b.iter().copied()).collect();
    pairs.sort_by(|x, y| x.0.total_cmp(&y.0).then(x.1.total_cmp(&y.1)));
    pairs.dedup_by(|x, y| x.0.total_cmp(&y.0).is_eq() && x.1.total_cmp(&y.1).is_eq());
    // One pair per value of a, and as many distinct values of b as of a.
    let mut firsts: Vec<f64> = pairs.iter().map(|p| p.0).collect();
    firsts.dedup_by(|x, y| x.total_cmp(y).is_eq());
    firsts.len() == pairs.len() && classes_of(b) == pairs.len()
}

/// How many distinct values `v` takes.
fn classes_of(v: &[f64]) -> usize {
    classes(v).0
}

#[cfg(test)]
mod association_tests {
    use super::*;

    #[test]
    fn spearman_and_cramer_v_match_scipy() {
        // tests/reference/association.json: scipy.stats.spearmanr,
        // scipy.stats.contingency.association(method="cramer", correction=False) and eta from
        // scipy.stats.f_oneway (scipy 1.17.1), written by tests/reference/make_association.py.
        let text = include_str!("../../tests/reference/association.json");
        let v: serde_json::Value = serde_json::from_str(text).unwrap();
        let col = |x: &serde_json::Value| -> Vec<f64> {
            x.as_array()
                .unwrap()
                .iter()
                .map(|c| c.as_f64().unwrap())
                .collect()
        };
        let cases = v["cases"].as_array().unwrap();
        assert_eq!(cases.len(), 9);
        for c in cases {
            let (a, b) = (col(&c["a"]), col(&c["b"]));
            let rho = spearman(&a, &b).unwrap();
            let want = c["spearman"].as_f64().unwrap();
            assert!((rho - want).abs() < 1e-12, "{a:?} {b:?}: {rho} vs {want}");
            let cv = cramer_v(&a, &b).unwrap();
            let want = c["cramer_v"].as_f64().unwrap();
            assert!((cv - want).abs() < 1e-12, "{a:?} {b:?}: {cv} vs {want}");
            if let Some(want) = c.get("eta").and_then(|e| e.as_f64()) {
                let eta = correlation_ratio(&a, &b);
                assert!(
                    (eta - want).abs() < 1e-12,
                    "{a:?} {b:?}: eta {eta} vs {want}"
                );
            }
        }
    }

    #[test]
    fn association_takes_classes_only_when_they_are_few() {
        // Three classes relabelled out of order on 60 rows: rho is -0.5, V is 1.
        let a: Vec<f64> = (0..60).map(|i| f64::from(i % 3)).collect();
        let b: Vec<f64> = a.iter().map(|x| [2.0, 0.0, 1.0][*x as usize]).collect();
        assert_eq!(association(&a, &b, true), 1.0);
        // Not read as classes on either side: ranks only.
        let r = association(&a, &b, false);
        assert!((r - 0.5).abs() < 1e-12, "{r}");
        // Four classes relabelled on 18 rows (below MIN_ROWS): one to one, so counted; not
        // as numbers, whose ranks disagree.
        let a: Vec<f64> = (0..18).map(|i| f64::from(i % 4)).collect();
        let b: Vec<f64> = a
            .iter()
            .map(|x| [2.0, 0.0, 3.0, 1.0][*x as usize])
            .collect();
        assert_eq!(association(&a, &b, true), 1.0);
        assert_eq!(association(&a, &b, false), 0.0);
        // One value per group of two rows (60 groups): one-to-one by construction, not a
        // relabelling; ranks decide. A binary outcome beside 30 per-group values: unequal
        // counts, ranks decide.
        let g: Vec<f64> = (0..120).map(|i| f64::from(i / 2)).collect();
        let h: Vec<f64> = (0..120).map(|i| f64::from((i / 2) * 37 % 61)).collect();
        assert!(association(&g, &h, true) < 0.5);
        let per: Vec<f64> = (0..60).map(|i| f64::from((i / 2) * 7 % 30)).collect();
        let outcome: Vec<f64> = (0..60).map(|i| f64::from((i / 2) % 2)).collect();
        assert!(association(&outcome, &per, true) < 0.5);
        // Three classes cut from 60 values, labelled out of order: eta sees the coarsening.
        let y: Vec<f64> = (0..60).map(|i| f64::from(i * 17 % 60)).collect();
        let cut: Vec<f64> = y
            .iter()
            .map(|v| [1.0, 2.0, 0.0][(*v / 20.0) as usize])
            .collect();
        assert!(association(&y, &cut, true) > 0.9);
        assert!(association(&y, &cut, false) < 0.8);
        // Between FEW_ROWS and MIN_ROWS: an exact monotone relation counts (a logarithm, a
        // rounded change of units), a loose one does not.
        let few: Vec<f64> = (0..12).map(|i| f64::from(i * 5 % 12) + 1.5).collect();
        let logs: Vec<f64> = few.iter().map(|v| v.ln()).collect();
        let pounds: Vec<f64> = few
            .iter()
            .map(|v| (v * 2.2046 * 100.0).round() / 100.0)
            .collect();
        assert_eq!(association(&few, &logs, false), 1.0);
        assert_eq!(association(&few, &pounds, false), 1.0);
        let mut loose = few.clone();
        loose.swap(0, 1);
        loose.swap(4, 7);
        assert_eq!(association(&few, &loose, false), 0.0);
        // Below FEW_ROWS nothing can be told apart.
        assert_eq!(association(&[1.0, 2.0, 3.0], &[7.0, 3.0, 5.0], false), 1.0);
        // Constant columns: both constant follow each other; one alone does not, on any
        // number of rows.
        assert_eq!(association(&[1.0; 60], &[7.0; 60], false), 1.0);
        let ramp: Vec<f64> = (0..60).map(f64::from).collect();
        assert_eq!(association(&ramp, &[1.0; 60], false), 0.0);
        assert_eq!(association(&ramp[..20], &[1.0; 20], false), 0.0);
    }
}

//! Metrics: pure functions of (truth, prediction) slices, with their direction.
//!
//! Regression predictions are one value per row. Classification truth is the class index per
//! row (as f64) and predictions are n x C probabilities, row-major. Sums are taken in row order,
//! so a score depends only on the rows and their order.

/// A scoring metric.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Metric {
    Rmse,
    Mse,
    Mae,
    R2,
    Accuracy,
    BalancedAccuracy,
    LogLoss,
    Brier,
    Auc,
}

/// Probabilities are clipped to [EPS, 1 - EPS] in the log-loss (the usual convention).
pub const LOG_LOSS_EPS: f64 = 1e-15;

impl Metric {
    /// The regression metrics, in the order tables and JSON list them.
    pub const REGRESSION: [Metric; 4] = [Metric::Rmse, Metric::Mse, Metric::Mae, Metric::R2];
    /// The classification metrics.
    pub const CLASSIFICATION: [Metric; 5] = [
        Metric::Accuracy,
        Metric::BalancedAccuracy,
        Metric::LogLoss,
        Metric::Brier,
        Metric::Auc,
    ];

    /// The metrics scored for a task.
    pub fn for_task(classification: bool) -> &'static [Metric] {
        if classification {
            &Metric::CLASSIFICATION
        } else {
            &Metric::REGRESSION
        }
    }

    pub fn name(self) -> &'static str {
        match self {
            Metric::Rmse => "rmse",
            Metric::Mse => "mse",
            Metric::Mae => "mae",
            Metric::R2 => "r2",
            Metric::Accuracy => "accuracy",
            Metric::BalancedAccuracy => "balanced_accuracy",
            Metric::LogLoss => "log_loss",
            Metric::Brier => "brier",
            Metric::Auc => "auc",
        }
    }

    pub fn parse(s: &str) -> Option<Metric> {
        Metric::REGRESSION
            .into_iter()
            .chain(Metric::CLASSIFICATION)
            .find(|m| m.name() == s)
    }

    pub fn is_classification(self) -> bool {
        Metric::CLASSIFICATION.contains(&self)
    }

    /// True when a larger value is better.
    pub fn higher_is_better(self) -> bool {
        matches!(
            self,
            Metric::R2 | Metric::Accuracy | Metric::BalancedAccuracy | Metric::Auc
        )
    }

    /// True when the metric is a mean of per-row values in [0, 1], as Thresholdout and the
    /// Hoeffding bound need: accuracy, and the binary Brier score.
    pub fn bounded_unit(self) -> bool {
        matches!(self, Metric::Accuracy | Metric::Brier)
    }

    /// True when `a` is strictly better than `b`.
    pub fn better(self, a: f64, b: f64) -> bool {
        if self.higher_is_better() {
            a > b
        } else {
            a < b
        }
    }

    /// The metric on one set of rows; `None` when it is undefined (r2 on rows with one value,
    /// AUC with one class present or more than two classes).
    pub fn score(self, y: &[f64], pred: &[f64], classes: usize) -> Option<f64> {
        let n = y.len();
        if n == 0 {
            return None;
        }
        match self {
            Metric::Mse | Metric::Rmse | Metric::Mae | Metric::R2 => {
                Truth::of(y).score_sums(self, &ErrorSums::of(y, pred))
            }
            Metric::Accuracy => {
                let hits = y
                    .iter()
                    .enumerate()
                    .filter(|(i, c)| predicted(pred, *i, classes) == **c as usize)
                    .count();
                Some(hits as f64 / n as f64)
            }
            Metric::BalancedAccuracy => {
                // Mean recall over the classes present among the scored rows.
                let mut seen = vec![0usize; classes];
                let mut hit = vec![0usize; classes];
                for (i, c) in y.iter().enumerate() {
                    let c = *c as usize;
                    seen[c] += 1;
                    if predicted(pred, i, classes) == c {
                        hit[c] += 1;
                    }
                }
                let present: Vec<f64> = (0..classes)
                    .filter(|&c| seen[c] > 0)
                    .map(|c| hit[c] as f64 / seen[c] as f64)
                    .collect();
                Some(present.iter().sum::<f64>() / present.len() as f64)
            }
            Metric::LogLoss => {
                let s: f64 = y
                    .iter()
                    .enumerate()
                    .map(|(i, c)| {
                        -pred[i * classes + *c as usize]
                            .clamp(LOG_LOSS_EPS, 1.0 - LOG_LOSS_EPS)
                            .ln()
                    })
                    .sum();
                Some(s / n as f64)
            }
            Metric::Brier => {
                // Binary: mean (p - y)^2 for the positive class. Multiclass: mean over rows of the
                // squared distance between the probability vector and the one-hot truth (Brier 1950).
                let s: f64 = if classes == 2 {
                    y.iter()
                        .enumerate()
                        .map(|(i, c)| (pred[i * 2 + 1] - *c).powi(2))
                        .sum()
                } else {
                    y.iter()
                        .enumerate()
                        .map(|(i, c)| {
                            (0..classes)
                                .map(|k| {
                                    (pred[i * classes + k]
                                        - if k == *c as usize { 1.0 } else { 0.0 })
                                    .powi(2)
                                })
                                .sum::<f64>()
                        })
                        .sum()
                };
                Some(s / n as f64)
            }
            Metric::Auc => {
                if classes != 2 {
                    return None;
                }
                let scores: Vec<f64> = (0..n).map(|i| pred[i * 2 + 1]).collect();
                auc(y, &scores)
            }
        }
    }
}

/// The class predicted for row `i` of row-major probabilities: `argmax` of its row, with the
/// two-class case as one comparison (the same answer: a tie or a NaN picks the first class).
fn predicted(pred: &[f64], i: usize, classes: usize) -> usize {
    if classes == 2 {
        usize::from(pred[2 * i + 1] > pred[2 * i])
    } else {
        argmax(&pred[i * classes..(i + 1) * classes])
    }
}

/// The first index of the largest value (ties go to the first class).
pub fn argmax(p: &[f64]) -> usize {
    let mut best = 0;
    for (i, v) in p.iter().enumerate() {
        if *v > p[best] {
            best = i;
        }
    }
    best
}

/// ROC AUC as the Mann-Whitney statistic with ties counted one half (Hanley & McNeil 1982):
/// the share of (positive, negative) pairs whose positive scores higher. Computed from midranks,
/// O(n log n). `None` without both classes.
pub fn auc(y: &[f64], score: &[f64]) -> Option<f64> {
    // The Mann-Whitney count: over positive rows, the negatives scored below plus half those
    // scored equal. Every term is a half-integer, so the sum is exact in any order (below 2^52
    // pairs) and equals the mid-rank formula bit for bit. Scores of each class are sorted as
    // integer keys (radix), then merged.
    let key = |v: f64| {
        // The total order of f64 (as `total_cmp`) as an unsigned integer order; -0 is 0 (the
        // same score, a tie).
        let b = (v + 0.0).to_bits();
        if b >> 63 == 1 { !b } else { b | (1 << 63) }
    };
    let mut pos: Vec<u64> = Vec::new();
    let mut neg: Vec<u64> = Vec::new();
    for (v, s) in y.iter().zip(score) {
        if *v == 1.0 {
            pos.push(key(*s));
        } else {
            neg.push(key(*s));
        }
    }
    if pos.is_empty() || neg.is_empty() {
        return None;
    }
    radix_sort(&mut pos);
    radix_sort(&mut neg);
    let (np, nn) = (pos.len() as f64, neg.len() as f64);
    let mut u = 0.0;
    let (mut below, mut i) = (0usize, 0usize);
    while i < pos.len() {
        let k = pos[i];
        let mut j = i;
        while j < pos.len() && pos[j] == k {
            j += 1;
        }
        while below < neg.len() && neg[below] < k {
            below += 1;
        }
        let mut equal = below;
        while equal < neg.len() && neg[equal] == k {
            equal += 1;
        }
        u += (j - i) as f64 * (below as f64 + 0.5 * (equal - below) as f64);
        i = j;
    }
    Some(u / (np * nn))
}

/// Sort integer keys, least significant 11 bits first; a pass whose digit is the same in every
/// key is skipped (probabilities share their leading bits).
fn radix_sort(v: &mut Vec<u64>) {
    const BITS: u32 = 11;
    const BUCKETS: usize = 1 << BITS;
    if v.len() < 256 {
        v.sort_unstable();
        return;
    }
    let mut tmp = vec![0u64; v.len()];
    let mut shift = 0;
    while shift < 64 {
        let digit = |k: u64| ((k >> shift) as usize) & (BUCKETS - 1);
        let mut count = vec![0usize; BUCKETS];
        v.iter().for_each(|&k| count[digit(k)] += 1);
        if count[digit(v[0])] != v.len() {
            let mut at = 0;
            for c in count.iter_mut() {
                let n = *c;
                *c = at;
                at += n;
            }
            for &k in v.iter() {
                let d = digit(k);
                tmp[count[d]] = k;
                count[d] += 1;
            }
            std::mem::swap(v, &mut tmp);
        }
        shift += BITS;
    }
}

/// Sums of squared and absolute errors, each of the errors divided by `scale`. The scale is 1
/// unless a plain sum overflows (errors near 1e154 and beyond square past the largest f64);
/// then it is the largest error, so RMSE, MAE and R2 stay finite and the ordinary case keeps
/// its bits.
#[derive(Debug, Clone, Copy)]
pub struct ErrorSums {
    pub sse: f64,
    pub sae: f64,
    pub scale: f64,
}

impl ErrorSums {
    pub fn of(y: &[f64], pred: &[f64]) -> ErrorSums {
        ErrorSums::of_pairs(y.iter().zip(pred))
    }

    /// `of` for the rows `rows` of `y` against one prediction for all of them (the mean
    /// baseline), without copying the rows out or building the predictions: the same sums.
    pub fn of_constant(y: &[f64], rows: &[usize], pred: f64) -> ErrorSums {
        ErrorSums::of_pairs(rows.iter().map(|&i| (&y[i], &pred)))
    }

    /// (true value, prediction) pairs, each sum taken in their order.
    fn of_pairs<'a>(pairs: impl Iterator<Item = (&'a f64, &'a f64)> + Clone) -> ErrorSums {
        let sse: f64 = pairs.clone().map(|(a, b)| (a - b) * (a - b)).sum();
        let sae: f64 = pairs.clone().map(|(a, b)| (a - b).abs()).sum();
        if sse.is_finite() && sae.is_finite() {
            return ErrorSums {
                sse,
                sae,
                scale: 1.0,
            };
        }
        // An error that is itself infinite (or NaN) stays so: scaling cannot rescue it.
        let big = pairs.clone().fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
        if !(big.is_finite() && big > 0.0) {
            return ErrorSums {
                sse,
                sae,
                scale: 1.0,
            };
        }
        let e = |a: &f64, b: &f64| (a - b) / big;
        ErrorSums {
            sse: pairs.clone().map(|(a, b)| e(a, b) * e(a, b)).sum(),
            sae: pairs.map(|(a, b)| e(a, b).abs()).sum(),
            scale: big,
        }
    }
}

/// What the regression metrics need from the true values of a set of rows besides the sums
/// of squared and absolute errors: so a caller that accumulates those sums itself (the
/// sufficient-statistics path for least squares) scores exactly as `Metric::score` does.
#[derive(Debug, Clone, Copy)]
pub struct Truth {
    pub n: usize,
    /// Total sum of squares about the mean, of the deviations divided by `scale`; `None` when
    /// the rows hold one distinct value.
    pub sst: Option<f64>,
    /// 1 unless the plain sum overflows; then the largest deviation (as in `ErrorSums`).
    pub scale: f64,
}

impl Truth {
    pub fn of(y: &[f64]) -> Truth {
        Truth::of_rows(y, 0..y.len())
    }

    /// `of` for the rows `rows` of `y` (in that order), without copying them out.
    pub fn of_rows(y: &[f64], rows: impl Iterator<Item = usize> + Clone) -> Truth {
        let n = rows.clone().count();
        let nf = n.max(1) as f64;
        let mut mean = rows.clone().map(|i| y[i]).sum::<f64>() / nf;
        if !mean.is_finite() {
            // The sum overflowed (values near the largest f64); the mean itself is in range.
            mean = rows.clone().map(|i| y[i] / nf).sum::<f64>();
        }
        let mut sst: f64 = rows.clone().map(|i| (y[i] - mean) * (y[i] - mean)).sum();
        let mut scale = 1.0;
        if !sst.is_finite() {
            let big = rows.clone().fold(0.0f64, |m, i| m.max((y[i] - mean).abs()));
            if big.is_finite() && big > 0.0 {
                let d = |i: usize| (y[i] - mean) / big;
                sst = rows.clone().map(|i| d(i) * d(i)).sum();
                scale = big;
            }
        }
        // One distinct value among the scored rows (always so with leave-one-out).
        let mut values = rows.map(|i| y[i]);
        let first = values.next();
        let constant = sst == 0.0 || values.all(|v| Some(v) == first);
        Truth {
            n,
            sst: (!constant).then_some(sst),
            scale,
        }
    }

    /// A regression metric from the sums of squared and absolute errors, taken in row order.
    pub fn score(&self, m: Metric, sse: f64, sae: f64) -> Option<f64> {
        self.score_sums(
            m,
            &ErrorSums {
                sse,
                sae,
                scale: 1.0,
            },
        )
    }

    /// `score` from sums that may be scaled. With both scales 1 (every ordinary case) this is
    /// the plain formula, bit for bit.
    pub fn score_sums(&self, m: Metric, e: &ErrorSums) -> Option<f64> {
        if self.n == 0 {
            return None;
        }
        let n = self.n as f64;
        let s = e.scale;
        match m {
            // Absent when it exceeds the largest f64 (errors near 1e154 and beyond): an
            // infinite score would turn every mean and standard error built on it into NaN.
            Metric::Mse => Some(s * s * (e.sse / n)).filter(|v| v.is_finite()),
            Metric::Rmse if s == 1.0 => Some((e.sse / n).sqrt()),
            Metric::Rmse => Some(s * (e.sse / n).sqrt()),
            Metric::Mae if s == 1.0 => Some(e.sae / n),
            Metric::Mae => Some(s * (e.sae / n)),
            Metric::R2 if s == 1.0 && self.scale == 1.0 => self.sst.map(|sst| 1.0 - e.sse / sst),
            Metric::R2 => self.sst.map(|sst| {
                let ratio = s / self.scale;
                1.0 - (e.sse * ratio) * ratio / sst
            }),
            _ => None,
        }
    }
}

/// Every metric of `metrics` on one set of rows (`classes` = 0 for regression).
pub fn score_all(metrics: &[Metric], y: &[f64], pred: &[f64], classes: usize) -> Vec<Option<f64>> {
    if classes == 0 && metrics.iter().all(|m| !m.is_classification()) {
        // The regression metrics share their sums: take them once.
        let truth = Truth::of(y);
        let sums = ErrorSums::of(y, pred);
        return metrics
            .iter()
            .map(|&m| truth.score_sums(m, &sums))
            .collect();
    }
    metrics.iter().map(|m| m.score(y, pred, classes)).collect()
}

/// Mean and standard error (sample sd with n - 1, over sqrt(n)) of the present values.
/// The standard error is absent with fewer than two values.
pub fn mean_se(values: &[Option<f64>]) -> (Option<f64>, Option<f64>) {
    let v: Vec<f64> = values.iter().flatten().copied().collect();
    if v.is_empty() {
        return (None, None);
    }
    let n = v.len() as f64;
    let mut mean = v.iter().sum::<f64>() / n;
    if !mean.is_finite() {
        // The sum overflowed (values near the largest f64); the mean itself is in range.
        mean = v.iter().map(|x| x / n).sum::<f64>();
    }
    if v.len() < 2 {
        return (Some(mean), None);
    }
    let (var, scale) = scaled_variance(&v, mean, n - 1.0);
    (Some(mean), Some(scale * (var / n).sqrt()))
}

/// The sum of squared deviations from `mean` over `divisor`, as (that / scale^2, scale). The
/// scale is 1 unless the plain sum overflows (deviations near 1e154 and beyond); then it is the
/// largest deviation, so `scale * sqrt(value)` stays finite and ordinary values keep their bits.
pub fn scaled_variance(v: &[f64], mean: f64, divisor: f64) -> (f64, f64) {
    let var = v.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / divisor;
    if var.is_finite() || !mean.is_finite() {
        return (var, 1.0);
    }
    let big = v.iter().fold(0.0f64, |b, x| b.max((x - mean).abs()));
    if !(big.is_finite() && big > 0.0) {
        return (var, 1.0);
    }
    let d = |x: &f64| (x - mean) / big;
    (v.iter().map(|x| d(x) * d(x)).sum::<f64>() / divisor, big)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Hand-computed: errors are 1, -1, 2, 0.
    const Y: [f64; 4] = [3.0, 5.0, 7.0, 9.0];
    const P: [f64; 4] = [2.0, 6.0, 5.0, 9.0];

    #[test]
    fn metrics_match_hand_computed_values() {
        assert_eq!(Metric::Mse.score(&Y, &P, 0), Some(1.5));
        assert_eq!(Metric::Rmse.score(&Y, &P, 0), Some(1.5f64.sqrt()));
        assert_eq!(Metric::Mae.score(&Y, &P, 0), Some(1.0));
        // SS_tot around the scored rows' mean 6: 9 + 1 + 1 + 9 = 20; SS_res = 6.
        assert_eq!(Metric::R2.score(&Y, &P, 0), Some(1.0 - 6.0 / 20.0));
    }

    #[test]
    fn r2_is_absent_for_one_value() {
        assert_eq!(Metric::R2.score(&[4.0], &[3.0], 0), None);
        assert_eq!(Metric::R2.score(&[4.0, 4.0], &[3.0, 5.0], 0), None);
    }

    #[test]
    fn directions() {
        assert!(Metric::Rmse.better(1.0, 2.0));
        assert!(Metric::R2.better(0.9, 0.8));
        assert!(!Metric::Mae.better(2.0, 2.0));
        assert!(Metric::Auc.better(0.9, 0.8) && Metric::LogLoss.better(0.2, 0.3));
    }

    #[test]
    fn mean_and_standard_error() {
        let (m, se) = mean_se(&[Some(1.0), Some(2.0), Some(3.0), None]);
        assert_eq!(m, Some(2.0));
        // sd = 1, n = 3
        assert_eq!(se, Some((1.0f64 / 3.0).sqrt()));
        assert_eq!(mean_se(&[Some(5.0)]), (Some(5.0), None));
    }

    /// ../shared/METHODS.md section 6 small check values (computed there):
    /// positives [0.9, 0.8, 0.6, 0.55], negatives [0.7, 0.5, 0.4, 0.3, 0.2]: A = 0.9; with a
    /// positive tied at 0.5 with a negative: A = 0.875. By hand: 18 of 20 pairs ordered right,
    /// then 17 and one tie (17.5 of 20).
    #[test]
    fn auc_by_radix_sort_equals_counting_every_pair() {
        // 3,000 rows (the radix path), scores with many ties, negative values and zeros of
        // both signs: the pair count, directly.
        let mut rng = crate::testgen::Lcg(3);
        let mut next = || rng.next_u64() >> 33;
        let n = 3000;
        let y: Vec<f64> = (0..n).map(|_| (next() % 3 == 0) as u8 as f64).collect();
        let s: Vec<f64> = (0..n)
            .map(|i| match i % 7 {
                0 => 0.0,
                1 => -0.0,
                2 => -((next() % 50) as f64) / 7.0,
                _ => (next() % 400) as f64 / 13.0 + y[i] * 3.0,
            })
            .collect();
        let (mut u, mut np, mut nn) = (0.0, 0.0, 0.0);
        for i in 0..n {
            if y[i] == 1.0 {
                np += 1.0;
                for j in 0..n {
                    if y[j] != 1.0 {
                        // -0.0 and 0.0 are the same score: a tie.
                        u += match s[i].partial_cmp(&s[j]) {
                            Some(std::cmp::Ordering::Greater) => 1.0,
                            Some(std::cmp::Ordering::Equal) => 0.5,
                            _ => 0.0,
                        };
                    }
                }
            } else {
                nn += 1.0;
            }
        }
        assert_eq!(auc(&y, &s), Some(u / (np * nn)));
    }

    #[test]
    fn auc_is_the_mann_whitney_statistic_with_ties_one_half() {
        let y = [1.0, 1.0, 1.0, 1.0, 0.0, 0.0, 0.0, 0.0, 0.0];
        let s = [0.9, 0.8, 0.6, 0.55, 0.7, 0.5, 0.4, 0.3, 0.2];
        assert_eq!(auc(&y, &s), Some(0.9));
        let s2 = [0.9, 0.8, 0.5, 0.55, 0.7, 0.5, 0.4, 0.3, 0.2];
        assert_eq!(auc(&y, &s2), Some(0.875));
        assert_eq!(auc(&[1.0, 1.0], &[0.3, 0.4]), None);
        // The Hanley & McNeil (1982) CT rating data (METHODS.md section 6): ratings 1..5,
        // normal counts 33, 6, 6, 11, 2 and abnormal 3, 2, 2, 11, 33: A = 2642 / 2958.
        let (mut y, mut s) = (Vec::new(), Vec::new());
        for (rating, (normal, abnormal)) in [(33, 3), (6, 2), (6, 2), (11, 11), (2, 33)]
            .iter()
            .enumerate()
        {
            for _ in 0..*normal {
                y.push(0.0);
                s.push(rating as f64);
            }
            for _ in 0..*abnormal {
                y.push(1.0);
                s.push(rating as f64);
            }
        }
        assert!((auc(&y, &s).unwrap() - 2642.0 / 2958.0).abs() < 1e-15);
        assert!((auc(&y, &s).unwrap() - 0.893171).abs() < 5e-7);
    }

    /// The mean baseline scores a constant from the rows themselves: the same bits as the sums
    /// over gathered true values and a materialised prediction, on ordinary values and on values
    /// whose plain sums overflow (the scaled fallback).
    #[test]
    fn constant_prediction_sums_equal_the_general_sums() {
        let ordinary: Vec<f64> = (0..1000)
            .map(|i| ((i * 7919) % 1013) as f64 * 0.37 - 91.0)
            .collect();
        let huge: Vec<f64> = ordinary.iter().map(|v| v * 1e305).collect();
        for y in [&ordinary, &huge] {
            let rows: Vec<usize> = (0..y.len()).filter(|i| i % 3 != 1).rev().collect();
            let gathered: Vec<f64> = rows.iter().map(|&i| y[i]).collect();
            for pred in [0.0, 12.5, y[4], -y[9]] {
                let a = ErrorSums::of(&gathered, &vec![pred; gathered.len()]);
                let b = ErrorSums::of_constant(y, &rows, pred);
                assert_eq!(
                    (a.sse.to_bits(), a.sae.to_bits(), a.scale.to_bits()),
                    (b.sse.to_bits(), b.sae.to_bits(), b.scale.to_bits())
                );
            }
        }
        let scaled = ErrorSums::of_constant(&huge, &[0, 1, 2], 0.0);
        assert!(
            scaled.scale > 1.0,
            "the overflow case takes the scaled sums"
        );
    }

    /// The two-class shortcut picks what `argmax` picks, ties and NaN included.
    #[test]
    fn two_class_prediction_is_argmax() {
        let values = [0.0, 0.25, 0.5, 0.75, 1.0, f64::NAN, -0.0];
        for &a in &values {
            for &b in &values {
                assert_eq!(predicted(&[a, b], 0, 2), argmax(&[a, b]), "{a} {b}");
            }
        }
    }

    #[test]
    fn classification_metrics_by_hand() {
        // 4 rows, 3 classes; truth 0, 1, 2, 1.
        let y = [0.0, 1.0, 2.0, 1.0];
        let p = [0.7, 0.2, 0.1, 0.1, 0.6, 0.3, 0.2, 0.5, 0.3, 0.4, 0.4, 0.2];
        // argmax: 0, 1, 1, 0 (a 0.4/0.4 tie goes to the first class): 2 of 4 right.
        assert_eq!(Metric::Accuracy.score(&y, &p, 3), Some(0.5));
        // recalls: class 0 1/1, class 1 1/2, class 2 0/1 -> mean 0.5
        assert_eq!(Metric::BalancedAccuracy.score(&y, &p, 3), Some(0.5));
        let ll = -(0.7f64.ln() + 0.6f64.ln() + 0.3f64.ln() + 0.4f64.ln()) / 4.0;
        assert!((Metric::LogLoss.score(&y, &p, 3).unwrap() - ll).abs() < 1e-15);
        // Brier: row sums of squared distances: 0.14, 0.26, 0.78, 0.56 -> mean 0.435
        assert!((Metric::Brier.score(&y, &p, 3).unwrap() - 0.435).abs() < 1e-15);
        assert_eq!(Metric::Auc.score(&y, &p, 3), None);
        // Binary Brier uses the positive class only; log-loss clips at 1e-15.
        let yb = [1.0, 0.0];
        let pb = [0.2, 0.8, 1.0, 0.0];
        assert!((Metric::Brier.score(&yb, &pb, 2).unwrap() - (0.04 + 0.0) / 2.0).abs() < 1e-15);
        let ll = -(0.8f64.ln() + (1.0 - 1e-15f64).ln()) / 2.0;
        assert!((Metric::LogLoss.score(&yb, &pb, 2).unwrap() - ll).abs() < 1e-15);
    }
}

//! Regression metrics: pure functions of (truth, prediction) slices, with their direction.
//!
//! Sums are taken in row order, so a score depends only on the rows and their order.

/// A scoring metric.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Metric {
    Rmse,
    Mse,
    Mae,
    R2,
}

impl Metric {
    /// Every regression metric, in the order tables and JSON list them.
    pub const ALL: [Metric; 4] = [Metric::Rmse, Metric::Mse, Metric::Mae, Metric::R2];

    pub fn name(self) -> &'static str {
        match self {
            Metric::Rmse => "rmse",
            Metric::Mse => "mse",
            Metric::Mae => "mae",
            Metric::R2 => "r2",
        }
    }

    pub fn parse(s: &str) -> Option<Metric> {
        Metric::ALL.into_iter().find(|m| m.name() == s)
    }

    /// True when a larger value is better.
    pub fn higher_is_better(self) -> bool {
        matches!(self, Metric::R2)
    }

    /// True when the metric is a mean of per-row values in [0, 1] (what Thresholdout and the
    /// Hoeffding bound need). No regression metric is.
    pub fn bounded_unit(self) -> bool {
        false
    }

    /// True when `a` is strictly better than `b`.
    pub fn better(self, a: f64, b: f64) -> bool {
        if self.higher_is_better() {
            a > b
        } else {
            a < b
        }
    }

    /// The metric on one set of rows; `None` when it is undefined (r2 on rows with one value).
    pub fn score(self, y: &[f64], pred: &[f64]) -> Option<f64> {
        let n = y.len();
        if n == 0 {
            return None;
        }
        match self {
            Metric::Mse => Some(sse(y, pred) / n as f64),
            Metric::Rmse => Some((sse(y, pred) / n as f64).sqrt()),
            Metric::Mae => {
                Some(y.iter().zip(pred).map(|(a, b)| (a - b).abs()).sum::<f64>() / n as f64)
            }
            Metric::R2 => {
                let mean = y.iter().sum::<f64>() / n as f64;
                let sst: f64 = y.iter().map(|v| (v - mean) * (v - mean)).sum();
                // One distinct value among the scored rows (always so with leave-one-out).
                if sst == 0.0 || y.iter().all(|v| *v == y[0]) {
                    None
                } else {
                    Some(1.0 - sse(y, pred) / sst)
                }
            }
        }
    }
}

fn sse(y: &[f64], pred: &[f64]) -> f64 {
    y.iter().zip(pred).map(|(a, b)| (a - b) * (a - b)).sum()
}

/// Every metric on one set of rows, in `Metric::ALL` order.
pub fn score_all(y: &[f64], pred: &[f64]) -> [Option<f64>; 4] {
    Metric::ALL.map(|m| m.score(y, pred))
}

/// Mean and standard error (sample sd with n - 1, over sqrt(n)) of the present values.
/// The standard error is absent with fewer than two values.
pub fn mean_se(values: &[Option<f64>]) -> (Option<f64>, Option<f64>) {
    let v: Vec<f64> = values.iter().flatten().copied().collect();
    if v.is_empty() {
        return (None, None);
    }
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    if v.len() < 2 {
        return (Some(mean), None);
    }
    let var = v.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / (n - 1.0);
    (Some(mean), Some((var / n).sqrt()))
}

#[cfg(test)]
mod tests {
    use super::*;

    // Hand-computed: errors are 1, -1, 2, 0.
    const Y: [f64; 4] = [3.0, 5.0, 7.0, 9.0];
    const P: [f64; 4] = [2.0, 6.0, 5.0, 9.0];

    #[test]
    fn metrics_match_hand_computed_values() {
        assert_eq!(Metric::Mse.score(&Y, &P), Some(1.5));
        assert_eq!(Metric::Rmse.score(&Y, &P), Some(1.5f64.sqrt()));
        assert_eq!(Metric::Mae.score(&Y, &P), Some(1.0));
        // SS_tot around the scored rows' mean 6: 9 + 1 + 1 + 9 = 20; SS_res = 6.
        assert_eq!(Metric::R2.score(&Y, &P), Some(1.0 - 6.0 / 20.0));
    }

    #[test]
    fn r2_is_absent_for_one_value() {
        assert_eq!(Metric::R2.score(&[4.0], &[3.0]), None);
        assert_eq!(Metric::R2.score(&[4.0, 4.0], &[3.0, 5.0]), None);
    }

    #[test]
    fn directions() {
        assert!(Metric::Rmse.better(1.0, 2.0));
        assert!(Metric::R2.better(0.9, 0.8));
        assert!(!Metric::Mae.better(2.0, 2.0));
    }

    #[test]
    fn mean_and_standard_error() {
        let (m, se) = mean_se(&[Some(1.0), Some(2.0), Some(3.0), None]);
        assert_eq!(m, Some(2.0));
        // sd = 1, n = 3
        assert_eq!(se, Some((1.0f64 / 3.0).sqrt()));
        assert_eq!(mean_se(&[Some(5.0)]), (Some(5.0), None));
    }
}

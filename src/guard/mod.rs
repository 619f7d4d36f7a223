//! The sealed test partition. `run` receives the development rows through `Sealed`; the test
//! rows' indices stay private here, so no code path of `run` can fit or score on them.
//! Counted reveals, exposure and optimism bounds build on this type.

pub mod mechanism;
pub mod stats;

use crate::split::{Part, Partition};

/// A partition whose test rows are sealed.
#[derive(Debug, Clone)]
pub struct Sealed {
    partition: Partition,
}

impl Sealed {
    pub fn new(partition: Partition) -> Sealed {
        Sealed { partition }
    }

    /// Rows that may be fitted and scored during development (train and validation).
    pub fn development(&self) -> Vec<usize> {
        self.partition.development()
    }

    /// The fitting/scoring folds; they never contain a test row (checked in tests).
    pub fn folds(&self) -> &[crate::split::Fold] {
        &self.partition.folds
    }

    pub fn holdout(&self) -> bool {
        self.partition.holdout
    }

    pub fn count(&self, p: Part) -> usize {
        self.partition.count(p)
    }

    /// Per-row partition codes (for the ledger's compact assignment); reveals nothing but
    /// membership, which the ledger must record anyway.
    pub fn codes(&self) -> Vec<u8> {
        self.partition.parts.iter().map(|p| p.code()).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::split::{Folds, Method, SplitInput, split};

    #[test]
    fn folds_and_development_rows_exclude_test_rows() {
        let y: Vec<f64> = (0..50).map(f64::from).collect();
        let input = SplitInput {
            method: Method::Random,
            seed: 3,
            test: 0.2,
            validation: 0.0,
            folds: Folds::K(5),
            repeats: 2,
            target: &y,
        };
        let p = split(&input).unwrap();
        let test: Vec<usize> = p.rows_in(Part::Test);
        let s = Sealed::new(p);
        assert_eq!(test.len(), 10);
        assert!(s.development().iter().all(|r| !test.contains(r)));
        for f in s.folds() {
            assert!(f.fit.iter().chain(&f.score).all(|r| !test.contains(r)));
        }
    }
}

/// Leave to read a sealed partition's test rows. Only `permit` makes one, and the CLI calls it
/// only after the user confirmed (or passed `--yes`), so no code path reads test rows by accident.
#[derive(Debug)]
pub struct RevealPermit(());

/// Grant a reveal. `confirmed` records that the user said yes; refusing here is the caller's job.
pub fn permit(confirmed: bool) -> Option<RevealPermit> {
    confirmed.then_some(RevealPermit(()))
}

impl Sealed {
    /// The test rows, for a reveal.
    pub fn test_rows(&self, _permit: &RevealPermit) -> Vec<usize> {
        self.partition.rows_in(Part::Test)
    }
}

/// What earlier reveals of a partition left behind.
#[derive(Debug, Clone, Default)]
pub struct History {
    /// Reveals of the partition so far.
    pub reveals: usize,
    /// Distinct candidates (spec hash, candidate id) revealed so far.
    pub candidates: std::collections::BTreeSet<(String, i64)>,
    /// Thresholdout state after the last reusable reveal, if any.
    pub thresholdout: Option<mechanism::ThresholdoutState>,
    /// The Ladder's best released score, in step units, if any.
    pub ladder_best: Option<i64>,
}

/// The value a reveal shows for the selection metric, and how it was produced.
#[derive(Debug, Clone, PartialEq)]
pub struct Answer {
    /// test | development | test+noise | refused | ladder-new | ladder-previous
    pub kind: &'static str,
    pub value: Option<f64>,
    /// The mechanism's state and noise draws, for the ledger.
    pub mechanism: serde_json::Value,
}

/// Answer one reveal under `mode`. `noise` is the seeded stream for Laplace draws (reusable only);
/// `development` is the candidate's cross-validated estimate of the metric.
pub fn answer(
    mode: crate::spec::GuardMode,
    budget: u32,
    history: &History,
    development: f64,
    test: f64,
    higher_is_better: bool,
    noise: &mut rand_chacha::ChaCha20Rng,
) -> Answer {
    use crate::spec::GuardMode;
    use serde_json::json;
    match mode {
        GuardMode::Count => Answer {
            kind: "test",
            value: Some(test),
            mechanism: json!({"mode": "count"}),
        },
        GuardMode::Reusable {
            threshold,
            noise: sigma,
        } => {
            let mut draw = |scale: f64| stats::laplace(stats::unit_open(noise), scale);
            let (state, initial_gamma) = match history.thresholdout {
                Some(s) => (s, None),
                None => {
                    let g = draw(2.0 * sigma);
                    (
                        mechanism::ThresholdoutState {
                            budget,
                            t_hat: threshold + g,
                        },
                        Some(g),
                    )
                }
            };
            let step =
                mechanism::thresholdout(state, threshold, sigma, development, test, &mut draw);
            let kind = match (step.answer, step.from_test) {
                (None, _) => "refused",
                (Some(_), true) => "test+noise",
                (Some(_), false) => "development",
            };
            Answer {
                kind,
                value: step.answer,
                mechanism: json!({"mode": "reusable", "threshold": threshold, "noise": sigma, "initial_gamma": initial_gamma, "step": step}),
            }
        }
        GuardMode::Ladder { step } => {
            let (released, units, new) =
                mechanism::ladder(history.ladder_best, step, test, higher_is_better);
            Answer {
                kind: if new { "ladder-new" } else { "ladder-previous" },
                value: Some(released),
                mechanism: json!({"mode": "ladder", "step": step, "best_units_before": history.ladder_best, "best_units_after": units}),
            }
        }
    }
}

/// How optimistic a test score may be after k distinct candidates were revealed on n rows.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Optimism {
    pub k: usize,
    pub n: usize,
    pub metric: String,
    /// Bootstrap standard error of the metric on the test rows.
    pub se: Option<f64>,
    /// E[max of k standard normals].
    pub expected_max: f64,
    /// se x expected_max: how much better than the truth the best of k equally good candidates
    /// looks on these rows, on average.
    pub estimate: Option<f64>,
    /// For metrics in [0, 1]: the simultaneous Hoeffding-union width at the spec's confidence.
    pub hoeffding_union: Option<f64>,
    /// For metrics in [0, 1]: sqrt(k/n), the scale of overfitting by adaptive re-selection.
    pub adaptive_scale: Option<f64>,
    /// What the numbers assume, in words.
    pub assumes: String,
}

pub fn optimism(
    metric: crate::metrics::Metric,
    n: usize,
    k: usize,
    se: Option<f64>,
    confidence: f64,
) -> Optimism {
    let m = stats::expected_max_normal(k);
    let bounded = metric.bounded_unit();
    let mut assumes = format!(
        "estimate = bootstrap standard error x E[max of {k} standard normals] ({m:.6}): the expected optimism of the best of {k} equally good candidates whose test scores were independent; correlated candidates make it smaller, candidates chosen after seeing earlier test scores can make it larger"
    );
    if bounded {
        assumes.push_str(&format!(
            "; hoeffding_union holds with probability {confidence} only for candidates fixed before any reveal; adaptive_scale sqrt(k/n) is the order of the bias that adaptive re-selection can reach"
        ));
    }
    Optimism {
        k,
        n,
        metric: metric.name().to_string(),
        se,
        expected_max: m,
        estimate: se.map(|s| s * m),
        hoeffding_union: bounded.then(|| stats::hoeffding_union(n, k, 1.0 - confidence)),
        adaptive_scale: bounded.then(|| stats::adaptive_scale(n, k)),
        assumes,
    }
}

//! The sealed test partition. `run` receives the development rows through `Sealed`; the test
//! rows' indices stay private here, so no code path of `run` can fit or score on them.
//! Counted reveals, exposure and optimism bounds build on this type.

pub mod consult;
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

    /// Which kept rows are test rows (positions among the kept rows): membership only, for the
    /// accounting, as `codes` gives it; reading a test row's values still takes a permit.
    pub fn test_members(&self) -> Vec<usize> {
        self.partition.rows_in(Part::Test)
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

/// What earlier consultations of a partition left behind.
#[derive(Debug, Clone, Default)]
pub struct History {
    /// Reveals of the partition so far (`reveal`, and `predict --allow-sealed`).
    pub reveals: usize,
    /// Development uses so far: (run, rows) of each run that fitted or scored on its test rows.
    pub uses: Vec<consult::Use>,
    /// Reusable answers drawn from the test rows (each spent one unit of the budget).
    pub over_threshold: usize,
    /// Reusable queries refused because the budget was spent.
    pub refused: usize,
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
            // Development uses spend the budget too: each was an unmediated look at the rows.
            let left =
                (budget as usize).saturating_sub(history.over_threshold + history.uses.len());
            let left = u32::try_from(left).unwrap_or(budget);
            let (state, initial_gamma) = match history.thresholdout {
                Some(s) => (
                    mechanism::ThresholdoutState {
                        budget: s.budget.min(left),
                        t_hat: s.t_hat,
                    },
                    None,
                ),
                None => {
                    let g = draw(2.0 * sigma);
                    (
                        mechanism::ThresholdoutState {
                            budget: left,
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

#[cfg(test)]
mod answer_tests {
    use super::*;
    use crate::spec::GuardMode;
    use crate::split::rng::{Domain, stream};

    const REUSABLE: GuardMode = GuardMode::Reusable {
        threshold: 0.04,
        noise: 0.01,
    };

    /// Thresholdout with the practical parameters of Dwork et al. (T = 0.04, sigma = 0.01, as in
    /// their Science experiments; ../shared/METHODS.md section 1), driven through `answer` with
    /// the seeded stream, carrying state from reveal to reveal as the ledger does.
    fn queries(pairs: &[(f64, f64)], seed: u64) -> Vec<Answer> {
        queries_with(REUSABLE, pairs, seed)
    }

    fn queries_with(mode: GuardMode, pairs: &[(f64, f64)], seed: u64) -> Vec<Answer> {
        let mut h = History::default();
        let mut out = Vec::new();
        for (i, (dev, test)) in pairs.iter().enumerate() {
            let mut rng = stream(seed, Domain::Noise, i as u32);
            let a = answer(mode, 3, &h, *dev, *test, true, &mut rng);
            h.reveals += 1;
            h.thresholdout = serde_json::from_value(a.mechanism["step"]["after"].clone()).ok();
            out.push(a);
        }
        out
    }

    #[test]
    fn agreeing_estimates_return_the_development_score_and_spend_nothing() {
        // Test scores within 0.005 of the development estimates: far inside T = 0.04.
        let pairs: Vec<(f64, f64)> = (0..20)
            .map(|i| (0.80 + i as f64 * 0.001, 0.803 + i as f64 * 0.001))
            .collect();
        // With sigma = 0.01 the threshold noise Lap(0.04) itself crosses the gap about one query
        // in five (then the test score is answered and budget spent, as designed); with
        // sigma = 0.001 that chance is below 1e-4 per query, so every answer is the
        // development estimate.
        let quiet = GuardMode::Reusable {
            threshold: 0.04,
            noise: 0.001,
        };
        let answers = queries_with(quiet, &pairs, 11);
        for (a, (dev, _)) in answers.iter().zip(&pairs) {
            assert_eq!(a.kind, "development");
            assert_eq!(a.value, Some(*dev));
            assert_eq!(a.mechanism["step"]["after"]["budget"], 3);
        }
    }

    #[test]
    fn an_overfitted_candidate_gets_the_noisy_test_score_and_spends_budget() {
        // Development 0.95, test 0.70: the candidate overfits the development rows.
        let answers = queries(
            &[(0.95, 0.70), (0.96, 0.71), (0.97, 0.69), (0.98, 0.70)],
            12,
        );
        for (i, a) in answers.iter().take(3).enumerate() {
            assert_eq!(a.kind, "test+noise");
            let v = a.value.unwrap();
            assert!((v - [0.70, 0.71, 0.69][i]).abs() < 0.2, "{v}");
            assert_ne!(v, [0.70, 0.71, 0.69][i], "noise was added");
            assert_eq!(a.mechanism["step"]["after"]["budget"], 2 - i as i64);
        }
        assert_eq!(answers[3].kind, "refused");
        assert_eq!(answers[3].value, None);
        // Same seed, same noise.
        let again = queries(
            &[(0.95, 0.70), (0.96, 0.71), (0.97, 0.69), (0.98, 0.70)],
            12,
        );
        assert_eq!(answers, again);
        let other = queries(&[(0.95, 0.70)], 13);
        assert_ne!(answers[0].value, other[0].value);
    }

    #[test]
    fn count_mode_returns_the_exact_score() {
        let mut rng = stream(1, Domain::Noise, 0);
        let a = answer(
            GuardMode::Count,
            1,
            &History::default(),
            0.5,
            0.4,
            false,
            &mut rng,
        );
        assert_eq!((a.kind, a.value), ("test", Some(0.4)));
    }
}

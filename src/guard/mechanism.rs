//! The answer a reveal gives under each `[guard]` mode: the exact test score (`count`),
//! Thresholdout (`reusable`), or the Ladder (`ladder`). Pure state machines; the noise comes in
//! as values drawn from the recorded seeded stream, so a replay gives the same answers.

use serde::{Deserialize, Serialize};

/// Thresholdout state carried from one reveal of a partition to the next.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ThresholdoutState {
    /// Over-threshold answers still allowed (B).
    pub budget: u32,
    /// The current noisy threshold T + gamma.
    pub t_hat: f64,
}

/// What one Thresholdout query did, for the ledger.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ThresholdoutStep {
    pub before: ThresholdoutState,
    pub after: ThresholdoutState,
    pub eta: f64,
    /// Laplace noise added to the test score, when the answer is the test score.
    pub xi: Option<f64>,
    /// The new gamma, when it was redrawn.
    pub gamma: Option<f64>,
    /// The released value; `None` when the budget was already spent (the query is refused).
    pub answer: Option<f64>,
    /// True when the answer came from the test rows.
    pub from_test: bool,
}

/// One Thresholdout query (Dwork, Feldman, Hardt, Pitassi, Reingold & Roth 2015, Science
/// 349(6248); canonical form in ../shared/METHODS.md section 1): with eta ~ Lap(4 sigma), answer
/// the development estimate when |test - development| <= T_hat + eta; otherwise spend one unit of
/// budget, answer test + xi with xi ~ Lap(sigma), and redraw gamma ~ Lap(2 sigma) so the new
/// T_hat = threshold + gamma. Pinned convention: gamma is redrawn only after an over-threshold
/// answer. `draw(scale)` supplies Laplace noise in the fixed order eta, xi, gamma.
pub fn thresholdout(
    state: ThresholdoutState,
    threshold: f64,
    sigma: f64,
    development: f64,
    test: f64,
    mut draw: impl FnMut(f64) -> f64,
) -> ThresholdoutStep {
    if state.budget == 0 {
        return ThresholdoutStep {
            before: state,
            after: state,
            eta: 0.0,
            xi: None,
            gamma: None,
            answer: None,
            from_test: false,
        };
    }
    let eta = draw(4.0 * sigma);
    if (test - development).abs() > state.t_hat + eta {
        let xi = draw(sigma);
        let gamma = draw(2.0 * sigma);
        let after = ThresholdoutState {
            budget: state.budget - 1,
            t_hat: threshold + gamma,
        };
        ThresholdoutStep {
            before: state,
            after,
            eta,
            xi: Some(xi),
            gamma: Some(gamma),
            answer: Some(test + xi),
            from_test: true,
        }
    } else {
        ThresholdoutStep {
            before: state,
            after: state,
            eta,
            xi: None,
            gamma: None,
            answer: Some(development),
            from_test: false,
        }
    }
}

/// The Ladder with a fixed step (Blum & Hardt 2015, ICML, Algorithm 1): report a new best only
/// when the score beats the best released so far by more than `step`, rounded to a multiple of
/// the step; otherwise report the previous best. Works in integer units of the step, so the
/// comparisons are exact. `best_units` is the released best in step units (None before the first
/// reveal). Returns (released value, new best units, whether it is a new best).
pub fn ladder(
    best_units: Option<i64>,
    step: f64,
    score: f64,
    higher_is_better: bool,
) -> (f64, i64, bool) {
    let s = if higher_is_better { -score } else { score };
    let units = (s / step).round() as i64;
    let improves = match best_units {
        None => true,
        Some(b) => s < (b - 1) as f64 * step,
    };
    let new_units = if improves {
        units
    } else {
        best_units.unwrap_or(units)
    };
    let released = new_units as f64 * step;
    (
        if higher_is_better {
            -released
        } else {
            released
        },
        new_units,
        improves,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The deterministic trace of ../shared/METHODS.md section 1 (T = 0.04, B = 2, initial
    /// gamma = 0.004 so T_hat = 0.044; injected noise).
    #[test]
    #[allow(clippy::type_complexity)]
    fn thresholdout_follows_the_worked_trace() {
        let mut state = ThresholdoutState {
            budget: 2,
            t_hat: 0.044,
        };
        // (development, test, noise draws in the order eta, xi, gamma, expected answer, budget after, T_hat after)
        let rows: [(f64, f64, Vec<f64>, Option<f64>, u32, f64); 5] = [
            (0.81, 0.79, vec![-0.006], Some(0.81), 2, 0.044),
            (
                0.90,
                0.78,
                vec![0.010, 0.003, -0.002],
                Some(0.783),
                1,
                0.038,
            ),
            (0.85, 0.83, vec![0.000], Some(0.85), 1, 0.038),
            (
                0.95,
                0.70,
                vec![-0.020, -0.005, 0.001],
                Some(0.695),
                0,
                0.041,
            ),
            (0.60, 0.59, vec![], None, 0, 0.041),
        ];
        for (q, (dev, test, noise, want, budget, t_hat)) in rows.into_iter().enumerate() {
            let mut it = noise.into_iter();
            let step = thresholdout(state, 0.04, 0.01, dev, test, |_| {
                it.next().expect("a noise draw was expected")
            });
            match (step.answer, want) {
                (Some(a), Some(w)) => assert!((a - w).abs() < 1e-12, "query {}: {a} vs {w}", q + 1),
                (a, w) => assert_eq!(a, w, "query {}", q + 1),
            }
            assert_eq!(step.after.budget, budget, "query {}", q + 1);
            assert!((step.after.t_hat - t_hat).abs() < 1e-12, "query {}", q + 1);
            state = step.after;
        }
    }

    #[test]
    fn thresholdout_noise_scales_are_sigma_2sigma_4sigma() {
        let mut scales = Vec::new();
        thresholdout(
            ThresholdoutState {
                budget: 1,
                t_hat: 0.0,
            },
            0.04,
            0.01,
            0.9,
            0.1,
            |s| {
                scales.push(s);
                0.0
            },
        );
        assert_eq!(scales, vec![0.04, 0.01, 0.02]);
    }

    /// METHODS.md section 2 check values (fixed Ladder, eta = 0.01).
    #[test]
    fn ladder_releases_the_worked_example() {
        let losses = [0.400, 0.395, 0.380, 0.383, 0.371, 0.369, 0.350, 0.3449];
        let want = [0.40, 0.40, 0.38, 0.38, 0.38, 0.37, 0.35, 0.35];
        let mut best = None;
        for (l, w) in losses.iter().zip(want) {
            let (released, units, _) = ladder(best, 0.01, *l, false);
            assert!(
                (released - w).abs() < 1e-12,
                "{l}: released {released}, want {w}"
            );
            best = Some(units);
        }
        // Higher-is-better metrics mirror it.
        let (r, _, new) = ladder(None, 0.01, 0.8123, true);
        assert!((r - 0.81).abs() < 1e-12 && new);
        let (r, _, new) = ladder(Some(-81), 0.01, 0.815, true);
        assert!((r - 0.81).abs() < 1e-12 && !new);
    }
}

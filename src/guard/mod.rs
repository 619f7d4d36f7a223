//! The sealed test partition. `run` receives the development rows through `Sealed`; the test
//! rows' indices stay private here, so no code path of `run` can fit or score on them.
//! Counted reveals, exposure and optimism bounds build on this type.

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

//! Split tests: exact pinned partitions for fixed seeds (a change in the stream, the bounded
//! draw or the shuffle fails here), and properties checked over many seeds and sizes.

use super::*;

fn input(
    method: Method,
    y: &[f64],
    test: f64,
    validation: f64,
    folds: Folds,
    repeats: usize,
    seed: u64,
) -> SplitInput<'_> {
    SplitInput {
        method,
        seed,
        test,
        validation,
        folds,
        repeats,
        target: y,
    }
}

fn ys(n: usize) -> Vec<f64> {
    // A deterministic, unsorted target.
    (0..n).map(|i| ((i * 37) % 101) as f64).collect()
}

fn codes(p: &Partition) -> String {
    p.parts.iter().map(|q| q.code() as char).collect()
}

/// Small deterministic generator for property-test inputs (splitmix64; not used by the tool).
struct Gen(u64);
impl Gen {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        z ^ (z >> 31)
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
}

#[test]
fn pinned_random_partition_and_folds() {
    let y = ys(20);
    let p = split(&input(Method::Random, &y, 0.25, 0.0, Folds::K(3), 1, 2026)).unwrap();
    assert_eq!(codes(&p), PINNED_RANDOM);
    let f0: Vec<usize> = p.folds[0].score.clone();
    assert_eq!(f0, PINNED_RANDOM_FOLD0);
}

const PINNED_RANDOM: &str = "rrtrttrrrrrrrrttrrrr";
const PINNED_RANDOM_FOLD0: [usize; 5] = [0, 6, 8, 16, 17];

#[test]
fn pinned_stratified_group_time_hash() {
    let y = ys(24);
    let s = split(&input(
        Method::Stratified {
            bins: 4,
            by_class: false,
        },
        &y,
        0.25,
        0.0,
        Folds::K(3),
        1,
        5,
    ))
    .unwrap();
    let groups: Vec<u32> = (0..24).map(|i| (i % 6) as u32).collect();
    let g = split(&input(
        Method::Group { groups },
        &y,
        0.34,
        0.0,
        Folds::K(2),
        1,
        5,
    ))
    .unwrap();
    let order: Vec<f64> = (0..24).map(|i| ((i * 7) % 24) as f64).collect();
    let t = split(&input(
        Method::Time { order },
        &y,
        0.25,
        0.0,
        Folds::K(3),
        1,
        0,
    ))
    .unwrap();
    let keys: Vec<String> = (0..24).map(|i| format!("row-{i}")).collect();
    let h = split(&input(
        Method::Hash { keys },
        &y,
        0.25,
        0.0,
        Folds::K(3),
        1,
        5,
    ))
    .unwrap();
    assert_eq!([codes(&s), codes(&g), codes(&t), codes(&h)], PINNED_OTHERS);
}

const PINNED_OTHERS: [&str; 4] = [
    "rrrtrrrtrrrrttrrttrrrrrr",
    "rtrrtrrtrrtrrtrrtrrtrrtr",
    "rrrtrrtrrrtrrtrrrtrrtrrr",
    "rrrrtrrttrrrrrtrrrtrttrr",
];

#[test]
fn the_hash_unit_is_pinned() {
    // SHA-256("probity-hash-split" || 7u64 LE || "abc"), top 53 bits of the first 8 bytes.
    assert_eq!(key_unit(7, "abc"), PINNED_UNIT);
}

/// Checked independently with Python hashlib.
const PINNED_UNIT: f64 = 0.07996718331733887;

/// Every repeat's score sets partition the development rows; fit and score never meet; no
/// test row is in any fold.
fn check_folds(p: &Partition) {
    let dev: Vec<usize> = p.development();
    let repeats = p.folds.iter().map(|f| f.repeat).max().unwrap_or(0) + 1;
    for r in 0..repeats {
        let mut seen: Vec<usize> = Vec::new();
        for f in p.folds.iter().filter(|f| f.repeat == r) {
            assert!(!f.score.is_empty());
            for i in &f.fit {
                assert!(!f.score.contains(i));
                assert_ne!(p.parts[*i], Part::Test);
            }
            for i in &f.score {
                assert_ne!(p.parts[*i], Part::Test);
            }
            if !p.holdout {
                let mut all: Vec<usize> = f.fit.iter().chain(&f.score).copied().collect();
                all.sort_unstable();
                assert!(all.iter().all(|i| dev.contains(i)));
            }
            seen.extend(&f.score);
        }
        seen.sort_unstable();
        if !p.holdout {
            assert_eq!(
                seen, dev,
                "score sets of repeat {r} cover the development rows once"
            );
        }
    }
}

#[test]
fn property_random_counts_and_folds() {
    let mut g = Gen(1);
    let mut checked = 0;
    for _ in 0..200 {
        let n = 10 + g.below(300) as usize;
        let test = g.below(40) as f64 / 100.0;
        let k = 2 + g.below(8) as usize;
        let y = ys(n);
        let seed = g.next();
        let r = split(&input(Method::Random, &y, test, 0.0, Folds::K(k), 2, seed));
        let Ok(p) = r else { continue };
        assert_eq!(p.count(Part::Test), ((test * n as f64).round()) as usize);
        check_folds(&p);
        let sizes: Vec<usize> = p
            .folds
            .iter()
            .filter(|f| f.repeat == 0)
            .map(|f| f.score.len())
            .collect();
        assert!(
            sizes.iter().max().unwrap() - sizes.iter().min().unwrap() <= 1,
            "{sizes:?}"
        );
        // Same inputs, same result.
        let again = split(&input(Method::Random, &y, test, 0.0, Folds::K(k), 2, seed)).unwrap();
        assert_eq!(p.parts, again.parts);
        assert_eq!(p.folds, again.folds);
        checked += 1;
    }
    assert!(
        checked >= 150,
        "only {checked} of 200 generated cases could be split"
    );
}

#[test]
fn property_group_never_straddles() {
    let mut g = Gen(2);
    let mut checked = 0;
    for _ in 0..200 {
        let n = 20 + g.below(200) as usize;
        let ng = 3 + g.below(40);
        let groups: Vec<u32> = (0..n).map(|_| g.below(ng) as u32).collect();
        let y = ys(n);
        let k = 2 + g.below(4) as usize;
        let Ok(p) = split(&input(
            Method::Group {
                groups: groups.clone(),
            },
            &y,
            0.2,
            0.0,
            Folds::K(k),
            1,
            g.next(),
        )) else {
            continue;
        };
        for a in 0..n {
            for b in 0..n {
                if groups[a] == groups[b] {
                    assert_eq!(
                        p.parts[a], p.parts[b],
                        "group {} straddles partitions",
                        groups[a]
                    );
                }
            }
        }
        for f in &p.folds {
            for i in &f.fit {
                assert!(
                    f.score.iter().all(|j| groups[*j] != groups[*i]),
                    "a group straddles a fold"
                );
            }
        }
        check_folds(&p);
        checked += 1;
    }
    assert!(
        checked >= 150,
        "only {checked} of 200 generated cases could be split"
    );
}

#[test]
fn property_time_never_fits_on_the_future() {
    let mut g = Gen(3);
    let mut checked = 0;
    for _ in 0..200 {
        let n = 20 + g.below(200) as usize;
        let order: Vec<f64> = (0..n).map(|_| g.below(50) as f64).collect();
        let y = ys(n);
        let k = 2 + g.below(5) as usize;
        let Ok(p) = split(&input(
            Method::Time {
                order: order.clone(),
            },
            &y,
            0.2,
            0.0,
            Folds::K(k),
            1,
            0,
        )) else {
            continue;
        };
        let dev_max = p
            .development()
            .iter()
            .map(|&i| order[i])
            .fold(f64::MIN, f64::max);
        for i in p.rows_in(Part::Test) {
            assert!(
                order[i] > dev_max,
                "a test row is not later than every development row (ties never straddle the cut)"
            );
        }
        for f in &p.folds {
            let fit_max = f.fit.iter().map(|&i| order[i]).fold(f64::MIN, f64::max);
            let score_min = f.score.iter().map(|&i| order[i]).fold(f64::MAX, f64::min);
            assert!(
                fit_max < score_min,
                "fold {} fits on rows not earlier than it scores",
                f.index
            );
        }
        checked += 1;
    }
    assert!(
        checked >= 150,
        "only {checked} of 200 generated cases could be split"
    );
}

#[test]
fn property_hash_membership_is_stable_when_rows_are_appended() {
    let mut g = Gen(4);
    for _ in 0..50 {
        let n = 50 + g.below(200) as usize;
        let extra = 1 + g.below(100) as usize;
        let seed = g.next();
        let keys: Vec<String> = (0..n + extra)
            .map(|i| format!("bay-{}-{}", i, g.below(1000)))
            .collect();
        let y = ys(n + extra);
        let small = split(&input(
            Method::Hash {
                keys: keys[..n].to_vec(),
            },
            &y[..n],
            0.2,
            0.1,
            Folds::K(3),
            1,
            seed,
        ))
        .unwrap();
        let big = split(&input(
            Method::Hash { keys: keys.clone() },
            &y,
            0.2,
            0.1,
            Folds::K(3),
            1,
            seed,
        ))
        .unwrap();
        for i in 0..n {
            assert_eq!(
                small.parts[i], big.parts[i],
                "row {i} changed partition when rows were appended"
            );
        }
    }
}

#[test]
fn property_stratified_keeps_bins_balanced() {
    let mut g = Gen(5);
    for _ in 0..100 {
        let n = 40 + g.below(300) as usize;
        let y: Vec<f64> = (0..n).map(|_| g.below(10_000) as f64).collect();
        let bins = 2 + g.below(6) as usize;
        let k = 2 + g.below(6) as usize;
        let p = split(&input(
            Method::Stratified {
                bins,
                by_class: false,
            },
            &y,
            0.2,
            0.0,
            Folds::K(k),
            1,
            g.next(),
        ))
        .unwrap();
        check_folds(&p);
        // Bin of each row among all rows, as the split computes it.
        let mut by: Vec<usize> = (0..n).collect();
        by.sort_by(|&a, &b| y[a].total_cmp(&y[b]).then(a.cmp(&b)));
        let mut bin = vec![0; n];
        for (rank, &r) in by.iter().enumerate() {
            bin[r] = rank * bins / n;
        }
        for b in 0..bins {
            let in_bin = (0..n).filter(|&r| bin[r] == b).count() as f64;
            let in_test = (0..n)
                .filter(|&r| bin[r] == b && p.parts[r] == Part::Test)
                .count() as f64;
            assert!(
                (in_test - in_bin * p.count(Part::Test) as f64 / n as f64).abs() <= 1.0 + 1e-9,
                "bin {b}: {in_test} of {in_bin} in test"
            );
        }
    }
}

#[test]
fn validation_fraction_gives_one_holdout_fold() {
    let y = ys(100);
    let p = split(&input(Method::Random, &y, 0.2, 0.2, Folds::K(5), 1, 9)).unwrap();
    assert!(p.holdout);
    assert_eq!(p.folds.len(), 1);
    assert_eq!(
        (
            p.count(Part::Train),
            p.count(Part::Validation),
            p.count(Part::Test)
        ),
        (60, 20, 20)
    );
    check_folds(&p);
}

#[test]
fn leave_one_out_and_impossible_splits() {
    let y = ys(7);
    let p = split(&input(
        Method::Random,
        &y,
        0.0,
        0.0,
        Folds::LeaveOneOut,
        1,
        1,
    ))
    .unwrap();
    assert_eq!(p.folds.len(), 7);
    assert!(
        p.folds
            .iter()
            .all(|f| f.score.len() == 1 && f.fit.len() == 6)
    );
    let e = split(&input(Method::Random, &y, 0.0, 0.0, Folds::K(10), 1, 1)).unwrap_err();
    assert!(e.to_string().contains("fewer than the 10 folds"), "{e}");
    let groups = vec![0, 0, 1, 1, 1, 0, 1];
    let e = split(&input(
        Method::Group { groups },
        &y,
        0.0,
        0.0,
        Folds::K(3),
        1,
        1,
    ))
    .unwrap_err();
    assert!(
        e.to_string().contains("groups, fewer than the 3 folds"),
        "{e}"
    );
}

#[test]
fn property_stratified_groups_never_straddle_and_keep_class_shares() {
    let mut g = Gen(6);
    let mut checked = 0;
    for _ in 0..100 {
        let ngroups = 20 + g.below(40) as u32;
        let n = 200 + g.below(300) as usize;
        let groups: Vec<u32> = (0..n).map(|_| g.below(u64::from(ngroups)) as u32).collect();
        // Two classes, about 25% positive.
        let y: Vec<f64> = (0..n)
            .map(|_| if g.below(4) == 0 { 1.0 } else { 0.0 })
            .collect();
        let k = 2 + g.below(4) as usize;
        let input = input(
            Method::StratifiedGroup {
                groups: groups.clone(),
                bins: 0,
            },
            &y,
            0.2,
            0.0,
            Folds::K(k),
            1,
            g.next(),
        );
        let Ok(p) = split(&input) else { continue };
        for a in 0..n {
            for b in a + 1..n {
                if groups[a] == groups[b] {
                    assert_eq!(p.parts[a], p.parts[b]);
                }
            }
        }
        for f in &p.folds {
            assert!(
                f.fit
                    .iter()
                    .all(|i| f.score.iter().all(|j| groups[*i] != groups[*j])),
                "a group straddles a fold"
            );
        }
        check_folds(&p);
        let share = |rows: &[usize]| {
            rows.iter().filter(|&&r| y[r] == 1.0).count() as f64 / rows.len().max(1) as f64
        };
        let all = share(&(0..n).collect::<Vec<_>>());
        let test = p.rows_in(Part::Test);
        assert!(
            (share(&test) - all).abs() < 0.1,
            "test share {} vs {all}",
            share(&test)
        );
        assert!(
            (test.len() as f64 / n as f64 - 0.2).abs() < 0.1,
            "test size {}",
            test.len()
        );
        checked += 1;
    }
    assert!(checked >= 90, "{checked}");
    // The same inputs give the same assignment.
    let groups: Vec<u32> = (0..60).map(|i| i / 3).collect();
    let y: Vec<f64> = (0..60).map(|i| f64::from(i % 4 == 0)).collect();
    let a = split(&input(
        Method::StratifiedGroup {
            groups: groups.clone(),
            bins: 0,
        },
        &y,
        0.25,
        0.0,
        Folds::K(3),
        1,
        9,
    ))
    .unwrap();
    let b = split(&input(
        Method::StratifiedGroup { groups, bins: 0 },
        &y,
        0.25,
        0.0,
        Folds::K(3),
        1,
        9,
    ))
    .unwrap();
    assert_eq!((a.parts, a.folds), (b.parts, b.folds));
}

/// A split large enough for the fold lists to be built on two threads: every fold's lists are
/// in row order, its fit and score rows are exactly the development rows, the scores cover
/// them once, and the sizes differ by at most one (odd and even fold counts).
#[test]
fn large_splits_build_each_fold_from_every_development_row() {
    let n = 150_001;
    let y = ys(n);
    for k in [2, 3, 5] {
        let p = split(&input(Method::Random, &y, 0.2, 0.0, Folds::K(k), 1, 7)).unwrap();
        let dev = p.development();
        assert!(dev.len() >= 100_000);
        let mut covered = vec![0u8; n];
        for f in &p.folds {
            assert!(f.fit.is_sorted() && f.score.is_sorted());
            let mut both: Vec<usize> = f.fit.iter().chain(&f.score).copied().collect();
            both.sort_unstable();
            assert_eq!(both, dev, "fold {} of {k}", f.index);
            for &r in &f.score {
                covered[r] += 1;
            }
        }
        assert!(dev.iter().all(|&r| covered[r] == 1));
        let sizes: Vec<usize> = p.folds.iter().map(|f| f.score.len()).collect();
        assert!(sizes.iter().max().unwrap() - sizes.iter().min().unwrap() <= 1);
        assert_eq!(
            (0..k).collect::<Vec<_>>(),
            p.folds.iter().map(|f| f.index).collect::<Vec<_>>()
        );
    }
}

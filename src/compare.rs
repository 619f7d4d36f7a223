//! Two stored runs side by side: what differs in their specs (data, split, grid, selection),
//! the scores of the candidates they share, and, for two candidates scored on the same folds,
//! the corrected resampled t-test (Nadeau & Bengio 2003), so that a difference within the noise
//! of cross-validation is called so. Pure: it reads ledger rows handed to it.

use crate::guard::stats::{ResampledT, resampled_t};
use crate::ledger::{CandidateRow, FoldScore, RunDetail};
use crate::metrics::Metric;
use serde_json::Value;

/// A candidate id with its fold scores.
pub type Scored = (i64, Vec<FoldScore>);

/// One compared field of the two runs.
#[derive(Debug, Clone)]
pub struct Field {
    pub name: &'static str,
    pub a: String,
    pub b: String,
    /// Equal in substance (for the grid: the same candidates, not only the same counts).
    pub same: bool,
}

/// A candidate present in both runs (same family, parameters and standardisation).
#[derive(Debug, Clone)]
pub struct Matched {
    pub family: String,
    pub params: Value,
    pub a: i64,
    pub b: i64,
    pub a_score: Option<f64>,
    pub b_score: Option<f64>,
}

impl Matched {
    /// b minus a.
    pub fn difference(&self) -> Option<f64> {
        Some(self.b_score? - self.a_score?)
    }
}

/// The paired test of one candidate of each run.
#[derive(Debug, Clone)]
pub struct PairTest {
    pub a: i64,
    pub b: i64,
    /// The mean validation score of each over the shared folds.
    pub a_mean: f64,
    pub b_mean: f64,
    /// On the differences b - a per fold; `None` when undefined (see `reason`).
    pub result: Option<ResampledT>,
    pub reason: Option<String>,
}

#[derive(Debug, Clone)]
pub struct Comparison {
    pub a: i64,
    pub b: i64,
    pub fields: Vec<Field>,
    /// Lines only in A's spec text, and only in B's (a line diff).
    pub spec_diff: Vec<(char, String)>,
    pub metric: String,
    pub higher_is_better: bool,
    pub matched: Vec<Matched>,
    pub only_a: Vec<(i64, String, Value)>,
    pub only_b: Vec<(i64, String, Value)>,
    /// Whether the two runs scored the same folds of the same partition.
    pub same_folds: bool,
    pub test: Option<PairTest>,
    /// Why no test was run, when none was.
    pub no_test: Option<String>,
}

fn key(c: &CandidateRow) -> (String, String, bool) {
    (c.family.clone(), c.params.to_string(), c.standardize)
}

/// Lines of `a` and `b` as a diff: (' ', line) common, ('-', line) only in a, ('+', line) only
/// in b; by a longest common subsequence (spec files are short).
pub fn line_diff(a: &str, b: &str) -> Vec<(char, String)> {
    let (x, y): (Vec<&str>, Vec<&str>) = (a.lines().collect(), b.lines().collect());
    let (n, m) = (x.len(), y.len());
    let mut l = vec![0u32; (n + 1) * (m + 1)];
    for i in (0..n).rev() {
        for j in (0..m).rev() {
            l[i * (m + 1) + j] = if x[i] == y[j] {
                l[(i + 1) * (m + 1) + j + 1] + 1
            } else {
                l[(i + 1) * (m + 1) + j].max(l[i * (m + 1) + j + 1])
            };
        }
    }
    let (mut i, mut j) = (0, 0);
    let mut out = Vec::new();
    while i < n || j < m {
        if i < n && j < m && x[i] == y[j] {
            out.push((' ', x[i].to_string()));
            i += 1;
            j += 1;
        } else if i < n && (j == m || l[(i + 1) * (m + 1) + j] >= l[i * (m + 1) + j + 1]) {
            // A's line first, then B's, where a line changed.
            out.push(('-', x[i].to_string()));
            i += 1;
        } else {
            out.push(('+', y[j].to_string()));
            j += 1;
        }
    }
    out
}

/// Validation scores of `metric` by (repeat, fold).
fn by_fold(scores: &[FoldScore], metric: &str) -> Vec<((i64, i64), Option<f64>)> {
    scores
        .iter()
        .filter(|(_, _, part, m, _)| part == "validation" && m == metric)
        .map(|(r, f, _, _, v)| ((*r, *f), *v))
        .collect()
}

/// Compare run `a` with run `b`. `metric` is the score compared (the runs' selection metric
/// when `None`); `pair` the two candidates to test, with their fold scores (the caller reads
/// them from the ledger; `None` when the runs do not share folds).
pub fn compare(
    a: &RunDetail,
    b: &RunDetail,
    metric: Metric,
    pair: Option<(Scored, Scored)>,
) -> Comparison {
    let (sa, sb) = (&a.summary, &b.summary);
    let grid = |d: &RunDetail| {
        let mut fams: Vec<(String, usize)> = Vec::new();
        for c in &d.candidates {
            match fams.iter_mut().find(|(f, _)| *f == c.family) {
                Some((_, n)) => *n += 1,
                None => fams.push((c.family.clone(), 1)),
            }
        }
        fams.iter()
            .map(|(f, n)| format!("{f} x{n}"))
            .collect::<Vec<_>>()
            .join(", ")
    };
    let f = |name: &'static str, a: String, b: String| Field {
        name,
        same: a == b,
        a,
        b,
    };
    let fields = vec![
        f("experiment", sa.experiment.clone(), sb.experiment.clone()),
        f("spec sha256", a.spec_hash.clone(), b.spec_hash.clone()),
        f(
            "data sha256",
            sa.data_sha256.clone(),
            sb.data_sha256.clone(),
        ),
        f(
            "rows used",
            a.rows_used.to_string(),
            b.rows_used.to_string(),
        ),
        f("split", a.split_settings.clone(), b.split_settings.clone()),
        f(
            "partition",
            sa.partition_id.clone(),
            sb.partition_id.clone(),
        ),
        f(
            "train / validation / test",
            format!("{} / {} / {}", a.n_train, a.n_validation, a.n_test),
            format!("{} / {} / {}", b.n_train, b.n_validation, b.n_test),
        ),
        f(
            "folds",
            a.folds.len().to_string(),
            b.folds.len().to_string(),
        ),
        f("grid", grid(a), grid(b)),
        f(
            "selection",
            format!("{} {}", sa.metric, a.rule),
            format!("{} {}", sb.metric, b.rule),
        ),
        f("tool", a.tool_version.clone(), b.tool_version.clone()),
    ];
    let name = metric.name();
    let score = |c: &CandidateRow| c.validation.get(name).and_then(|s| s.mean);
    let mut matched = Vec::new();
    let mut only_a = Vec::new();
    for ca in &a.candidates {
        match b.candidates.iter().find(|cb| key(cb) == key(ca)) {
            Some(cb) => matched.push(Matched {
                family: ca.family.clone(),
                params: ca.params.clone(),
                a: ca.id,
                b: cb.id,
                a_score: score(ca),
                b_score: score(cb),
            }),
            None => only_a.push((ca.id, ca.family.clone(), ca.params.clone())),
        }
    }
    let only_b: Vec<_> = b
        .candidates
        .iter()
        .filter(|cb| !a.candidates.iter().any(|ca| key(ca) == key(cb)))
        .map(|c| (c.id, c.family.clone(), c.params.clone()))
        .collect();
    let shape = |d: &RunDetail| -> Vec<(i64, i64, i64, i64)> {
        d.folds
            .iter()
            .map(|f| (f.repeat, f.fold, f.n_fit, f.n_score))
            .collect()
    };
    let same_folds = sa.partition_id == sb.partition_id
        && shape(a) == shape(b)
        && a.split_settings == b.split_settings;
    let mut no_test = None;
    let test = match pair {
        _ if !same_folds => {
            no_test = Some(
                "the runs did not score the same folds (partition or split settings differ), so their fold scores do not pair up"
                    .to_string(),
            );
            None
        }
        _ if a.folds.len() < 2 => {
            no_test = Some(
                "one fixed validation partition gives one score per candidate: there is no spread to test"
                    .to_string(),
            );
            None
        }
        None => None,
        Some(((ia, fa), (ib, fb))) => Some(pair_test(a, metric, (ia, &fa), (ib, &fb))),
    };
    let mut fields = fields;
    if let Some(g) = fields.iter_mut().find(|f| f.name == "grid") {
        g.same = only_a.is_empty() && only_b.is_empty();
    }
    Comparison {
        a: sa.id,
        b: sb.id,
        fields,
        spec_diff: line_diff(&a.spec_text, &b.spec_text),
        metric: name.to_string(),
        higher_is_better: metric.higher_is_better(),
        matched,
        only_a,
        only_b,
        same_folds,
        test,
        no_test,
    }
}

fn pair_test(
    a: &RunDetail,
    metric: Metric,
    (ia, fa): (i64, &[FoldScore]),
    (ib, fb): (i64, &[FoldScore]),
) -> PairTest {
    let (xa, xb) = (by_fold(fa, metric.name()), by_fold(fb, metric.name()));
    let mut diffs = Vec::new();
    let (mut sum_a, mut sum_b) = (0.0, 0.0);
    let mut reason = None;
    for (k, va) in &xa {
        match (va, xb.iter().find(|(kb, _)| kb == k).and_then(|(_, v)| *v)) {
            (Some(va), Some(vb)) => {
                diffs.push(vb - va);
                sum_a += va;
                sum_b += vb;
            }
            _ => {
                reason = Some(format!(
                    "{} is undefined on repeat {} fold {} for one of the two",
                    metric.name(),
                    k.0,
                    k.1
                ));
                break;
            }
        }
    }
    if reason.is_none() && xa.len() != xb.len() {
        reason = Some("the two candidates were scored on different folds".to_string());
    }
    // n2 / n1 from the folds' sizes (1 / (k - 1) for k-fold).
    let n_fit: i64 = a.folds.iter().map(|f| f.n_fit).sum();
    let n_score: i64 = a.folds.iter().map(|f| f.n_score).sum();
    let ratio = n_score as f64 / n_fit.max(1) as f64;
    let result = match reason {
        Some(_) => None,
        None => resampled_t(&diffs, ratio),
    };
    if reason.is_none() && result.is_none() {
        reason = Some(
            "the two candidates score the same on every fold: the difference is exactly 0"
                .to_string(),
        );
    }
    let n = diffs.len().max(1) as f64;
    PairTest {
        a: ia,
        b: ib,
        a_mean: sum_a / n,
        b_mean: sum_b / n,
        result,
        reason,
    }
}

/// The candidates compared when none are named: each run's selected candidate; within one run,
/// its selected candidate and the best other one by `metric` (is the winner really ahead?).
pub fn default_pair(a: &RunDetail, b: &RunDetail, metric: Metric) -> Option<(i64, i64)> {
    if a.summary.id != b.summary.id {
        return Some((a.summary.selected, b.summary.selected));
    }
    let sel = a.summary.selected;
    let score = |c: &CandidateRow| c.validation.get(metric.name()).and_then(|s| s.mean);
    let mut best: Option<(i64, f64)> = None;
    for c in a.candidates.iter().filter(|c| c.id != sel) {
        if let Some(v) = score(c)
            && best.is_none_or(|(_, b)| metric.better(v, b))
        {
            best = Some((c.id, v));
        }
    }
    best.map(|(id, _)| (sel, id))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn line_diff_keeps_common_lines_in_order() {
        let d = line_diff("a\nb\nc\nd\n", "a\nc\nx\nd\n");
        let text: Vec<String> = d.iter().map(|(k, l)| format!("{k}{l}")).collect();
        assert_eq!(text, [" a", "-b", " c", "+x", " d"]);
        let changed = line_diff("k = 1\nz\n", "k = 2\nz\n");
        let text: Vec<String> = changed.iter().map(|(k, l)| format!("{k}{l}")).collect();
        assert_eq!(text, ["-k = 1", "+k = 2", " z"]);
        assert!(line_diff("same\n", "same\n").iter().all(|(k, _)| *k == ' '));
    }
}

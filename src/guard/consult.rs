//! Consultations of sealed test rows, and every rule about them.
//!
//! A consultation is any use of a sealed test row's target in a number a person can see:
//! - a reveal (`probity reveal`);
//! - a prediction of sealed rows allowed with `predict --allow-sealed`;
//! - a development use: a run that fits or scores on rows that are test rows of another stored
//!   partition (its validation scores are then scores on those sealed targets).
//!
//! Each partition keeps the rules of the run that first stored it (its `Seal`). This module
//! decides what one consultation answers and records, applies the one over-budget rule, and
//! words the warnings. It reads and writes nothing: the ledger hands it a partition's history
//! read inside the transaction that then stores the record it returns, so two consultations at
//! once are serialised and each sees the other.

use super::{Answer, History, Optimism, answer, optimism};
use crate::error::{Error, Result};
use crate::metrics::Metric;
use crate::spec::{GuardMode, GuardSpec, Overlap};
use serde_json::json;

/// The rules a partition was sealed with: the `[guard]` of the run that first stored it, fixed
/// from that run's start. A later spec on the same partition cannot loosen them (a copied spec
/// with a larger budget gets a warning, not a larger budget).
#[derive(Debug, Clone, PartialEq)]
pub struct Seal {
    pub rules: GuardSpec,
    /// Whether rules were fixed for it (false: nothing is stored about it yet, and the
    /// defaults apply).
    pub fixed: bool,
    /// The first run stored on the partition, when there is one.
    pub by: Option<i64>,
    /// The target column of that run's spec: a run that reads neither it as its target nor
    /// as a feature uses no sealed target, and consults nothing.
    pub target: Option<String>,
}

/// A warning when a spec's `[guard]` differs from the rules its partition was sealed with: the
/// seal's apply (a copied spec with a larger budget does not buy more looks).
pub fn rules_differ(seal: &Seal, spec: &GuardSpec, partition: &str) -> Option<String> {
    (seal.rules != *spec).then(|| {
        format!(
            "partition {partition} was sealed{} with [guard] {}; those rules apply to it, not this spec's {}",
            seal.by.map_or(String::new(), |r| format!(" by run {r}")),
            seal.rules.to_json(),
            spec.to_json()
        )
    })
}

/// What a run says about its own test partition before storing: rules that differ from the
/// partition's seal (when earlier runs sealed it), consultations it already had (`own`), and
/// its rows that other partitions' consultations showed (`exposure`; `test_rows` in all).
pub fn run_warnings(
    seal: &Seal,
    spec: &GuardSpec,
    partition: &str,
    own: &History,
    exposure: &Exposure,
    test_rows: usize,
) -> Vec<String> {
    let mut w = Vec::new();
    if seal.fixed
        && let Some(d) = rules_differ(seal, spec, partition)
    {
        w.push(d);
    }
    let n = own.consultations();
    if n > 0 {
        w.push(format!(
            "this test partition ({partition}) has already been consulted {n} time(s); a new reveal will count on top"
        ));
    }
    if exposure.rows > 0 {
        w.push(format!(
            "{} of {} test rows were already revealed in another partition (up to {} time(s), last on {}); their effective reveal count is {}, so this test partition is not fresh",
            thousands(exposure.rows),
            thousands(test_rows),
            exposure.most,
            exposure.last,
            exposure.most.max(n as i64)
        ));
    }
    w
}

/// One unit of consultation of a sealed partition from a development use: (run, rows used).
pub type Use = (i64, i64);

impl History {
    /// Reveals and development uses together: what the budget counts.
    pub fn consultations(&self) -> usize {
        self.reveals + self.uses.len()
    }
}

/// The one over-budget rule. `count` and `ladder`: more consultations than the budget.
/// `reusable`: the budget counts answers drawn from the test rows (Thresholdout's over-threshold
/// answers) and development uses; a refused query means it was spent.
pub fn over_budget(rules: &GuardSpec, h: &History) -> bool {
    let budget = rules.reveals as usize;
    match rules.mode {
        GuardMode::Reusable { .. } => h.refused > 0 || h.over_threshold + h.uses.len() > budget,
        GuardMode::Count | GuardMode::Ladder { .. } => h.consultations() > budget,
    }
}

/// Who consulted, and when: read by the CLI (the only code that reads clock and environment).
#[derive(Debug, Clone)]
pub struct Who {
    pub at: String,
    pub user: String,
    pub host: String,
    pub tool_version: String,
}

/// One stored score of a consultation: (metric, value, low, high, standard error).
pub type RecordScore = (String, Option<f64>, Option<f64>, Option<f64>, Option<f64>);

/// What the ledger stores for a reveal or an allowed prediction (one row of `reveals`, with its
/// scores).
#[derive(Debug, Clone)]
pub struct Record {
    pub run_id: i64,
    pub candidate: i64,
    pub partition_id: String,
    /// "reveal" or "predict" (`predict --allow-sealed`).
    pub source: String,
    pub revealed_at: String,
    pub user: String,
    pub host: String,
    pub tool_version: String,
    pub mode: String,
    pub budget: i64,
    pub metric: String,
    pub n_rows: i64,
    pub seed: String,
    pub resamples: i64,
    pub confidence: f64,
    pub answer: Option<f64>,
    pub answer_kind: String,
    pub mechanism: String,
    pub optimism: String,
    pub scores: Vec<RecordScore>,
}

/// A candidate's exact scores on the sealed rows, computed before the consultation (outside
/// the transaction: they do not depend on the history).
#[derive(Debug, Clone)]
pub struct TestScores<'a> {
    pub metrics: &'a [Metric],
    pub scores: &'a [Option<f64>],
    /// (low, high, standard error) per metric, from the bootstrap.
    pub intervals: &'a [Option<(f64, f64, f64)>],
    pub seed: u64,
    pub resamples: usize,
}

/// Rows of a partition that other partitions' reveals have already shown: how many, the most
/// consultations of any partition holding them, and the last reveal's time.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Exposure {
    pub rows: usize,
    pub most: i64,
    pub last: String,
}

/// Sum up the exposure of `keys` from a map of identity -> (consultations, last reveal).
pub fn exposure(
    keys: &[crate::data::RowKey],
    map: &std::collections::BTreeMap<crate::data::RowKey, (i64, String)>,
) -> Exposure {
    let mut e = Exposure::default();
    for k in keys {
        if let Some((count, when)) = map.get(k) {
            e.rows += 1;
            e.most = e.most.max(*count);
            if *when > e.last {
                e.last = when.clone();
            }
        }
    }
    e
}

/// Who consults which candidate of which run, on which partition, for which metric.
#[derive(Debug, Clone)]
pub struct Subject<'a> {
    pub who: Who,
    pub run: i64,
    pub candidate: i64,
    pub spec_hash: &'a str,
    pub partition: &'a str,
    /// The selection metric, which the mode answers for.
    pub metric: Metric,
}

/// A reveal asked for: one candidate of one run on its partition's test rows.
#[derive(Debug, Clone)]
pub struct RevealQuery<'a> {
    pub subject: Subject<'a>,
    /// The run's split seed: the mechanism's noise streams derive from it.
    pub seed: u64,
    /// The candidate's cross-validated estimate of `metric`.
    pub development: f64,
    pub rows: usize,
    pub test: TestScores<'a>,
    /// This partition's rows as other partitions' reveals showed them.
    pub exposure: Exposure,
}

/// What one consultation answered and recorded.
#[derive(Debug, Clone)]
pub struct Consultation {
    pub record: Record,
    pub answer: Answer,
    pub optimism: Optimism,
    /// This reveal's number among the partition's reveals.
    pub position: usize,
    /// Reveals and development uses of the partition, this one included.
    pub consultations: usize,
    pub budget: u32,
    pub over_budget: bool,
    /// Whether exact scores may be shown (count mode only).
    pub exact: bool,
    /// The development uses counted before this consultation.
    pub uses: Vec<Use>,
    pub warnings: Vec<String>,
}

/// Thousands separators for counts in messages.
pub fn thousands(n: usize) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

fn uses_text(uses: &[Use]) -> String {
    let runs: Vec<String> = uses
        .iter()
        .map(|(run, rows)| format!("run {run} ({} rows)", thousands(*rows as usize)))
        .collect();
    runs.join(", ")
}

/// The warning every consultation past the budget carries.
fn budget_warning(partition: &str, rules: &GuardSpec, h: &History) -> String {
    match rules.mode {
        GuardMode::Reusable { .. } => format!(
            "partition {partition}: the reusable holdout's budget of {} (answers drawn from the test rows, and development uses) is spent; no more test answers (audit fails)",
            rules.reveals
        ),
        _ => format!(
            "partition {partition} has now been consulted {} times ({} reveal(s), {} development use(s)), over its budget of {}: its test score is no longer an unbiased estimate (audit fails)",
            h.consultations(),
            h.reveals,
            h.uses.len(),
            rules.reveals
        ),
    }
}

/// What the mechanism produced for one consultation, before it is recorded.
struct Outcome<'a> {
    source: &'static str,
    answer: Answer,
    rows: usize,
    /// The bootstrap's seed and resamples (none for a prediction).
    seed: u64,
    resamples: usize,
    /// The standard error of the metric on these rows, when the bootstrap gave one.
    se: Option<f64>,
    scores: Vec<RecordScore>,
    exposure: &'a Exposure,
}

/// The record, the history after it, the over-budget flag and the warnings of one
/// consultation: the same for every kind.
fn conclude(rules: &GuardSpec, h: &History, s: &Subject, o: Outcome) -> Result<Consultation> {
    let mut after = h.clone();
    after.reveals += 1;
    after
        .candidates
        .insert((s.spec_hash.to_string(), s.candidate));
    match o.answer.kind {
        "test+noise" => after.over_threshold += 1,
        "refused" => after.refused += 1,
        _ => {}
    }
    // Under a mechanism the bootstrap's standard error is withheld too: with a proportion it
    // gives the score back (n x se^2 = p (1 - p)).
    let se = o.se.filter(|_| matches!(rules.mode, GuardMode::Count));
    let opt = optimism(
        s.metric,
        o.rows,
        after.candidates.len(),
        se,
        rules.confidence,
    );
    let over = over_budget(rules, &after);
    let mut warnings = Vec::new();
    if over {
        warnings.push(budget_warning(s.partition, rules, &after));
    }
    if !h.uses.is_empty() {
        warnings.push(format!(
            "partition {}'s test rows were used in development by {}: each such run counts as one consultation, so this test set was not fresh",
            s.partition,
            uses_text(&h.uses)
        ));
    }
    let e = o.exposure;
    if e.rows > 0 {
        warnings.push(format!(
            "{} of these {} test rows had been revealed in other partitions (up to {} time(s), last on {}): their effective reveal count is {}",
            thousands(e.rows),
            thousands(o.rows),
            e.most,
            e.last,
            e.most.max(after.consultations() as i64)
        ));
    }
    let record = Record {
        run_id: s.run,
        candidate: s.candidate,
        partition_id: s.partition.to_string(),
        source: o.source.into(),
        revealed_at: s.who.at.clone(),
        user: s.who.user.clone(),
        host: s.who.host.clone(),
        tool_version: s.who.tool_version.clone(),
        mode: rules.mode.name().into(),
        budget: i64::from(rules.reveals),
        metric: s.metric.name().into(),
        n_rows: o.rows as i64,
        seed: o.seed.to_string(),
        resamples: o.resamples as i64,
        confidence: rules.confidence,
        answer: o.answer.value,
        answer_kind: o.answer.kind.into(),
        mechanism: o.answer.mechanism.to_string(),
        optimism: serde_json::to_string(&opt).map_err(|e| Error::Internal(e.to_string()))?,
        scores: o.scores,
    };
    Ok(Consultation {
        record,
        answer: o.answer,
        optimism: opt,
        position: after.reveals,
        consultations: after.consultations(),
        budget: rules.reveals,
        over_budget: over,
        exact: matches!(rules.mode, GuardMode::Count),
        uses: h.uses.clone(),
        warnings,
    })
}

/// A reveal under the partition's seal. `h` is the partition's history before it, read in the
/// transaction that stores the returned record; `h.reveals` picks the noise stream, so two
/// reveals never share noise.
pub fn reveal(seal: &Seal, h: &History, q: &RevealQuery) -> Result<Consultation> {
    let rules = &seal.rules;
    let (s, t) = (&q.subject, &q.test);
    let mi = t.metrics.iter().position(|m| *m == s.metric).unwrap_or(0);
    let test_value = t.scores.get(mi).copied().flatten().ok_or_else(|| {
        Error::Input(format!(
            "{} is undefined on these test rows",
            s.metric.name()
        ))
    })?;
    let mut noise =
        crate::split::rng::stream(q.seed, crate::split::rng::Domain::Noise, h.reveals as u32);
    let a = answer(
        rules.mode,
        rules.reveals,
        h,
        q.development,
        test_value,
        s.metric.higher_is_better(),
        &mut noise,
    );
    let scores = t
        .metrics
        .iter()
        .enumerate()
        .map(|(i, m)| {
            let iv = t.intervals.get(i).copied().flatten();
            (
                m.name().to_string(),
                t.scores.get(i).copied().flatten(),
                iv.map(|v| v.0),
                iv.map(|v| v.1),
                iv.map(|v| v.2),
            )
        })
        .collect();
    let outcome = Outcome {
        source: "reveal",
        answer: a,
        rows: q.rows,
        seed: t.seed,
        resamples: t.resamples,
        se: t.intervals.get(mi).copied().flatten().map(|i| i.2),
        scores,
        exposure: &q.exposure,
    };
    conclude(rules, h, s, outcome)
}

/// Predictions of sealed rows, allowed with `--allow-sealed`.
#[derive(Debug, Clone)]
pub struct PredictQuery<'a> {
    pub subject: Subject<'a>,
    /// The task's metrics.
    pub metrics: &'a [Metric],
    /// The exact scores on the sealed rows, when the file held their targets.
    pub scores: Option<&'a [Option<f64>]>,
    /// Sealed rows of this partition among the predicted ones.
    pub rows: usize,
    /// The predicted file, for the record.
    pub file: String,
}

/// An allowed prediction of sealed rows: in `count` mode one consultation, counted like a
/// reveal; `ladder` and `reusable` release only their mechanism's answers, so exact predictions
/// of their rows are refused.
pub fn predict(seal: &Seal, h: &History, q: &PredictQuery) -> Result<Consultation> {
    let rules = &seal.rules;
    let s = &q.subject;
    if !matches!(rules.mode, GuardMode::Count) {
        return Err(Error::Input(format!(
            "{}: {} rows are test rows of partition {}, sealed in {} mode, which releases only its mechanism's answers: exact predictions of them are refused even with --allow-sealed; use `probity reveal`",
            q.file,
            thousands(q.rows),
            s.partition,
            rules.mode.name()
        )));
    }
    let mi = q.metrics.iter().position(|m| *m == s.metric).unwrap_or(0);
    let exact = q.scores.and_then(|v| v.get(mi).copied().flatten());
    // Without targets in the file the predictions are the look: whoever holds the data file
    // scores them at once.
    let (kind, mechanism) = match q.scores {
        Some(_) => (
            "test",
            json!({"mode": "count", "source": "predict --allow-sealed", "file": q.file}),
        ),
        None => (
            "predictions",
            json!({"mode": "count", "source": "predict --allow-sealed", "file": q.file, "targets": false}),
        ),
    };
    let scores = q.scores.map_or_else(Vec::new, |v| {
        q.metrics
            .iter()
            .enumerate()
            .map(|(i, m)| {
                (
                    m.name().to_string(),
                    v.get(i).copied().flatten(),
                    None,
                    None,
                    None,
                )
            })
            .collect()
    });
    let outcome = Outcome {
        source: "predict",
        answer: Answer {
            kind,
            value: exact,
            mechanism,
        },
        rows: q.rows,
        seed: 0,
        resamples: 0,
        se: None,
        scores,
        exposure: &Exposure::default(),
    };
    conclude(rules, h, s, outcome)
}

/// A reveal (or allowed prediction) of one partition whose test rows are test rows of another
/// partition too (the same rows under another split: other folds, a `missing` rule that drops
/// nothing, a copy of the file): a look at those rows of the other partition, counted there as
/// one consultation. A partition under a mechanism releases only its own mechanism's answers
/// (from its own state and budget), so any look at its rows through another partition is
/// refused, whatever that partition's mode: another mechanism with a step of 1e-12 answers as
/// exactly as a count.
pub fn through(
    seal: &Seal,
    h: &History,
    s: &Subject,
    rows: usize,
    via: &str,
) -> Result<Consultation> {
    let rules = &seal.rules;
    if !matches!(rules.mode, GuardMode::Count) {
        return Err(Error::Input(format!(
            "{} of these test rows are test rows of partition {}{} too, sealed in {} mode, which releases only its own mechanism's answers: a score here would be one on its rows. Reveal a run of that partition instead",
            thousands(rows),
            s.partition,
            seal.by.map_or(String::new(), |r| format!(" (run {r})")),
            rules.mode.name()
        )));
    }
    let outcome = Outcome {
        source: "reveal",
        answer: Answer {
            kind: "overlap",
            value: None,
            mechanism: json!({"mode": rules.mode.name(), "via": via, "rows": rows}),
        },
        rows,
        seed: 0,
        resamples: 0,
        se: None,
        scores: Vec::new(),
        exposure: &Exposure::default(),
    };
    let mut c = conclude(rules, h, s, outcome)?;
    c.warnings.insert(
        0,
        format!(
            "{} of these test rows are test rows of partition {} too: counted there as one consultation ({} of its budget of {})",
            thousands(rows),
            s.partition,
            c.consultations,
            c.budget
        ),
    );
    Ok(c)
}

/// A stored partition whose test rows a run's development rows include.
#[derive(Debug, Clone)]
pub struct Overlapping {
    pub partition: String,
    pub seal: Seal,
    pub history: History,
    /// The run's development rows that are test rows of the partition.
    pub rows: usize,
    /// Why a run for another target counts: its target may be the sealed one (`TargetSeen`).
    pub because: Option<String>,
}

/// A run whose target is another column than a partition's sealed target, on rows that are
/// that partition's test rows, consults it anyway when its target follows the sealed one that
/// closely (`stats::association`: |Spearman's rho|, or Cramér's V for few classes, from 50
/// shared rows; an exact relation below): its validation scores are then, near enough, scores
/// on the sealed targets. Our own threshold (no source): a copy, a change of units or a
/// relabelling give 1, a median split about 0.87; the demo's outbreaks and yields about 0.07.
pub const FOLLOWS: f64 = 0.8;

/// The same for one of the run's features: a feature that follows the sealed target this
/// closely is that target under another name (a copy, a rescaling). Higher than `FOLLOWS`,
/// since honest features of another target may well track the sealed one loosely. Our own
/// threshold (no source).
pub const FEATURE_FOLLOWS: f64 = 0.95;

/// What a run for another target can tell of a partition's sealed target on the shared rows.
#[derive(Debug, Clone, PartialEq)]
pub enum TargetSeen {
    /// The file holds no column under the sealed target's name: the run's target may be it.
    Missing,
    /// The column under that name does not hold the sealed targets on these rows (the rows'
    /// identities with it as the target are not the sealed ones).
    NotTheTarget,
    /// The sealed target is there: how closely the run's target follows it, and each of the
    /// run's features (by name).
    Follows {
        target: f64,
        features: Vec<(String, f64)>,
        /// The shared rows where the sealed target and the run's target both have a value.
        rows: usize,
    },
}

/// Whether a run for another target consults the partition (and why, for its warning), given
/// the partition's target `sealed` and the run's `target`.
pub fn another_target(sealed: &str, target: &str, seen: &TargetSeen) -> Option<String> {
    match seen {
        TargetSeen::Missing => Some(format!(
            "the file has no column `{sealed}` (the partition's target), so this run's target `{target}` may be it renamed"
        )),
        TargetSeen::NotTheTarget => Some(format!(
            "the file's column `{sealed}` does not hold the partition's sealed targets on these rows, so this run's target `{target}` may be them"
        )),
        TargetSeen::Follows { rows, .. } if *rows < crate::guard::stats::FEW_ROWS => Some(format!(
            "on {rows} shared rows there is no telling whether this run's target `{target}` follows the partition's target `{sealed}` (it takes {})",
            crate::guard::stats::FEW_ROWS
        )),
        TargetSeen::Follows { target: a, .. } if *a >= FOLLOWS => Some(format!(
            "this run's target `{target}` follows the partition's target `{sealed}` on them (association {a:.2}, counted from {FOLLOWS})"
        )),
        TargetSeen::Follows { features, .. } => features
            .iter()
            .find(|(_, a)| *a >= FEATURE_FOLLOWS)
            .map(|(f, a)| format!(
                "this run's feature `{f}` follows the partition's target `{sealed}` on them (association {a:.2}, counted from {FEATURE_FOLLOWS} for a feature)"
            )),
    }
}

/// A run's development uses, (partition, rows) each, and the warnings to store with it.
pub type Development = (Vec<(String, i64)>, Vec<String>);

/// What a run's development rows did to other partitions: one use of each overlapping
/// partition (partition, rows), and the warnings to store with the run. Refused (exit 2) when a
/// partition was sealed with `overlap = "refuse"`. `dev_rows` is the run's development row
/// count.
pub fn development(dev_rows: usize, overlapping: &[Overlapping]) -> Result<Development> {
    if let Some(o) = overlapping.iter().find(|o| {
        o.seal.rules.overlap == Overlap::Refuse || !matches!(o.seal.rules.mode, GuardMode::Count)
    }) {
        let why = match o.seal.rules.mode {
            GuardMode::Count => "which was sealed with overlap = \"refuse\"".to_string(),
            m => format!(
                "which is sealed in {} mode and releases only its mechanism's answers (this run's validation scores would be exact scores on them)",
                m.name()
            ),
        };
        return Err(Error::Input(format!(
            "{} of this run's {} development rows are sealed test rows of partition {}{}, {why}: fitting or scoring on them would consult its test set. Keep those rows out of this data (the same split, or a file without them), or use another partition's spec",
            thousands(o.rows),
            thousands(dev_rows),
            o.partition,
            o.seal.by.map_or(String::new(), |r| format!(" (run {r})")),
        )));
    }
    let mut uses = Vec::new();
    let mut warnings = Vec::new();
    for o in overlapping {
        uses.push((o.partition.clone(), o.rows as i64));
        let mut after = o.history.clone();
        // The run's own id is not known yet; the count is what matters here.
        after.uses.push((0, o.rows as i64));
        let rules = &o.seal.rules;
        let mut w = format!(
            "{} of {} development rows are sealed test rows of partition {}{}: this run's validation scores are scores on them, so it counts as one consultation of that test set ({} of its budget of {})",
            thousands(o.rows),
            thousands(dev_rows),
            o.partition,
            o.seal.by.map_or(String::new(), |r| format!(" (run {r}'s)")),
            after.consultations(),
            rules.reveals
        );
        if over_budget(rules, &after) {
            w.push_str("; it is now over its budget (audit fails)");
        }
        if let Some(b) = &o.because {
            w.push_str(&format!(
                ". Counted though this run's target is another column: {b}"
            ));
        }
        warnings.push(w);
    }
    Ok((uses, warnings))
}

/// An earlier partition whose development rows include some of a new partition's test rows.
#[derive(Debug, Clone)]
pub struct Earlier {
    pub partition: String,
    /// The runs that fitted and scored on that partition's development rows.
    pub runs: Vec<i64>,
    /// The new partition's test rows among them.
    pub rows: usize,
}

/// The warning for a test partition whose rows earlier runs developed on: it is not fresh.
pub fn not_fresh(test_rows: usize, earlier: &[Earlier]) -> Option<String> {
    let most = earlier.iter().map(|e| e.rows).max()?;
    let list: Vec<String> = earlier
        .iter()
        .map(|e| {
            let runs: Vec<String> = e.runs.iter().map(i64::to_string).collect();
            format!(
                "{} in partition {} (run(s) {})",
                thousands(e.rows),
                e.partition,
                runs.join(", ")
            )
        })
        .collect();
    Some(format!(
        "up to {} of this run's {} test rows were development rows of earlier runs ({}): models were already fitted and scored on them, so this test partition is not fresh",
        thousands(most),
        thousands(test_rows),
        list.join("; ")
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rules(mode: GuardMode, reveals: u32) -> GuardSpec {
        GuardSpec {
            reveals,
            confidence: 0.95,
            mode,
            overlap: Overlap::Count,
        }
    }

    #[test]
    fn uses_count_against_the_budget_in_every_mode() {
        let mut h = History::default();
        let count = rules(GuardMode::Count, 2);
        let ladder = rules(GuardMode::Ladder { step: 0.1 }, 2);
        let reusable = rules(
            GuardMode::Reusable {
                threshold: 0.04,
                noise: 0.01,
            },
            2,
        );
        for r in [&count, &ladder, &reusable] {
            assert!(!over_budget(r, &h));
        }
        h.uses.push((3, 10));
        h.uses.push((4, 10));
        for r in [&count, &ladder, &reusable] {
            assert!(!over_budget(r, &h), "two uses fill a budget of two");
        }
        h.reveals += 1;
        assert!(over_budget(&count, &h));
        assert!(over_budget(&ladder, &h));
        // A reusable reveal answered from the development estimate spends nothing.
        assert!(!over_budget(&reusable, &h));
        h.over_threshold += 1;
        assert!(over_budget(&reusable, &h));
        let r = History {
            refused: 1,
            ..History::default()
        };
        assert!(
            over_budget(&reusable, &r),
            "a refused query means the budget was spent"
        );
    }

    #[test]
    fn a_refusing_seal_refuses_the_run_and_names_the_partition() {
        let seal = Seal {
            rules: GuardSpec {
                overlap: Overlap::Refuse,
                ..rules(GuardMode::Count, 1)
            },
            fixed: true,
            by: Some(4),
            target: None,
        };
        let o = Overlapping {
            partition: "abc".into(),
            seal,
            history: History::default(),
            rows: 1234,
            because: None,
        };
        let e = development(5000, &[o]).unwrap_err().to_string();
        assert!(
            e.contains("1,234 of this run's 5,000") && e.contains("partition abc (run 4)"),
            "{e}"
        );
    }

    #[test]
    fn a_use_is_counted_and_warned() {
        let o = Overlapping {
            partition: "abc".into(),
            seal: Seal {
                rules: rules(GuardMode::Count, 1),
                fixed: true,
                by: Some(1),
                target: None,
            },
            history: History {
                reveals: 1,
                ..History::default()
            },
            rows: 10,
            because: None,
        };
        let (uses, w) = development(30, &[o]).unwrap();
        assert_eq!(uses, vec![("abc".to_string(), 10)]);
        assert!(
            w[0].contains("(2 of its budget of 1)") && w[0].contains("now over its budget"),
            "{}",
            w[0]
        );
    }

    #[test]
    fn predictions_of_rows_under_a_mechanism_are_refused() {
        let seal = Seal {
            rules: rules(GuardMode::Ladder { step: 1.0 }, 5),
            fixed: false,
            by: None,
            target: None,
        };
        let q = PredictQuery {
            subject: Subject {
                who: Who {
                    at: "t".into(),
                    user: "u".into(),
                    host: "h".into(),
                    tool_version: "0".into(),
                },
                run: 1,
                candidate: 1,
                spec_hash: "s",
                partition: "p",
                metric: Metric::Rmse,
            },
            metrics: Metric::for_task(false),
            scores: None,
            rows: 3,
            file: "f.csv".into(),
        };
        let e = predict(&seal, &History::default(), &q)
            .unwrap_err()
            .to_string();
        assert!(e.contains("sealed in ladder mode"), "{e}");
        let count = Seal {
            rules: rules(GuardMode::Count, 1),
            fixed: false,
            by: None,
            target: None,
        };
        let c = predict(&count, &History::default(), &q).unwrap();
        assert_eq!(
            (c.position, c.over_budget, c.record.answer_kind.as_str()),
            (1, false, "predictions")
        );
        let h = History {
            reveals: 1,
            ..History::default()
        };
        assert!(predict(&count, &h, &q).unwrap().over_budget);
    }

    #[test]
    fn thousands_separates_groups_of_three() {
        assert_eq!(thousands(0), "0");
        assert_eq!(thousands(999), "999");
        assert_eq!(thousands(1000), "1,000");
        assert_eq!(thousands(1234567), "1,234,567");
    }
}

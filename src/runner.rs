//! The experiment runner: spec + table -> resolved columns -> partition -> every candidate on
//! every fold -> aggregate scores -> selection -> refit on all development rows.
//!
//! Work is split into (fold, model entry) tasks that run on any number of threads; each task's
//! result lands in its own slot and everything is reduced in task order, so one thread and many
//! give the same bits. No clock, no environment, no printing here.

use crate::data::{Table, Values};
use crate::error::{Error, Result};
use crate::guard::Sealed;
use crate::metrics::{ErrorSums, Metric, Truth, mean_se, score_all};
use crate::models::encode::{Encoder, Feature, Notes};
use crate::models::gram::{FITS, Gram, LaneGroup, Source, error_sums_both, fold_error_sums_shared};
use crate::models::{Design, Fitted, Params, model_for};
use crate::spec::{Family, Missing, ModelSpec, Named, Rule, Spec, SplitMethod, hex};
use crate::split::rng::{Domain, derive_seed};
use crate::split::{Method, Part, SplitInput, split};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::sync::Mutex;
use std::sync::atomic::{AtomicUsize, Ordering};

/// Scores in the order of `Prepared::metrics`; `None` where a metric is undefined.
pub type Scores = Vec<Option<f64>>;

/// The experiment's columns resolved against the data, and its partition.
#[derive(Debug, Clone)]
pub struct Prepared {
    /// Table rows kept (after `missing = "drop-rows"`), in file order.
    pub rows: Vec<usize>,
    /// Target per kept row.
    pub target: Vec<f64>,
    /// Table column indices of the features.
    pub features: Vec<usize>,
    pub feature_names: Vec<String>,
    pub sealed: Sealed,
    /// Stable partition id: data hash + split settings + assignment.
    pub partition_id: String,
    /// One byte per table row: r(train) v(alidation) t(est) -(dropped).
    pub assignment: Vec<u8>,
    pub dropped: usize,
    pub warnings: Vec<String>,
    /// The key column, if any (row identities use it).
    pub key: Option<usize>,
    /// The target column (labelled identities read it).
    pub target_column: usize,
    /// What a version-3 identity reads: the key's name and the feature names.
    pub recipe: crate::data::identity::Recipe,
    /// The identities of the partition's rows, as the ledger stores them (filled by the run
    /// beside its grid: `identities`).
    pub ids: Identities,
    /// How the row identities are formed: the version of the partition they go to.
    pub identity: crate::data::Identity,
    /// The resolved split method (for nested cross-validation's inner folds).
    pub method: Method,
    /// The metrics scored for this task, in order (every `Scores` follows it).
    pub metrics: Vec<Metric>,
    /// Class labels of a classification task (the target holds their indices); empty for
    /// regression. A binary task's positive class is the second.
    pub classes: Vec<String>,
}

/// The identities of a partition's rows, in the form the ledger stores them.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Identities {
    /// The test rows': version 3, their feature identities; versions 1 and 2, their whole-row
    /// ones. In identity order (a repeat kept: rows that look alike).
    pub test: Vec<crate::data::RowKey>,
    /// Version 3: the test rows' labelled identities (features and target), sorted, each once.
    pub test_labels: Vec<crate::data::RowKey>,
    /// Version 3 with a key: the test rows' key identities, sorted, each once.
    pub test_keys: Vec<crate::data::RowKey>,
    /// Version 3: the development rows' labelled fingerprints, sorted, each once.
    pub development: Vec<u64>,
    /// Version 3 with a key: the development rows' key fingerprints, sorted, each once.
    pub development_keys: Vec<u64>,
}

impl Prepared {
    /// Rows of the data file, for positions among the kept rows.
    pub fn table_rows(&self, positions: &[usize]) -> Vec<usize> {
        positions.iter().map(|&i| self.rows[i]).collect()
    }

    /// The test rows, as rows of the data file (membership only: their values stay sealed).
    pub fn test_rows(&self) -> Vec<usize> {
        self.table_rows(&self.sealed.test_members())
    }

    /// The development rows, as rows of the data file.
    pub fn development_rows(&self) -> Vec<usize> {
        self.table_rows(&self.sealed.development())
    }

    /// The identities of the partition's rows in the version `identity` says: SHA-256 of each
    /// row's cells, the costly part of preparing a large split, so `run_recording` does it
    /// beside the grid. Versions 1 and 2 (a partition stored by an earlier probity) keep their
    /// test rows' identities only.
    pub fn identities(&self, table: &Table, threads: usize) -> Identities {
        use crate::data::identity::{fingerprints, key_fingerprints, key_ids, labelled_ids};
        let test = self.test_rows();
        let Some(legacy) = self.identity.legacy() else {
            let dev = self.development_rows();
            fn sorted<T: Ord>(mut k: Vec<T>, distinct: bool) -> Vec<T> {
                k.sort_unstable();
                if distinct {
                    k.dedup();
                }
                k
            }
            // The recipe's columns are this table's features, so every identity forms.
            let (test_features, test_labels): (Vec<_>, Vec<_>) =
                labelled_ids(table, &self.recipe, self.target_column, &test, threads)
                    .unwrap_or_default()
                    .into_iter()
                    .unzip();
            let development = fingerprints(table, &self.recipe, self.target_column, &dev, threads)
                .unwrap_or_default();
            let (test_keys, development_keys) = match self.key {
                Some(c) => (
                    key_ids(table, c, &test, threads)
                        .into_iter()
                        .flatten()
                        .collect(),
                    key_fingerprints(table, c, &dev, threads)
                        .into_iter()
                        .flatten()
                        .collect(),
                ),
                None => (Vec::new(), Vec::new()),
            };
            return Identities {
                test: sorted(test_features, false),
                test_labels: sorted(test_labels, true),
                test_keys: sorted(test_keys, true),
                development: sorted(development, true),
                development_keys: sorted(development_keys, true),
            };
        };
        let mut keys = crate::data::row_keys(table, self.key, &test, threads, legacy);
        keys.sort_unstable();
        Identities {
            test: keys,
            ..Identities::default()
        }
    }

    /// Inner folds over `rows` (positions among the kept rows) for outer fold `outer`, by the
    /// run's split method, from their own seeded stream.
    pub fn inner_folds(
        &self,
        spec: &Spec,
        rows: &[usize],
        outer: u32,
    ) -> Result<Vec<crate::split::Fold>> {
        let s = &spec.split;
        let input = SplitInput {
            method: self.method.clone(),
            seed: s.seed,
            test: 0.0,
            validation: 0.0,
            folds: s.folds,
            repeats: 1,
            target: &self.target,
        };
        crate::split::folds_of(&input, rows, Domain::NestedFolds, outer)
    }
}

/// One fold's scores for one candidate.
#[derive(Debug, Clone, PartialEq)]
pub struct FoldScores {
    pub repeat: usize,
    pub fold: usize,
    pub n_fit: usize,
    pub n_score: usize,
    pub train: Scores,
    pub validation: Scores,
}

/// One grid point of one model entry, with all its scores.
#[derive(Debug, Clone)]
pub struct CandidateResult {
    /// 1-based, stable: baseline first, then entries in spec order, grid in expansion order.
    pub id: usize,
    pub family: Family,
    pub entry: usize,
    pub standardize: bool,
    pub params: Params,
    pub seed: u64,
    pub folds: Vec<FoldScores>,
    pub train: Scores,
    pub train_se: Scores,
    pub validation: Scores,
    pub validation_se: Scores,
    /// Why an external command failed on some fold (the candidate then has no estimate).
    pub failure: Option<String>,
}

/// What `predict` needs: the encoder and the fitted model, stored as JSON in the ledger.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StoredModel {
    pub candidate: usize,
    /// Class labels (classification); predictions are then probabilities per class.
    #[serde(default)]
    pub classes: Vec<String>,
    pub target: String,
    pub key: Option<String>,
    pub encoder: Encoder,
    pub fitted: Fitted,
}

#[derive(Debug, Clone)]
pub struct RunOutcome {
    pub prepared: Prepared,
    pub candidates: Vec<CandidateResult>,
    /// Candidate chosen by `[select]`.
    pub selected: usize,
    /// Candidate with the best mean validation score (equals `selected` under rule "min").
    pub best: usize,
    pub metric: Metric,
    pub rule: Rule,
    pub refit: StoredModel,
    /// SHA-256 of the refitted model's predictions on the development rows (f64 LE bytes).
    pub predictions_digest: String,
    /// (path as written, SHA-256) of every input file of the external command families.
    pub inputs: Vec<(String, String)>,
    /// Present when `[select] nested = true`.
    pub nested: Option<NestedOutcome>,
    pub warnings: Vec<String>,
}

fn named_col(spec: &Spec, table: &Table, n: &Named, role: &str) -> Result<usize> {
    table.index_of(&n.name).ok_or_else(|| {
        Error::spec(
            &spec.file,
            Some(n.loc),
            format!(
                "{role} column '{}' is not in {}{}",
                n.name,
                table.path.display(),
                table.suggest(&n.name)
            ),
        )
    })
}

/// Resolve the spec's columns against the table, handle missing values and split. The rows'
/// identities (`ids`) are left empty: `identities` computes them, in the version `identity`
/// names, for whoever stores them.
pub fn prepare(spec: &Spec, table: &Table, identity: crate::data::Identity) -> Result<Prepared> {
    let mut prep = prepare_unkeyed(spec, table)?;
    prep.identity = identity;
    Ok(prep)
}

/// `prepare` without the rows' identities (`ids` is empty until `identities` fills it).
fn prepare_unkeyed(spec: &Spec, table: &Table) -> Result<Prepared> {
    crate::data::identity::refuse_ambiguous(table)?;
    let d = &spec.data;
    if let Some((want, loc)) = &d.sha256
        && *want != table.sha256
    {
        return Err(Error::spec(
            &spec.file,
            Some(*loc),
            format!(
                "{} has SHA-256 {}, but the spec pins {}; the data changed: check it, then update sha256",
                table.path.display(),
                table.sha256,
                want
            ),
        ));
    }
    let target = named_col(spec, table, &d.target, "target")?;
    let key = d
        .key
        .as_ref()
        .map(|k| named_col(spec, table, k, "key"))
        .transpose()?;
    for n in d.ignore.iter().chain(&d.categorical) {
        named_col(spec, table, n, "listed")?;
    }
    let split_col = match &spec.split.method {
        SplitMethod::Group { column } | SplitMethod::Column { column } => {
            Some(named_col(spec, table, column, "split")?)
        }
        SplitMethod::Time { order } => Some(named_col(spec, table, order, "order")?),
        SplitMethod::Stratified { group: Some(g), .. } => Some(named_col(spec, table, g, "group")?),
        _ => None,
    };
    if matches!(spec.split.method, SplitMethod::Hash) && key.is_none() {
        return Err(Error::spec(
            &spec.file,
            Some(spec.split.loc),
            "method = \"hash\" needs [data] key = \"<row id column>\" so test membership follows each row",
        ));
    }
    let features: Vec<usize> = match &d.features {
        Some(list) => {
            let mut out = Vec::new();
            for f in list {
                let c = named_col(spec, table, f, "feature")?;
                if Some(c) == key || Some(c) == split_col {
                    return Err(Error::spec(
                        &spec.file,
                        Some(f.loc),
                        format!(
                            "'{}' is the key or split column and cannot also be a feature",
                            f.name
                        ),
                    ));
                }
                if d.ignore.iter().any(|i| i.name == f.name) {
                    return Err(Error::spec(
                        &spec.file,
                        Some(f.loc),
                        format!(
                            "'{}' is listed in both features and ignore; keep one",
                            f.name
                        ),
                    ));
                }
                out.push(c);
            }
            out
        }
        None => (0..table.columns.len())
            .filter(|&c| {
                c != target
                    && Some(c) != key
                    && Some(c) != split_col
                    && !d.ignore.iter().any(|i| i.name == table.columns[c].name)
            })
            .collect(),
    };
    if features.is_empty() {
        return Err(Error::spec(
            &spec.file,
            Some(d.target.loc),
            "no feature columns are left after target, key, split and ignore; list features",
        ));
    }
    let tcol = &table.columns[target];
    let (yall, classes) = match spec.task {
        crate::spec::Task::Regression => (regression_target(table, target)?, Vec::new()),
        crate::spec::Task::Classification => class_target(spec, table, target)?,
    };
    // Missing values in the columns the run reads.
    let mut used: Vec<usize> = features.clone();
    used.push(target);
    used.extend(key);
    used.extend(split_col);
    let mut rows = Vec::with_capacity(table.n_rows());
    let mut dropped = 0;
    // Column by column first (sequential reads): with nothing missing, every row is used and
    // the row-by-row search below, which finds the first missing cell for the message, is moot.
    let none = |cols: &[usize]| cols.iter().all(|&c| !table.columns[c].has_missing());
    let complete = if table.n_rows() < 100_000 {
        none(&used)
    } else {
        // Two threads, half the columns each: a million-row file's scan is memory-bound.
        let (a, b) = used.split_at(used.len() / 2);
        std::thread::scope(|s| {
            let other = s.spawn(|| none(b));
            // A panic there is a bug: carry it on.
            let first = none(a);
            first
                & other
                    .join()
                    .unwrap_or_else(|e| std::panic::resume_unwind(e))
        })
    };
    if complete {
        rows.extend(0..table.n_rows());
    }
    for r in (0..table.n_rows()).filter(|_| !complete) {
        let missing_col = used
            .iter()
            .copied()
            .find(|&c| table.columns[c].is_missing(r));
        match (missing_col, d.missing) {
            (None, _) => rows.push(r),
            (Some(_), Missing::DropRows) => dropped += 1,
            (Some(c), Missing::Mean) if features.contains(&c) => rows.push(r),
            (Some(c), mode) => {
                let name = &table.columns[c].name;
                let how = if mode == Missing::Mean {
                    "the target, key and split columns cannot be imputed; fill the cell or use missing = \"drop-rows\""
                } else {
                    "fill the cell, or set [data] missing = \"drop-rows\" or \"mean\""
                };
                return Err(Error::data(
                    &table.path,
                    Some(table.lines[r]),
                    Some(name),
                    format!("missing value; {how}"),
                ));
            }
        }
    }
    if rows.is_empty() {
        return Err(Error::Input(format!(
            "{}: every row has a missing value in a used column; nothing is left to fit",
            table.path.display()
        )));
    }
    // Every row used: the target is the column itself (no copy).
    let y: Vec<f64> = if rows.len() == yall.len() {
        yall
    } else {
        // A large file's full target column need not live beside the folds.
        rows.iter().map(|&r| yall[r]).collect()
    };
    if !classes.is_empty() && y.iter().all(|v| *v == y[0]) {
        return Err(Error::data(
            &table.path,
            None,
            Some(&tcol.name),
            format!(
                "every used row is of class '{}'; a classifier needs at least two classes",
                classes[y[0] as usize]
            ),
        ));
    }
    if y.iter().all(|v| *v == y[0]) {
        return Err(Error::data(
            &table.path,
            None,
            Some(&tcol.name),
            format!(
                "the target has the same value ({}) in every row; there is nothing to predict",
                y[0]
            ),
        ));
    }
    let mut keys: Option<Vec<String>> = None;
    if let Some(k) = key {
        let col = &table.columns[k];
        let ks: Vec<String> = rows.iter().map(|&r| col.text(r)).collect();
        let mut seen: BTreeMap<&str, usize> = BTreeMap::new();
        for (i, kv) in ks.iter().enumerate() {
            if let Some(prev) = seen.insert(kv.as_str(), i) {
                return Err(Error::data(
                    &table.path,
                    Some(table.lines[rows[i]]),
                    Some(&col.name),
                    format!(
                        "key '{kv}' repeats the key of line {}; a key must identify one row",
                        table.lines[rows[prev]]
                    ),
                ));
            }
        }
        keys = Some(ks);
    }
    let method = match &spec.split.method {
        SplitMethod::Random => Method::Random,
        SplitMethod::Stratified { bins, group: None } => Method::Stratified {
            bins: *bins,
            by_class: !classes.is_empty(),
        },
        SplitMethod::Stratified {
            bins,
            group: Some(_),
        } => Method::StratifiedGroup {
            groups: codes_of(table, split_col.unwrap_or(0), &rows),
            bins: if classes.is_empty() { *bins } else { 0 },
        },
        SplitMethod::Hash => Method::Hash {
            keys: keys.clone().unwrap_or_default(),
        },
        SplitMethod::Group { .. } => Method::Group {
            groups: codes_of(table, split_col.unwrap_or(0), &rows),
        },
        SplitMethod::Time { .. } => {
            let c = split_col.unwrap_or(0);
            let order = match &table.columns[c].values {
                Values::Numeric(v) => rows.iter().map(|&r| v[r]).collect(),
                // Text (ISO dates, for example) orders by byte order, which the level codes follow.
                Values::Text { codes, .. } => rows.iter().map(|&r| f64::from(codes[r])).collect(),
            };
            Method::Time { order }
        }
        SplitMethod::Column { column } => {
            let c = split_col.unwrap_or(0);
            let col = &table.columns[c];
            let mut parts = Vec::with_capacity(rows.len());
            for &r in &rows {
                parts.push(match col.text(r).as_str() {
                    "train" => Part::Train,
                    "validation" => Part::Validation,
                    "test" => Part::Test,
                    other => {
                        return Err(Error::data(&table.path, Some(table.lines[r]), Some(&column.name), format!(
                            "'{other}' is not a partition; the split column holds train, validation or test"
                        )));
                    }
                });
            }
            Method::Column { parts }
        }
    };
    let s = &spec.split;
    if matches!(spec.split.method, SplitMethod::Stratified { .. }) && !classes.is_empty() {
        // Every fold (and the test partition) gets its share of each class within one row; a
        // class with fewer rows than that cannot be spread.
        let need = match s.folds {
            crate::split::Folds::K(k) => k,
            crate::split::Folds::LeaveOneOut => 2,
        } + usize::from(s.test > 0.0);
        for (c, name) in classes.iter().enumerate() {
            let n = y.iter().filter(|v| **v as usize == c).count();
            if n < need {
                return Err(Error::Input(format!(
                    "class '{name}' has {n} row(s); a stratified split into {} folds{} needs at least {need} rows of each class. Merge or drop the class, or lower folds",
                    need - usize::from(s.test > 0.0),
                    if s.test > 0.0 {
                        " and a test partition"
                    } else {
                        ""
                    }
                )));
            }
        }
    }
    let partition = split(&SplitInput {
        method: method.clone(),
        seed: s.seed,
        test: s.test,
        validation: s.validation,
        folds: s.folds,
        repeats: s.repeats,
        target: &y,
    })?;
    if partition.holdout && spec.select.rule == Rule::OneSe {
        return Err(Error::spec(
            &spec.file,
            None,
            "rule = \"one-se\" needs cross-validation folds, but this split has a fixed validation partition; use rule = \"min\"",
        ));
    }
    for (c, name) in classes.iter().enumerate() {
        let in_dev = (0..y.len()).any(|i| y[i] as usize == c && partition.parts[i] != Part::Test);
        let in_test = (0..y.len())
            .filter(|&i| y[i] as usize == c && partition.parts[i] == Part::Test)
            .count();
        if !in_dev && in_test > 0 {
            return Err(Error::Input(format!(
                "class '{name}' appears only in test rows ({in_test}); no model can learn it. Use method = \"stratified\", or check the labels"
            )));
        }
    }
    let mut assignment = vec![b'-'; table.n_rows()];
    for (i, &r) in rows.iter().enumerate() {
        assignment[r] = partition.parts[i].code();
    }
    let mut h = Sha256::new();
    h.update(b"probity-partition-v1\n");
    h.update(table.sha256.as_bytes());
    h.update(b"\n");
    h.update(spec.split_canonical().as_bytes());
    h.update(b"\n");
    h.update(&assignment);
    let partition_id = hex(&h.finalize())[..16].to_string();
    let mut warnings = Vec::new();
    if dropped > 0 {
        warnings.push(format!(
            "{dropped} of {} rows dropped for missing values (missing = \"drop-rows\")",
            table.n_rows()
        ));
    }
    let recipe = crate::data::identity::Recipe::new(
        d.key.as_ref().map(|k| k.name.as_str()),
        &features
            .iter()
            .map(|&c| table.columns[c].name.as_str())
            .collect::<Vec<_>>(),
    );
    Ok(Prepared {
        rows,
        target: y,
        feature_names: features
            .iter()
            .map(|&c| table.columns[c].name.clone())
            .collect(),
        features,
        sealed: Sealed::new(partition),
        partition_id,
        assignment,
        dropped,
        warnings,
        key,
        target_column: target,
        recipe,
        ids: Identities::default(),
        identity: crate::data::Identity::CURRENT,
        method,
        metrics: Metric::for_task(spec.task == crate::spec::Task::Classification).to_vec(),
        classes,
    })
}

/// A regression target: numbers (NaN where missing).
fn regression_target(table: &Table, target: usize) -> Result<Vec<f64>> {
    let tcol = &table.columns[target];
    match &tcol.values {
        Values::Numeric(v) => Ok(v.clone()),
        Values::Text { codes, levels } => {
            let row = codes
                .iter()
                .position(|&c| {
                    c != crate::data::MISSING_CODE && levels[c as usize].parse::<f64>().is_err()
                })
                .unwrap_or(0);
            Err(Error::data(
                &table.path,
                Some(table.lines[row]),
                Some(&tcol.name),
                format!(
                    "the regression target holds text ('{}'); a regression target must be numeric (or set task = \"classification\")",
                    tcol.text(row)
                ),
            ))
        }
    }
}

/// A classification target: class indices (NaN where missing) and the class labels, sorted
/// numerically when every label is a number, else by text; a binary task's positive class is
/// the second unless `[data] positive` names it.
fn class_target(spec: &Spec, table: &Table, target: usize) -> Result<(Vec<f64>, Vec<String>)> {
    let col = &table.columns[target];
    let texts: Vec<String> = (0..table.n_rows()).map(|r| col.text(r)).collect();
    let mut classes: Vec<String> = texts.iter().filter(|t| !t.is_empty()).cloned().collect();
    classes.sort();
    classes.dedup();
    let numeric: Option<Vec<f64>> = classes.iter().map(|c| c.parse::<f64>().ok()).collect();
    if let Some(v) = numeric {
        let mut paired: Vec<(f64, String)> = v.into_iter().zip(classes).collect();
        paired.sort_by(|a, b| a.0.total_cmp(&b.0));
        classes = paired.into_iter().map(|p| p.1).collect();
    }
    if let Some((pos, loc)) = &spec.data.positive {
        if classes.len() != 2 {
            return Err(Error::spec(
                &spec.file,
                Some(*loc),
                format!(
                    "'positive' applies to two classes; the target has {}",
                    classes.len()
                ),
            ));
        }
        let Some(i) = classes.iter().position(|c| c == pos) else {
            return Err(Error::spec(
                &spec.file,
                Some(*loc),
                format!(
                    "positive class '{pos}' is not a value of the target; its classes are {}",
                    classes.join(", ")
                ),
            ));
        };
        if i == 0 {
            classes.swap(0, 1);
        }
    }
    let y = texts
        .iter()
        .map(|t| {
            if t.is_empty() {
                f64::NAN
            } else {
                classes
                    .iter()
                    .position(|c| c == t)
                    .map_or(f64::NAN, |i| i as f64)
            }
        })
        .collect();
    Ok((y, classes))
}

/// Codes of a column's values among `rows`, by sorted distinct text.
fn codes_of(table: &Table, c: usize, rows: &[usize]) -> Vec<u32> {
    let col = &table.columns[c];
    let texts: Vec<String> = rows.iter().map(|&r| col.text(r)).collect();
    let mut distinct = texts.clone();
    distinct.sort();
    distinct.dedup();
    texts
        .iter()
        .map(|t| distinct.binary_search(t).unwrap_or(0) as u32)
        .collect()
}

/// The model entries of a run: the `mean` baseline first (unless listed), then the spec's.
pub fn entries(spec: &Spec) -> Vec<ModelSpec> {
    let mut out = Vec::new();
    if !spec.models.iter().any(|m| m.family == Family::Mean) {
        out.push(ModelSpec {
            family: Family::Mean,
            standardize: true,
            grid: Vec::new(),
            loc: Default::default(),
            command: None,
        });
    }
    out.extend(spec.models.iter().cloned());
    out
}

/// Check the grid against the data before any fitting: poly features must be numeric
/// features, no k of knn may exceed a fold's fitting rows, and every fold's fitting rows must
/// hold every class. (Nested cross-validation's inner folds are checked as they are made.)
/// Every check of the grid against the data before any fit: k against the smallest fold,
/// classes in every fold, poly features, and, given the `memory` available (bytes), that one
/// fit of each family fits in it.
pub fn check_grid(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    entries: &[ModelSpec],
    memory: Option<u64>,
) -> Result<()> {
    if let Some(available) = memory {
        check_memory(spec, table, prep, entries, available)?;
    }
    let folds = prep.sealed.folds();
    if let Some(fewest) = folds.iter().map(|f| f.fit.len()).min() {
        for e in entries.iter().filter(|e| e.family == Family::Knn) {
            for params in e.expand() {
                let k = crate::models::param(&params, "k").map_or(0.0, |v| v.as_f64());
                if k > fewest as f64 {
                    return Err(Error::spec(
                        &spec.file,
                        Some(e.loc),
                        format!(
                            "knn: k = {k} is larger than the {fewest} fitting rows of the smallest fold; lower k or use fewer folds"
                        ),
                    ));
                }
            }
        }
    }
    for fold in folds {
        check_classes(prep, &fold.fit)?;
    }
    for e in entries.iter().filter(|e| e.family == Family::Poly) {
        for params in e.expand() {
            let f = crate::models::param(&params, "feature")
                .map(|v| v.as_text().to_string())
                .unwrap_or_default();
            let ok = prep.features.iter().any(|&c| {
                table.columns[c].name == f && matches!(table.columns[c].values, Values::Numeric(_))
            });
            if !ok {
                let names: Vec<&str> = prep.feature_names.iter().map(String::as_str).collect();
                return Err(Error::spec(
                    &spec.file,
                    Some(e.loc),
                    format!(
                        "poly feature '{f}' is not a numeric feature of this experiment{}",
                        crate::error::did_you_mean(&f, names)
                    ),
                ));
            }
        }
    }
    Ok(())
}

/// The encoded columns the features can make at most: one per numeric feature, one per level
/// of a text feature (what one-hot encoding of every level would give).
pub fn encoded_width(table: &Table, prep: &Prepared) -> u64 {
    prep.features
        .iter()
        .map(|&c| match &table.columns[c].values {
            Values::Numeric(_) => 1,
            Values::Text { levels, .. } => levels.len().max(1) as u64,
        })
        .sum()
}

/// About how many bytes one fit of `family` holds at its peak on `n` rows of `p` encoded
/// columns (`classes` for logistic): the design matrix, and for the families that solve
/// with a p x p matrix (ols, ridge, lasso, poly; logistic with one block per class after the
/// first) three such matrices (the Gram or Hessian, its decomposition, workspace). `None` for
/// families whose memory grows with the rows alone.
pub fn fit_bytes(family: Family, n: u64, p: u64, classes: u64) -> Option<u64> {
    let q = match family {
        Family::Ols | Family::Ridge | Family::Lasso => p + 1,
        // One feature becomes up to 20 powers.
        Family::Poly => p + 21,
        Family::Logistic => (p + 1).saturating_mul(classes.saturating_sub(1).max(1)),
        _ => return None,
    };
    Some(
        8u64.saturating_mul(
            n.saturating_mul(p)
                .saturating_add(3u64.saturating_mul(q.saturating_mul(q))),
        ),
    )
}

/// Refuse (exit 2, at the [[model]]) a family whose one fit needs more memory than is
/// available, before anything is allocated for it.
fn check_memory(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    entries: &[ModelSpec],
    available: u64,
) -> Result<()> {
    let p = encoded_width(table, prep);
    let n = prep
        .sealed
        .folds()
        .iter()
        .map(|f| f.fit.len())
        .max()
        .unwrap_or(0) as u64;
    let classes = prep.classes.len() as u64;
    for e in entries {
        let Some(need) = fit_bytes(e.family, n, p, classes) else {
            continue;
        };
        if need > available {
            return Err(Error::spec(
                &spec.file,
                Some(e.loc),
                format!(
                    "{}: one fit on {n} rows of up to {p} encoded columns needs about {} (its matrices grow with the columns squared), more than the {} of memory available; use fewer features or text levels, or another family (knn, or a command model), or give more memory (--memory)",
                    e.family.name(),
                    bytes_text(need),
                    bytes_text(available)
                ),
            ));
        }
    }
    Ok(())
}

/// Bytes in binary units, one decimal: "3.2 GiB".
pub fn bytes_text(b: u64) -> String {
    let units = ["bytes", "KiB", "MiB", "GiB", "TiB", "PiB"];
    let mut v = b as f64;
    let mut u = 0;
    while v >= 1024.0 && u + 1 < units.len() {
        v /= 1024.0;
        u += 1;
    }
    if u == 0 {
        format!("{b} bytes")
    } else {
        format!("{v:.1} {}", units[u])
    }
}

/// Every class of a classification task must have a row among `fit` (positions among the kept
/// rows): a model cannot learn a class it never saw.
fn check_classes(prep: &Prepared, fit: &[usize]) -> Result<()> {
    let nc = prep.classes.len();
    if nc == 0 {
        return Ok(());
    }
    let mut seen = vec![false; nc];
    for &i in fit {
        seen[prep.target[i] as usize] = true;
    }
    match seen.iter().position(|s| !s) {
        Some(c) => Err(Error::Input(format!(
            "the fitting rows of a fold hold no row of class '{}', so no model can learn it; use method = \"stratified\", fewer folds, or more data for that class",
            prep.classes[c]
        ))),
        None => Ok(()),
    }
}

struct TaskOut {
    /// Per grid point: (train scores, validation scores), or why an external command failed.
    scores: Vec<std::result::Result<(Scores, Scores), String>>,
    notes: Notes,
}

/// Seed handed to an external command for one fit: derived from the candidate's seed and the
/// fold (`REFIT` for the fit on all development rows).
pub fn command_seed(run_seed: u64, candidate: usize, fold: u32) -> u64 {
    derive_seed(
        derive_seed(run_seed, Domain::Candidate, candidate as u32),
        Domain::Command,
        fold,
    )
}

/// The fold index used for fits on all development rows.
pub const REFIT: u32 = u32::MAX;

/// Predictions of a model fitted on `fit` (positions among the kept rows) for `score_rows` of
/// `score_table`: the stored model's for built-in families; a fresh run of the command, fitted on
/// the same rows with the refit seed, for an external one.
#[allow(clippy::too_many_arguments)]
pub fn predict_with(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    model: &StoredModel,
    fit: &[usize],
    score_table: &Table,
    score_rows: &[usize],
    notes: &mut Notes,
) -> Result<Vec<f64>> {
    if matches!(model.fitted, Fitted::External) {
        let entry_params = candidate_entry(spec, model.candidate)?;
        let (entry, params) = entry_params;
        let cmd = entry
            .command
            .as_ref()
            .ok_or_else(|| Error::Internal("an external model without a command".into()))?;
        let seed = command_seed(spec.split.seed, model.candidate, REFIT);
        return run_command(
            spec,
            table,
            prep,
            cmd,
            &params,
            seed,
            fit,
            score_table,
            score_rows,
        )
        .map_err(|m| Error::Input(format!("candidate {} (command): {m}", model.candidate)));
    }
    Ok(model
        .fitted
        .predict(&model.encoder.transform(score_table, score_rows, notes)?))
}

/// The model entry and grid point of candidate `id` (1-based, in the run's order).
/// Whether candidate `id` (1-based, in the run's order) is an external command family.
pub fn is_command(spec: &Spec, id: usize) -> bool {
    candidate_entry(spec, id).is_ok_and(|(e, _)| e.command.is_some())
}

fn candidate_entry(spec: &Spec, id: usize) -> Result<(ModelSpec, Params)> {
    let mut n = 0;
    for entry in entries(spec) {
        for params in entry.expand() {
            n += 1;
            if n == id {
                return Ok((entry.clone(), params));
            }
        }
    }
    Err(Error::Input(format!(
        "the run has no candidate {id}; `probity show RUN` lists them"
    )))
}

/// Run an external command family's fit on `fit` (positions among the kept rows) and predict
/// `score_rows` of `score_table`.
#[allow(clippy::too_many_arguments)]
fn run_command(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    cmd: &crate::spec::CommandSpec,
    params: &Params,
    seed: u64,
    fit: &[usize],
    score_table: &Table,
    score_rows: &[usize],
) -> std::result::Result<Vec<f64>, String> {
    let job = crate::external::Job {
        cmd,
        params,
        seed,
        target: &spec.data.target.name,
        features: &prep.feature_names,
        classes: &prep.classes,
    };
    let fit_rows: Vec<usize> = fit.iter().map(|&i| prep.rows[i]).collect();
    crate::external::fit_predict(&job, table, &fit_rows, score_table, score_rows)
}

fn design(table: &Table, enc: &Encoder, rows: &[usize], notes: &mut Notes) -> Result<Design> {
    Ok(Design {
        x: enc.transform(table, rows, notes)?,
        names: enc.names(),
    })
}

#[allow(clippy::too_many_arguments)]
fn run_task(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    entry: &ModelSpec,
    grid: &[Params],
    fold: &crate::split::Fold,
    impute: bool,
    first_id: usize,
    fold_no: u32,
    pre: Option<&Gram>,
) -> Result<TaskOut> {
    let nc = prep.classes.len();
    check_classes(prep, &fold.fit)?;
    if let Some(cmd) = &entry.command {
        // The held-out rows, then the fitting rows again (for training scores), in one call.
        let mut rows: Vec<usize> = fold.score.iter().map(|&i| prep.rows[i]).collect();
        rows.extend(fold.fit.iter().map(|&i| prep.rows[i]));
        let yf: Vec<f64> = fold.fit.iter().map(|&i| prep.target[i]).collect();
        let ys: Vec<f64> = fold.score.iter().map(|&i| prep.target[i]).collect();
        let width = nc.max(1);
        let scores = grid
            .iter()
            .enumerate()
            .map(|(g, params)| {
                let seed = command_seed(spec.split.seed, first_id + g, fold_no);
                run_command(
                    spec, table, prep, cmd, params, seed, &fold.fit, table, &rows,
                )
                .map(|p| {
                    let (held, fitted) = p.split_at(ys.len() * width);
                    (
                        score_all(&prep.metrics, &yf, fitted, nc),
                        score_all(&prep.metrics, &ys, held, nc),
                    )
                })
            })
            .collect();
        return Ok(TaskOut {
            scores,
            notes: Notes::new(),
        });
    }
    if let Some(lambdas) = gram_lambdas(table, prep, entry, grid, impute) {
        let columns = numeric_columns(table, &prep.features);
        let src = source(prep, &columns);
        let gram = match pre {
            Some(g) => g.clone(),
            None => Gram::of(&src, &fold.fit),
        };
        if let Some(fits) = gram.solve(&lambdas) {
            let (on_fit, on_score) = error_sums_both(&src, &fold.fit, &fold.score, &fits);
            if let Some(out) = gram_task(prep, grid, &truths(prep, fold), &on_fit, &on_score) {
                return Ok(out);
            }
        }
    }
    if entry.family == Family::Mean && nc == 0 && entry.command.is_none() {
        // The regression baseline predicts one number: score it from the rows themselves,
        // without a design or prediction vectors. The arithmetic is the general path's below
        // (`MeanModel::fit`, then `score_all` on a constant prediction), so the same bits.
        let mean =
            fold.fit.iter().map(|&i| prep.target[i]).sum::<f64>() / fold.fit.len().max(1) as f64;
        if !mean.is_finite() {
            return Err(not_finite(entry, grid.first().unwrap_or(&Params::new())));
        }
        let score = |rows: &[usize]| -> Scores {
            let truth = Truth::of_rows(&prep.target, rows.iter().copied());
            let sums = ErrorSums::of_constant(&prep.target, rows, mean);
            prep.metrics
                .iter()
                .map(|&m| truth.score_sums(m, &sums))
                .collect()
        };
        let (train, validation) = (score(&fold.fit), score(&fold.score));
        return Ok(TaskOut {
            scores: grid
                .iter()
                .map(|_| Ok((train.clone(), validation.clone())))
                .collect(),
            notes: Notes::new(),
        });
    }
    let model = model_for(entry, nc);
    let fit_rows: Vec<usize> = fold.fit.iter().map(|&i| prep.rows[i]).collect();
    let score_rows: Vec<usize> = fold.score.iter().map(|&i| prep.rows[i]).collect();
    // The mean baseline reads no feature: encoding none saves two copies of the design.
    let features: &[usize] = if entry.family == Family::Mean {
        &[]
    } else {
        &prep.features
    };
    let enc = Encoder::fit(
        table,
        features,
        &fit_rows,
        model.drops_first_level(),
        impute,
    );
    let mut notes = Notes::new();
    let xf = design(table, &enc, &fit_rows, &mut notes)?;
    let xs = design(table, &enc, &score_rows, &mut notes)?;
    let yf: Vec<f64> = fold.fit.iter().map(|&i| prep.target[i]).collect();
    let ys: Vec<f64> = fold.score.iter().map(|&i| prep.target[i]).collect();
    // Training scores of a family that is quadratic to predict on its own fitting rows (knn) are
    // taken on at most `limit` evenly spaced fitting rows; exact below that.
    let (xt, yt) = match model.train_rows_limit() {
        Some(limit) if yf.len() > limit => {
            let pick: Vec<usize> = (0..limit).map(|i| i * yf.len() / limit).collect();
            let cols: Vec<Vec<f64>> = (0..xf.x.cols)
                .map(|j| pick.iter().map(|&i| xf.x.get(i, j)).collect())
                .collect();
            (
                crate::models::linalg::Matrix::from_cols(limit, &cols),
                pick.iter().map(|&i| yf[i]).collect(),
            )
        }
        _ => (xf.x.clone(), yf.clone()),
    };
    let mut scores = Vec::with_capacity(grid.len());
    let mut fit_notes = Notes::new();
    model.fit_predict_each(
        &xf,
        &yf,
        grid,
        &[&xt, &xs.x],
        &mut fit_notes,
        &mut |g, p| {
            if g != scores.len() {
                return Err(Error::Internal(format!(
                    "grid point {g} arrived out of order"
                )));
            }
            if p.iter().flatten().any(|v| !v.is_finite()) {
                return Err(not_finite(entry, &grid[g]));
            }
            scores.push(Ok((
                score_all(&prep.metrics, &yt, &p[0], nc),
                score_all(&prep.metrics, &ys, &p[1], nc),
            )));
            Ok(())
        },
    )?;
    for (k, v) in fit_notes {
        *notes.entry(k).or_insert(0) += v;
    }
    Ok(TaskOut { scores, notes })
}

/// A fold's scores from its error sums on the fitting and held-out rows (per grid point:
/// squared, absolute); `None` when a sum overflowed (errors near 1e154 and beyond), so the
/// task runs alone and its metrics take the scaled sums.
fn gram_task(
    prep: &Prepared,
    grid: &[Params],
    (tf, ts): &(Truth, Truth),
    on_fit: &[(f64, f64)],
    on_score: &[(f64, f64)],
) -> Option<TaskOut> {
    if on_fit
        .iter()
        .chain(on_score)
        .any(|s| !(s.0.is_finite() && s.1.is_finite()))
    {
        return None;
    }
    let mut scores = Vec::with_capacity(grid.len());
    for (f, s) in on_fit.iter().zip(on_score) {
        let of = |t: &Truth, sums: &(f64, f64)| -> Scores {
            prep.metrics
                .iter()
                .map(|&m| t.score(m, sums.0, sums.1))
                .collect()
        };
        scores.push(Ok((of(tf, f), of(ts, s))));
    }
    Some(TaskOut {
        scores,
        notes: Notes::new(),
    })
}

/// The target's truth on a fold's fitting and held-out rows (what `gram_task` scores against).
fn truths(prep: &Prepared, fold: &crate::split::Fold) -> (Truth, Truth) {
    (
        Truth::of_rows(&prep.target, fold.fit.iter().copied()),
        Truth::of_rows(&prep.target, fold.score.iter().copied()),
    )
}

/// (intercept, weights) per penalty of one fold.
type Fits = Vec<(f64, Vec<f64>)>;

/// Most folds `sweep_folds` takes (one bit each in a row's held-out mask).
const SWEEP_MAX_FOLDS: usize = 64;

/// The (fold, entry) tasks of every grid on the sufficient-statistics path whose fold Grams
/// `fold_grams` made, scored together: one solve per fold, then one pass over the development
/// rows predicts every fold's fits at once (`gram::fold_error_sums`; each row is read once
/// instead of once per fold), the lane groups shared among the threads, which take work over
/// from each other (`gram::fold_error_sums_shared`). The sums are the bits `run_task` would
/// get. Slot `f * entries.len() + e`; `None` where the task runs alone.
#[allow(clippy::too_many_arguments)]
fn sweep_folds(
    table: &Table,
    prep: &Prepared,
    entries: &[ModelSpec],
    grids: &[Vec<Params>],
    folds: &[crate::split::Fold],
    pre: &[Option<Gram>],
    threads: usize,
    impute: bool,
) -> Vec<Option<Result<TaskOut>>> {
    let mut out: Vec<Option<Result<TaskOut>>> =
        (0..folds.len() * entries.len()).map(|_| None).collect();
    let sorted = |v: &[usize]| v.windows(2).all(|w| w[0] < w[1]);
    if folds.is_empty()
        || folds.len() > SWEEP_MAX_FOLDS
        || pre.iter().any(Option::is_none)
        || !folds.iter().all(|f| sorted(&f.fit) && sorted(&f.score))
    {
        return out;
    }
    // (entry, per fold: its fits)
    let mut solved: Vec<(usize, Vec<Fits>)> = Vec::new();
    for (e, entry) in entries.iter().enumerate() {
        let Some(lambdas) = gram_lambdas(table, prep, entry, &grids[e], impute) else {
            continue;
        };
        let fits: Option<Vec<_>> = pre
            .iter()
            .map(|g| g.as_ref().and_then(|g| g.solve(&lambdas)))
            .collect();
        if let Some(fits) = fits {
            solved.push((e, fits));
        }
    }
    if solved.is_empty() {
        return out;
    }
    let dev = prep.sealed.development();
    let held: Vec<u64> = {
        let mut mask = vec![0u64; prep.rows.len()];
        for (f, fold) in folds.iter().enumerate() {
            fold.score.iter().for_each(|&i| mask[i] |= 1 << f);
        }
        dev.iter().map(|&i| mask[i]).collect()
    };
    let p = prep.features.len();
    // The lane groups of every (entry, fold), and where each one's groups start.
    let mut groups = Vec::new();
    let mut starts = Vec::new();
    for (_, fits) in &solved {
        for (f, fold_fits) in fits.iter().enumerate() {
            starts.push(groups.len());
            groups.extend(LaneGroup::of(f as u32, fold_fits, p));
        }
    }
    let columns = numeric_columns(table, &prep.features);
    let src = source(prep, &columns);
    let sums = fold_error_sums_shared(&src, &dev, &held, &groups, threads);
    let truth = crate::par::jobs(folds.len(), threads, |f| truths(prep, &folds[f]));
    if sums.len() != groups.len() || truth.len() != folds.len() {
        // A worker panicked: leave every task to run alone.
        return out;
    }
    let mut next = starts.iter();
    for (e, fits) in &solved {
        for (f, fold_fits) in fits.iter().enumerate() {
            let start = next.next().copied().unwrap_or(0);
            let lane = |k: usize| &sums[start + k / FITS];
            let on_fit: Vec<(f64, f64)> = (0..fold_fits.len())
                .map(|k| (lane(k)[0][k % FITS], lane(k)[1][k % FITS]))
                .collect();
            let on_score: Vec<(f64, f64)> = (0..fold_fits.len())
                .map(|k| (lane(k)[2][k % FITS], lane(k)[3][k % FITS]))
                .collect();
            out[f * entries.len() + e] =
                gram_task(prep, &grids[*e], &truth[f], &on_fit, &on_score).map(Ok);
        }
    }
    out
}

/// Each fold's held-out Gram, about the shift of the first development row, when the folds of
/// each repeat split the development rows (every row held out exactly once, fitting rows = the
/// rest); `None` otherwise.
fn held_grams(
    table: &Table,
    prep: &Prepared,
    folds: &[crate::split::Fold],
    threads: usize,
) -> Option<Vec<Gram>> {
    let dev = prep.sealed.development();
    if dev.is_empty() || folds.is_empty() {
        return None;
    }
    const NONE: u32 = u32::MAX;
    let mut in_dev = vec![false; prep.rows.len()];
    dev.iter().for_each(|&i| in_dev[i] = true);
    // owner[i]: the fold of this repeat that holds row i out; seen[i]: the last fold whose
    // fitting rows included row i (both as fold numbers, so one pair of arrays serves all).
    let mut owner = vec![NONE; prep.rows.len()];
    let mut seen = vec![NONE; prep.rows.len()];
    let repeats: std::collections::BTreeSet<usize> = folds.iter().map(|f| f.repeat).collect();
    // Per repeat (in `repeats` order): the owning fold of each development row, in `dev` order.
    let mut owners: Vec<Vec<u32>> = Vec::with_capacity(repeats.len());
    for &r in &repeats {
        owner.iter_mut().for_each(|o| *o = NONE);
        for (f, fold) in folds.iter().enumerate().filter(|(_, x)| x.repeat == r) {
            if fold.fit.len() + fold.score.len() != dev.len() {
                return None;
            }
            for &i in &fold.score {
                if owner[i] != NONE {
                    return None;
                }
                owner[i] = f as u32;
            }
        }
        if dev.iter().any(|&i| owner[i] == NONE) {
            return None;
        }
        owners.push(dev.iter().map(|&i| owner[i]).collect());
        for (f, fold) in folds.iter().enumerate().filter(|(_, x)| x.repeat == r) {
            // Fitting rows: development rows, none held out by this fold, none repeated.
            for &i in &fold.fit {
                if !in_dev[i] || owner[i] == f as u32 || seen[i] == f as u32 {
                    return None;
                }
                seen[i] = f as u32;
            }
        }
    }
    drop((in_dev, owner, seen));
    let columns = numeric_columns(table, &prep.features);
    let src = source(prep, &columns);
    let shift = Gram::row(&src, dev[0]);
    // Each fold's held-out Gram (the bits of `Gram::of_shifted` on its sorted rows), from passes
    // over the development rows that each serve a range of folds: one per thread, not one per
    // fold. Per repeat, every development row has one owner.
    let sorted = folds
        .iter()
        .all(|f| f.score.windows(2).all(|w| w[0] < w[1]))
        && folds.windows(2).all(|w| w[0].repeat <= w[1].repeat);
    let held: Vec<Gram> = if sorted {
        let mut held = Vec::with_capacity(folds.len());
        for (&r, own) in repeats.iter().zip(&owners) {
            let first = folds.iter().position(|f| f.repeat == r).unwrap_or(0);
            let end = first + folds[first..].iter().take_while(|f| f.repeat == r).count();
            let n = end - first;
            let k = threads.clamp(1, n.max(1));
            let parts = crate::par::jobs(k, threads, |c| {
                let (lo, hi) = (first + c * n / k, first + (c + 1) * n / k);
                crate::models::gram::of_sets(&src, &dev, own, lo as u32..hi as u32, &shift)
            });
            held.extend(parts.into_iter().flatten());
        }
        held
    } else {
        crate::par::jobs(folds.len(), threads, |f| {
            Gram::of_shifted(&src, &folds[f].score, &shift)
        })
    };
    (held.len() == folds.len()).then_some(held)
}

/// The folds of the first repeat (a prefix of the run's folds).
fn first_repeat(folds: &[crate::split::Fold]) -> &[crate::split::Fold] {
    let n = folds
        .iter()
        .take_while(|f| Some(f.repeat) == folds.first().map(|x| x.repeat))
        .count();
    &folds[..n]
}

/// The Gram matrix of each fold's fitting rows for the sufficient-statistics path, as the
/// development rows' total minus the fold's held-out rows: one pass over the development rows
/// instead of one over each fold's fitting rows. Only when some entry takes that path and the
/// folds of each repeat split the development rows; otherwise `None` per fold, and each task
/// makes its own. Also the development rows' Gram (the first repeat's held-out Grams added in
/// fold order, as `development_gram` forms it) for the refit.
#[allow(clippy::too_many_arguments)]
fn fold_grams(
    table: &Table,
    prep: &Prepared,
    entries: &[ModelSpec],
    grids: &[Vec<Params>],
    folds: &[crate::split::Fold],
    threads: usize,
    impute: bool,
) -> (Vec<Option<Gram>>, Option<Gram>) {
    let none = || (vec![None; folds.len()], None);
    let wanted = entries
        .iter()
        .zip(grids)
        .any(|(e, g)| gram_lambdas(table, prep, e, g, impute).is_some());
    if !wanted {
        return none();
    }
    let Some(held) = held_grams(table, prep, folds, threads) else {
        return none();
    };
    let dev_total = Gram::total(&held[..first_repeat(folds).len()]);
    let per_fold = folds
        .iter()
        .enumerate()
        .map(|(f, fold)| {
            let parts: Vec<Gram> = folds
                .iter()
                .zip(&held)
                .filter(|(x, _)| x.repeat == fold.repeat)
                .map(|(_, g)| g.clone())
                .collect();
            Gram::total(&parts).map(|t| t.minus(&held[f]))
        })
        .collect();
    (per_fold, dev_total)
}

/// The development rows' Gram as `fold_grams` forms it (the first repeat's held-out Grams added
/// in fold order), so a later refit (reveal, predict) gets the run's bits; `None` when the folds
/// do not split the development rows.
fn development_gram(table: &Table, prep: &Prepared, threads: usize) -> Option<Gram> {
    let folds = first_repeat(prep.sealed.folds());
    held_grams(table, prep, folds, threads).and_then(|h| Gram::total(&h))
}

fn not_finite(entry: &ModelSpec, params: &Params) -> Error {
    Error::Input(format!(
        "{} {}: predictions are not finite (overflow); rescale the features or the target",
        entry.family.name(),
        fmt_params(params)
    ))
}

/// Most features the sufficient-statistics path takes (its eigendecomposition is O(p^3) per
/// sweep; the SVD path is the better choice beyond this).
const GRAM_MAX_FEATURES: usize = 200;

/// The penalties of a grid that the sufficient-statistics path (`models::gram`) can take:
/// standardised ridge on numeric features with nothing imputed and every penalty positive.
fn gram_lambdas(
    table: &Table,
    prep: &Prepared,
    entry: &ModelSpec,
    grid: &[Params],
    impute: bool,
) -> Option<Vec<f64>> {
    let plain = entry.family == Family::Ridge
        && entry.standardize
        && entry.command.is_none()
        && !impute
        && prep.features.len() <= GRAM_MAX_FEATURES
        && prep
            .features
            .iter()
            .all(|&c| matches!(table.columns[c].values, Values::Numeric(_)));
    if !plain {
        return None;
    }
    grid.iter()
        .map(|p| crate::models::param(p, "lambda").map(|v| v.as_f64()))
        .collect::<Option<Vec<f64>>>()
        .filter(|ls| ls.iter().all(|&l| l > 0.0 && l.is_finite()))
}

/// Where the sufficient-statistics passes read this run's rows.
fn source<'a>(prep: &'a Prepared, columns: &'a [&'a [f64]]) -> Source<'a> {
    Source {
        columns,
        target: &prep.target,
        table_row: &prep.rows,
    }
}

/// The numeric feature columns, by table row.
fn numeric_columns<'a>(table: &'a Table, features: &[usize]) -> Vec<&'a [f64]> {
    features
        .iter()
        .filter_map(|&c| match &table.columns[c].values {
            Values::Numeric(v) => Some(v.as_slice()),
            Values::Text { .. } => None,
        })
        .collect()
}

/// `name=value` pairs for messages and tables.
pub fn fmt_params(p: &Params) -> String {
    p.iter()
        .map(|(k, v)| format!("{k}={v}"))
        .collect::<Vec<_>>()
        .join(" ")
}

/// Run the experiment. `threads` only changes speed, never a result.
pub fn run(spec: &Spec, table: &Table, threads: usize) -> Result<RunOutcome> {
    run_reporting(spec, table, threads, None, &|_, _| {})
}

/// `run`, calling `progress(done, total)` as cross-validation tasks finish (for a display; the
/// calls come from worker threads, in no particular order).
pub fn run_reporting(
    spec: &Spec,
    table: &Table,
    threads: usize,
    memory: Option<u64>,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<RunOutcome> {
    run_recording(spec, table, threads, memory, progress, None)
}

/// What the CLI stores while a run goes on: its start once the spec has passed every check,
/// before the grid; then, on a thread of its own while the grid runs, the prepared split and
/// its test rows' identities.
pub trait Recorder: Send {
    /// How the row identities are formed for the partition: a stored partition's own version,
    /// or the current one for a new partition.
    fn identity(&mut self, partition: &str) -> Result<crate::data::Identity>;
    /// Every check has passed and the grid is about to begin (the place to record a start).
    fn started(&mut self, prep: &Prepared) -> Result<()>;
    /// The partition's rows' identities, while the grid runs.
    fn partition(&mut self, prep: &Prepared, ids: &Identities) -> Result<()>;
}

/// `run_reporting`, handing `record` the partition beside the grid: hashing the test rows and
/// storing them then costs no time of their own on a machine with a core to spare. The
/// recorder sees nothing of the grid, so it changes no result.
pub fn run_recording(
    spec: &Spec,
    table: &Table,
    threads: usize,
    memory: Option<u64>,
    progress: &(dyn Fn(usize, usize) + Sync),
    record: Option<&mut dyn Recorder>,
) -> Result<RunOutcome> {
    let mut prep = prepare_unkeyed(spec, table)?;
    let entries = entries(spec);
    check_grid(spec, table, &prep, &entries, memory)?;
    let grids: Vec<Vec<Params>> = entries.iter().map(ModelSpec::expand).collect();
    let folds = prep.sealed.folds();
    let mut notes = Notes::new();
    let mut inputs = Vec::new();
    for cmd in entries.iter().filter_map(|e| e.command.as_ref()) {
        inputs.extend(crate::external::input_hashes(cmd).map_err(Error::Input)?);
    }
    let (after, keys) = match record {
        None => {
            let keys = prep.identities(table, threads);
            let cv = cross_validate(
                spec, table, &prep, &entries, &grids, folds, threads, &mut notes, progress,
            );
            let after = after_grid(
                spec, table, &prep, &entries, &grids, folds, threads, &mut notes, cv,
            );
            (after, Ok(keys))
        }
        Some(record) => {
            prep.identity = record.identity(&prep.partition_id)?;
            std::thread::scope(|s| -> Result<_> {
                let shared = &prep;
                // The recorder goes to the side job once the start is recorded; the hashing,
                // which needs only the split, begins while the start is written.
                let (give, take) = std::sync::mpsc::channel::<&mut dyn Recorder>();
                let side = s.spawn(move || -> Result<Identities> {
                    let keys = shared.identities(table, threads);
                    // No recorder: recording the start failed, and the run stops with that error.
                    if let Ok(record) = take.recv() {
                        record.partition(shared, &keys)?;
                    }
                    Ok(keys)
                });
                record.started(shared)?;
                give.send(record)
                    .map_err(|_| Error::Internal("the partition job ended early".into()))?;
                crate::failpoint::pause("run:grid");
                let cv = cross_validate(
                    spec, table, shared, &entries, &grids, folds, threads, &mut notes, progress,
                );
                // The refit and its digest run while the side job may still be storing the
                // partition: its tail no longer leaves a core idle.
                let after = after_grid(
                    spec, table, shared, &entries, &grids, folds, threads, &mut notes, cv,
                );
                // A panic there is a bug: carry it on rather than turn it into an error.
                let keys = side.join().unwrap_or_else(|e| std::panic::resume_unwind(e));
                Ok((after, keys))
            })?
        }
    };
    // The grid's error first: it is the user's to fix.
    let AfterGrid {
        candidates,
        best,
        selected,
        metric,
        refit,
        predictions_digest,
        nested,
    } = after?;
    prep.ids = keys?;
    let mut warnings = prep.warnings.clone();
    if entries.iter().any(|e| {
        e.command
            .as_ref()
            .is_some_and(crate::external::sandbox::boxed)
    }) {
        warnings.extend(crate::external::sandbox::linked_data_warning(
            &spec.data.path,
        ));
    }
    for e in &entries {
        if let Some(w) = e
            .command
            .as_ref()
            .and_then(|c| crate::external::sandbox::warning(c, e.loc.line))
        {
            warnings.push(w);
        }
    }
    for c in candidates.iter().filter(|c| c.failure.is_some()) {
        warnings.push(format!(
            "candidate {} ({} {}) failed on {}",
            c.id,
            c.family.name(),
            fmt_params(&c.params),
            c.failure.as_deref().unwrap_or("")
        ));
    }
    for (msg, count) in notes {
        warnings.push(if count > 1 {
            format!("{msg} ({count} fits)")
        } else {
            msg
        });
    }
    Ok(RunOutcome {
        prepared: prep,
        candidates,
        selected,
        best,
        metric,
        rule: spec.select.rule,
        refit,
        predictions_digest,
        inputs,
        nested,
        warnings,
    })
}

/// What follows the grid: the selection, the refit on every development row, its predictions'
/// digest and the nested estimate.
struct AfterGrid {
    candidates: Vec<CandidateResult>,
    best: usize,
    selected: usize,
    metric: Metric,
    refit: StoredModel,
    predictions_digest: String,
    nested: Option<NestedOutcome>,
}

#[allow(clippy::too_many_arguments)]
fn after_grid(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    entries: &[ModelSpec],
    grids: &[Vec<Params>],
    folds: &[crate::split::Fold],
    threads: usize,
    notes: &mut Notes,
    cv: Result<(Vec<CandidateResult>, Option<Gram>)>,
) -> Result<AfterGrid> {
    let (candidates, dev_gram) = cv?;
    let metric = spec.select.metric;
    let (best, selected) = select(&candidates, metric, spec.select.rule, entries)?;
    let chosen = &candidates[selected - 1];
    // Refit the selected candidate on every development row.
    let dev_rows: Vec<usize> = prep.sealed.development();
    // The grid is done: the refit's passes may use every core (the side job that stores the
    // partition, if still running, shares them).
    let (encoder, fitted) = crate::par::lend(threads.saturating_sub(1), || {
        fit_on(
            spec,
            table,
            prep,
            &entries[chosen.entry],
            &chosen.params,
            &dev_rows,
            dev_gram.as_ref().map_or(DevGram::Make, DevGram::Made),
            threads,
            notes,
        )
    })?;
    let refit = StoredModel {
        candidate: chosen.id,
        classes: prep.classes.clone(),
        target: spec.data.target.name.clone(),
        key: spec.data.key.as_ref().map(|k| k.name.clone()),
        encoder,
        fitted,
    };
    // The refitted model's predictions on the development rows, digested: replay compares it.
    let predictions_digest = {
        let columns = numeric_columns(table, &prep.features);
        let p = match &refit.fitted {
            // A linear model on plain numeric columns is applied straight to the table (the
            // same arithmetic as `Fitted::predict`, without a copy of the design).
            Fitted::Linear {
                intercept,
                weights,
                poly: None,
            } if columns.len() == prep.features.len()
                && weights.len() == columns.len()
                && !refit.encoder.impute =>
            {
                let src = source(prep, &columns);
                crate::par::lend(threads.saturating_sub(1), || {
                    crate::models::gram::predictions(&src, &dev_rows, *intercept, weights)
                })
            }
            _ => {
                let rows: Vec<usize> = dev_rows.iter().map(|&i| prep.rows[i]).collect();
                // A family that is quadratic to predict on its own fitting rows (knn) is
                // digested on the same evenly spaced subset its training scores use.
                let limit =
                    model_for(&entries[chosen.entry], prep.classes.len()).train_rows_limit();
                let scored: Vec<usize> = match limit {
                    Some(l) if rows.len() > l => (0..l).map(|i| rows[i * rows.len() / l]).collect(),
                    _ => rows.clone(),
                };
                predict_with(spec, table, prep, &refit, &dev_rows, table, &scored, notes)?
            }
        };
        let mut h = Sha256::new();
        for v in &p {
            h.update(v.to_le_bytes());
        }
        hex(&h.finalize())
    };
    let nested = if spec.select.nested {
        Some(nested_cv(
            spec, table, prep, entries, grids, folds, threads, notes,
        )?)
    } else {
        None
    };
    Ok(AfterGrid {
        candidates,
        best,
        selected,
        metric,
        refit,
        predictions_digest,
        nested,
    })
}

/// What `fit_on` knows of the development rows' Gram.
#[derive(Clone, Copy)]
enum DevGram<'a> {
    /// The fitting rows are not the development rows.
    Not,
    /// They are; make their Gram as `fold_grams` does (`development_gram`).
    Make,
    /// They are, and `fold_grams` made it (`None`: the folds do not split them).
    Made(&'a Gram),
}

/// Fit one grid point on `fit` (positions among the kept rows); returns the encoder and model.
#[allow(clippy::too_many_arguments)]
fn fit_on(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    entry: &ModelSpec,
    params: &Params,
    fit: &[usize],
    dev: DevGram,
    threads: usize,
    notes: &mut Notes,
) -> Result<(Encoder, Fitted)> {
    let impute = spec.data.missing == Missing::Mean;
    if let Some(lambdas) = gram_lambdas(table, prep, entry, std::slice::from_ref(params), impute) {
        let columns = numeric_columns(table, &prep.features);
        let src = source(prep, &columns);
        let gram = match dev {
            DevGram::Made(g) => Some(g.clone()),
            DevGram::Make => development_gram(table, prep, threads),
            DevGram::Not => None,
        }
        .unwrap_or_else(|| Gram::of(&src, fit));
        if let Some(mut fits) = gram.solve(&lambdas) {
            let (intercept, weights) = fits.remove(0);
            // Numeric columns only, nothing imputed: the encoder's means come from the Gram.
            let encoder = Encoder {
                features: prep
                    .features
                    .iter()
                    .zip(gram.means())
                    .map(|(&c, fill)| Feature::Numeric {
                        name: table.columns[c].name.clone(),
                        fill,
                    })
                    .collect(),
                impute,
            };
            let fitted = Fitted::Linear {
                intercept,
                weights,
                poly: None,
            };
            return Ok((encoder, fitted));
        }
    }
    let model = model_for(entry, prep.classes.len());
    let rows: Vec<usize> = fit.iter().map(|&i| prep.rows[i]).collect();
    let y: Vec<f64> = fit.iter().map(|&i| prep.target[i]).collect();
    let encoder = Encoder::fit(
        table,
        &prep.features,
        &rows,
        model.drops_first_level(),
        impute,
    );
    let x = design(table, &encoder, &rows, notes)?;
    let fitted = model.fit(&x, &y, params, notes)?;
    Ok((encoder, fitted))
}

/// Every candidate on every fold: tasks over (fold, model entry) on `threads` threads, reduced
/// in task order into candidates with per-fold and aggregate scores.
#[allow(clippy::too_many_arguments)]
fn cross_validate(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    entries: &[ModelSpec],
    grids: &[Vec<Params>],
    folds: &[crate::split::Fold],
    threads: usize,
    notes: &mut Notes,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<(Vec<CandidateResult>, Option<Gram>)> {
    let impute = spec.data.missing == Missing::Mean;
    let (pre, dev_gram) = fold_grams(table, prep, entries, grids, folds, threads, impute);
    let swept: Vec<Mutex<Option<Result<TaskOut>>>> =
        sweep_folds(table, prep, entries, grids, folds, &pre, threads, impute)
            .into_iter()
            .map(Mutex::new)
            .collect();
    // A grid on the sufficient-statistics path is cut into one chunk of fits per thread: each
    // fit's sums are its own, so the cut changes no bit and keeps every thread busy. Other
    // grids stay whole (they share a decomposition or warm starts).
    let chunks: Vec<usize> = entries
        .iter()
        .zip(grids)
        .enumerate()
        .map(|(i, (e, g))| {
            let ready = (0..folds.len()).all(|f| {
                swept[f * entries.len() + i]
                    .lock()
                    .is_ok_and(|s| s.is_some())
            });
            if ready {
                1
            } else if gram_lambdas(table, prep, e, g, impute).is_some() {
                threads.min(g.len() / 8).max(1)
            } else {
                1
            }
        })
        .collect();
    // (fold, entry, first grid point, end)
    let tasks: Vec<(usize, usize, usize, usize)> = (0..folds.len())
        .flat_map(|f| {
            let chunks = &chunks;
            (0..entries.len()).flat_map(move |e| {
                let (k, n) = (chunks[e], grids[e].len());
                (0..k).map(move |c| (f, e, c * n / k, (c + 1) * n / k))
            })
        })
        .collect();
    // Candidate ids are consecutive over the entries' grids.
    let first_ids: Vec<usize> = grids
        .iter()
        .scan(1, |next, g| {
            let first = *next;
            *next += g.len();
            Some(first)
        })
        .collect();
    let done = AtomicUsize::new(0);
    let outs = crate::par::jobs(tasks.len(), threads, |t| {
        let (f, e, lo, hi) = tasks[t];
        let ready = swept[f * entries.len() + e]
            .lock()
            .ok()
            .and_then(|mut s| s.take());
        let out = ready.unwrap_or_else(|| {
            run_task(
                spec,
                table,
                prep,
                &entries[e],
                &grids[e][lo..hi],
                &folds[f],
                impute,
                first_ids[e] + lo,
                f as u32,
                pre[f].as_ref(),
            )
        });
        progress(done.fetch_add(1, Ordering::Relaxed) + 1, tasks.len());
        out
    });
    if outs.len() != tasks.len() {
        return Err(Error::Internal("a worker thread panicked".into()));
    }
    // Reduce in task order: the first error by task, the notes merged in a sorted map, the
    // chunks of a (fold, entry) joined in grid order.
    let mut by_task: Vec<TaskOut> = (0..folds.len() * entries.len())
        .map(|_| TaskOut {
            scores: Vec::new(),
            notes: Notes::new(),
        })
        .collect();
    for (t, o) in outs.into_iter().enumerate() {
        let o = o.map_err(|e| match e {
            Error::Input(m) => {
                let f = &folds[tasks[t].0];
                Error::Input(format!(
                    "fold {} (repeat {}): {m}",
                    f.index + 1,
                    f.repeat + 1
                ))
            }
            other => other,
        })?;
        for (k, v) in &o.notes {
            *notes.entry(k.clone()).or_insert(0) += v;
        }
        let (f, e, _, _) = tasks[t];
        by_task[f * entries.len() + e].scores.extend(o.scores);
    }
    let mut candidates = Vec::new();
    for (e, entry) in entries.iter().enumerate() {
        for (g, params) in grids[e].iter().enumerate() {
            let id = candidates.len() + 1;
            let mut fs = Vec::with_capacity(folds.len());
            let mut failure: Option<String> = None;
            for (f, fold) in folds.iter().enumerate() {
                let (train, validation) = match &by_task[f * entries.len() + e].scores[g] {
                    Ok(s) => s.clone(),
                    Err(msg) => {
                        failure.get_or_insert_with(|| {
                            format!(
                                "fold {} (repeat {}): {msg}",
                                fold.index + 1,
                                fold.repeat + 1
                            )
                        });
                        (
                            vec![None; prep.metrics.len()],
                            vec![None; prep.metrics.len()],
                        )
                    }
                };
                fs.push(FoldScores {
                    repeat: fold.repeat,
                    fold: fold.index,
                    n_fit: fold.fit.len(),
                    n_score: fold.score.len(),
                    train,
                    validation,
                });
            }
            let agg = |pick: fn(&FoldScores) -> &Scores| -> (Scores, Scores) {
                let nm = prep.metrics.len();
                let mut m = vec![None; nm];
                let mut se = vec![None; nm];
                for k in 0..nm {
                    let vals: Vec<Option<f64>> = fs.iter().map(|f| pick(f)[k]).collect();
                    (m[k], se[k]) = mean_se(&vals);
                }
                (m, se)
            };
            let (mut train, mut train_se) = agg(|f| &f.train);
            let (mut validation, mut validation_se) = agg(|f| &f.validation);
            if failure.is_some() {
                // A candidate that failed on any fold has no estimate and cannot be selected.
                for v in [
                    &mut train,
                    &mut train_se,
                    &mut validation,
                    &mut validation_se,
                ] {
                    v.iter_mut().for_each(|x| *x = None);
                }
            }
            candidates.push(CandidateResult {
                id,
                family: entry.family,
                entry: e,
                standardize: entry.standardize,
                params: params.clone(),
                seed: derive_seed(spec.split.seed, Domain::Candidate, id as u32),
                folds: fs,
                train,
                train_se,
                validation,
                validation_se,
                failure,
            });
        }
    }
    Ok((candidates, dev_gram))
}

/// The nested cross-validation estimate of the whole selection procedure.
#[derive(Debug, Clone)]
pub struct NestedOutcome {
    pub metric: Metric,
    pub estimate: Option<f64>,
    pub se: Option<f64>,
    /// Per outer fold: the candidate the inner selection chose, and its outer score.
    pub selections: Vec<(usize, Option<f64>)>,
}

/// Nested cross-validation (Varma & Simon 2006, BMC Bioinformatics 7:91): the run's first-repeat
/// folds are the outer folds; inside each, the whole selection (inner k-fold over every
/// candidate, the `[select]` rule) runs on the outer fitting rows only, the chosen candidate is
/// refitted there and scored on the outer held-out rows.
#[allow(clippy::too_many_arguments)]
fn nested_cv(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    entries: &[ModelSpec],
    grids: &[Vec<Params>],
    folds: &[crate::split::Fold],
    threads: usize,
    notes: &mut Notes,
) -> Result<NestedOutcome> {
    let metric = spec.select.metric;
    let mi = prep.metrics.iter().position(|m| *m == metric).unwrap_or(0);
    let mut selections = Vec::new();
    for (o, outer) in folds.iter().filter(|f| f.repeat == 0).enumerate() {
        let wrap = |e: Error| match e {
            Error::Input(m) => Error::Input(format!(
                "nested cross-validation, outer fold {}: {m}",
                o + 1
            )),
            other => other,
        };
        let inner = prep.inner_folds(spec, &outer.fit, o as u32).map_err(wrap)?;
        let cands = cross_validate(
            spec,
            table,
            prep,
            entries,
            grids,
            &inner,
            threads,
            notes,
            &|_, _| {},
        )
        .map_err(wrap)?
        .0;
        let (_, chosen) = select(&cands, metric, spec.select.rule, entries).map_err(wrap)?;
        let c = &cands[chosen - 1];
        let (encoder, fitted) = fit_on(
            spec,
            table,
            prep,
            &entries[c.entry],
            &c.params,
            &outer.fit,
            DevGram::Not,
            threads,
            notes,
        )
        .map_err(wrap)?;
        let rows: Vec<usize> = outer.score.iter().map(|&i| prep.rows[i]).collect();
        let y: Vec<f64> = outer.score.iter().map(|&i| prep.target[i]).collect();
        let stored = StoredModel {
            candidate: chosen,
            classes: prep.classes.clone(),
            target: spec.data.target.name.clone(),
            key: None,
            encoder,
            fitted,
        };
        let pred = predict_with(spec, table, prep, &stored, &outer.fit, table, &rows, notes)
            .map_err(wrap)?;
        selections.push((
            chosen,
            score_all(&prep.metrics, &y, &pred, prep.classes.len())[mi],
        ));
    }
    let (estimate, se) = mean_se(&selections.iter().map(|s| s.1).collect::<Vec<_>>());
    Ok(NestedOutcome {
        metric,
        estimate,
        se,
        selections,
    })
}

/// (best id, selected id). Ties go to the lower id.
fn select(
    cands: &[CandidateResult],
    metric: Metric,
    rule: Rule,
    entries: &[ModelSpec],
) -> Result<(usize, usize)> {
    let k = Metric::for_task(metric.is_classification())
        .iter()
        .position(|m| *m == metric)
        .unwrap_or(0);
    let mut best: Option<&CandidateResult> = None;
    for c in cands {
        if let Some(v) = c.validation[k]
            && best.is_none_or(|b| metric.better(v, b.validation[k].unwrap_or(f64::NAN)))
        {
            best = Some(c);
        }
    }
    let best = best.ok_or_else(|| {
        Error::Input(format!("{} is undefined on every fold (for example r2 on single-row folds); select by rmse, mse or mae", metric.name()))
    })?;
    if rule == Rule::Min {
        return Ok((best.id, best.id));
    }
    // One-standard-error rule (Hastie, Tibshirani & Friedman, ESL 2nd ed., sec. 7.10): the
    // simplest candidate of the best one's model entry within one SE of the best score.
    let bv = best.validation[k].unwrap_or(f64::NAN);
    let se = best.validation_se[k].unwrap_or(0.0);
    let limit = if metric.higher_is_better() {
        bv - se
    } else {
        bv + se
    };
    // Complexity does not depend on the class count.
    let model = model_for(&entries[best.entry], 0);
    let mut pick = best;
    for c in cands.iter().filter(|c| c.entry == best.entry) {
        let Some(v) = c.validation[k] else { continue };
        let within = if metric.higher_is_better() {
            v >= limit
        } else {
            v <= limit
        };
        if within && model.complexity(&c.params) < model.complexity(&pick.params) {
            pick = c;
        }
    }
    Ok((best.id, pick.id))
}

/// Refit one candidate of a stored run on all development rows (for `predict --candidate`).
/// The spec and data must be the run's own; the caller checks the data hash.
pub fn refit(spec: &Spec, table: &Table, candidate: usize) -> Result<StoredModel> {
    // A refit reads no test row and needs no row identity.
    let prep = prepare_unkeyed(spec, table)?;
    refit_prepared(spec, table, &prep, candidate)
}

/// Refit candidate `candidate` (1-based, in the run's order) on the development rows.
pub fn refit_prepared(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    candidate: usize,
) -> Result<StoredModel> {
    let entries = entries(spec);
    let mut id = 0;
    for entry in &entries {
        for params in entry.expand() {
            id += 1;
            if id == candidate {
                let dev = prep.sealed.development();
                let threads = crate::data::all_cores();
                let (encoder, fitted) = crate::par::lend(threads - 1, || {
                    fit_on(
                        spec,
                        table,
                        prep,
                        entry,
                        &params,
                        &dev,
                        DevGram::Make,
                        threads,
                        &mut Notes::new(),
                    )
                })?;
                return Ok(StoredModel::of(spec, prep, candidate, encoder, fitted));
            }
        }
    }
    Err(Error::Input(format!(
        "the run has no candidate {candidate}; `probity show RUN` lists them"
    )))
}

impl StoredModel {
    /// Candidate `candidate`'s fitted model with what predicting needs of the run.
    fn of(
        spec: &Spec,
        prep: &Prepared,
        candidate: usize,
        encoder: Encoder,
        fitted: Fitted,
    ) -> StoredModel {
        StoredModel {
            candidate,
            classes: prep.classes.clone(),
            target: spec.data.target.name.clone(),
            key: spec.data.key.as_ref().map(|k| k.name.clone()),
            encoder,
            fitted,
        }
    }
}

/// Out-of-fold predictions of one candidate on the development rows.
#[derive(Debug, Clone)]
pub struct OutOfFold {
    /// Per scored row, in fold order then row order: (fold, kept-row position, target,
    /// prediction: one value, or one probability per class).
    pub rows: Vec<(usize, usize, f64, Vec<f64>)>,
    pub classes: Vec<String>,
}

/// Refit `candidate` (1-based) on each fold's fitting rows of the first repeat, as the run did,
/// and predict that fold's held-out rows: every development row once (for a fixed validation
/// partition, its rows). Encoders are fitted on each fold's fitting rows only. Test rows are
/// never touched (nor hashed: the split is prepared without the test rows' identities).
pub fn out_of_fold(spec: &Spec, table: &Table, candidate: usize) -> Result<OutOfFold> {
    let prep = &prepare_unkeyed(spec, table)?;
    let (entry, params) = candidate_entry(spec, candidate)?;
    if entry.command.is_some() {
        return Err(Error::Input(format!(
            "candidate {candidate} is an external command family: its out-of-fold predictions would mean running the command again on every fold, which `plot` does not do; plot a built-in candidate"
        )));
    }
    let threads = crate::data::all_cores();
    let width = prep.classes.len().max(1);
    let mut rows = Vec::new();
    for fold in first_repeat(prep.sealed.folds()) {
        let mut notes = Notes::new();
        let (encoder, fitted) = crate::par::lend(threads.saturating_sub(1), || {
            fit_on(
                spec,
                table,
                prep,
                &entry,
                &params,
                &fold.fit,
                DevGram::Not,
                threads,
                &mut notes,
            )
        })?;
        let model = StoredModel::of(spec, prep, candidate, encoder, fitted);
        let score_rows: Vec<usize> = fold.score.iter().map(|&i| prep.rows[i]).collect();
        let p = predict_with(
            spec,
            table,
            prep,
            &model,
            &fold.fit,
            table,
            &score_rows,
            &mut notes,
        )?;
        for (k, &i) in fold.score.iter().enumerate() {
            rows.push((
                fold.index,
                i,
                prep.target[i],
                p[k * width..(k + 1) * width].to_vec(),
            ));
        }
    }
    Ok(OutOfFold {
        rows,
        classes: prep.classes.clone(),
    })
}

/// One candidate scored once on the test rows, with bootstrap intervals.
#[derive(Debug, Clone)]
pub struct TestOutcome {
    pub candidate: usize,
    pub n: usize,
    pub scores: Scores,
    /// Per metric: (low, high, bootstrap standard error) at the requested confidence.
    pub intervals: Vec<Option<(f64, f64, f64)>>,
    pub resamples: usize,
    /// Seed of the bootstrap stream (derived from the run seed and the candidate).
    pub seed: u64,
}

/// Bootstrap resamples of every reveal (Efron & Tibshirani 1993 advise 1000 or more for
/// percentile intervals; 2000 as the issue asks).
pub const RESAMPLES: usize = 2000;

/// Refit `candidate` on the development rows and score it on the test rows: the only place test
/// rows reach a model, and only with a permit.
pub fn score_test(
    spec: &Spec,
    table: &Table,
    prep: &Prepared,
    candidate: usize,
    permit: &crate::guard::RevealPermit,
    confidence: f64,
) -> Result<TestOutcome> {
    let model = refit_prepared(spec, table, prep, candidate)?;
    let test = prep.sealed.test_rows(permit);
    if test.is_empty() {
        return Err(Error::Input(
            "this run has no test partition (test = 0): there is nothing to reveal".into(),
        ));
    }
    let rows: Vec<usize> = test.iter().map(|&i| prep.rows[i]).collect();
    let y: Vec<f64> = test.iter().map(|&i| prep.target[i]).collect();
    let mut notes = Notes::new();
    let dev = prep.sealed.development();
    let pred = predict_with(spec, table, prep, &model, &dev, table, &rows, &mut notes)?;
    let nc = prep.classes.len();
    let scores = score_all(&prep.metrics, &y, &pred, nc);
    let seed = derive_seed(spec.split.seed, Domain::Bootstrap, candidate as u32);
    let mut rng = crate::split::rng::stream(seed, Domain::Bootstrap, 0);
    let reps =
        crate::guard::stats::bootstrap(y.len(), RESAMPLES, &mut rng, prep.metrics.len(), |idx| {
            let ys: Vec<f64> = idx.iter().map(|&i| y[i]).collect();
            let width = nc.max(1);
            let ps: Vec<f64> = idx
                .iter()
                .flat_map(|&i| pred[i * width..(i + 1) * width].iter().copied())
                .collect();
            score_all(&prep.metrics, &ys, &ps, nc)
        });
    let mut intervals = vec![None; prep.metrics.len()];
    for (k, r) in reps.into_iter().enumerate() {
        intervals[k] = crate::guard::stats::percentile_interval(r, confidence);
    }
    Ok(TestOutcome {
        candidate,
        n: y.len(),
        scores,
        intervals,
        resamples: RESAMPLES,
        seed,
    })
}

impl StoredModel {
    /// Predictions for every row of `table`, and notes (unseen levels).
    pub fn predict(&self, table: &Table) -> Result<(Vec<f64>, Vec<String>)> {
        let rows: Vec<usize> = (0..table.n_rows()).collect();
        let mut notes = Notes::new();
        let x = self.encoder.transform(table, &rows, &mut notes)?;
        let p = self.fitted.predict(&x);
        Ok((
            p,
            notes
                .into_iter()
                .map(|(m, n)| if n > 1 { format!("{m} ({n} times)") } else { m })
                .collect(),
        ))
    }

    /// Text columns the encoder expects, so a file's numeric-looking levels stay text.
    pub fn text_columns(&self) -> Vec<String> {
        self.encoder
            .features
            .iter()
            .filter_map(|f| match f {
                crate::models::encode::Feature::Categorical { name, .. } => Some(name.clone()),
                _ => None,
            })
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    /// Ridge on the sufficient-statistics path: the run takes the development rows' Gram from
    /// its fold passes, a later refit (`reveal`, `predict --candidate`) forms it on its own;
    /// both must give the same model bits, whatever the thread count.
    #[test]
    fn a_later_refit_gives_the_run_s_model_bits() {
        // Values with long expansions, so sums taken in another order round differently.
        let mut csv = String::from("x1,x2,y\n");
        for i in 0..2000u32 {
            let t = f64::from(i);
            let x1 = (t * 0.731).sin() * 3.7;
            let x2 = (t * 1.37).cos() * 11.3 + 40.0;
            let y = 1.9 * x1 - 0.23 * x2 + (t * 2.9).sin();
            csv.push_str(&format!("{x1},{x2},{y}\n"));
        }
        let table =
            crate::data::parse(csv.as_bytes(), Path::new("r.csv"), "0".into(), &[]).unwrap();
        let text = "name = \"r\"\ntask = \"regression\"\n[data]\npath = \"r.csv\"\ntarget = \"y\"\n\
            [split]\nmethod = \"random\"\nseed = 3\ntest = 0.2\nfolds = 5\n\
            [[model]]\nkind = \"ridge\"\nlambda = [0.01, 1, 100]\n";
        let spec = crate::spec::parse(text, Path::new("r.toml"), Path::new(".")).unwrap();
        let out = run(&spec, &table, 2).unwrap();
        for threads in [1, 3] {
            let prep = prepare(&spec, &table, crate::data::Identity::CURRENT).unwrap();
            let dev = prep.sealed.development();
            let chosen = &out.candidates[out.selected - 1];
            let (entry, params) = (&entries(&spec)[chosen.entry], &chosen.params);
            assert_eq!(entry.family, Family::Ridge);
            let refit = |dev_gram| {
                fit_on(
                    &spec,
                    &table,
                    &prep,
                    entry,
                    params,
                    &dev,
                    dev_gram,
                    threads,
                    &mut Notes::new(),
                )
                .unwrap()
            };
            let (encoder, fitted) = refit(DevGram::Make);
            assert_eq!(encoder, out.refit.encoder);
            assert_eq!(fitted, out.refit.fitted);
            // The direct pass over the development rows is another sum, with other bits.
            assert_ne!(refit(DevGram::Not).1, out.refit.fitted);
        }
    }
}

#[cfg(test)]
mod memory_tests {
    use super::*;

    #[test]
    fn fit_bytes_grow_with_the_columns_squared() {
        // ridge on 20,000 columns: three 20,001-square matrices dominate (about 9.6 GB).
        let b = fit_bytes(Family::Ridge, 1000, 20_000, 0).unwrap();
        assert_eq!(b, 8 * (1000 * 20_000 + 3 * 20_001 * 20_001));
        // Logistic with four classes: three blocks of 11 parameters.
        assert_eq!(
            fit_bytes(Family::Logistic, 100, 10, 4),
            Some(8 * (100 * 10 + 3 * 33 * 33))
        );
        assert_eq!(fit_bytes(Family::Knn, 1000, 20_000, 0), None);
        assert_eq!(bytes_text(512), "512 bytes");
        assert_eq!(bytes_text(3 << 29), "1.5 GiB");
    }
}

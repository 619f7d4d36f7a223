//! Experiment specs: the TOML schema, validation into `Spec`, and the canonical hash.
//!
//! A `Spec` only exists once every key has been checked, so later stages never re-validate.
//! Errors name the spec file, line and column, and suggest the nearest valid key or value.

mod raw;

use crate::error::{Error, Loc, Result, did_you_mean};
use raw::{RawData, RawGuard, RawModel, RawSelect, RawSpec, RawSplit};
use serde_json::{Value, json};
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};
use toml::Spanned;

/// A column name as written in the spec, with where it was written.
#[derive(Debug, Clone, PartialEq)]
pub struct Named {
    pub name: String,
    pub loc: Loc,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Missing {
    Error,
    DropRows,
    Mean,
}

impl Missing {
    pub fn as_str(self) -> &'static str {
        match self {
            Missing::Error => "error",
            Missing::DropRows => "drop-rows",
            Missing::Mean => "mean",
        }
    }
}

#[derive(Debug, Clone)]
pub struct DataSpec {
    /// Resolved against the spec file's folder.
    pub path: PathBuf,
    /// As written in the spec.
    pub path_text: String,
    /// Where `path` is written, for "file not found".
    pub path_loc: Loc,
    pub target: Named,
    pub features: Option<Vec<Named>>,
    pub ignore: Vec<Named>,
    pub key: Option<Named>,
    pub categorical: Vec<Named>,
    pub sha256: Option<(String, Loc)>,
    pub missing: Missing,
    /// The positive class of a binary classification task (default: the second class).
    pub positive: Option<(String, Loc)>,
}

#[derive(Debug, Clone, PartialEq)]
pub enum SplitMethod {
    Random,
    /// With `group`, whole groups are assigned so that each partition and fold gets close to
    /// its share of every stratum (stratified group folds).
    Stratified {
        bins: usize,
        group: Option<Named>,
    },
    Group {
        column: Named,
    },
    Time {
        order: Named,
    },
    Hash,
    Column {
        column: Named,
    },
}

impl SplitMethod {
    pub fn name(&self) -> &'static str {
        match self {
            SplitMethod::Random => "random",
            SplitMethod::Stratified { .. } => "stratified",
            SplitMethod::Group { .. } => "group",
            SplitMethod::Time { .. } => "time",
            SplitMethod::Hash => "hash",
            SplitMethod::Column { .. } => "column",
        }
    }
}

#[derive(Debug, Clone)]
pub struct SplitSpec {
    pub method: SplitMethod,
    pub seed: u64,
    pub test: f64,
    pub validation: f64,
    pub folds: crate::split::Folds,
    pub repeats: usize,
    pub loc: Loc,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Rule {
    Min,
    OneSe,
}

#[derive(Debug, Clone)]
pub struct SelectSpec {
    pub metric: crate::metrics::Metric,
    pub rule: Rule,
    /// Wrap the whole selection in an outer cross-validation (Varma & Simon 2006).
    pub nested: bool,
    /// The most candidates the grid may hold (a limit on the work, not part of the
    /// experiment: it stays out of the canonical hash).
    pub max_candidates: u64,
}

/// The default of `[select] max_candidates`: a grid is counted before it is expanded, and one
/// larger than this is refused (each candidate is fitted on every fold and stored).
pub const MAX_CANDIDATES: u64 = 100_000;

/// How reveals of the test partition are answered.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum GuardMode {
    /// The true test score; past the budget every reveal warns and `audit` fails.
    Count,
    /// Thresholdout (Dwork et al. 2015): `threshold` T and Laplace noise scale `noise`.
    Reusable { threshold: f64, noise: f64 },
    /// The Ladder (Blum & Hardt 2015) with a fixed `step`.
    Ladder { step: f64 },
}

impl GuardSpec {
    /// The rules without a `[guard]`: count mode, one consultation.
    pub const DEFAULT: GuardSpec = GuardSpec {
        reveals: 1,
        confidence: 0.95,
        mode: GuardMode::Count,
        overlap: Overlap::Count,
    };

    /// Canonical JSON: part of the spec's canonical form, and what a partition's seal stores.
    pub fn to_json(&self) -> Value {
        let mut v = json!({"reveals": self.reveals, "confidence": self.confidence, "mode": self.mode.name()});
        match self.mode {
            GuardMode::Count => {}
            GuardMode::Reusable { threshold, noise } => {
                v["threshold"] = json!(threshold);
                v["noise"] = json!(noise);
            }
            GuardMode::Ladder { step } => v["step"] = json!(step),
        }
        // Only when set: specs written before the key existed keep their canonical hash.
        if self.overlap != Overlap::Count {
            v["overlap"] = json!(self.overlap.name());
        }
        v
    }

    /// The rules `to_json` wrote, checked as a spec's `[guard]` is (a stored seal, perhaps
    /// merged from another ledger); `None` when they do not read.
    pub fn from_json(v: &Value) -> Option<GuardSpec> {
        let o = v.as_object()?;
        let known = [
            "reveals",
            "confidence",
            "mode",
            "threshold",
            "noise",
            "step",
            "overlap",
        ];
        if o.keys().any(|k| !known.contains(&k.as_str())) {
            return None;
        }
        let reveals = o
            .get("reveals")?
            .as_u64()
            .filter(|r| (1..=1_000_000).contains(r))? as u32;
        let confidence = o
            .get("confidence")?
            .as_f64()
            .filter(|c| *c > 0.0 && *c < 1.0)?;
        let positive = |k: &str| o.get(k)?.as_f64().filter(|x| *x > 0.0 && x.is_finite());
        let mode = match o.get("mode")?.as_str()? {
            "count" => GuardMode::Count,
            "reusable" => GuardMode::Reusable {
                threshold: positive("threshold")?,
                noise: positive("noise")?,
            },
            "ladder" => GuardMode::Ladder {
                step: positive("step")?,
            },
            _ => return None,
        };
        let overlap = match o.get("overlap").map(Value::as_str) {
            None => Overlap::Count,
            Some(Some("refuse")) => Overlap::Refuse,
            Some(_) => return None,
        };
        let g = GuardSpec {
            reveals,
            confidence,
            mode,
            overlap,
        };
        // Exactly what `to_json` writes: nothing extra for the mode, nothing rewritten.
        (g.to_json() == *v).then_some(g)
    }
}

impl GuardMode {
    pub fn name(self) -> &'static str {
        match self {
            GuardMode::Count => "count",
            GuardMode::Reusable { .. } => "reusable",
            GuardMode::Ladder { .. } => "ladder",
        }
    }
}

/// What a later run that uses this partition's sealed test rows as development rows meets.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Overlap {
    /// The run is stored with a warning and counts as one consultation of the partition.
    Count,
    /// The run is refused (exit 2) before its grid.
    Refuse,
}

impl Overlap {
    pub fn name(self) -> &'static str {
        match self {
            Overlap::Count => "count",
            Overlap::Refuse => "refuse",
        }
    }
}

/// `[guard]`: the test partition's budget and how reveals are answered. The first run that
/// stores a partition seals it with these rules (`guard::Seal`); later runs on it follow them.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GuardSpec {
    /// Consultations allowed per partition (Thresholdout: over-threshold answers allowed).
    pub reveals: u32,
    pub confidence: f64,
    pub mode: GuardMode,
    pub overlap: Overlap,
}

/// The built-in model families.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Family {
    Mean,
    Ols,
    Ridge,
    Lasso,
    Poly,
    Knn,
    Logistic,
    /// An external command (a model fitted by another program).
    Command,
}

impl Family {
    pub const ALL: [Family; 8] = [
        Family::Mean,
        Family::Ols,
        Family::Ridge,
        Family::Lasso,
        Family::Poly,
        Family::Knn,
        Family::Logistic,
        Family::Command,
    ];

    /// Whether the family serves the task.
    pub fn serves(self, task: Task) -> bool {
        match task {
            Task::Regression => !matches!(self, Family::Logistic),
            Task::Classification => matches!(
                self,
                Family::Mean | Family::Knn | Family::Logistic | Family::Command
            ),
        }
    }

    pub fn name(self) -> &'static str {
        match self {
            Family::Mean => "mean",
            Family::Ols => "ols",
            Family::Ridge => "ridge",
            Family::Lasso => "lasso",
            Family::Poly => "poly",
            Family::Knn => "knn",
            Family::Logistic => "logistic",
            Family::Command => "command",
        }
    }

    /// The grid parameters the family takes (each must be given).
    pub fn params(self) -> &'static [&'static str] {
        match self {
            Family::Mean | Family::Ols | Family::Command => &[],
            Family::Ridge | Family::Lasso | Family::Logistic => &["lambda"],
            Family::Poly => &["degree", "feature"],
            Family::Knn => &["k"],
        }
    }

    /// Whether `standardize` means anything for the family.
    pub fn standardizes(self) -> bool {
        matches!(
            self,
            Family::Ridge | Family::Lasso | Family::Knn | Family::Logistic
        )
    }
}

/// What the experiment predicts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Task {
    Regression,
    Classification,
}

impl Task {
    pub fn name(self) -> &'static str {
        match self {
            Task::Regression => "regression",
            Task::Classification => "classification",
        }
    }
}

/// One value of a grid parameter.
#[derive(Debug, Clone, PartialEq)]
pub enum ParamValue {
    Float(f64),
    Int(u64),
    Text(String),
    Bool(bool),
}

impl ParamValue {
    /// A totally ordered key with the same equality as `==` (0.0 and -0.0 are one value).
    fn key(&self) -> (u8, u64, String) {
        match self {
            ParamValue::Float(f) => (0, (f + 0.0).to_bits(), String::new()),
            ParamValue::Int(i) => (1, *i, String::new()),
            ParamValue::Text(t) => (2, 0, t.clone()),
            ParamValue::Bool(b) => (3, u64::from(*b), String::new()),
        }
    }

    pub fn to_json(&self) -> Value {
        match self {
            ParamValue::Float(f) => json!(f),
            ParamValue::Int(i) => json!(i),
            ParamValue::Text(s) => json!(s),
            ParamValue::Bool(b) => json!(b),
        }
    }
    pub fn as_f64(&self) -> f64 {
        match self {
            ParamValue::Float(f) => *f,
            ParamValue::Int(i) => *i as f64,
            ParamValue::Text(_) | ParamValue::Bool(_) => f64::NAN,
        }
    }
    pub fn as_usize(&self) -> usize {
        match self {
            ParamValue::Int(i) => *i as usize,
            ParamValue::Float(f) => *f as usize,
            ParamValue::Text(_) | ParamValue::Bool(_) => 0,
        }
    }
    pub fn as_text(&self) -> &str {
        match self {
            ParamValue::Text(s) => s,
            _ => "",
        }
    }
}

impl std::fmt::Display for ParamValue {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ParamValue::Float(x) => write!(f, "{x}"),
            ParamValue::Int(i) => write!(f, "{i}"),
            ParamValue::Text(s) => write!(f, "{s}"),
            ParamValue::Bool(b) => write!(f, "{b}"),
        }
    }
}

/// One `[[model]]` table: a family and its grid (parameter name -> values, names sorted).
#[derive(Debug, Clone)]
pub struct ModelSpec {
    pub family: Family,
    pub standardize: bool,
    pub grid: Vec<(String, Vec<ParamValue>)>,
    pub loc: Loc,
    /// Present for `kind = "command"`.
    pub command: Option<CommandSpec>,
}

/// An external command family: what to run, where, and which files to fingerprint.
#[derive(Debug, Clone, PartialEq)]
pub struct CommandSpec {
    /// argv, run without a shell.
    pub run: Vec<String>,
    /// The spec file's folder: the command's working directory.
    pub workdir: PathBuf,
    /// (as written, resolved) for each file or folder whose SHA-256 is recorded with the run;
    /// the only paths of the spec's folder the boxed command can read.
    pub inputs: Vec<(String, PathBuf)>,
    /// Seconds before the command is stopped.
    pub timeout: u64,
    /// Whether the command runs in the box (`src/external/sandbox.rs`); `sandbox = false` in
    /// the spec turns it off for this family.
    pub sandbox: bool,
}

/// What makes two `[[model]]` entries the same: family, standardisation and grid, with the
/// same equality as `==` on them (values by `ParamValue::key`).
type RepeatKey = (&'static str, bool, Vec<(String, Vec<(u8, u64, String)>)>);

impl ModelSpec {
    /// How many candidates `expand` gives, without expanding (saturating).
    pub fn count(&self) -> u64 {
        self.grid
            .iter()
            .fold(1u64, |n, (_, v)| n.saturating_mul(v.len() as u64))
    }

    fn repeat_key(&self) -> RepeatKey {
        let grid = self
            .grid
            .iter()
            .map(|(name, values)| (name.clone(), values.iter().map(ParamValue::key).collect()))
            .collect();
        (self.family.name(), self.standardize, grid)
    }

    /// The grid's product in a stable order: parameters by name, the last varying fastest,
    /// values in the order written.
    pub fn expand(&self) -> Vec<Vec<(String, ParamValue)>> {
        let mut out: Vec<Vec<(String, ParamValue)>> = vec![Vec::new()];
        for (name, values) in &self.grid {
            let mut next = Vec::with_capacity(out.len() * values.len());
            for prefix in &out {
                for v in values {
                    let mut p = prefix.clone();
                    p.push((name.clone(), v.clone()));
                    next.push(p);
                }
            }
            out = next;
        }
        out
    }
}

#[derive(Debug, Clone)]
pub struct Spec {
    pub name: String,
    pub task: Task,
    pub description: Option<String>,
    pub data: DataSpec,
    pub split: SplitSpec,
    pub select: SelectSpec,
    pub guard: GuardSpec,
    pub models: Vec<ModelSpec>,
    /// The spec file, for error messages.
    pub file: PathBuf,
    /// The spec text verbatim, as stored in the ledger.
    pub text: String,
}

/// The largest spec file read. Parsing holds several times the text in memory.
pub const SPEC_MAX_BYTES: u64 = 16 << 20;

/// Read and validate a spec file.
pub fn load(path: &Path) -> Result<Spec> {
    if let Some(kind) = crate::files::not_regular(path) {
        return Err(Error::spec(
            path,
            None,
            format!("is {kind}, not a spec file; pass the path of a .toml spec"),
        ));
    }
    let io = |e| Error::Io {
        action: "cannot read spec",
        path: path.to_path_buf(),
        source: e,
    };
    let mut text = String::new();
    // Read at most one byte past the limit, so that a huge file is refused without being held.
    std::io::Read::read_to_string(
        &mut std::io::Read::take(std::fs::File::open(path).map_err(io)?, SPEC_MAX_BYTES + 1),
        &mut text,
    )
    .map_err(io)?;
    if text.len() as u64 > SPEC_MAX_BYTES {
        return Err(Error::spec(
            path,
            None,
            format!(
                "is over {} MiB, more than a spec may be; a grid is written as lists and ranges in a few [[model]] tables, not one table per candidate",
                SPEC_MAX_BYTES >> 20
            ),
        ));
    }
    let base = path.parent().map(Path::to_path_buf).unwrap_or_default();
    parse(&text, path, &base)
}

/// The `[guard]` rules of a stored spec text, checked as `parse` checks them, without the
/// rest of the spec (whose files, such as an external command's inputs, may be gone); `None`
/// when the text or its `[guard]` does not read.
pub fn stored_guard(text: &str) -> Option<GuardSpec> {
    let raw: RawSpec = toml::from_str(text).ok()?;
    let check = Check::new(text, Path::new(""));
    let task = match raw.task.as_ref().map(|t| t.get_ref().as_str()) {
        Some("classification") => Task::Classification,
        _ => Task::Regression,
    };
    let select = check.select(raw.select.as_ref(), task).ok()?;
    check.guard(raw.guard.as_ref(), select.metric).ok()
}

/// The `[data] target` of a stored spec text, as written; `None` when it does not read.
pub fn stored_target(text: &str) -> Option<String> {
    let raw: RawSpec = toml::from_str(text).ok()?;
    Some(raw.data?.into_inner().target?.into_inner())
}

/// Validate spec text. `file` names it in errors; `base` resolves the data path.
pub fn parse(text: &str, file: &Path, base: &Path) -> Result<Spec> {
    let raw: RawSpec = toml::from_str(text).map_err(|e| toml_error(text, file, &e))?;
    Check::new(text, file).spec(raw, base)
}

fn toml_error(text: &str, file: &Path, e: &toml::de::Error) -> Error {
    let loc = e.span().map(|s| Loc::of_offset(text, s.start));
    let msg = e.message().trim().to_string();
    let mut out = msg.clone();
    // serde lists the valid keys as `a`, `b`; suggest the nearest to the unknown one.
    if let Some(rest) = msg.strip_prefix("unknown field `")
        && let Some(end) = rest.find('`')
    {
        let bad = &rest[..end];
        let expected: Vec<&str> = rest[end..].split('`').skip(2).step_by(2).collect();
        out = format!(
            "unknown key '{bad}'{}; valid keys here: {}",
            did_you_mean(bad, expected.iter().copied()),
            expected.join(", ")
        );
    }
    Error::spec(file, loc, out)
}

struct Check<'a> {
    text: &'a str,
    file: &'a Path,
    // Positions are asked for every table and key, so they come from an index built once:
    // a spec of many [[model]] tables stays linear.
    lines: crate::error::Lines<'a>,
}

impl<'a> Check<'a> {
    fn new(text: &'a str, file: &'a Path) -> Check<'a> {
        Check {
            text,
            file,
            lines: crate::error::Lines::new(text),
        }
    }
    fn loc<T>(&self, s: &Spanned<T>) -> Loc {
        self.lines.loc(s.span().start)
    }
    fn err<T>(&self, at: &Spanned<T>, msg: impl Into<String>) -> Error {
        Error::spec(self.file, Some(self.loc(at)), msg)
    }
    fn top(&self, msg: impl Into<String>) -> Error {
        Error::spec(self.file, Some(Loc { line: 1, col: 1 }), msg)
    }
    fn named(&self, s: &Spanned<String>) -> Result<Named> {
        if s.get_ref().trim().is_empty() {
            return Err(self.err(s, "a column name must not be empty"));
        }
        Ok(Named {
            name: s.get_ref().clone(),
            loc: self.loc(s),
        })
    }
    fn names(&self, v: &Option<Vec<Spanned<String>>>, key: &str) -> Result<Vec<Named>> {
        let mut out: Vec<Named> = Vec::new();
        for s in v.iter().flatten() {
            let n = self.named(s)?;
            if out.iter().any(|o| o.name == n.name) {
                return Err(self.err(s, format!("column '{}' is listed twice in {key}", n.name)));
            }
            out.push(n);
        }
        Ok(out)
    }

    fn spec(&self, raw: RawSpec, base: &Path) -> Result<Spec> {
        let name = raw.name.ok_or_else(|| {
            self.top("missing required key 'name' (for example name = \"bay-yield\")")
        })?;
        let ok = !name.get_ref().is_empty()
            && name
                .get_ref()
                .chars()
                .all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '-')
            && !name.get_ref().starts_with('-');
        if !ok {
            return Err(self.err(&name, format!("name '{}' must use lowercase letters, digits and dashes only, and not start with a dash", name.get_ref())));
        }
        let task = match raw.task.as_ref().map(|t| t.get_ref().as_str()) {
            None => {
                return Err(self.top(
                    "missing required key 'task' (task = \"regression\" or \"classification\")",
                ));
            }
            Some("regression") => Task::Regression,
            Some("classification") => Task::Classification,
            Some(other) => {
                let t = raw.task.as_ref().unwrap_or_else(|| unreachable!());
                return Err(self.err(
                    t,
                    format!(
                        "unknown task '{other}'; use \"regression\" or \"classification\"{}",
                        did_you_mean(other, ["regression", "classification"])
                    ),
                ));
            }
        };
        let data_raw = raw
            .data
            .ok_or_else(|| self.top("missing [data] table (with at least path and target)"))?;
        let data = self.data(&data_raw, base, task)?;
        let split =
            match &raw.split {
                Some(s) => self.split(s)?,
                None => return Err(self.top(
                    "missing [split] table (for example method = \"random\", seed = 1, test = 0.2)",
                )),
            };
        let select = self.select(raw.select.as_ref(), task)?;
        let guard = self.guard(raw.guard.as_ref(), select.metric)?;
        if raw.model.is_empty() {
            return Err(self.top("no [[model]] table: add at least one, for example [[model]] kind = \"ridge\" lambda = [0.1, 1, 10]"));
        }
        let mut models: Vec<ModelSpec> = Vec::new();
        let mut seen: std::collections::BTreeMap<RepeatKey, usize> = Default::default();
        // Candidates counted before any grid is expanded: a few long lists multiply.
        let mut candidates: u64 = 0;
        for m in &raw.model {
            let ms = self.model(m, &data.path)?;
            candidates = candidates.saturating_add(ms.count());
            if candidates > select.max_candidates {
                return Err(self.err(
                    m,
                    format!(
                        "with this [[model]] the grid holds more than {} candidates ({} here alone), over [select] max_candidates = {}; narrow its lists and ranges, or raise max_candidates (each candidate is fitted on every fold and stored)",
                        select.max_candidates,
                        ms.count(),
                        select.max_candidates
                    ),
                ));
            }
            if !ms.family.serves(task) {
                let serves: Vec<&str> = Family::ALL
                    .iter()
                    .filter(|f| f.serves(task))
                    .map(|f| f.name())
                    .collect();
                return Err(self.err(
                    m,
                    format!(
                        "{} does not serve a {} task; use one of {}",
                        ms.family.name(),
                        task.name(),
                        serves.join(", ")
                    ),
                ));
            }
            // Looked up by key, not by scanning the earlier entries: a spec of many tables
            // stays linear.
            if let Some(line) = seen.insert(ms.repeat_key(), ms.loc.line) {
                return Err(self.err(
                    m,
                    format!(
                        "this [[model]] repeats the {} entry at line {line}; remove one",
                        ms.family.name(),
                    ),
                ));
            }
            models.push(ms);
        }
        if select.nested && split.validation > 0.0 {
            let s = raw
                .select
                .as_ref()
                .and_then(|s| s.get_ref().nested.as_ref());
            let msg = "nested = true wraps cross-validation in an outer cross-validation; set [split] validation = 0";
            return Err(match s {
                Some(s) => self.err(s, msg),
                None => self.top(msg),
            });
        }
        // (A column split with validation rows is caught once the data is read.)
        if select.rule == Rule::OneSe && split.validation > 0.0 {
            let s = raw.select.as_ref().and_then(|s| s.get_ref().rule.as_ref());
            let msg = "rule = \"one-se\" needs the standard error across cross-validation folds; set [split] validation = 0 or use rule = \"min\"";
            return Err(match s {
                Some(s) => self.err(s, msg),
                None => self.top(msg),
            });
        }
        Ok(Spec {
            name: name.into_inner(),
            task,
            description: raw.description,
            data,
            split,
            select,
            guard,
            models,
            file: self.file.to_path_buf(),
            text: self.text.to_string(),
        })
    }

    fn data(&self, d: &Spanned<RawData>, base: &Path, task: Task) -> Result<DataSpec> {
        let r = d.get_ref();
        let path = r.path.as_ref().ok_or_else(|| {
            self.err(
                d,
                "[data] needs path = \"...\" (relative to this spec file)",
            )
        })?;
        if path.get_ref().trim().is_empty() {
            return Err(self.err(path, "data path is empty"));
        }
        let target = r
            .target
            .as_ref()
            .ok_or_else(|| self.err(d, "[data] needs target = \"<column to predict>\""))?;
        let missing = match r.missing.as_ref() {
            None => Missing::Error,
            Some(m) => match m.get_ref().as_str() {
                "error" => Missing::Error,
                "drop-rows" => Missing::DropRows,
                "mean" => Missing::Mean,
                other => {
                    return Err(self.err(m, format!("missing = '{other}' is not one of \"error\", \"drop-rows\", \"mean\"{}", did_you_mean(other, ["error", "drop-rows", "mean"]))));
                }
            },
        };
        let sha256 = match &r.sha256 {
            None => None,
            Some(s) => {
                let h = s.get_ref().to_ascii_lowercase();
                if h.len() != 64 || !h.chars().all(|c| c.is_ascii_hexdigit()) {
                    return Err(self.err(
                        s,
                        "sha256 must be 64 hexadecimal characters (as `probity check` prints)",
                    ));
                }
                Some((h, self.loc(s)))
            }
        };
        let features = match &r.features {
            None => None,
            Some(v) => {
                if v.is_empty() {
                    return Err(self.err(
                        d,
                        "features = [] selects no column; remove the key to use every column",
                    ));
                }
                Some(self.names(&r.features, "features")?)
            }
        };
        let target = self.named(target)?;
        if let Some(f) = features
            .as_ref()
            .and_then(|f| f.iter().find(|f| f.name == target.name))
        {
            return Err(Error::spec(
                self.file,
                Some(f.loc),
                format!("the target '{}' cannot also be a feature", f.name),
            ));
        }
        Ok(DataSpec {
            path: base.join(path.get_ref()),
            path_text: path.get_ref().clone(),
            path_loc: self.loc(path),
            target,
            features,
            ignore: self.names(&r.ignore, "ignore")?,
            key: r.key.as_ref().map(|k| self.named(k)).transpose()?,
            categorical: self.names(&r.categorical, "categorical")?,
            sha256,
            missing,
            positive: match (&r.positive, task) {
                (None, _) => None,
                (Some(p), Task::Classification) => Some((p.get_ref().clone(), self.loc(p))),
                (Some(p), Task::Regression) => return Err(self.err(p, "'positive' names the positive class of a classification task; remove it for regression")),
            },
        })
    }

    fn fraction(&self, v: &Option<Spanned<f64>>, key: &str) -> Result<f64> {
        match v {
            None => Ok(0.0),
            Some(s) => {
                let x = *s.get_ref();
                if !(0.0..1.0).contains(&x) {
                    return Err(self.err(s, format!("{key} = {x} must be a fraction in [0, 1)")));
                }
                Ok(x)
            }
        }
    }

    fn split(&self, s: &Spanned<RawSplit>) -> Result<SplitSpec> {
        let r = s.get_ref();
        let need = |v: &Option<Spanned<String>>, key: &str, method: &str| -> Result<Named> {
            match v {
                Some(c) => self.named(c),
                None => Err(self.err(
                    s,
                    format!("method = \"{method}\" needs {key} = \"<column>\" in [split]"),
                )),
            }
        };
        let method_name = r
            .method
            .as_ref()
            .map(|m| m.get_ref().as_str())
            .unwrap_or("random");
        let method = match method_name {
            "random" => SplitMethod::Random,
            "stratified" => {
                let bins = match &r.bins {
                    None => 5,
                    Some(b) if *b.get_ref() >= 2 && *b.get_ref() <= 1000 => *b.get_ref() as usize,
                    Some(b) => return Err(self.err(b, "bins must be an integer from 2 to 1000")),
                };
                let group = match &r.group {
                    Some(g) => Some(self.named(g)?),
                    None => None,
                };
                SplitMethod::Stratified { bins, group }
            }
            "group" => SplitMethod::Group {
                column: need(&r.group, "group", "group")?,
            },
            "time" => SplitMethod::Time {
                order: need(&r.order, "order", "time")?,
            },
            "hash" => SplitMethod::Hash,
            "column" => SplitMethod::Column {
                column: need(&r.column, "column", "column")?,
            },
            other => {
                let m = r.method.as_ref().unwrap_or_else(|| unreachable!());
                let all = ["random", "stratified", "group", "time", "hash", "column"];
                return Err(self.err(
                    m,
                    format!(
                        "unknown split method '{other}'{}; use one of {}",
                        did_you_mean(other, all),
                        all.join(", ")
                    ),
                ));
            }
        };
        // Keys that only one method reads are errors elsewhere: a silently ignored key misleads.
        let stray: [(&Option<Spanned<String>>, &str, &str); 3] = [
            (
                &r.group,
                "group",
                if method_name == "stratified" {
                    "stratified"
                } else {
                    "group"
                },
            ),
            (&r.order, "order", "time"),
            (&r.column, "column", "column"),
        ];
        for (v, key, m) in stray {
            if let Some(v) = v
                && method_name != m
            {
                return Err(self.err(
                    v,
                    format!(
                        "'{key}' is only read by method = \"{m}\"; remove it or change the method"
                    ),
                ));
            }
        }
        if let Some(b) = &r.bins
            && method_name != "stratified"
        {
            return Err(self.err(b, "'bins' is only read by method = \"stratified\""));
        }
        let seeded = !matches!(
            method,
            SplitMethod::Time { .. } | SplitMethod::Column { .. }
        );
        let seed = match &r.seed {
            Some(v) if *v.get_ref() < 0 => return Err(self.err(v, "seed must be a non-negative integer")),
            Some(v) => *v.get_ref() as u64,
            None if seeded => return Err(self.err(s, format!("method = \"{method_name}\" draws at random: add seed = <integer> to [split] so the run can be repeated"))),
            None => 0,
        };
        let test = self.fraction(&r.test, "test")?;
        let validation = self.fraction(&r.validation, "validation")?;
        if test + validation >= 1.0 {
            let at = r
                .validation
                .as_ref()
                .or(r.test.as_ref())
                .unwrap_or_else(|| unreachable!());
            return Err(self.err(
                at,
                format!(
                    "test + validation = {} leaves no training rows; keep the sum below 1",
                    test + validation
                ),
            ));
        }
        if matches!(method, SplitMethod::Column { .. }) {
            for (v, key) in [(&r.test, "test"), (&r.validation, "validation")] {
                if let Some(v) = v {
                    return Err(self.err(v, format!("'{key}' is not read by method = \"column\": the column says which rows are test and validation")));
                }
            }
        }
        let folds = match &r.folds {
            None => crate::split::Folds::K(5),
            Some(f) => match f.get_ref() {
                toml::Value::Integer(k) if *k >= 2 => crate::split::Folds::K(*k as usize),
                toml::Value::String(s) if s == "loo" => crate::split::Folds::LeaveOneOut,
                _ => {
                    return Err(self.err(
                        f,
                        "folds must be an integer of at least 2, or \"loo\" for leave-one-out",
                    ));
                }
            },
        };
        let repeats = match &r.repeats {
            None => 1,
            Some(v) if *v.get_ref() >= 1 && *v.get_ref() <= 1000 => *v.get_ref() as usize,
            Some(v) => return Err(self.err(v, "repeats must be an integer from 1 to 1000")),
        };
        if repeats > 1 {
            let v = r.repeats.as_ref().unwrap_or_else(|| unreachable!());
            if matches!(method, SplitMethod::Time { .. }) {
                return Err(self.err(v, "forward-chaining folds of method = \"time\" are the same every repeat; set repeats = 1"));
            }
            if folds == crate::split::Folds::LeaveOneOut {
                return Err(self.err(
                    v,
                    "leave-one-out folds are the same every repeat; set repeats = 1",
                ));
            }
            if validation > 0.0 {
                return Err(self.err(v, "repeats applies to k-fold cross-validation; with a validation fraction set repeats = 1"));
            }
        }
        if folds == crate::split::Folds::LeaveOneOut && matches!(method, SplitMethod::Time { .. }) {
            let f = r.folds.as_ref().unwrap_or_else(|| unreachable!());
            return Err(self.err(
                f,
                "method = \"time\" chains folds forward; give folds as an integer",
            ));
        }
        Ok(SplitSpec {
            method,
            seed,
            test,
            validation,
            folds,
            repeats,
            loc: self.loc(s),
        })
    }

    fn select(&self, s: Option<&Spanned<RawSelect>>, task: Task) -> Result<SelectSpec> {
        let r = s.map(|s| s.get_ref());
        let allowed: Vec<&str> = crate::metrics::Metric::for_task(task == Task::Classification)
            .iter()
            .map(|m| m.name())
            .collect();
        let metric = match r.and_then(|r| r.metric.as_ref()) {
            None if task == Task::Classification => crate::metrics::Metric::LogLoss,
            None => crate::metrics::Metric::Rmse,
            Some(m) => match crate::metrics::Metric::parse(m.get_ref())
                .filter(|x| allowed.contains(&x.name()))
            {
                Some(x) => x,
                None => {
                    return Err(self.err(
                        m,
                        format!(
                            "metric '{}' is not a {} metric{}; use one of {}",
                            m.get_ref(),
                            task.name(),
                            did_you_mean(m.get_ref(), allowed.iter().copied()),
                            allowed.join(", ")
                        ),
                    ));
                }
            },
        };
        let rule = match r.and_then(|r| r.rule.as_ref()) {
            None => Rule::Min,
            Some(v) => match v.get_ref().as_str() {
                "min" => Rule::Min,
                "one-se" => Rule::OneSe,
                other => {
                    return Err(self.err(
                        v,
                        format!(
                            "unknown rule '{other}'; use \"min\" or \"one-se\"{}",
                            did_you_mean(other, ["min", "one-se"])
                        ),
                    ));
                }
            },
        };
        let nested = r
            .and_then(|r| r.nested.as_ref())
            .is_some_and(|n| *n.get_ref());
        let max_candidates = match r.and_then(|r| r.max_candidates.as_ref()) {
            None => MAX_CANDIDATES,
            Some(m) if *m.get_ref() >= 1 => *m.get_ref() as u64,
            Some(m) => {
                return Err(self.err(m, "max_candidates must be an integer >= 1"));
            }
        };
        Ok(SelectSpec {
            metric,
            rule,
            nested,
            max_candidates,
        })
    }

    fn guard(
        &self,
        g: Option<&Spanned<RawGuard>>,
        metric: crate::metrics::Metric,
    ) -> Result<GuardSpec> {
        let Some(g) = g else {
            return Ok(GuardSpec {
                reveals: 1,
                confidence: 0.95,
                mode: GuardMode::Count,
                overlap: Overlap::Count,
            });
        };
        let r = g.get_ref();
        let reveals = match &r.reveals {
            None => 1,
            Some(v) if (1..=1_000_000).contains(v.get_ref()) => *v.get_ref() as u32,
            Some(v) => return Err(self.err(
                v,
                "reveals must be an integer of at least 1 (a test set is meant to be used once)",
            )),
        };
        let confidence = match &r.confidence {
            None => 0.95,
            Some(v) if *v.get_ref() > 0.0 && *v.get_ref() < 1.0 => *v.get_ref(),
            Some(v) => {
                return Err(self.err(v, "confidence must be between 0 and 1, for example 0.95"));
            }
        };
        let positive = |v: &Option<Spanned<f64>>, key: &str, default: Option<f64>| -> Result<f64> {
            match v {
                Some(x) if *x.get_ref() > 0.0 && x.get_ref().is_finite() => Ok(*x.get_ref()),
                Some(x) => Err(self.err(x, format!("{key} must be a positive number"))),
                None => default.ok_or_else(|| self.err(g, format!("mode = \"ladder\" needs {key} = <the smallest improvement worth reporting, in {} units>", metric.name()))),
            }
        };
        let mode_name = r
            .mode
            .as_ref()
            .map(|m| m.get_ref().as_str())
            .unwrap_or("count");
        let mode = match mode_name {
            "count" => GuardMode::Count,
            "reusable" => {
                // Thresholdout's guarantee is for statistics that are means of per-row values in [0, 1].
                if !metric.bounded_unit() {
                    let at = r.mode.as_ref().unwrap_or_else(|| unreachable!());
                    return Err(self.err(at, format!(
                        "mode = \"reusable\" (Thresholdout) needs a metric bounded in [0, 1], such as accuracy or brier; {} is unbounded. Use mode = \"count\" or \"ladder\"",
                        metric.name()
                    )));
                }
                GuardMode::Reusable {
                    threshold: positive(&r.threshold, "threshold", Some(0.04))?,
                    noise: positive(&r.noise, "noise", Some(0.01))?,
                }
            }
            "ladder" => GuardMode::Ladder {
                step: positive(&r.step, "step", None)?,
            },
            other => {
                let at = r.mode.as_ref().unwrap_or_else(|| unreachable!());
                return Err(self.err(
                    at,
                    format!(
                        "unknown guard mode '{other}'{}; use \"count\", \"reusable\" or \"ladder\"",
                        did_you_mean(other, ["count", "reusable", "ladder"])
                    ),
                ));
            }
        };
        for (v, key, m) in [
            (&r.threshold, "threshold", "reusable"),
            (&r.noise, "noise", "reusable"),
            (&r.step, "step", "ladder"),
        ] {
            if let Some(v) = v
                && mode_name != m
            {
                return Err(self.err(v, format!("'{key}' is only read by mode = \"{m}\"")));
            }
        }
        let overlap = match r.overlap.as_ref().map(|o| (o, o.get_ref().as_str())) {
            None | Some((_, "count")) => Overlap::Count,
            Some((_, "refuse")) => Overlap::Refuse,
            Some((at, other)) => {
                return Err(self.err(
                    at,
                    format!(
                        "unknown overlap rule '{other}'{}; use \"count\" (a later run on these test rows is stored, warned and counted) or \"refuse\" (it is refused)",
                        did_you_mean(other, ["count", "refuse"])
                    ),
                ));
            }
        };
        Ok(GuardSpec {
            reveals,
            confidence,
            mode,
            overlap,
        })
    }

    fn model(&self, m: &Spanned<RawModel>, data: &Path) -> Result<ModelSpec> {
        let r = m.get_ref();
        let kind = r.kind.as_ref().ok_or_else(|| {
            self.err(
                m,
                "[[model]] needs kind = \"...\" (mean, ols, ridge, lasso, poly, knn, logistic)",
            )
        })?;
        let family = Family::ALL
            .iter()
            .copied()
            .find(|f| f.name() == kind.get_ref())
            .ok_or_else(|| {
                let names: Vec<&str> = Family::ALL.iter().map(|f| f.name()).collect();
                self.err(
                    kind,
                    format!(
                        "unknown model kind '{}'{}; built-in kinds: {}",
                        kind.get_ref(),
                        did_you_mean(kind.get_ref(), names.iter().copied()),
                        names.join(", ")
                    ),
                )
            })?;
        if family == Family::Command {
            return self.command_model(m, data);
        }
        for (present, key) in [
            (r.run.is_some(), "run"),
            (r.params.is_some(), "params"),
            (r.inputs.is_some(), "inputs"),
            (r.timeout.is_some(), "timeout"),
            (r.sandbox.is_some(), "sandbox"),
        ] {
            if present {
                return Err(self.err(
                    m,
                    format!(
                        "'{key}' belongs to kind = \"command\"; {} does not read it",
                        family.name()
                    ),
                ));
            }
        }
        let given: [(&str, &Option<Spanned<toml::Value>>); 4] = [
            ("degree", &r.degree),
            ("feature", &r.feature),
            ("k", &r.k),
            ("lambda", &r.lambda),
        ];
        // Keys the family does not take are reported before keys it lacks: a misplaced key is
        // the likelier mistake.
        for (name, v) in given {
            if let (Some(v), false) = (v, family.params().contains(&name)) {
                let list = if family.params().is_empty() {
                    "no parameters".to_string()
                } else {
                    family.params().join(", ")
                };
                return Err(self.err(
                    v,
                    format!(
                        "'{name}' is not a parameter of {}; it takes {list}",
                        family.name()
                    ),
                ));
            }
        }
        let mut grid = Vec::new();
        for (name, v) in given {
            match v {
                Some(v) => grid.push((name.to_string(), self.values(family, name, v)?)),
                None if family.params().contains(&name) => {
                    return Err(self.err(
                        m,
                        format!(
                            "{} needs '{name}' (a value, a list, or {{ from, to, steps, scale }})",
                            family.name()
                        ),
                    ));
                }
                None => {}
            }
        }
        if let Some(s) = &r.standardize
            && !family.standardizes()
        {
            return Err(self.err(s, format!("'standardize' does not apply to {}; its predictions do not depend on feature scale", family.name())));
        }
        Ok(ModelSpec {
            family,
            standardize: r.standardize.as_ref().is_none_or(|s| *s.get_ref()),
            grid,
            loc: self.loc(m),
            command: None,
        })
    }

    /// `kind = "command"`: run (argv), params (name -> list), inputs, timeout.
    fn command_model(&self, m: &Spanned<RawModel>, data: &Path) -> Result<ModelSpec> {
        let r = m.get_ref();
        for (v, key) in [
            (&r.lambda, "lambda"),
            (&r.k, "k"),
            (&r.degree, "degree"),
            (&r.feature, "feature"),
        ] {
            if let Some(v) = v {
                return Err(self.err(v, format!("'{key}' is not a key of kind = \"command\"; put the command's parameters in params = {{ {key} = [...] }}")));
            }
        }
        if let Some(s) = &r.standardize {
            return Err(self.err(s, "'standardize' does not apply to a command; the command sees the data as it is in the file"));
        }
        let run = r.run.as_ref().ok_or_else(|| self.err(m, "kind = \"command\" needs run = [\"program\", \"arg\", ...] (an argv list, run without a shell)"))?;
        if run.get_ref().is_empty() || run.get_ref()[0].trim().is_empty() {
            return Err(self.err(
                run,
                "run must name a program: run = [\"python3\", \"models/forest.py\"]",
            ));
        }
        // The command's working folder: the spec's folder, made absolute ("" means here).
        let base = match self.file.parent() {
            Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
            _ => PathBuf::from("."),
        };
        let base = std::fs::canonicalize(&base).unwrap_or(base);
        let mut grid = Vec::new();
        if let Some(p) = &r.params {
            for (name, v) in p.get_ref() {
                let list = match v {
                    toml::Value::Array(a) => a.clone(),
                    other => vec![other.clone()],
                };
                if list.is_empty() {
                    return Err(self.err(
                        p,
                        format!("params.{name} has no values; the grid would be empty"),
                    ));
                }
                let mut vals = Vec::new();
                // Repeats found by key, not by scanning: a long list stays linear.
                let mut seen = std::collections::BTreeSet::new();
                for it in list {
                    let pv = match it {
                        toml::Value::Integer(i) if i >= 0 => ParamValue::Int(i as u64),
                        toml::Value::Integer(i) => ParamValue::Float(i as f64),
                        toml::Value::Float(x) if x.is_finite() => ParamValue::Float(x),
                        toml::Value::String(s) => ParamValue::Text(s),
                        toml::Value::Boolean(b) => ParamValue::Bool(b),
                        other => {
                            return Err(self.err(
                                p,
                                format!(
                                    "params.{name}: {other} is not a number, string or boolean"
                                ),
                            ));
                        }
                    };
                    if !seen.insert(pv.key()) {
                        return Err(self.err(p, format!("params.{name} lists {pv} twice")));
                    }
                    vals.push(pv);
                }
                grid.push((name.clone(), vals));
            }
        }
        let sandbox = r.sandbox.as_ref().is_none_or(|s| *s.get_ref());
        let data_real = std::fs::canonicalize(data).unwrap_or_else(|_| data.to_path_buf());
        let inputs = r
            .inputs
            .iter()
            .flatten()
            .map(|i| {
                let path = base.join(i.get_ref());
                if !path.is_file() && !path.is_dir() {
                    return Err(self.err(i, format!("input {} does not exist (inputs are files or folders, relative to the spec file's folder)", path.display())));
                }
                // The box lets the command read its inputs: never the data file, which holds
                // the sealed rows' targets.
                let real = std::fs::canonicalize(&path).unwrap_or_else(|_| path.clone());
                if data_real.starts_with(&real) {
                    return Err(self.err(i, format!("input {} {} the data file, which holds the sealed test rows; a command sees the fitting rows only through PROBITY_FIT. List the command's own files instead", path.display(), if real == data_real { "is" } else { "holds" })));
                }
                if let Some(why) = input_problem(&real, &data_real) {
                    return Err(self.err(i, format!("input {}: {why}", path.display())));
                }
                Ok((i.get_ref().clone(), path))
            })
            .collect::<Result<Vec<_>>>()?;
        // The boxed command runs in a scratch folder: a program named by a relative path is found
        // through `inputs`, which the box lets it read.
        // So is a file of the spec's folder named in the argv (relative or absolute):
        // undeclared, the box would hide it.
        if sandbox {
            for (i, arg) in run.get_ref().iter().enumerate() {
                let relative = !arg.is_empty() && !Path::new(arg).is_absolute();
                let path_like = i == 0 && arg.contains('/');
                let inside = !arg.is_empty()
                    && std::fs::canonicalize(base.join(arg))
                        .is_ok_and(|p| p.is_file() && p.starts_with(&base));
                if ((relative && path_like) || inside) && !inputs.iter().any(|(t, _)| t == arg) {
                    return Err(self.err(run, format!("{arg:?} names a file of the spec's folder, which the command's box does not show: list it in inputs = [\"{arg}\"] (the command runs in a scratch folder, and reads its inputs by absolute path)")));
                }
            }
        }
        let timeout = match &r.timeout {
            None => 600,
            Some(t) if *t.get_ref() >= 1 => *t.get_ref() as u64,
            Some(t) => {
                return Err(self.err(t, "timeout must be a whole number of seconds, at least 1"));
            }
        };
        Ok(ModelSpec {
            family: Family::Command,
            standardize: false,
            grid,
            loc: self.loc(m),
            command: Some(CommandSpec {
                run: run.get_ref().clone(),
                workdir: base,
                inputs,
                timeout,
                sandbox,
            }),
        })
    }

    /// A parameter's values: one value, a list, or a `{ from, to, steps, scale }` range.
    fn values(
        &self,
        family: Family,
        name: &str,
        v: &Spanned<toml::Value>,
    ) -> Result<Vec<ParamValue>> {
        let items: Vec<toml::Value> = match v.get_ref() {
            toml::Value::Array(a) => a.clone(),
            toml::Value::Table(t) => self.range(name, v, t)?,
            other => vec![other.clone()],
        };
        if items.is_empty() {
            return Err(self.err(
                v,
                format!("'{name}' has no values; the grid would be empty"),
            ));
        }
        let mut out: Vec<ParamValue> = Vec::new();
        let mut seen = std::collections::BTreeSet::new();
        for it in &items {
            let pv = match (name, it) {
                ("lambda", toml::Value::Float(x)) if x.is_finite() && *x >= 0.0 => {
                    ParamValue::Float(*x)
                }
                ("lambda", toml::Value::Integer(i)) if *i >= 0 => ParamValue::Float(*i as f64),
                ("lambda", _) => {
                    return Err(self.err(
                        v,
                        format!(
                            "{} lambda values must be finite numbers >= 0; got {it}",
                            family.name()
                        ),
                    ));
                }
                ("k", toml::Value::Integer(i)) if *i >= 1 => ParamValue::Int(*i as u64),
                ("k", toml::Value::Float(x)) if x.fract() == 0.0 && *x >= 1.0 => {
                    ParamValue::Int(*x as u64)
                }
                ("k", _) => {
                    return Err(self.err(v, format!("k values must be integers >= 1; got {it}")));
                }
                ("degree", toml::Value::Integer(i)) if (1..=20).contains(i) => {
                    ParamValue::Int(*i as u64)
                }
                ("degree", toml::Value::Float(x))
                    if x.fract() == 0.0 && (1.0..=20.0).contains(x) =>
                {
                    ParamValue::Int(*x as u64)
                }
                ("degree", _) => {
                    return Err(self.err(
                        v,
                        format!("degree values must be integers from 1 to 20; got {it}"),
                    ));
                }
                ("feature", toml::Value::String(s)) if !s.is_empty() => ParamValue::Text(s.clone()),
                ("feature", _) => {
                    return Err(
                        self.err(v, format!("feature values must be column names; got {it}"))
                    );
                }
                _ => {
                    return Err(Error::Internal(format!(
                        "no value rule for parameter {name}"
                    )));
                }
            };
            // A set of keys, not a scan of the list: generated ranges hold thousands of values.
            if !seen.insert(pv.key()) {
                return Err(self.err(
                    v,
                    format!("'{name}' lists {pv} twice; each grid value must be distinct"),
                ));
            }
            out.push(pv);
        }
        Ok(out)
    }

    fn range(
        &self,
        name: &str,
        v: &Spanned<toml::Value>,
        t: &toml::Table,
    ) -> Result<Vec<toml::Value>> {
        for k in t.keys() {
            if !["from", "to", "steps", "scale"].contains(&k.as_str()) {
                return Err(self.err(v, format!("unknown key '{k}' in the range for '{name}'{}; a range has from, to, steps, scale", did_you_mean(k, ["from", "to", "steps", "scale"]))));
            }
        }
        let num = |k: &str| -> Result<f64> {
            match t.get(k) {
                Some(toml::Value::Float(x)) => Ok(*x),
                Some(toml::Value::Integer(i)) => Ok(*i as f64),
                _ => Err(self.err(v, format!("the range for '{name}' needs a number '{k}'"))),
            }
        };
        let (from, to) = (num("from")?, num("to")?);
        let steps = match t.get("steps") {
            Some(toml::Value::Integer(s)) if (1..=10_000).contains(s) => *s as usize,
            _ => {
                return Err(self.err(
                    v,
                    format!("the range for '{name}' needs steps = an integer from 1 to 10000"),
                ));
            }
        };
        let log = match t.get("scale") {
            None => false,
            Some(toml::Value::String(s)) if s == "linear" => false,
            Some(toml::Value::String(s)) if s == "log" => true,
            _ => return Err(self.err(v, "scale must be \"log\" or \"linear\"")),
        };
        if log && (from <= 0.0 || to <= 0.0) {
            return Err(self.err(v, "a log-scale range needs from > 0 and to > 0"));
        }
        if steps == 1 && from != to {
            return Err(self.err(v, "steps = 1 needs from = to"));
        }
        let integer = name != "lambda";
        let mut out: Vec<toml::Value> = Vec::new();
        for i in 0..steps {
            let x = if i == 0 {
                from
            } else if i + 1 == steps {
                to
            } else {
                let f = i as f64 / (steps - 1) as f64;
                let x = if log {
                    10f64.powf(from.log10() + f * (to.log10() - from.log10()))
                } else {
                    from + f * (to - from)
                };
                // 15 significant digits drop the last-bit noise of pow and interpolation, so a
                // decade grid reads 0.01, 0.1, 1 and the stored values are what the user sees.
                format!("{x:.14e}").parse::<f64>().unwrap_or(x)
            };
            if integer {
                let r = toml::Value::Integer(x.round() as i64);
                // Rounding can merge neighbouring values on a narrow integer range.
                if !out.contains(&r) {
                    out.push(r);
                }
            } else {
                out.push(toml::Value::Float(x));
            }
        }
        Ok(out)
    }
}

impl Spec {
    /// The spec's meaning as canonical JSON (defaults filled in, keys sorted, description
    /// left out): two specs that run the same experiment have the same text here.
    pub fn canonical(&self) -> String {
        let names = |v: &[Named]| v.iter().map(|n| n.name.clone()).collect::<Vec<_>>();
        let d = &self.data;
        let s = &self.split;
        let mut split = json!({
            "method": s.method.name(),
            "seed": s.seed,
            "test": s.test,
            "validation": s.validation,
            "folds": match s.folds { crate::split::Folds::K(k) => json!(k), crate::split::Folds::LeaveOneOut => json!("loo") },
            "repeats": s.repeats,
        });
        match &s.method {
            SplitMethod::Stratified { bins, group } => {
                split["bins"] = json!(bins);
                if let Some(g) = group {
                    split["column"] = json!(g.name);
                }
            }
            SplitMethod::Group { column } | SplitMethod::Column { column } => {
                split["column"] = json!(column.name)
            }
            SplitMethod::Time { order } => split["order"] = json!(order.name),
            SplitMethod::Random | SplitMethod::Hash => {}
        }
        let models: Vec<Value> = self
            .models
            .iter()
            .map(|m| {
                let grid: serde_json::Map<String, Value> = m
                    .grid
                    .iter()
                    .map(|(k, v)| {
                        (
                            k.clone(),
                            Value::Array(v.iter().map(ParamValue::to_json).collect()),
                        )
                    })
                    .collect();
                {
                    let mut v = json!({"kind": m.family.name(), "standardize": m.standardize, "params": grid});
                    if let Some(c) = &m.command {
                        v["run"] = json!(c.run);
                        v["inputs"] = json!(c.inputs.iter().map(|i| i.0.clone()).collect::<Vec<_>>());
                        v["timeout"] = json!(c.timeout);
                        // Only written when off, so the hash of every boxed spec is unchanged.
                        if !c.sandbox {
                            v["sandbox"] = json!(false);
                        }
                    }
                    v
                }
            })
            .collect();
        let v = json!({
            "format": 1,
            "name": self.name,
            "task": self.task.name(),
            "data": {
                "path": d.path_text,
                "target": d.target.name,
                "features": d.features.as_ref().map(|f| names(f)),
                "ignore": names(&d.ignore),
                "key": d.key.as_ref().map(|k| k.name.clone()),
                "categorical": names(&d.categorical),
                "sha256": d.sha256.as_ref().map(|s| s.0.clone()),
                "missing": d.missing.as_str(),
                "positive": d.positive.as_ref().map(|p| p.0.clone()),
            },
            "split": split,
            "select": {"metric": self.select.metric.name(), "rule": match self.select.rule { Rule::Min => "min", Rule::OneSe => "one-se" }, "nested": self.select.nested},
            "guard": self.guard_canonical(),
            "models": models,
        });
        v.to_string()
    }

    fn guard_canonical(&self) -> Value {
        self.guard.to_json()
    }

    /// SHA-256 of the canonical JSON, hex.
    pub fn canonical_hash(&self) -> String {
        hex(&Sha256::digest(self.canonical().as_bytes()))
    }

    /// The canonical split settings alone, as they enter the partition identity.
    pub fn split_canonical(&self) -> String {
        let v: Value = serde_json::from_str(&self.canonical()).unwrap_or(Value::Null);
        let mut s = v["split"].clone();
        s["key"] = v["data"]["key"].clone();
        s["missing"] = v["data"]["missing"].clone();
        s.to_string()
    }
}

/// Why an input (canonical path) cannot be granted to a command's box, if it cannot: a system
/// tree of the kernel's (`/proc`, `/sys`, `/dev`: endless files, devices, other processes), a
/// pipe, device or socket (a read would block or never end), or a file that is the data file
/// under another name (a hard link: the same file, whatever its path). Folders are walked
/// whole, without following links.
fn input_problem(input: &Path, data: &Path) -> Option<String> {
    if ["/proc", "/sys", "/dev"]
        .iter()
        .any(|k| input.starts_with(k))
    {
        return Some("a folder of the kernel's (/proc, /sys, /dev) cannot be an input".into());
    }
    let same_file = {
        #[cfg(unix)]
        {
            use std::os::unix::fs::MetadataExt;
            let d = std::fs::metadata(data).ok().map(|m| (m.dev(), m.ino()));
            move |m: &std::fs::Metadata| d == Some((m.dev(), m.ino()))
        }
        #[cfg(not(unix))]
        {
            let _ = data;
            |_: &std::fs::Metadata| false
        }
    };
    let mut stack = vec![input.to_path_buf()];
    while let Some(p) = stack.pop() {
        let Ok(meta) = std::fs::symlink_metadata(&p) else {
            continue;
        };
        let t = meta.file_type();
        if t.is_dir() {
            match std::fs::read_dir(&p) {
                Ok(rd) => stack.extend(rd.filter_map(|e| e.ok().map(|e| e.path()))),
                Err(e) => return Some(format!("cannot read {} ({e})", p.display())),
            }
        } else if t.is_file() {
            if same_file(&meta) {
                return Some(format!(
                    "{} is the data file under another name (a hard link); the data file holds the sealed test rows, so no input may reach it",
                    p.display()
                ));
            }
        } else if !t.is_symlink() {
            return Some(format!(
                "{} is {}, not a file or folder; inputs hold files only",
                p.display(),
                crate::files::not_regular(&p).unwrap_or("not a regular file")
            ));
        }
    }
    None
}

/// Lowercase hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

#[cfg(test)]
mod tests;

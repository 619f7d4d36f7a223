//! Text tables for the terminal.

use super::{num, params_text};
use crate::ledger::{RunDetail, RunSummary};
use comfy_table::{CellAlignment, Table, presets::UTF8_FULL_CONDENSED};

fn new_table(header: Vec<&str>) -> Table {
    let mut t = Table::new();
    t.load_style(UTF8_FULL_CONDENSED);
    t.set_header(header);
    t
}

fn right(t: &mut Table, from: usize) {
    let n = t.column_count();
    for i in from..n {
        if let Some(c) = t.column_mut(i) {
            c.set_cell_alignment(CellAlignment::Right);
        }
    }
}

/// Candidates ranked by validation score (best first; ties by id), the selected one marked.
/// `limit` keeps the table short after a run; `show --all` passes `None`.
pub fn leaderboard(d: &RunDetail, limit: Option<usize>) -> String {
    let metric = d.summary.metric.as_str();
    let parsed = crate::metrics::Metric::parse(metric);
    let rows = super::ranked(d);
    let se_label = if d.holdout { "" } else { "± se" };
    let mut header = vec!["", "id", "model", "params", "train", "validation"];
    if !d.holdout {
        header.push(se_label);
    }
    // The other metrics of the task, in their usual order (mse is rmse squared: left out).
    let others: Vec<&str> =
        crate::metrics::Metric::for_task(parsed.is_some_and(|m| m.is_classification()))
            .iter()
            .map(|m| m.name())
            .filter(|m| *m != metric && *m != "mse")
            .collect();
    let other_headers: Vec<String> = others.iter().map(|m| format!("val {m}")).collect();
    for h in &other_headers {
        header.push(h);
    }
    let mut t = new_table(header);
    let shown = limit.unwrap_or(rows.len()).min(rows.len());
    for c in &rows[..shown] {
        let mark = if c.failure.is_some() {
            "failed"
        } else if c.id == d.summary.selected {
            "*"
        } else if c.id == d.best {
            "best"
        } else {
            ""
        };
        let mut cells = vec![
            mark.to_string(),
            c.id.to_string(),
            c.family.clone(),
            params_text(&c.params),
            num(c.train.get(metric).and_then(|s| s.mean)),
            num(c.validation.get(metric).and_then(|s| s.mean)),
        ];
        if !d.holdout {
            cells.push(num(c.validation.get(metric).and_then(|s| s.se)));
        }
        for m in &others {
            cells.push(num(c.validation.get(*m).and_then(|s| s.mean)));
        }
        t.add_row(cells);
    }
    right(&mut t, 4);
    let mut out = format!("{}\n", t);
    let how = if d.holdout {
        "on the validation partition".to_string()
    } else {
        format!("mean over {} folds", d.folds.len())
    };
    out.push_str(&format!(
        "scores: {metric} ({how}); * selected by rule \"{}\"",
        d.rule
    ));
    if d.best != d.summary.selected {
        out.push_str("; best = best mean score");
    }
    out.push('\n');
    if shown < rows.len() {
        out.push_str(&format!(
            "... {} more candidates: probity show {} --all\n",
            rows.len() - shown,
            d.summary.id
        ));
    }
    out
}

/// The `history` table.
/// An RFC 3339 UTC time to the second, with a space for the T ("2026-12-02 08:12:55").
fn seconds(t: &str) -> String {
    t.chars().take(19).collect::<String>().replace('T', " ")
}

/// The keys a ledger trusts to sign bundles: (public key, name, added at, added by).
pub fn trusted_keys(keys: &[(String, String, String, String)]) -> String {
    if keys.is_empty() {
        return "no trusted keys: `probity key trust NAME KEY` adds one (a teammate's `probity key show`)\n".into();
    }
    let mut t = new_table(vec!["name", "public key", "added (UTC)", "by"]);
    for (k, n, at, by) in keys {
        t.add_row(vec![n.clone(), k.clone(), seconds(at), by.clone()]);
    }
    format!("{t}\n")
}

/// Runs that recorded a start but were never stored: still going, or killed. Empty when none.
pub fn unfinished(starts: &[crate::ledger::starts::Unfinished]) -> String {
    if starts.is_empty() {
        return String::new();
    }
    let mut t = new_table(vec![
        "start",
        "experiment",
        "started (UTC)",
        "state",
        "by",
        "pid",
        "data",
        "spec",
    ]);
    for u in starts {
        t.add_row(vec![
            u.id.to_string(),
            u.experiment.clone(),
            seconds(&u.started_at),
            u.state.name().to_string(),
            format!("{}@{}", u.user, u.host),
            u.pid.to_string(),
            u.data_sha256.chars().take(12).collect(),
            u.spec_path.clone(),
        ]);
    }
    format!(
        "runs started but not stored (running: still going; interrupted: the process ended before storing anything, so none of its results are in the ledger):\n{t}\n"
    )
}

pub fn history(runs: &[RunSummary]) -> String {
    let mut t = new_table(vec![
        "run",
        "experiment",
        "started (UTC)",
        "status",
        "data",
        "cands",
        "selected",
        "metric",
        "validation",
        "note",
    ]);
    for r in runs {
        t.add_row(vec![
            r.id.to_string(),
            r.experiment.clone(),
            seconds(&r.started_at),
            r.status.clone(),
            r.data_sha256.chars().take(12).collect(),
            r.candidates.to_string(),
            format!(
                "{} {} {}",
                r.selected,
                r.selected_family,
                params_text(&r.selected_params)
            )
            .trim_end()
            .to_string(),
            r.metric.clone(),
            num(r.selected_score),
            r.note.clone().unwrap_or_default(),
        ]);
    }
    format!("{t}\n")
}

/// The heading block of `run` and `show`.
pub fn run_header(d: &RunDetail) -> String {
    let s = &d.summary;
    let dev = d.n_train + d.n_validation;
    let mut out = format!(
        "run {}  experiment {}  ({} UTC, by {} on {})\n",
        s.id, s.experiment, s.started_at, d.user, d.host
    );
    out.push_str(&format!(
        "data       {}  sha256 {}\n",
        d.data_path, s.data_sha256
    ));
    out.push_str(&format!(
        "rows       {} in file, {} used: {} development ({} train, {} validation), {} test (sealed)\n",
        d.data_rows, d.rows_used, dev, d.n_train, d.n_validation, d.n_test
    ));
    let settings: serde_json::Value = serde_json::from_str(&d.split_settings).unwrap_or_default();
    let method = settings["method"].as_str().unwrap_or("?");
    let repeats = d.folds.iter().map(|f| f.repeat).max().map_or(1, |r| r + 1);
    let k = d.folds.len() as i64 / repeats.max(1);
    let scheme = if d.holdout {
        "fixed validation partition".to_string()
    } else if method == "time" {
        format!("{k} forward-chaining folds")
    } else if repeats > 1 {
        format!("{k}-fold cross-validation x {repeats} repeats")
    } else {
        format!("{k}-fold cross-validation")
    };
    let seed = if matches!(method, "time" | "column") {
        "not used".to_string()
    } else {
        d.seed.clone()
    };
    out.push_str(&format!(
        "partition  {}  split {method}, seed {seed}, {scheme}\n",
        s.partition_id
    ));
    if let Some(sel) = selection_optimism(d) {
        out.push_str(&format!(
            "selection  {} candidates in {} run(s) scored on this development partition so far; were they independent and equally good, the best CV {} would look better than the truth by about {} (its se x E[max of {} normals] = {}; correlated candidates make it less)\n",
            d.partition_candidates,
            d.partition_runs,
            s.metric,
            num(sel.1),
            d.partition_candidates,
            num(Some(sel.0))
        ));
    }
    if let Some(n) = &d.nested {
        out.push_str(&format!(
            "nested     {} of the whole selection procedure, {}-fold outer cross-validation: {} ± {} (beside the best CV score above)\n",
            n.metric,
            n.outer_folds,
            num(n.estimate),
            num(n.se)
        ));
    }
    out
}

/// The text shown for a reveal, from its JSON document.
pub fn reveal(doc: &serde_json::Value, family: &str, params: &str) -> String {
    let metric = doc["metric"].as_str().unwrap_or("");
    let mut out = format!(
        "reveal {}: run {} candidate {} ({family} {params}) on {} test rows of partition {}\n",
        doc["reveal"],
        doc["run"],
        doc["candidate"],
        doc["rows"],
        doc["partition"].as_str().unwrap_or("")
    );
    let mode = doc["mode"].as_str().unwrap_or("count");
    if mode == "count" {
        let conf = doc["confidence"].as_f64().unwrap_or(0.95) * 100.0;
        let mut t = new_table(vec![
            "metric",
            "test",
            &format!("{conf}% interval"),
            "development (CV)",
        ]);
        let names: Vec<&str> = doc["metrics"]
            .as_array()
            .map(|a| a.iter().filter_map(|m| m.as_str()).collect())
            .unwrap_or_default();
        for m in names {
            let iv = &doc["interval"][m];
            let iv_text = match (iv[0].as_f64(), iv[1].as_f64()) {
                (Some(lo), Some(hi)) => format!("[{}, {}]", num(Some(lo)), num(Some(hi))),
                _ => "-".into(),
            };
            let dev = if m == metric {
                num(doc["development"][m].as_f64())
            } else {
                String::new()
            };
            t.add_row(vec![
                m.to_string(),
                num(doc["test"][m].as_f64()),
                iv_text,
                dev,
            ]);
        }
        right(&mut t, 1);
        out.push_str(&format!("{t}\n"));
        out.push_str(&format!(
            "interval: {} bootstrap resamples, percentile method (Efron & Tibshirani 1993)\n",
            doc["resamples"]
        ));
    } else {
        let kind = doc["answer"]["kind"].as_str().unwrap_or("");
        let explain = match kind {
            "development" => {
                "the test score agrees with the development estimate within the noisy threshold, so the development estimate is returned and no budget is spent"
            }
            "test+noise" => {
                "the test score differs from the development estimate: the test score plus Laplace noise is returned and one unit of budget is spent"
            }
            "refused" => "the reusable holdout's budget is spent: no answer",
            "ladder-new" => "a new best by more than the step, rounded to the step",
            "ladder-previous" => {
                "not better than the best so far by more than the step: the previous best is repeated"
            }
            _ => "",
        };
        out.push_str(&format!(
            "{metric} ({mode} mode): {}  ({explain})\n",
            num(doc["answer"]["value"].as_f64())
        ));
    }
    let over = if doc["over_budget"].as_bool() == Some(true) {
        "  OVER BUDGET"
    } else {
        ""
    };
    let uses = doc["development_uses"].as_array().map_or(0, Vec::len);
    if uses == 0 {
        out.push_str(&format!(
            "reveals of this partition: {} of a budget of {}{over}\n",
            doc["reveals"], doc["budget"]
        ));
    } else {
        out.push_str(&format!(
            "consultations of this partition: {} of a budget of {} ({} reveal(s), {uses} development use(s)){over}\n",
            doc["consultations"], doc["budget"], doc["reveals"]
        ));
    }
    let o = &doc["optimism"];
    out.push_str(&format!(
        "optimism: {} distinct candidate(s) revealed on {} rows; the test {metric} may look better than the truth by about {} (estimate)\n",
        o["k"], o["n"], num(o["estimate"].as_f64())
    ));
    if let (Some(h), Some(s)) = (o["hoeffding_union"].as_f64(), o["adaptive_scale"].as_f64()) {
        out.push_str(&format!(
            "          Hoeffding-union width {}, adaptive-reuse scale sqrt(k/n) {}\n",
            num(Some(h)),
            num(Some(s))
        ));
    }
    out.push_str(&format!(
        "          assumes: {}\n",
        o["assumes"].as_str().unwrap_or("")
    ));
    out
}

/// (E[max of k normals], se x E[max]) for the best candidate of a run, k = candidates scored on
/// the partition so far; `None` without a standard error.
pub fn selection_optimism(d: &RunDetail) -> Option<(f64, Option<f64>)> {
    let best = d.candidates.iter().find(|c| c.id == d.best)?;
    let se = best.validation.get(&d.summary.metric).and_then(|s| s.se)?;
    let m = crate::guard::stats::expected_max_normal(d.partition_candidates.max(1) as usize);
    Some((m, Some(se * m)))
}

/// The `audit` table, from its JSON rows, and its warnings, each after a label saying what it
/// is about (`overlap`, `unverified merge`).
pub fn audit(rows: &[serde_json::Value], warnings: &[(&str, String)]) -> String {
    let mut t = new_table(vec![
        "partition",
        "experiment",
        "test rows",
        "reveals",
        "dev uses",
        "budget",
        "cands",
        "people",
        "last reveal",
        "mode",
        "optimism",
        "status",
    ]);
    for r in rows {
        let s = |k: &str| {
            r[k].as_str().map(str::to_string).unwrap_or_else(|| {
                if r[k].is_null() {
                    "-".into()
                } else {
                    r[k].to_string()
                }
            })
        };
        let people: Vec<&str> = r["people"]
            .as_array()
            .map(|a| a.iter().filter_map(|p| p.as_str()).collect())
            .unwrap_or_default();
        let opt = r["optimism"]["estimate"].as_f64();
        t.add_row(vec![
            s("id"),
            s("experiment"),
            s("test_rows"),
            s("reveals"),
            r["development_uses"]
                .as_array()
                .map_or(0, |u| u.len())
                .to_string(),
            s("budget"),
            s("candidates_revealed"),
            if people.is_empty() {
                "-".into()
            } else {
                people.join(", ")
            },
            r["last_reveal"]
                .as_str()
                .map(seconds)
                .unwrap_or_else(|| "-".into()),
            s("mode"),
            if opt.is_some() {
                format!(
                    "{} {}",
                    num(opt),
                    r["optimism"]["metric"].as_str().unwrap_or("")
                )
            } else {
                "-".into()
            },
            s("status"),
        ]);
    }
    right(&mut t, 2);
    let mut out = format!("{t}\n");
    if rows.is_empty() {
        out = "no partitions yet\n".into();
    }
    for r in rows {
        let uses: Vec<String> = r["development_uses"]
            .as_array()
            .map(|a| {
                a.iter()
                    .map(|u| format!("run {} ({} rows)", u["run"], u["rows"]))
                    .collect()
            })
            .unwrap_or_default();
        if !uses.is_empty() {
            out.push_str(&format!(
                "partition {}: used in development by {}\n",
                r["id"].as_str().unwrap_or(""),
                uses.join(", ")
            ));
        }
    }
    for (what, w) in warnings {
        out.push_str(&format!("{what}: {w}\n"));
    }
    out
}

/// The text shown for a replay, from its JSON document.
pub fn replay(doc: &serde_json::Value) -> String {
    let mut out = format!(
        "replay of run {} stored as run {}: {}\n",
        doc["replay_of"],
        doc["run"],
        if doc["identical"].as_bool() == Some(true) {
            "IDENTICAL, bit for bit"
        } else {
            "DIFFERS"
        }
    );
    let mut t = new_table(vec!["compared", "identical", "differing"]);
    t.add_row(vec![
        doc["compared"].to_string(),
        doc["identical_items"].to_string(),
        doc["differing"].to_string(),
    ]);
    right(&mut t, 0);
    out.push_str(&format!("{t}\n"));
    let s = &doc["stored"];
    let r = &doc["replayed"];
    out.push_str(&format!(
        "stored:   probity {} ({}, {}, {} threads)\nreplayed: probity {} ({}, {}, {} threads)\n",
        s["tool_version"].as_str().unwrap_or(""),
        s["tool_commit"].as_str().unwrap_or(""),
        s["target"].as_str().unwrap_or(""),
        s["threads"],
        r["tool_version"].as_str().unwrap_or(""),
        r["tool_commit"].as_str().unwrap_or(""),
        r["target"].as_str().unwrap_or(""),
        r["threads"]
    ));
    let diffs = doc["differences"].as_array().cloned().unwrap_or_default();
    if !diffs.is_empty() {
        let mut t = new_table(vec![
            "candidate",
            "repeat",
            "fold",
            "part",
            "what",
            "stored",
            "replayed",
        ]);
        for d in diffs.iter().take(10) {
            let s = |v: &serde_json::Value| {
                if v.is_null() {
                    "-".to_string()
                } else {
                    v.as_str()
                        .map(str::to_string)
                        .unwrap_or_else(|| v.to_string())
                }
            };
            t.add_row(vec![
                s(&d["candidate"]),
                s(&d["repeat"]),
                s(&d["fold"]),
                s(&d["part"]),
                s(&d["metric"]),
                s(&d["stored"]),
                s(&d["replayed"]),
            ]);
        }
        out.push_str(&format!("first differences (exact values):\n{t}\n"));
    }
    out
}

/// The chain verification summary.
pub fn chain(c: &serde_json::Value) -> String {
    let mut out = format!(
        "chain: {} entries, head {}: {}\n",
        c["entries"],
        c["head"].as_str().unwrap_or(""),
        if c["intact"].as_bool() == Some(true) {
            "intact"
        } else {
            "BROKEN"
        }
    );
    for b in c["breaks"].as_array().into_iter().flatten() {
        let at = match b["seq"].as_i64() {
            Some(s) => format!(
                "entry {s} ({} {})",
                b["kind"].as_str().unwrap_or(""),
                b["id"]
            ),
            None => format!("{} {}", b["kind"].as_str().unwrap_or(""), b["id"]),
        };
        out.push_str(&format!(
            "  broken at {at}: {}\n",
            b["what"].as_str().unwrap_or("")
        ));
    }
    out
}

/// What a paired test says, in words (the significance level is the conventional 5 %).
pub fn verdict(c: &crate::compare::Comparison) -> Option<String> {
    let t = c.test.as_ref()?;
    let Some(r) = &t.result else {
        return t.reason.clone();
    };
    let m = &c.metric;
    Some(if r.p < 0.05 {
        let b_better = (r.mean > 0.0) == c.higher_is_better;
        let (win, lose) = if b_better {
            (
                format!("B's candidate {}", t.b),
                format!("A's candidate {}", t.a),
            )
        } else {
            (
                format!("A's candidate {}", t.a),
                format!("B's candidate {}", t.b),
            )
        };
        format!(
            "{win} is better than {lose} by {} {m} (p = {}): more than the noise of cross-validation",
            num(Some(r.mean.abs())),
            num(Some(r.p))
        )
    } else {
        format!(
            "the difference is within the noise of cross-validation (p = {}): this evidence prefers neither",
            num(Some(r.p))
        )
    })
}

/// `compare`.
pub fn compare(c: &crate::compare::Comparison) -> String {
    let mut out = format!("run {} (A) against run {} (B)\n\n", c.a, c.b);
    let mut t = new_table(vec!["", "A", "B", ""]);
    // Long values (the split settings) wrap instead of widening the table past a terminal.
    t.set_content_arrangement(comfy_table::ContentArrangement::Dynamic)
        .set_width(120);
    // Hashes to 16 digits and settings as name=value pairs here; JSON carries them whole.
    let show = |name: &str, v: &str| -> String {
        if name.ends_with("sha256") {
            v.chars().take(16).collect()
        } else if let Ok(obj @ serde_json::Value::Object(_)) = serde_json::from_str(v) {
            params_text(&obj)
        } else {
            v.to_string()
        }
    };
    for f in &c.fields {
        t.add_row(vec![
            f.name.to_string(),
            show(f.name, &f.a),
            show(f.name, &f.b),
            if f.same { "same" } else { "differs" }.to_string(),
        ]);
    }
    out.push_str(&format!("{t}\n"));
    let changed: Vec<&(char, String)> = c.spec_diff.iter().filter(|(k, _)| *k != ' ').collect();
    if changed.is_empty() {
        out.push_str("\nspec texts: identical\n");
    } else {
        out.push_str("\nspec text lines only in A (-) and only in B (+):\n");
        for (k, line) in changed {
            out.push_str(&format!("  {k} {line}\n"));
        }
    }
    out.push_str(&format!(
        "\ncandidates in both runs: {} (validation {}, mean over folds; B - A)\n",
        c.matched.len(),
        c.metric
    ));
    if !c.matched.is_empty() {
        let mut t = new_table(vec!["model", "params", "A id", "A", "B id", "B", "B - A"]);
        for m in &c.matched {
            t.add_row(vec![
                m.family.clone(),
                params_text(&m.params),
                m.a.to_string(),
                num(m.a_score),
                m.b.to_string(),
                num(m.b_score),
                num(m.difference()),
            ]);
        }
        right(&mut t, 2);
        out.push_str(&format!("{t}\n"));
    }
    for (label, list) in [("only in A", &c.only_a), ("only in B", &c.only_b)] {
        if !list.is_empty() {
            let items: Vec<String> = list
                .iter()
                .map(|(id, f, p)| {
                    format!("{id} {f} {}", params_text(p))
                        .trim_end()
                        .to_string()
                })
                .collect();
            out.push_str(&format!("{label}: {}\n", items.join("; ")));
        }
    }
    out.push('\n');
    match (&c.test, &c.no_test) {
        (Some(t), _) => {
            out.push_str(&format!(
                "paired test of A's candidate {} and B's candidate {} on the same folds (corrected resampled t, Nadeau & Bengio 2003):\n",
                t.a, t.b
            ));
            out.push_str(&format!(
                "  mean validation {}: A {}, B {}\n",
                c.metric,
                num(Some(t.a_mean)),
                num(Some(t.b_mean))
            ));
            if let Some(r) = &t.result {
                out.push_str(&format!(
                    "  B - A = {} (95% interval {} to {}), corrected se {}, t = {} on {} df, p = {}\n  ({} folds; the variance is inflated by 1/J + n2/n1 with n2/n1 = {}, because the folds' fitting rows overlap)\n",
                    num(Some(r.mean)),
                    num(Some(r.low)),
                    num(Some(r.high)),
                    num(Some(r.se)),
                    num(Some(r.t)),
                    r.df,
                    num(Some(r.p)),
                    r.resamples,
                    num(Some(r.ratio))
                ));
            }
            if let Some(v) = verdict(c) {
                out.push_str(&format!("  {v}\n"));
            }
        }
        (None, Some(why)) => out.push_str(&format!("no paired test: {why}\n")),
        (None, None) => out.push_str("no paired test: no two candidates to compare\n"),
    }
    out
}

//! Text tables for the terminal.

use super::{num, params_text};
use crate::ledger::{CandidateRow, RunDetail, RunSummary};
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
    let higher = metric == "r2";
    let mut rows: Vec<&CandidateRow> = d.candidates.iter().collect();
    let key = |c: &CandidateRow| c.validation.get(metric).and_then(|s| s.mean);
    rows.sort_by(|a, b| {
        let (x, y) = (key(a), key(b));
        let ord = match (x, y) {
            (Some(x), Some(y)) => {
                if higher {
                    y.total_cmp(&x)
                } else {
                    x.total_cmp(&y)
                }
            }
            (Some(_), None) => std::cmp::Ordering::Less,
            (None, Some(_)) => std::cmp::Ordering::Greater,
            (None, None) => std::cmp::Ordering::Equal,
        };
        ord.then(a.id.cmp(&b.id))
    });
    let se_label = if d.holdout { "" } else { "± se" };
    let mut header = vec!["", "id", "model", "params", "train", "validation"];
    if !d.holdout {
        header.push(se_label);
    }
    let others: Vec<&str> = ["rmse", "mae", "r2"]
        .into_iter()
        .filter(|m| *m != metric)
        .collect();
    let other_headers: Vec<String> = others.iter().map(|m| format!("val {m}")).collect();
    for h in &other_headers {
        header.push(h);
    }
    let mut t = new_table(header);
    let shown = limit.unwrap_or(rows.len()).min(rows.len());
    for c in &rows[..shown] {
        let mark = if c.id == d.summary.selected {
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
            r.started_at
                .chars()
                .take(19)
                .collect::<String>()
                .replace('T', " "),
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
    out
}

//! `report`: one self-contained HTML file for a model review: the spec, the data fingerprint,
//! the partition, the leaderboard, the plots inline (SVG), every reveal of the partition with
//! its optimism estimate, the replay status and the run's link in the hash chain. No script, no
//! external asset. The page is well-formed XML as well as HTML (every element closed, every
//! text escaped), so a strict parser reads it.

use super::{num, params_text, ranked};
use crate::ledger::{RevealPoint, RunDetail};

/// What the report shows beyond the run itself.
pub struct Extras {
    /// (tool commit, target triple)
    pub build: (String, String),
    pub predictions_digest: Option<String>,
    pub reveals: Vec<RevealPoint>,
    /// Runs that fitted or scored on the partition's test rows: (run, rows).
    pub uses: Vec<(i64, i64)>,
    /// (replay run, run replayed, identical, compared, differing)
    pub replays: Vec<crate::ledger::ReplayRow>,
    /// (position, entry hash) of the run in the chain.
    pub chain: Option<(i64, String)>,
    /// (when, who, text)
    pub notes: Vec<(String, String, String)>,
    /// Inline SVG plots with their titles (complexity, reveals), where the run has them.
    pub plots: Vec<(String, String)>,
    /// The chain's state when the report was made: (entries, intact).
    pub chain_state: (usize, bool),
    /// Why a plot is missing (the data file could not be read again), if one is.
    pub missing: Option<String>,
}

/// Text for an HTML/XML text node or attribute value.
pub fn esc(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

fn row(cells: &[String]) -> String {
    let tds: String = cells.iter().map(|c| format!("<td>{c}</td>")).collect();
    format!("<tr>{tds}</tr>\n")
}

fn head(cells: &[&str]) -> String {
    let ths: String = cells
        .iter()
        .map(|c| format!("<th>{}</th>", esc(c)))
        .collect();
    format!("<tr>{ths}</tr>\n")
}

fn kv(rows: &[(&str, String)]) -> String {
    let body: String = rows
        .iter()
        .map(|(k, v)| format!("<tr><th>{}</th><td>{}</td></tr>\n", esc(k), esc(v)))
        .collect();
    format!("<table class=\"kv\">\n{body}</table>\n")
}

const STYLE: &str = "body{font-family:sans-serif;max-width:60em;margin:2em auto;padding:0 1em;color:#222;line-height:1.4}\
h1{font-size:1.5em}h2{font-size:1.2em;margin-top:2em;border-bottom:1px solid #ccc}\
table{border-collapse:collapse;margin:0.5em 0}td,th{border:1px solid #ddd;padding:0.2em 0.5em;text-align:left;vertical-align:top}\
td.n{text-align:right;font-variant-numeric:tabular-nums}tr.sel{background:#eef5fb}\
table.kv th{background:#f6f6f6;font-weight:normal}pre{background:#f6f6f6;padding:0.8em;overflow-x:auto}\
.warn{color:#a33}.small{font-size:0.9em;color:#555}svg{max-width:100%;height:auto}";

/// The report page.
pub fn page(d: &RunDetail, x: &Extras) -> String {
    let s = &d.summary;
    let metric = &s.metric;
    let mut h = String::new();
    h.push_str("<!DOCTYPE html>\n<html xmlns=\"http://www.w3.org/1999/xhtml\" lang=\"en\">\n<head>\n<meta charset=\"utf-8\"/>\n");
    h.push_str(&format!(
        "<title>probity run {} ({})</title>\n<style>{STYLE}</style>\n</head>\n<body>\n",
        s.id,
        esc(&s.experiment)
    ));
    h.push_str(&format!("<h1>Run {}: {}</h1>\n", s.id, esc(&s.experiment)));
    let selected = d.candidates.iter().find(|c| c.id == s.selected);
    let sel_text = selected.map_or(String::new(), |c| {
        let v = c.validation.get(metric.as_str());
        format!(
            "candidate {} ({} {}): validation {metric} {}{}",
            c.id,
            c.family,
            params_text(&c.params),
            num(v.and_then(|v| v.mean)),
            v.and_then(|v| v.se).map_or(String::new(), |se| format!(
                " ± {} (standard error over folds)",
                num(Some(se))
            ))
        )
    });
    h.push_str("<h2 id=\"summary\">Summary</h2>\n");
    h.push_str(&kv(&[
        ("selected", sel_text),
        (
            "selection",
            format!(
                "{metric}, rule {} (best mean: candidate {})",
                d.rule, d.best
            ),
        ),
        ("started (UTC)", s.started_at.clone()),
        ("finished (UTC)", d.finished_at.clone()),
        ("by", format!("{} on {}", d.user, d.host)),
        (
            "tool",
            format!(
                "probity {} (commit {}, {}), {} threads",
                d.tool_version, x.build.0, x.build.1, d.threads
            ),
        ),
        ("seed", d.seed.clone()),
        ("note", s.note.clone().unwrap_or_default()),
    ]));
    h.push_str("<h2 id=\"data\">Data</h2>\n");
    h.push_str(&kv(&[
        ("file", d.data_path.clone()),
        ("SHA-256", s.data_sha256.clone()),
        (
            "rows",
            format!(
                "{} rows, {} columns; {} rows used",
                d.data_rows, d.data_columns, d.rows_used
            ),
        ),
        ("spec file", d.spec_path.clone()),
        ("spec SHA-256 (canonical)", d.spec_hash.clone()),
    ]));
    h.push_str("<h2 id=\"partition\">Partition</h2>\n");
    h.push_str(&kv(&[
        ("id", s.partition_id.clone()),
        (
            "rows",
            format!(
                "train {}, validation {}, test {} (sealed)",
                d.n_train, d.n_validation, d.n_test
            ),
        ),
        (
            "split settings",
            serde_json::from_str(&d.split_settings)
                .map_or_else(|_| d.split_settings.clone(), |v| params_text(&v)),
        ),
        (
            "folds",
            if d.holdout {
                "one fixed validation partition".to_string()
            } else {
                format!("{} (repeat x fold)", d.folds.len())
            },
        ),
        (
            "use of the development rows",
            format!(
                "runs: {}, candidates: {} (on this partition, up to this run)",
                d.partition_runs, d.partition_candidates
            ),
        ),
    ]));
    h.push_str(&format!(
        "<h2 id=\"leaderboard\">Leaderboard</h2>\n<p class=\"small\">Mean over folds; ± is the standard error across folds. Sorted by validation {}; the selected candidate is highlighted.</p>\n<table id=\"leaderboard-table\">\n",
        esc(metric)
    ));
    h.push_str(&head(&[
        "rank",
        "candidate",
        "model",
        "params",
        &format!("train {metric}"),
        &format!("validation {metric}"),
        "± se",
    ]));
    for (i, c) in ranked(d).iter().enumerate() {
        let t = c.train.get(metric.as_str());
        let v = c.validation.get(metric.as_str());
        let cls = if c.id == s.selected {
            " class=\"sel\""
        } else {
            ""
        };
        let cells = [
            (i + 1).to_string(),
            c.id.to_string(),
            esc(&c.family),
            esc(&params_text(&c.params)),
            num(t.and_then(|t| t.mean)),
            num(v.and_then(|v| v.mean)),
            num(v.and_then(|v| v.se)),
        ];
        let tds: String = cells
            .iter()
            .enumerate()
            .map(|(k, v)| {
                if k >= 4 || k <= 1 {
                    format!("<td class=\"n\">{v}</td>")
                } else {
                    format!("<td>{v}</td>")
                }
            })
            .collect();
        h.push_str(&format!(
            "<tr{cls} data-candidate=\"{}\">{tds}</tr>\n",
            c.id
        ));
    }
    h.push_str("</table>\n");
    if let Some(n) = &d.nested {
        h.push_str(&format!(
            "<p>Nested cross-validation estimate of the whole selection procedure: {} {} ± {} over {} outer folds.</p>\n",
            esc(&n.metric),
            num(n.estimate),
            num(n.se),
            n.outer_folds
        ));
    }
    for (title, svg) in &x.plots {
        h.push_str(&format!(
            "<h2>{}</h2>\n<figure>\n{}\n</figure>\n",
            esc(title),
            strip_xml_decl(svg)
        ));
    }
    if let Some(m) = &x.missing {
        h.push_str(&format!("<p class=\"warn\">{}</p>\n", esc(m)));
    }
    h.push_str("<h2 id=\"reveals\">Reveals of the test partition</h2>\n");
    if !x.uses.is_empty() {
        let list: Vec<String> = x
            .uses
            .iter()
            .map(|(run, rows)| format!("run {run} ({rows} rows)"))
            .collect();
        h.push_str(&format!(
            "<p id=\"development-uses\" class=\"warn\">Used in development by {}: those runs fitted or scored on this partition's test rows, and each counts as one look at it, beside the reveals.</p>\n",
            esc(&list.join(", "))
        ));
    }
    if x.reveals.is_empty() && x.uses.is_empty() {
        h.push_str("<p>None: the test partition is still sealed.</p>\n");
    } else if x.reveals.is_empty() {
        h.push_str("<p>No reveal yet.</p>\n");
    } else {
        h.push_str(&format!(
            "<p>{} reveal(s) of partition {}, by any run. The optimism estimate is how much better than the truth the best of the candidates revealed can look by chance; each further look raises it.</p>\n<table id=\"reveals-table\">\n",
            x.reveals.len(),
            esc(&s.partition_id)
        ));
        h.push_str(&head(&[
            "#",
            "when (UTC)",
            "who",
            "run",
            "candidate",
            "mode",
            "metric",
            "test score",
            "development estimate",
            "optimism estimate",
            "answer shown",
        ]));
        for (i, r) in x.reveals.iter().enumerate() {
            let v = &r.reveal;
            h.push_str(&row(&[
                (i + 1).to_string(),
                esc(&v.at),
                esc(&v.user),
                v.run.to_string(),
                v.candidate.to_string(),
                esc(&v.mode),
                esc(&v.metric),
                num(r.test),
                num(r.development),
                num(r.optimism),
                format!("{} ({})", num(v.answer), esc(&v.answer_kind)),
            ]));
        }
        h.push_str("</table>\n");
    }
    h.push_str("<h2 id=\"replay\">Replay</h2>\n");
    if x.replays.is_empty() {
        h.push_str(&format!(
            "<p>Not replayed yet. <code>probity replay {}</code> re-executes it from the stored spec and seeds and compares every score bit for bit.</p>\n",
            s.id
        ));
    } else {
        h.push_str("<table id=\"replays-table\">\n");
        h.push_str(&head(&[
            "replay run",
            "of run",
            "result",
            "values compared",
            "differing",
        ]));
        for (run, of, same, compared, differing) in &x.replays {
            h.push_str(&row(&[
                run.to_string(),
                of.to_string(),
                if *same { "identical" } else { "DIFFERS" }.to_string(),
                compared.to_string(),
                differing.to_string(),
            ]));
        }
        h.push_str("</table>\n");
    }
    if let Some(dg) = &x.predictions_digest {
        h.push_str(&format!(
            "<p class=\"small\">Digest of the refitted model's predictions on the development rows: <code>{}</code></p>\n",
            esc(dg)
        ));
    }
    if !d.warnings.is_empty() {
        h.push_str("<h2 id=\"warnings\">Warnings raised by this run</h2>\n<ul>\n");
        for w in &d.warnings {
            h.push_str(&format!("<li class=\"warn\">{}</li>\n", esc(w)));
        }
        h.push_str("</ul>\n");
    }
    if !x.notes.is_empty() {
        h.push_str("<h2 id=\"notes\">Notes</h2>\n<ul>\n");
        for (at, user, text) in &x.notes {
            h.push_str(&format!(
                "<li>{} {}: {}</li>\n",
                esc(at),
                esc(user),
                esc(text)
            ));
        }
        h.push_str("</ul>\n");
    }
    h.push_str(&format!(
        "<h2 id=\"spec\">Spec (as run, verbatim)</h2>\n<pre>{}</pre>\n",
        esc(&d.spec_text)
    ));
    h.push_str("<h2 id=\"chain\">Ledger chain</h2>\n");
    match &x.chain {
        Some((seq, hash)) => h.push_str(&format!(
            "<p>This run is entry {seq} of the ledger's hash chain, entry hash <code id=\"chain-hash\">{}</code>. When this report was made the chain held {} entries and was {}. <code>probity audit --verify</code> checks it again.</p>\n",
            esc(hash),
            x.chain_state.0,
            if x.chain_state.1 { "intact" } else { "BROKEN" }
        )),
        None => h.push_str("<p>This run is not in the chain.</p>\n"),
    }
    h.push_str("<h2 id=\"cautions\">Reading these numbers</h2>\n<ul>\n\
<li>A cross-validated or test score is an estimate from a finite sample, not a guarantee; differences smaller than their standard error are often noise.</li>\n\
<li>The estimate holds for data like the development data only. Validate the model in its domain before it informs decisions about people or money, and follow the regulation and licensed practice that apply where you work.</li>\n\
<li>Every look at the test partition makes its score more optimistic; the reveals above are all the looks the ledger knows of.</li>\n</ul>\n");
    h.push_str("</body>\n</html>\n");
    h
}

/// An SVG document without an XML declaration, for inlining.
fn strip_xml_decl(svg: &str) -> &str {
    match svg.find("<svg") {
        Some(at) => &svg[at..],
        None => svg,
    }
}

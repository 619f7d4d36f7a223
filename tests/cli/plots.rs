//! `plot`: the SVG parses, labels its axes, and draws one point per candidate at the ledger's
//! values (checked through the plotted points the SVG lists in its metadata, and the circles
//! drawn at their pixel positions).

use crate::fixtures::{SMALL_SPEC, small_dir};
use serde_json::Value;

fn svg_of(d: &crate::util::Dir, args: &[&str]) -> String {
    let out = d.path.join("plot.svg");
    let mut all = vec!["plot"];
    all.extend_from_slice(args);
    all.extend_from_slice(&["--out", out.to_str().unwrap()]);
    d.probity(&all).expect(0);
    std::fs::read_to_string(out).unwrap()
}

#[test]
fn complexity_plot_draws_every_candidate_at_its_stored_score() {
    let d = small_dir("plot");
    d.probity(&["run", "small.toml"]).expect(0);
    let svg = svg_of(&d, &["1"]);
    let doc = roxmltree::Document::parse(&svg).expect("the SVG is well-formed XML");
    let root = doc.root_element();
    assert_eq!(root.tag_name().name(), "svg");
    let texts = texts_of(&svg);
    for label in ["lambda (log scale)", "k", "rmse"] {
        assert!(
            texts.iter().any(|t| t == label),
            "no axis label '{label}' in {texts:?}"
        );
    }
    let meta = meta_of(&svg);
    let points = meta["points"].as_array().unwrap();
    // ridge x3 and knn x2 have an ordered parameter; the mean baseline has none.
    let show = d.probity(&["show", "1", "--json"]).expect(0).json();
    let cands = show["candidates"].as_array().unwrap();
    let ordered: Vec<&Value> = cands.iter().filter(|c| c["model"] != "mean").collect();
    assert_eq!(points.len(), ordered.len());
    let circles: Vec<(i64, i64, String)> = root
        .descendants()
        .filter(|n| n.has_tag_name("circle"))
        .map(|n| {
            let num = |a: &str| n.attribute(a).unwrap().parse::<f64>().unwrap() as i64;
            (num("cx"), num("cy"), n.attribute("r").unwrap().to_string())
        })
        .collect();
    for c in ordered {
        let p = points
            .iter()
            .find(|p| p["candidate"] == c["id"])
            .unwrap_or_else(|| panic!("candidate {} not plotted", c["id"]));
        for (key, part) in [("validation", "validation"), ("train", "train")] {
            let want = c[part]["rmse"].as_f64().unwrap();
            assert_eq!(
                p[key].as_f64().unwrap().to_bits(),
                want.to_bits(),
                "{key} of {}",
                c["id"]
            );
        }
        assert_eq!(
            p["validation_se"].as_f64().unwrap().to_bits(),
            c["validation_se"]["rmse"].as_f64().unwrap().to_bits()
        );
        let param = if c["model"] == "knn" { "k" } else { "lambda" };
        assert_eq!(p["x"].as_f64(), c["params"][param].as_f64());
        let at = (p["px"].as_i64().unwrap(), p["py"].as_i64().unwrap());
        assert!(
            circles.iter().any(|(x, y, r)| (*x, *y) == at && r == "3"),
            "no point drawn at {at:?} for candidate {}",
            c["id"]
        );
    }
    // The selected candidate is ringed.
    let sel = points
        .iter()
        .find(|p| p["candidate"] == show["selected"])
        .unwrap();
    let at = (sel["px"].as_i64().unwrap(), sel["py"].as_i64().unwrap());
    assert!(circles.iter().any(|(x, y, r)| (*x, *y) == at && r == "8"));
    assert!(texts.iter().any(|t| t.starts_with("selected (candidate")));
}

#[test]
fn complexity_plot_shows_the_one_se_choice_and_takes_other_metrics() {
    let d = small_dir("plot-one-se");
    d.write(
        "onese.toml",
        &SMALL_SPEC
            .replace(
                "[[model]]\nkind = \"ridge\"",
                "[select]\nrule = \"one-se\"\n\n[[model]]\nkind = \"ridge\"",
            )
            .replace(
                "lambda = [0.1, 1, 10]",
                "lambda = [0.001, 0.01, 0.1, 1, 10, 100]",
            ),
    );
    d.probity(&["run", "onese.toml"]).expect(0);
    let show = d.probity(&["show", "1", "--json"]).expect(0).json();
    // Another metric: its own axis, and no one-SE marks (the rule was applied to rmse).
    let texts = texts_of(&svg_of(&d, &["1", "--metric", "mae"]));
    assert!(texts.iter().any(|t| t == "mae"), "{texts:?}");
    assert!(!texts.iter().any(|t| t == "one-SE threshold"), "{texts:?}");
    let texts = texts_of(&svg_of(&d, &["1"]));
    // On this grid the one-SE rule picks a simpler candidate than the best mean (checked), so
    // both are marked, with the threshold.
    assert_ne!(show["selected"], show["best"]);
    assert!(texts.iter().any(|t| t == "one-SE threshold"), "{texts:?}");
    assert!(
        texts
            .iter()
            .any(|t| *t == format!("best mean (candidate {})", show["best"])),
        "{texts:?}"
    );
    // Usage errors: an unknown metric; a run with nothing ordered to plot.
    let r = d
        .probity(&["plot", "1", "--metric", "auc", "--out", "x.svg"])
        .expect(2);
    assert!(r.stderr().contains("no such score"), "{}", r.stderr());
    d.write(
        "flat.toml",
        &SMALL_SPEC
            .replace("kind = \"ridge\"\nlambda = [0.1, 1, 10]", "kind = \"ols\"")
            .replace("[[model]]\nkind = \"knn\"\nk = [1, 3]\n", ""),
    );
    d.probity(&["run", "flat.toml"]).expect(0);
    let r = d.probity(&["plot", "2", "--out", "y.svg"]).expect(2);
    assert!(
        r.stderr().contains("no family with an ordered parameter"),
        "{}",
        r.stderr()
    );
    assert!(!d.path.join("y.svg").exists());
}

#[test]
fn reveals_plot_draws_each_reveal_against_its_development_estimate() {
    let d = small_dir("plot-reveals");
    d.probity(&["run", "small.toml"]).expect(0);
    // Nothing revealed yet: nothing to draw.
    let r = d
        .probity(&["plot", "1", "--kind", "reveals", "--out", "r.svg"])
        .expect(2);
    assert!(r.stderr().contains("has no reveal"), "{}", r.stderr());
    let first = d
        .probity(&["reveal", "1", "--yes", "--json"])
        .expect(0)
        .json();
    let second = d
        .probity(&["reveal", "1", "--candidate", "2", "--yes", "--json"])
        .expect(0)
        .json();
    let show = d.probity(&["show", "1", "--json"]).expect(0).json();
    let svg = svg_of(&d, &["1", "--kind", "reveals"]);
    let doc = roxmltree::Document::parse(&svg).expect("well-formed SVG");
    let texts = texts_of(&svg);
    for label in ["rmse", "reveal (in the order made)"] {
        assert!(
            texts.iter().any(|t| t == label),
            "no '{label}' in {texts:?}"
        );
    }
    let meta = meta_of(&svg);
    let points = meta["points"].as_array().unwrap();
    assert_eq!(points.len(), 2);
    let circles: Vec<(i64, i64)> = doc
        .descendants()
        .filter(|n| n.has_tag_name("circle"))
        .map(|n| {
            let num = |a: &str| n.attribute(a).unwrap().parse::<f64>().unwrap() as i64;
            (num("cx"), num("cy"))
        })
        .collect();
    for (p, rev) in points.iter().zip([&first, &second]) {
        assert_eq!(p["candidate"], rev["candidate"]);
        assert_eq!(
            p["test"].as_f64().unwrap().to_bits(),
            rev["test"]["rmse"].as_f64().unwrap().to_bits()
        );
        assert_eq!(p["optimism"], rev["optimism"]["estimate"]);
        let cand = show["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["id"] == rev["candidate"])
            .unwrap();
        assert_eq!(p["development"], cand["validation"]["rmse"]);
        // rmse is a loss: the corrected score is the test score plus the optimism estimate.
        let want = p["test"].as_f64().unwrap() + p["optimism"].as_f64().unwrap();
        assert_eq!(p["corrected"].as_f64().unwrap(), want);
        let at = (p["px"].as_i64().unwrap(), p["py"].as_i64().unwrap());
        assert!(circles.contains(&at), "no point at {at:?}");
    }
}

#[test]
fn report_is_one_well_formed_page_with_what_the_ledger_holds() {
    let d = small_dir("report");
    d.probity(&["run", "small.toml", "--note", "first try"])
        .expect(0);
    d.probity(&["reveal", "1", "--yes"]).expect(0);
    d.probity(&["replay", "1"]).expect(0);
    let out = d.path.join("r.html");
    d.probity(&["report", "1", "--out", out.to_str().unwrap()])
        .expect(0);
    let html = std::fs::read_to_string(&out).unwrap();
    // Well-formed: a strict XML parser reads the whole page (it is written as polyglot XHTML).
    let doc = roxmltree::Document::parse_with_options(
        &html,
        roxmltree::ParsingOptions {
            allow_dtd: true,
            ..Default::default()
        },
    )
    .expect("the report parses as XML");
    // Self-contained: no script, no stylesheet link, no external source.
    for n in doc.descendants().filter(|n| n.is_element()) {
        assert!(!["script", "link", "img", "iframe"].contains(&n.tag_name().name()));
        for a in ["src", "href"] {
            assert!(n.attribute(a).is_none(), "{} has {a}", n.tag_name().name());
        }
    }
    let by_id = |id: &str| {
        doc.descendants()
            .find(|n| n.attribute("id") == Some(id))
            .unwrap_or_else(|| panic!("no #{id}"))
    };
    // The leaderboard: one row per candidate, the selected one marked, its scores as `show`.
    let show = d.probity(&["show", "1", "--json"]).expect(0).json();
    let rows: Vec<roxmltree::Node> = by_id("leaderboard-table")
        .children()
        .filter(|n| n.has_attribute("data-candidate"))
        .collect();
    assert_eq!(rows.len(), show["candidates"].as_array().unwrap().len());
    let sel = rows
        .iter()
        .find(|r| r.attribute("class") == Some("sel"))
        .expect("the selected candidate is marked");
    assert_eq!(
        sel.attribute("data-candidate"),
        Some(show["selected"].to_string().as_str())
    );
    let cells: Vec<String> = sel
        .children()
        .filter(|n| n.has_tag_name("td"))
        .map(|n| n.text().unwrap_or("").to_string())
        .collect();
    let chosen = show["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["id"] == show["selected"])
        .unwrap();
    assert_eq!(
        cells[5],
        probity::report::num(chosen["validation"]["rmse"].as_f64())
    );
    // Both plots inline, as SVG.
    let svgs = doc.descendants().filter(|n| n.has_tag_name("svg")).count();
    assert_eq!(svgs, 3, "complexity, residuals and reveals plots");
    // The reveal, the replay, the chain hash and the spec, as stored.
    let reveal_rows = by_id("reveals-table")
        .children()
        .filter(|n| n.has_tag_name("tr"))
        .count();
    assert_eq!(reveal_rows, 2, "a header and one reveal");
    let replays = by_id("replays-table")
        .descendants()
        .filter_map(|n| n.text())
        .collect::<String>();
    assert!(replays.contains("identical"), "{replays}");
    let conn = rusqlite::Connection::open(d.ledger()).unwrap();
    let hash: String = conn
        .query_row(
            "SELECT entry_hash FROM chain WHERE kind = 'run' AND ref_id = 1",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(by_id("chain-hash").text(), Some(hash.as_str()));
    let spec = doc
        .descendants()
        .find(|n| n.has_tag_name("pre"))
        .and_then(|n| n.text())
        .unwrap();
    assert_eq!(spec, SMALL_SPEC);
    assert!(html.contains("first try"));
    // Without the data file the report is still written, and says what is missing.
    std::fs::rename(d.path.join("small.csv"), d.path.join("moved.csv")).unwrap();
    d.probity(&["report", "1", "--out", out.to_str().unwrap()])
        .expect(0);
    let html = std::fs::read_to_string(&out).unwrap();
    assert!(
        html.contains("no residuals plot"),
        "the missing plot is explained"
    );
    let moved = d.path.join("moved.csv");
    d.probity(&[
        "report",
        "1",
        "--data",
        moved.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ])
    .expect(0);
    assert!(
        !std::fs::read_to_string(&out)
            .unwrap()
            .contains("no residuals plot")
    );
    // An unknown run is a usage error and writes nothing.
    let r = d.probity(&["report", "7", "--out", "x.html"]).expect(2);
    assert!(r.stderr().contains("no run 7"), "{}", r.stderr());
    assert!(!d.path.join("x.html").exists());
}

/// Every text element of an SVG, trimmed.
fn texts_of(svg: &str) -> Vec<String> {
    roxmltree::Document::parse(svg)
        .expect("well-formed SVG")
        .descendants()
        .filter(|n| n.has_tag_name("text"))
        .map(|n| n.text().unwrap_or("").trim().to_string())
        .collect()
}

/// The metadata document of a plot.
fn meta_of(svg: &str) -> Value {
    let doc = roxmltree::Document::parse(svg).expect("well-formed SVG");
    serde_json::from_str(
        doc.descendants()
            .find(|n| n.has_tag_name("metadata"))
            .and_then(|n| n.text())
            .unwrap(),
    )
    .unwrap()
}

/// Stored validation scores of `metric` of one candidate in the first repeat, by fold.
fn stored_folds(d: &crate::util::Dir, run: &str, candidate: &str, metric: &str) -> Vec<f64> {
    let text = d
        .probity(&["export", "folds", "--run", run])
        .expect(0)
        .stdout();
    let mut r = csv::Reader::from_reader(text.as_bytes());
    r.records()
        .map(|x| x.unwrap())
        .filter(|x| &x[1] == candidate && &x[2] == "0" && &x[4] == "validation" && &x[5] == metric)
        .map(|x| x[6].parse().unwrap())
        .collect()
}

#[test]
fn residuals_are_the_out_of_fold_errors_the_run_scored() {
    let d = small_dir("plot-residuals");
    d.probity(&["run", "small.toml"]).expect(0);
    let show = d.probity(&["show", "1", "--json"]).expect(0).json();
    let selected = show["selected"].to_string();
    let meta = meta_of(&svg_of(&d, &["1", "--kind", "residuals"]));
    let points = meta["points"].as_array().unwrap();
    // Every development row once (30 of 40 rows; 10 are sealed test rows).
    assert_eq!(points.len(), 30);
    let mut rows: Vec<i64> = points.iter().map(|p| p["row"].as_i64().unwrap()).collect();
    rows.sort();
    rows.dedup();
    assert_eq!(rows.len(), 30);
    // Per fold, the root mean square of the plotted residuals is the rmse the run stored for
    // that fold (the same fits made again; only the order of the sum may differ).
    let stored = stored_folds(&d, "1", &selected, "rmse");
    assert_eq!(stored.len(), 4);
    for (fold, want) in stored.iter().enumerate() {
        let r: Vec<f64> = points
            .iter()
            .filter(|p| p["fold"] == fold)
            .map(|p| p["residual"].as_f64().unwrap())
            .collect();
        let got = (r.iter().map(|x| x * x).sum::<f64>() / r.len() as f64).sqrt();
        assert!(
            (got - want).abs() <= 1e-12 * want,
            "fold {fold}: {got} vs {want}"
        );
    }
    // Another candidate, by id; an unknown one is refused.
    let meta = meta_of(&svg_of(
        &d,
        &["1", "--kind", "residuals", "--candidate", "5"],
    ));
    assert_eq!(meta["candidate"], 5);
    let r = d
        .probity(&[
            "plot",
            "1",
            "--kind",
            "residuals",
            "--candidate",
            "99",
            "--out",
            "z.svg",
        ])
        .expect(2);
    assert!(r.stderr().contains("no candidate 99"), "{}", r.stderr());
}

#[test]
fn calibration_bins_hold_the_out_of_fold_probabilities_the_run_scored() {
    let d = crate::util::Dir::new("plot-calibration");
    let ex = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    d.copy(&ex.join("bays.csv"), "bays.csv");
    d.copy(&ex.join("outbreak.toml"), "outbreak.toml");
    d.probity(&["run", "outbreak.toml"]).expect(0);
    let show = d.probity(&["show", "1", "--json"]).expect(0).json();
    let selected = show["selected"].to_string();
    let meta = meta_of(&svg_of(&d, &["1", "--kind", "residuals"]));
    assert_eq!(meta["kind"], "calibration");
    let points = meta["points"].as_array().unwrap();
    let bins = meta["bins"].as_array().unwrap();
    let in_bins: i64 = bins.iter().map(|b| b["rows"].as_i64().unwrap()).sum();
    assert_eq!(in_bins as usize, points.len());
    for b in bins {
        let m = b["mean_predicted"].as_f64().unwrap();
        assert!(m >= b["low"].as_f64().unwrap() && m <= b["high"].as_f64().unwrap());
    }
    // Per fold, the log-loss of the listed probabilities is the one the run stored.
    let stored = stored_folds(&d, "1", &selected, "log_loss");
    assert!(stored.len() >= 2, "{stored:?}");
    for (fold, want) in stored.iter().enumerate() {
        let ll: Vec<f64> = points
            .iter()
            .filter(|p| p["fold"] == fold)
            .map(|p| {
                let c = p["class"].as_u64().unwrap() as usize;
                -p["probabilities"][c]
                    .as_f64()
                    .unwrap()
                    .clamp(1e-15, 1.0 - 1e-15)
                    .ln()
            })
            .collect();
        let got = ll.iter().sum::<f64>() / ll.len() as f64;
        assert!(
            (got - want).abs() <= 1e-12 * want,
            "fold {fold}: {got} vs {want}"
        );
    }
}

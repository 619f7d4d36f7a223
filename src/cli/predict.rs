//! `probity predict RUN --input FILE --output FILE`: apply a run's refitted model to new rows.

use super::{Global, open_existing, open_reading, warn};
use crate::error::{Error, Result};
use crate::metrics::Metric;
use crate::runner::StoredModel;
use std::path::{Path, PathBuf};

/// Apply a run's model (refitted on all development rows) to new rows
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run id
    pub run: i64,
    /// CSV with the feature columns (other columns are ignored)
    #[arg(long, value_name = "FILE")]
    pub input: PathBuf,
    /// CSV to write: the key column if the spec has one, then `prediction`
    #[arg(long, value_name = "FILE")]
    pub output: PathBuf,
    /// Use this candidate instead of the selected one (refitted from the run's data file,
    /// whose SHA-256 must match the ledger)
    #[arg(long, value_name = "ID")]
    pub candidate: Option<i64>,
    /// Score rows of a sealed test partition anyway, recording it as a reveal of that partition
    #[arg(long)]
    pub allow_sealed: bool,
    /// Run the candidate's external command even though the run came from another ledger or
    /// its inputs changed (the command and its inputs' hashes are listed first)
    #[arg(long)]
    pub allow_commands: bool,
    /// Prefix key and class cells that start with =, +, - or @ with ' so a spreadsheet does not
    /// run them as formulas (numbers are kept; without it every cell is exact)
    #[arg(long)]
    pub spreadsheet_safe: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    // Only `--allow-sealed` may record (a reveal); plain prediction reads a read-only ledger.
    let ledger = if a.allow_sealed {
        open_existing(g)?
    } else {
        open_reading(g)?
    };
    let d = super::stored_run(&ledger, a.run)?;
    let stored: StoredModel = serde_json::from_str(&d.model_json)
        .map_err(|e| {
            Error::Integrity(format!(
                "the stored model of run {} does not read ({e}): the run's record was altered; `probity audit --verify` checks the ledger",
                a.run
            ))
        })?;
    // Whether the user has been asked about the run's command already (a refit runs it).
    let mut consented = false;
    let model = match a.candidate {
        None => stored,
        Some(c) if c == stored.candidate as i64 => stored,
        Some(c) => {
            if c < 1 || !d.candidates.iter().any(|x| x.id == c) {
                return Err(Error::Input(format!(
                    "run {} has no candidate {c}; `probity show {}` lists them",
                    a.run, a.run
                )));
            }
            let (spec, table) = super::reveal::reload(&d, None)?;
            super::command_consent(
                &ledger,
                &d,
                &spec,
                c as usize,
                a.allow_commands,
                "predicting",
            )?;
            consented = true;
            crate::runner::refit(&spec, &table, c as usize)?
        }
    };
    let text_cols = model.text_columns();
    let text: Vec<&str> = text_cols.iter().map(String::as_str).collect();
    let input = crate::data::load(&a.input, &text, crate::data::all_cores())?;
    crate::data::identity::refuse_ambiguous(&input)?;
    let (pred, notes) = if matches!(model.fitted, crate::models::Fitted::External) {
        // An external command keeps no model: fit it again on the run's development rows.
        let (spec, table) = super::reveal::reload(&d, None)?;
        if !consented {
            super::command_consent(
                &ledger,
                &d,
                &spec,
                model.candidate,
                a.allow_commands,
                "predicting",
            )?;
        }
        let prep = crate::runner::prepare(&spec, &table, crate::data::Identity::CURRENT)?;
        let dev = prep.sealed.development();
        let rows: Vec<usize> = (0..input.n_rows()).collect();
        let mut notes = crate::models::encode::Notes::new();
        let p = crate::runner::predict_with(
            &spec, &table, &prep, &model, &dev, &input, &rows, &mut notes,
        )?;
        (p, Vec::new())
    } else {
        model.predict(&input)?
    };
    for n in &notes {
        warn(n);
    }
    let mut guarded = false;
    for _ in 0..super::FIND_TRIES {
        guarded = guard_sealed_rows(&ledger, &d, &model, &input, &pred, a.allow_sealed, &a.input)?;
        if guarded {
            break;
        }
    }
    if !guarded {
        return Err(Error::Internal(format!(
            "new partitions kept being stored while this prediction was checked ({} tries); nothing was recorded or written: run it again",
            super::FIND_TRIES
        )));
    }
    write_predictions(
        &a.output,
        &input,
        model.key.as_deref(),
        &pred,
        &model.classes,
        a.spreadsheet_safe,
    )?;
    eprintln!(
        "wrote {} predictions of run {} candidate {} to {}",
        input.n_rows(),
        a.run,
        model.candidate,
        a.output.display()
    );
    Ok(0)
}

fn write_predictions(
    path: &Path,
    input: &crate::data::Table,
    key: Option<&str>,
    pred: &[f64],
    classes: &[String],
    safe: bool,
) -> Result<()> {
    let io = |e: std::io::Error| Error::Io {
        action: "cannot write predictions to",
        path: path.to_path_buf(),
        source: e,
    };
    let key_col = key.and_then(|k| input.column(k));
    // Write beside the target and rename, so a failure never leaves half a file.
    let tmp = path.with_extension("probity-tmp");
    {
        let mut w = csv::Writer::from_path(&tmp).map_err(|e| io(std::io::Error::other(e)))?;
        let mut header = Vec::new();
        if let Some(k) = key_col {
            header.push(if safe {
                crate::report::spreadsheet_safe(&k.name).into_owned()
            } else {
                k.name.clone()
            });
        }
        header.push("prediction".to_string());
        header.extend(classes.iter().map(|c| format!("p_{c}")));
        w.write_record(&header)
            .map_err(|e| io(std::io::Error::other(e)))?;
        let width = classes.len().max(1);
        for (i, p) in pred.chunks(width).enumerate() {
            let mut rec = Vec::new();
            if let Some(k) = key_col {
                let cell = k.text(i);
                rec.push(if safe {
                    crate::report::spreadsheet_safe(&cell).into_owned()
                } else {
                    cell
                });
            }
            if classes.is_empty() {
                rec.push(format!("{}", p[0]));
            } else {
                // The predicted class is the most probable, ties to the first class.
                let class = &classes[crate::metrics::argmax(p)];
                rec.push(if safe {
                    crate::report::spreadsheet_safe(class).into_owned()
                } else {
                    class.clone()
                });
                rec.extend(p.iter().map(|v| format!("{v}")));
            }
            w.write_record(&rec)
                .map_err(|e| io(std::io::Error::other(e)))?;
        }
        w.flush().map_err(io)?;
    }
    std::fs::rename(&tmp, path).map_err(io)
}

/// Rows of a sealed test partition are a look at it whether or not the file holds their
/// targets: whoever holds the data file scores the predictions at once. Refuse them, or (with
/// `--allow-sealed`) record one consultation of each partition touched, through its seal, in
/// one transaction, before the predictions are written. `false` when a partition was stored
/// between finding the partitions touched and recording the consultation: nothing was
/// recorded, and the caller tries again.
fn guard_sealed_rows(
    ledger: &crate::ledger::Ledger,
    d: &crate::ledger::RunDetail,
    model: &StoredModel,
    input: &crate::data::Table,
    pred: &[f64],
    allow: bool,
    file: &Path,
) -> Result<bool> {
    let rows: Vec<usize> = (0..input.n_rows()).collect();
    if rows.is_empty() {
        return Ok(true);
    }
    let seen = ledger.partitions_seen()?;
    // The key column by the spec's key name; each partition then compares the rows its own
    // way (by key, or by feature cells whatever the file's other columns).
    let key = model.key.as_deref().and_then(|k| input.index_of(k));
    // The features the model reads: its predictions of rows that agree on them are its
    // predictions of the sealed rows.
    let features: Vec<String> = model
        .encoder
        .features
        .iter()
        .map(|f| match f {
            crate::models::encode::Feature::Numeric { name, .. }
            | crate::models::encode::Feature::Categorical { name, .. } => {
                crate::data::identity::normalise(name)
            }
        })
        .collect();
    let features = if features.is_empty() {
        ledger
            .partition_recipe(&d.summary.partition_id)?
            .map(|r| r.columns().to_vec())
            .unwrap_or_default()
    } else {
        features
    };
    let own = ledger.run_identities(d.summary.id)?;
    let predictor = crate::ledger::rows::Predictor {
        features,
        own: own.map(|(recipe, test)| (d.summary.partition_id.as_str(), recipe, test)),
    };
    let mut hits = ledger.sealed_rows(input, &rows, key, &predictor)?;
    // The partition with the most of these rows first (it names the refusal).
    hits.sort_by(|a, b| b.1.len().cmp(&a.1.len()).then_with(|| a.0.cmp(&b.0)));
    if hits.is_empty() {
        return Ok(true);
    }
    let target = input.column(&model.target);
    if !allow {
        let (p, n) = (&hits[0].0, hits[0].1.len());
        let more = if hits.len() > 1 {
            format!(" (and rows of {} more partition(s))", hits.len() - 1)
        } else {
            String::new()
        };
        return Err(Error::Input(format!(
            "{}: {n} rows are test rows of sealed partition {p}{more}{}: predicting them is a look at its test set. Use `probity reveal RUN` (counted), or pass --allow-sealed to record this prediction as a consultation",
            file.display(),
            if target.is_some() {
                format!(", and the file holds their target '{}'", model.target)
            } else {
                " (anyone with the data file can score the predictions)".to_string()
            }
        )));
    }
    // Truth as the model sees it: numbers, or class indices for a classifier.
    let nc = model.classes.len();
    let y: Option<Vec<f64>> = target.map(|target| {
        (0..input.n_rows())
            .map(|r| {
                let t = target.text(r);
                if nc > 0 {
                    model
                        .classes
                        .iter()
                        .position(|c| *c == t)
                        .map_or(f64::NAN, |i| i as f64)
                } else {
                    t.parse().unwrap_or(f64::NAN)
                }
            })
            .collect()
    });
    let spec_path = Path::new(&d.spec_path);
    let spec = crate::spec::parse(
        &d.spec_text,
        spec_path,
        &spec_path
            .parent()
            .map(Path::to_path_buf)
            .unwrap_or_default(),
    )?;
    let metrics = Metric::for_task(nc > 0);
    let width = nc.max(1);
    // Per partition touched: its sealed rows among the file's, and the exact scores on those
    // whose targets the file holds.
    let mut partitions = Vec::new();
    let mut per: Vec<(usize, Option<Vec<Option<f64>>>)> = Vec::new();
    for (partition, idx) in &hits {
        let scores = y.as_ref().map(|y| {
            let with: Vec<usize> = idx.iter().copied().filter(|&r| !y[r].is_nan()).collect();
            let ys: Vec<f64> = with.iter().map(|&r| y[r]).collect();
            let ps: Vec<f64> = with
                .iter()
                .flat_map(|&r| pred[r * width..(r + 1) * width].iter().copied())
                .collect();
            crate::metrics::score_all(metrics, &ys, &ps, nc)
        });
        partitions.push(partition.clone());
        per.push((idx.len(), scores));
    }
    let who = super::reveal::who();
    let file_text = file.display().to_string();
    // Recording needs a writable ledger of its own.
    let mut writer = crate::ledger::Ledger::open(ledger.path(), false)?;
    let stored = writer.consult(&seen, &partitions, |states| {
        let mut records = Vec::new();
        let mut out = Vec::new();
        for (((seal, history), partition), (n, scores)) in states.iter().zip(&partitions).zip(&per)
        {
            let q = crate::guard::consult::PredictQuery {
                subject: crate::guard::consult::Subject {
                    who: who.clone(),
                    run: d.summary.id,
                    candidate: model.candidate as i64,
                    spec_hash: &d.spec_hash,
                    partition,
                    metric: spec.select.metric,
                },
                metrics,
                scores: scores.as_deref(),
                rows: *n,
                file: file_text.clone(),
            };
            let c = crate::guard::consult::predict(seal, history, &q)?;
            records.push(c.record.clone());
            out.push(c);
        }
        Ok((records, out))
    })?;
    let Some((ids, consultations)) = stored else {
        return Ok(false);
    };
    for ((id, c), partition) in ids.iter().zip(&consultations).zip(&partitions) {
        warn(&format!(
            "{} rows of sealed partition {partition} were predicted{}: recorded as reveal {id} ({} consultation(s) of the partition now, budget {})",
            c.record.n_rows,
            if c.record.answer_kind == "test" {
                " and scored with their targets"
            } else {
                ""
            },
            c.consultations,
            c.budget
        ));
        for w in &c.warnings {
            warn(w);
        }
    }
    Ok(true)
}

//! `probity predict RUN --input FILE --output FILE`: apply a run's refitted model to new rows.

use super::{Global, open_existing, warn};
use crate::error::{Error, Result};
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
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_existing(g)?;
    let d = ledger.run(a.run)?.ok_or_else(|| {
        Error::Input(format!(
            "no run {}; `probity history` lists the runs",
            a.run
        ))
    })?;
    let stored: StoredModel = serde_json::from_str(&d.model_json)
        .map_err(|e| Error::Internal(format!("stored model of run {}: {e}", a.run)))?;
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
            let spec_path = Path::new(&d.spec_path);
            let base = spec_path
                .parent()
                .map(Path::to_path_buf)
                .unwrap_or_default();
            let spec = crate::spec::parse(&d.spec_text, spec_path, &base)?;
            let text: Vec<&str> = spec
                .data
                .categorical
                .iter()
                .map(|n| n.name.as_str())
                .collect();
            let table = crate::data::load(Path::new(&d.data_path), &text)?;
            if table.sha256 != d.summary.data_sha256 {
                return Err(Error::Input(format!(
                    "{} has SHA-256 {} but run {} used {}; the data changed, so candidate {c} cannot be refitted as it was",
                    d.data_path, table.sha256, a.run, d.summary.data_sha256
                )));
            }
            crate::runner::refit(&spec, &table, c as usize)?
        }
    };
    let text_cols = model.text_columns();
    let text: Vec<&str> = text_cols.iter().map(String::as_str).collect();
    let input = crate::data::load(&a.input, &text)?;
    let (pred, notes) = model.predict(&input)?;
    for n in &notes {
        warn(n);
    }
    write_predictions(&a.output, &input, model.key.as_deref(), &pred)?;
    eprintln!(
        "wrote {} predictions of run {} candidate {} to {}",
        pred.len(),
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
            header.push(k.name.clone());
        }
        header.push("prediction".to_string());
        w.write_record(&header)
            .map_err(|e| io(std::io::Error::other(e)))?;
        for (i, p) in pred.iter().enumerate() {
            let mut rec = Vec::new();
            if let Some(k) = key_col {
                rec.push(k.text(i));
            }
            rec.push(format!("{p}"));
            w.write_record(&rec)
                .map_err(|e| io(std::io::Error::other(e)))?;
        }
        w.flush().map_err(io)?;
    }
    std::fs::rename(&tmp, path).map_err(io)
}

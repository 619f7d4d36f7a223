//! External command families: a model fitted by the user's own program, run without a shell.
//!
//! For each fit, a fresh private folder gets `fit.csv` (the feature columns and the target of the
//! fitting rows) and `score.csv` (the feature columns only: never the target, never the key);
//! the command is told where they are, and where to write its predictions, in environment
//! variables, and runs in the spec file's folder. probity validates what comes back.
//!
//! This is the one module that starts processes; it measures elapsed time only to enforce the
//! timeout (nothing timed is stored) and takes its scratch folder from the system's temporary
//! directory.

use crate::data::Table;
use crate::models::Params;
use crate::spec::CommandSpec;
use sha2::{Digest, Sha256};
use std::io::Read;
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// One fit-and-predict job.
pub struct Job<'a> {
    pub cmd: &'a CommandSpec,
    pub params: &'a Params,
    pub seed: u64,
    pub target: &'a str,
    /// Feature column names, as in the data file.
    pub features: &'a [String],
    /// Class labels (classification), empty for regression.
    pub classes: &'a [String],
}

/// SHA-256 (hex) of each input file of a command family, in the order written.
pub fn input_hashes(cmd: &CommandSpec) -> Result<Vec<(String, String)>, String> {
    cmd.inputs
        .iter()
        .map(|(text, path)| {
            let bytes = std::fs::read(path)
                .map_err(|e| format!("cannot read input {}: {e}", path.display()))?;
            Ok((text.clone(), crate::spec::hex(&Sha256::digest(&bytes))))
        })
        .collect()
}

fn write_csv(
    path: &Path,
    header: &[String],
    table: &Table,
    rows: &[usize],
    cols: &[usize],
) -> Result<(), String> {
    let mut w = csv::Writer::from_path(path)
        .map_err(|e| format!("cannot write {}: {e}", path.display()))?;
    w.write_record(header).map_err(|e| e.to_string())?;
    for &r in rows {
        w.write_record(cols.iter().map(|&c| table.columns[c].text(r)))
            .map_err(|e| e.to_string())?;
    }
    w.flush().map_err(|e| e.to_string())
}

fn columns(table: &Table, names: &[String]) -> Result<Vec<usize>, String> {
    names
        .iter()
        .map(|n| {
            table
                .index_of(n)
                .ok_or_else(|| format!("the rows to score lack column '{n}'"))
        })
        .collect()
}

/// The last `n` lines of a text, for failure messages.
fn tail(text: &str, n: usize) -> String {
    let lines: Vec<&str> = text.lines().collect();
    lines[lines.len().saturating_sub(n)..].join(" | ")
}

/// Fit on `fit_rows` of `fit_table`, predict `score_rows` of `score_table`. Returns the
/// predictions (regression: one per row; classification: n x classes probabilities), or why the
/// command failed, in one line.
pub fn fit_predict(
    job: &Job,
    fit_table: &Table,
    fit_rows: &[usize],
    score_table: &Table,
    score_rows: &[usize],
) -> Result<Vec<f64>, String> {
    let dir = tempfile::Builder::new()
        .prefix("probity-command-")
        .tempdir()
        .map_err(|e| format!("cannot make a scratch folder: {e}"))?;
    let fit_path = dir.path().join("fit.csv");
    let score_path = dir.path().join("score.csv");
    let out_path = dir.path().join("predictions.csv");
    let err_path = dir.path().join("stderr.txt");
    let mut fit_names = job.features.to_vec();
    fit_names.push(job.target.to_string());
    write_csv(
        &fit_path,
        &fit_names,
        fit_table,
        fit_rows,
        &columns(fit_table, &fit_names)?,
    )?;
    // The score file holds the features only: the target and the key never leave probity.
    write_csv(
        &score_path,
        job.features,
        score_table,
        score_rows,
        &columns(score_table, job.features)?,
    )?;
    let params: serde_json::Map<String, serde_json::Value> = job
        .params
        .iter()
        .map(|(k, v)| (k.clone(), v.to_json()))
        .collect();
    let stderr = std::fs::File::create(&err_path)
        .map_err(|e| format!("cannot make {}: {e}", err_path.display()))?;
    let mut child = Command::new(&job.cmd.run[0])
        .args(&job.cmd.run[1..])
        .current_dir(&job.cmd.workdir)
        .env("PROBITY_FIT", &fit_path)
        .env("PROBITY_SCORE", &score_path)
        .env("PROBITY_OUT", &out_path)
        .env("PROBITY_SEED", job.seed.to_string())
        .env(
            "PROBITY_PARAMS",
            serde_json::Value::Object(params).to_string(),
        )
        .env("PROBITY_TARGET", job.target)
        .env(
            "PROBITY_TASK",
            if job.classes.is_empty() {
                "regression"
            } else {
                "classification"
            },
        )
        .env(
            "PROBITY_CLASSES",
            serde_json::json!(job.classes).to_string(),
        )
        .stdin(Stdio::null())
        .stdout(Stdio::null())
        .stderr(stderr)
        .spawn()
        .map_err(|e| format!("cannot start {:?}: {e}", job.cmd.run[0]))?;
    let start = Instant::now();
    let limit = Duration::from_secs(job.cmd.timeout);
    let status = loop {
        match child.try_wait() {
            Ok(Some(s)) => break s,
            Ok(None) if start.elapsed() > limit => {
                let _ = child.kill();
                let _ = child.wait();
                return Err(format!(
                    "timed out after {} s and was stopped",
                    job.cmd.timeout
                ));
            }
            Ok(None) => std::thread::sleep(Duration::from_millis(5)),
            Err(e) => return Err(format!("cannot wait for the command: {e}")),
        }
    };
    let mut err_text = String::new();
    if let Ok(mut f) = std::fs::File::open(&err_path) {
        let _ = f.read_to_string(&mut err_text);
    }
    if !status.success() {
        let code = status.code().map_or("killed by a signal".to_string(), |c| {
            format!("exit status {c}")
        });
        return Err(format!("{code}; stderr: {}", tail(&err_text, 5)));
    }
    read_predictions(&out_path, score_rows.len(), job.classes)
}

/// Read and check the predictions file: row count, numbers, no NaN, probabilities in [0, 1]
/// summing to 1 within 1e-6, predicted classes among the classes.
fn read_predictions(path: &Path, n: usize, classes: &[String]) -> Result<Vec<f64>, String> {
    let mut rdr =
        csv::Reader::from_path(path).map_err(|e| format!("wrote no predictions file ({e})"))?;
    let header: Vec<String> = rdr
        .headers()
        .map_err(|e| format!("unreadable predictions: {e}"))?
        .iter()
        .map(|h| h.trim().to_string())
        .collect();
    let pos = |name: &str| {
        header.iter().position(|h| h == name).ok_or_else(|| {
            format!(
                "predictions lack a '{name}' column (header: {})",
                header.join(",")
            )
        })
    };
    let pred_col = pos("prediction")?;
    let prob_cols: Vec<usize> = classes
        .iter()
        .map(|c| pos(&format!("p_{c}")))
        .collect::<Result<_, _>>()?;
    let mut out = Vec::with_capacity(n * classes.len().max(1));
    let mut rows = 0;
    for (i, rec) in rdr.records().enumerate() {
        let rec = rec.map_err(|e| format!("unreadable predictions at row {}: {e}", i + 1))?;
        rows += 1;
        let num = |c: usize| -> Result<f64, String> {
            let t = rec.get(c).unwrap_or("").trim();
            match t.parse::<f64>() {
                Ok(v) if v.is_finite() => Ok(v),
                _ => Err(format!(
                    "prediction row {} holds '{t}', not a finite number",
                    i + 1
                )),
            }
        };
        if classes.is_empty() {
            out.push(num(pred_col)?);
        } else {
            let label = rec.get(pred_col).unwrap_or("").trim();
            if !classes.iter().any(|c| c == label) {
                return Err(format!(
                    "prediction row {} names class '{label}', which is not one of {}",
                    i + 1,
                    classes.join(", ")
                ));
            }
            let mut sum = 0.0;
            for &c in &prob_cols {
                let p = num(c)?;
                if !(0.0..=1.0).contains(&p) {
                    return Err(format!(
                        "prediction row {} has a probability {p} outside [0, 1]",
                        i + 1
                    ));
                }
                sum += p;
                out.push(p);
            }
            if (sum - 1.0).abs() > 1e-6 {
                return Err(format!(
                    "prediction row {}: the probabilities sum to {sum}, not 1",
                    i + 1
                ));
            }
        }
    }
    if rows != n {
        return Err(format!(
            "wrote {rows} prediction rows for {n} rows to score"
        ));
    }
    Ok(out)
}

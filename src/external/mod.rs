//! External command families: a model fitted by the user's own program, run without a shell.
//!
//! For each fit, a fresh private folder gets `fit.csv` (the feature columns and the target of the
//! fitting rows) and `score.csv` (the feature columns only: never the target, never the key),
//! their cells as written in the data file; the command is told where they are, and where to
//! write its predictions, in environment variables, and runs in that folder, in its box
//! (`sandbox`): it reads the system, its declared inputs (named in its argv by absolute path)
//! and the folder, and nothing of the data file. probity validates what comes back.
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

pub mod sandbox;

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

/// SHA-256 (hex) of each input of a command family, in the order written: a file's bytes, or
/// for a folder, every entry beneath it in byte order of its relative path (`tree_hash`).
pub fn input_hashes(cmd: &CommandSpec) -> Result<Vec<(String, String)>, String> {
    cmd.inputs
        .iter()
        .map(|(text, path)| {
            let hash = if path.is_dir() {
                tree_hash(path)?
            } else {
                file_hash(path)?
            };
            Ok((text.clone(), hash))
        })
        .collect()
}

/// SHA-256 (hex) of a regular file's bytes, read in blocks (an input may be large); anything
/// else (a pipe, a device) is refused rather than read.
fn file_hash(path: &Path) -> Result<String, String> {
    if let Some(kind) = crate::files::not_regular(path) {
        return Err(format!("input {} is {kind}, not a file", path.display()));
    }
    let mut f = std::fs::File::open(path)
        .map_err(|e| format!("cannot read input {}: {e}", path.display()))?;
    let mut h = Sha256::new();
    let mut buf = vec![0u8; 1 << 16];
    loop {
        let n = f
            .read(&mut buf)
            .map_err(|e| format!("cannot read input {}: {e}", path.display()))?;
        if n == 0 {
            break;
        }
        h.update(&buf[..n]);
    }
    Ok(crate::spec::hex(&h.finalize()))
}

/// A folder's fingerprint: SHA-256 over one line per entry beneath it, sorted by relative
/// path: `f <path> <sha256 of the bytes>` for a file, `l <path> <target>` for a symbolic link
/// (not followed), `d <path>` for a folder; each path and target written as a JSON string, so
/// that no name can pass for a line break. Pipes, devices and sockets are refused.
fn tree_hash(root: &Path) -> Result<String, String> {
    let mut lines: Vec<(Vec<u8>, String)> = Vec::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(dir) = stack.pop() {
        let rd = std::fs::read_dir(&dir)
            .map_err(|e| format!("cannot read input folder {}: {e}", dir.display()))?;
        for entry in rd {
            let entry =
                entry.map_err(|e| format!("cannot read input folder {}: {e}", dir.display()))?;
            let path = entry.path();
            let rel = path
                .strip_prefix(root)
                .unwrap_or(&path)
                .to_string_lossy()
                .into_owned();
            let t = entry
                .file_type()
                .map_err(|e| format!("cannot read {}: {e}", path.display()))?;
            let name = serde_json::Value::String(rel.clone()).to_string();
            let line = if t.is_symlink() {
                let to = std::fs::read_link(&path)
                    .map_err(|e| format!("cannot read {}: {e}", path.display()))?;
                let to = serde_json::Value::String(to.to_string_lossy().into_owned());
                format!("l {name} {to}")
            } else if t.is_dir() {
                stack.push(path.clone());
                format!("d {name}")
            } else {
                format!("f {name} {}", file_hash(&path)?)
            };
            lines.push((rel.into_bytes(), line));
        }
    }
    lines.sort();
    let mut h = Sha256::new();
    for (_, line) in &lines {
        h.update(line.as_bytes());
        h.update(b"\n");
    }
    Ok(crate::spec::hex(&h.finalize()))
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
    // Cells as written in the file, not as the parsed numbers print (`29.60` stays `29.60`).
    let raw = table.raw()?;
    for &r in rows {
        let rec = raw.record(r)?;
        w.write_record(cols.iter().map(|&c| rec.get(c).unwrap_or("")))
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
    // The command's stderr goes to a file of probity's own, outside the scratch folder: one
    // the command could replace (by a link to the data file, say) would be read back.
    let own = tempfile::Builder::new()
        .prefix("probity-stderr-")
        .tempdir()
        .map_err(|e| format!("cannot make a folder for the command's stderr: {e}"))?;
    let err_path = own.path().join("stderr.txt");
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
    // The command runs in its scratch folder: a path in its argv that names a declared input
    // (the program's own included) is given absolute.
    let absolute = |arg: &String| match job.cmd.inputs.iter().find(|(t, _)| t == arg) {
        Some((_, p)) => p.as_os_str().to_os_string(),
        None => arg.into(),
    };
    let inputs: serde_json::Map<String, serde_json::Value> = job
        .cmd
        .inputs
        .iter()
        .map(|(t, p)| (t.clone(), p.to_string_lossy().into_owned().into()))
        .collect();
    // In a session of its own (`sandbox::apply`), so that what it leaves behind can be ended
    // with it.
    let mut command = Command::new(absolute(&job.cmd.run[0]));
    let boxed = sandbox::boxed(job.cmd);
    let grants = boxed.then(|| {
        let mut protected = vec![
            fit_table.path.clone(),
            score_table.path.clone(),
            job.cmd.workdir.clone(),
        ];
        protected.extend(std::env::current_dir().ok());
        sandbox::grants(job.cmd, dir.path(), &protected)
    });
    sandbox::apply(&mut command, grants.as_ref())?;
    command
        .args(job.cmd.run[1..].iter().map(absolute))
        .current_dir(dir.path())
        .env("TMPDIR", dir.path())
        .env(
            "PROBITY_INPUTS",
            serde_json::Value::Object(inputs).to_string(),
        )
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
        .stderr(stderr);
    let mut child = sandbox::spawn(&mut command)
        .map_err(|e| format!("cannot start {:?}: {e}", job.cmd.run[0]))?;
    let start = Instant::now();
    let limit = Duration::from_secs(job.cmd.timeout);
    let status = loop {
        match child.try_wait() {
            Ok(Some(s)) => break s,
            Ok(None) if start.elapsed() > limit => {
                let _ = child.kill();
                let _ = child.wait();
                sandbox::ended(child.id());
                sandbox::end_group(child.id());
                return Err(format!(
                    "timed out after {} s and was stopped",
                    job.cmd.timeout
                ));
            }
            Ok(None) => std::thread::sleep(Duration::from_millis(5)),
            Err(e) => {
                let _ = child.kill();
                let _ = child.wait();
                sandbox::ended(child.id());
                sandbox::end_group(child.id());
                return Err(format!("cannot wait for the command: {e}"));
            }
        }
    };
    // Whatever the command left running in the background ends with it.
    sandbox::ended(child.id());
    sandbox::end_group(child.id());
    let err_text = last_bytes(&err_path, 64 << 10);
    if !status.success() {
        let code = status.code().map_or("killed by a signal".to_string(), |c| {
            format!("exit status {c}")
        });
        let boxed = if boxed {
            " (the command ran in its box: it reads the system's folders, its inputs and its scratch folder only; see docs/box.md)"
        } else {
            ""
        };
        return Err(format!("{code}; stderr: {}{boxed}", tail(&err_text, 5)));
    }
    read_predictions(&out_path, score_rows.len(), job.classes)
}

/// The last `max` bytes of a file of probity's own, as text.
fn last_bytes(path: &Path, max: u64) -> String {
    use std::io::{Seek, SeekFrom};
    let Ok(mut f) = std::fs::File::open(path) else {
        return String::new();
    };
    let len = f.metadata().map_or(0, |m| m.len());
    let _ = f.seek(SeekFrom::Start(len.saturating_sub(max)));
    let mut bytes = Vec::new();
    let _ = f.take(max).read_to_end(&mut bytes);
    String::from_utf8_lossy(&bytes).into_owned()
}

/// Open the predictions file the command wrote, as a regular file only: not through a link
/// (it could name the data file), not a pipe or a device (they could block or never end), and
/// not larger than `max` bytes.
fn open_written(path: &Path, max: u64) -> Result<std::fs::File, String> {
    let mut opts = std::fs::OpenOptions::new();
    opts.read(true);
    #[cfg(target_os = "linux")]
    std::os::unix::fs::OpenOptionsExt::custom_flags(&mut opts, libc::O_NOFOLLOW | libc::O_NONBLOCK);
    let f = opts.open(path).map_err(|e| {
        if e.kind() == std::io::ErrorKind::NotFound {
            format!("wrote no predictions file ({e})")
        } else {
            format!("wrote a predictions file that is not a plain file ({e})")
        }
    })?;
    let meta = f
        .metadata()
        .map_err(|e| format!("unreadable predictions: {e}"))?;
    if !meta.is_file() {
        return Err("wrote a predictions file that is not a plain file".into());
    }
    if meta.len() > max {
        return Err(format!(
            "wrote a predictions file of {} bytes, more than {max} for its rows",
            meta.len()
        ));
    }
    Ok(f)
}

/// Read and check the predictions file: row count, numbers, no NaN, probabilities in [0, 1]
/// summing to 1 within 1e-6, predicted classes among the classes.
fn read_predictions(path: &Path, n: usize, classes: &[String]) -> Result<Vec<f64>, String> {
    // Room for 256 bytes a cell: far more than any number needs.
    let max = (1u64 << 20) + (n as u64) * (classes.len() as u64 + 1) * 256;
    let mut rdr = csv::Reader::from_reader(open_written(path, max)?);
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

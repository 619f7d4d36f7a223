//! `probity pack RUN... --out FILE`: write runs (with their reveals and notes) and their chain
//! hashes to a self-contained bundle a teammate can merge.

use super::{Global, open_reading};
use crate::error::{Error, Result};
use std::path::PathBuf;

/// Write runs, their reveals and notes, with chain hashes, to a bundle file
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run ids
    #[arg(required = true)]
    pub runs: Vec<i64>,
    /// The bundle file to write (JSON)
    #[arg(long, value_name = "FILE")]
    pub out: PathBuf,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let ledger = open_reading(g)?;
    for r in &a.runs {
        if ledger.run(*r)?.is_none() {
            return Err(Error::Input(format!(
                "no run {r}; `probity history` lists the runs"
            )));
        }
    }
    let (_, breaks) = ledger.verify()?;
    if let Some(b) = breaks.first() {
        return Err(Error::Integrity(format!(
            "this ledger's chain is broken ({} {}: {}); run `probity audit --verify` before sharing",
            b.kind, b.id, b.what
        )));
    }
    let bundle = ledger.pack(
        &a.runs,
        &chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
    )?;
    let n = bundle["entries"].as_array().map_or(0, Vec::len);
    let text = serde_json::to_string_pretty(&bundle).map_err(|e| Error::Internal(e.to_string()))?;
    std::fs::write(&a.out, text).map_err(|e| Error::Io {
        action: "cannot write bundle",
        path: a.out.clone(),
        source: e,
    })?;
    eprintln!(
        "wrote {n} entries (runs {:?} with their reveals and notes) to {}",
        a.runs,
        a.out.display()
    );
    Ok(0)
}

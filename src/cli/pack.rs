//! `probity pack RUN... --out FILE`: write runs (with their reveals and notes, and every run
//! that consulted a partition they ship) and their chain hashes to a self-contained bundle a
//! teammate can merge, signed with the packer's key.

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
    #[command(flatten)]
    pub key: super::key::KeyPath,
    /// Write the bundle without a signature (its receiver must then merge it with
    /// --allow-unverified)
    #[arg(long)]
    pub unsigned: bool,
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
    // The key first: a missing key stops before any work.
    let key =
        if a.unsigned {
            None
        } else {
            Some(crate::signing::Key::load(&a.key.resolve()?).map_err(|e| match e {
            Error::Input(m) => Error::Input(format!(
                "{m}, or pass --unsigned (its receiver must then merge with --allow-unverified)"
            )),
            other => other,
        })?)
        };
    let (mut bundle, runs) = ledger.pack(
        &a.runs,
        &chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
    )?;
    if let Some(key) = &key {
        let public = key.public_hex();
        let message = crate::signing::signed_message(&bundle, &key.name, &public)
            .ok_or_else(|| Error::Internal("a packed bundle lacks a part it signs".into()))?;
        bundle["signature"] = serde_json::json!({
            "signer": key.name,
            "public_key": public,
            "signature": key.sign(&message),
        });
    }
    let extra: Vec<i64> = runs
        .iter()
        .copied()
        .filter(|r| !a.runs.contains(r))
        .collect();
    if !extra.is_empty() {
        eprintln!(
            "also packed runs {extra:?}: they revealed or developed on a partition the bundle ships, or bring one that its reveals or development uses count against, and a bundle carries every consultation of its partitions"
        );
    }
    let n = bundle["entries"].as_array().map_or(0, Vec::len);
    let text = serde_json::to_string_pretty(&bundle).map_err(|e| Error::Internal(e.to_string()))?;
    std::fs::write(&a.out, text).map_err(|e| Error::Io {
        action: "cannot write bundle",
        path: a.out.clone(),
        source: e,
    })?;
    eprintln!(
        "wrote {n} entries (runs {runs:?} with their reveals and notes) to {}, {}",
        a.out.display(),
        match &key {
            Some(k) => format!("signed by {:?} (key {})", k.name, k.public_hex()),
            None => "unsigned".to_string(),
        }
    );
    Ok(0)
}

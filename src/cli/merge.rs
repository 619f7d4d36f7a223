//! `probity merge FILE`: merge a teammate's bundle. Every entry is verified; entries already
//! here are skipped; two different histories are refused (exit 4). Nothing in a bundle is ever
//! run.

use super::{Global, open_for_write};
use crate::error::{Error, Result};
use std::path::PathBuf;

/// Merge a bundle written by `probity pack` into this ledger
#[derive(clap::Args, Debug)]
pub struct Args {
    /// The bundle file
    pub file: PathBuf,
    /// Merge a bundle that is unsigned or signed with a key this ledger does not trust (the
    /// merge is recorded as unverified)
    #[arg(long)]
    pub allow_unverified: bool,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    if let Some(kind) = crate::files::not_regular(&a.file) {
        return Err(Error::Input(format!(
            "{}: is {kind}, not a bundle file; pass the path of a file `probity pack` wrote",
            a.file.display()
        )));
    }
    let text = std::fs::read_to_string(&a.file).map_err(|e| Error::Io {
        action: "cannot read bundle",
        path: a.file.clone(),
        source: e,
    })?;
    let bundle: serde_json::Value = serde_json::from_str(&text).map_err(|e| {
        Error::Input(format!(
            "{}: not a JSON bundle ({e}); make one with `probity pack`",
            a.file.display()
        ))
    })?;
    let mut ledger = open_for_write(g)?;
    let m = ledger.merge(&bundle, a.allow_unverified, &super::reveal::who())?;
    let by = match &m.signer {
        crate::ledger::bundle::Signer::Trusted {
            name,
            key,
            trusted_as,
        } => format!("signed by {name:?} with key {key}, trusted here as {trusted_as:?}"),
        crate::ledger::bundle::Signer::Untrusted { name, key } => format!(
            "signed by {name:?} with key {key}, which this ledger does not trust (merged with --allow-unverified, recorded)"
        ),
        crate::ledger::bundle::Signer::Unsigned => {
            "unsigned (merged with --allow-unverified, recorded)".to_string()
        }
    };
    eprintln!(
        "merged {} entries from {} ({} already present); {by}",
        m.merged,
        a.file.display(),
        m.skipped
    );
    Ok(0)
}

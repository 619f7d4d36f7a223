//! `probity note RUN TEXT`: add a note to a run as a new chained entry (history is never edited;
//! a correction is a note).

use super::{Global, open_existing, out};
use crate::error::{Error, Result};

/// Add a note to a run (a new ledger entry; nothing is ever edited)
#[derive(clap::Args, Debug)]
pub struct Args {
    /// Run id
    pub run: i64,
    /// The note
    pub text: String,
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    let mut ledger = open_existing(g)?;
    if ledger.run(a.run)?.is_none() {
        return Err(Error::Input(format!(
            "no run {}; `probity history` lists the runs",
            a.run
        )));
    }
    if a.text.trim().is_empty() {
        return Err(Error::Input("the note is empty".into()));
    }
    let at = chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true);
    let id = ledger.write_note(a.run, &at, &super::user(), &a.text)?;
    out(&format!("note {id} added to run {}\n", a.run))?;
    Ok(0)
}

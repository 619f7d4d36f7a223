//! The crate's one error type and its exit codes.
//!
//! Every failure a user can cause maps to exit code 2 and carries enough context (file, line,
//! column, CSV row, spec key) to be fixed without reading the source.

use std::path::PathBuf;

/// Result alias used throughout the library.
pub type Result<T> = std::result::Result<T, Error>;

/// Where in a text file something went wrong (1-based).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Loc {
    pub line: usize,
    pub col: usize,
}

impl Loc {
    /// Line and column of a byte offset in `text`.
    pub fn of_offset(text: &str, offset: usize) -> Loc {
        Lines::new(text).loc(offset)
    }
}

/// Line starts of a text, so that many positions cost a binary search each rather than a
/// scan from the start.
pub struct Lines<'a> {
    text: &'a str,
    starts: Vec<usize>,
    // The last column asked for (line start, offset, column): columns asked in increasing
    // order along one long line are counted on from there.
    last: std::cell::Cell<(usize, usize, usize)>,
}

impl<'a> Lines<'a> {
    pub fn new(text: &'a str) -> Lines<'a> {
        let mut starts = vec![0];
        starts.extend(
            text.bytes()
                .enumerate()
                .filter(|(_, b)| *b == b'\n')
                .map(|(i, _)| i + 1),
        );
        Lines {
            text,
            starts,
            last: std::cell::Cell::new((0, 0, 1)),
        }
    }

    /// Line and column of a byte offset (one past the text's end at most).
    pub fn loc(&self, offset: usize) -> Loc {
        let mut offset = offset.min(self.text.len());
        while !self.text.is_char_boundary(offset) {
            offset -= 1;
        }
        let line = self.starts.partition_point(|&s| s <= offset);
        let start = self.starts[line - 1];
        let (l_start, l_off, l_col) = self.last.get();
        let col = if l_start == start && l_off <= offset {
            l_col + self.text[l_off..offset].chars().count()
        } else {
            self.text[start..offset].chars().count() + 1
        };
        self.last.set((start, offset, col));
        Loc { line, col }
    }
}

/// All errors of the library. The CLI adds nothing but the `probity:` prefix.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// A spec file problem, with its position when known.
    #[error("{}: {msg}", fmt_place(file, *loc))]
    Spec {
        file: PathBuf,
        loc: Option<Loc>,
        msg: String,
    },

    /// A data file problem; `line` is the CSV line (header = line 1).
    #[error("{}: {msg}", fmt_data_place(file, *line, column.as_deref()))]
    Data {
        file: PathBuf,
        line: Option<u64>,
        column: Option<String>,
        msg: String,
    },

    /// Bad usage or bad input that is not tied to one file position.
    #[error("{0}")]
    Input(String),

    /// A file that could not be read or written.
    #[error("{action} {}: {source}", path.display())]
    Io {
        action: &'static str,
        path: PathBuf,
        source: std::io::Error,
    },

    /// A ledger that cannot be used as it is (not SQLite, newer schema, missing folder).
    #[error("ledger {}: {msg}", path.display())]
    LedgerRefused { path: PathBuf, msg: String },

    /// An SQLite failure that the user did not cause.
    #[error("ledger: {context}: {source}")]
    Ledger {
        context: String,
        source: rusqlite::Error,
    },

    /// The ledger's history does not add up: a broken chain, an altered bundle, or two
    /// different histories (exit 4).
    #[error("ledger integrity: {0}")]
    Integrity(String),

    /// A bug or an impossible state.
    #[error("internal error: {0}")]
    Internal(String),
}

fn fmt_place(file: &std::path::Path, loc: Option<Loc>) -> String {
    match loc {
        Some(l) => format!("{}:{}:{}", file.display(), l.line, l.col),
        None => file.display().to_string(),
    }
}

fn fmt_data_place(file: &std::path::Path, line: Option<u64>, column: Option<&str>) -> String {
    let mut s = file.display().to_string();
    if let Some(l) = line {
        s.push_str(&format!(":{l}"));
    }
    if let Some(c) = column {
        s.push_str(&format!(" (column '{c}')"));
    }
    s
}

impl Error {
    /// The process exit code this error maps to (see the README's table).
    pub fn exit_code(&self) -> i32 {
        match self {
            Error::Spec { .. }
            | Error::Data { .. }
            | Error::Input(_)
            | Error::Io { .. }
            | Error::LedgerRefused { .. } => 2,
            Error::Integrity(_) => 4,
            Error::Ledger { .. } | Error::Internal(_) => 1,
        }
    }

    pub(crate) fn spec(file: &std::path::Path, loc: Option<Loc>, msg: impl Into<String>) -> Error {
        Error::Spec {
            file: file.to_path_buf(),
            loc,
            msg: msg.into(),
        }
    }

    pub(crate) fn data(
        file: &std::path::Path,
        line: Option<u64>,
        column: Option<&str>,
        msg: impl Into<String>,
    ) -> Error {
        Error::Data {
            file: file.to_path_buf(),
            line,
            column: column.map(str::to_string),
            msg: msg.into(),
        }
    }
}

/// Levenshtein distance, for "did you mean" suggestions.
pub fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut cur = vec![i + 1; b.len() + 1];
        for (j, cb) in b.iter().enumerate() {
            let sub = prev[j] + usize::from(ca != *cb);
            cur[j + 1] = sub.min(prev[j + 1] + 1).min(cur[j] + 1);
        }
        prev = cur;
    }
    prev[b.len()]
}

/// The candidate closest to `word`, when it is close enough to be a plausible typo.
pub fn nearest<'a>(word: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    let mut best: Option<(usize, &str)> = None;
    for c in candidates {
        let d = edit_distance(&word.to_lowercase(), &c.to_lowercase());
        if best.is_none_or(|(bd, _)| d < bd) {
            best = Some((d, c));
        }
    }
    best.filter(|(d, c)| *d <= 2.max(c.len() / 3))
        .map(|(_, c)| c)
}

/// A suffix like ` (did you mean 'x'?)`, or nothing.
pub fn did_you_mean<'a>(word: &str, candidates: impl IntoIterator<Item = &'a str>) -> String {
    match nearest(word, candidates) {
        Some(c) => format!(" (did you mean '{c}'?)"),
        None => String::new(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn loc_counts_lines_and_columns_from_one() {
        let t = "a = 1\nbb = 2\n";
        assert_eq!(Loc::of_offset(t, 0), Loc { line: 1, col: 1 });
        assert_eq!(Loc::of_offset(t, 6), Loc { line: 2, col: 1 });
        assert_eq!(Loc::of_offset(t, 9), Loc { line: 2, col: 4 });
    }

    #[test]
    fn indexed_positions_match_a_scan_in_any_order() {
        // Columns count characters, not bytes; offsets are asked out of order as well.
        let t = "naïve = \"ü\"\n\nkey = 'é' # ß\nlast";
        let scan = |offset: usize| {
            let before = &t[..offset];
            let line = before.matches('\n').count() + 1;
            let start = before.rfind('\n').map(|i| i + 1).unwrap_or(0);
            Loc {
                line,
                col: before[start..].chars().count() + 1,
            }
        };
        let lines = Lines::new(t);
        let offsets: Vec<usize> = (0..=t.len()).filter(|&o| t.is_char_boundary(o)).collect();
        for &o in offsets
            .iter()
            .chain(offsets.iter().rev())
            .chain(offsets.iter().step_by(3))
        {
            assert_eq!(lines.loc(o), scan(o), "offset {o}");
        }
        assert_eq!(lines.loc(t.len() + 10), scan(t.len()));
    }

    #[test]
    fn nearest_suggests_typos_only() {
        assert_eq!(nearest("lamda", ["lambda", "k", "degree"]), Some("lambda"));
        assert_eq!(nearest("zzzzzz", ["lambda", "k"]), None);
        assert_eq!(edit_distance("kitten", "sitting"), 3);
    }
}

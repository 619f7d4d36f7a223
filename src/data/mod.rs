//! CSV loading into typed columns, and the SHA-256 fingerprint of the file.
//!
//! A column is numeric when its non-empty cells are numbers, text (categorical) otherwise or
//! when the caller forces it. An empty cell is missing. Errors name the CSV line and column.

use crate::error::{Error, Result, did_you_mean};
use sha2::{Digest, Sha256};
use std::path::{Path, PathBuf};

mod fast;
pub mod identity;

/// Bytes read per block by the fast loader.
const FAST_BLOCK: usize = 8 << 20;

/// Marker for a missing text cell.
pub const MISSING_CODE: u32 = u32::MAX;

/// The values of one column.
#[derive(Debug, Clone, PartialEq)]
pub enum Values {
    /// Numbers; NaN marks a missing cell (NaN text in the file is refused, so no clash).
    Numeric(Vec<f64>),
    /// Codes into `levels` (sorted by byte order); `MISSING_CODE` marks a missing cell.
    Text {
        codes: Vec<u32>,
        levels: Vec<String>,
    },
}

#[derive(Debug, Clone, PartialEq)]
pub struct Column {
    pub name: String,
    pub values: Values,
}

impl Column {
    /// A row's value as a number that orders like the column's values (text by its levels'
    /// byte order); `None` for a missing cell.
    pub fn ordered(&self, row: usize) -> Option<f64> {
        match &self.values {
            Values::Numeric(v) => Some(v[row]).filter(|x| !x.is_nan()),
            Values::Text { codes, .. } => Some(codes[row])
                .filter(|&c| c != MISSING_CODE)
                .map(f64::from),
        }
    }

    pub fn is_missing(&self, row: usize) -> bool {
        match &self.values {
            Values::Numeric(v) => v[row].is_nan(),
            Values::Text { codes, .. } => codes[row] == MISSING_CODE,
        }
    }
    /// `text` into a reused buffer (cleared first).
    pub fn write_text(&self, row: usize, buf: &mut String) {
        buf.clear();
        self.push_text(row, buf);
    }

    /// `text` appended to `buf`.
    pub fn push_text(&self, row: usize, buf: &mut String) {
        match &self.values {
            Values::Numeric(v) if v[row].is_nan() => {}
            Values::Numeric(v) => display_f64(v[row], buf),
            Values::Text { codes, levels } => {
                if let Some(l) = levels.get(codes[row] as usize) {
                    buf.push_str(l);
                }
            }
        }
    }

    /// Whether any cell of the column is missing.
    pub fn has_missing(&self) -> bool {
        match &self.values {
            Values::Numeric(v) => v.iter().any(|x| x.is_nan()),
            Values::Text { codes, .. } => codes.contains(&MISSING_CODE),
        }
    }

    /// The cell as text (numbers in shortest round-trip form), or "" when missing.
    pub fn text(&self, row: usize) -> String {
        match &self.values {
            Values::Numeric(v) if v[row].is_nan() => String::new(),
            Values::Numeric(v) => format!("{}", v[row]),
            Values::Text { codes, levels } => {
                levels.get(codes[row] as usize).cloned().unwrap_or_default()
            }
        }
    }
}

/// Append a finite number as `format!("{}", v)` writes it (the shortest digits that read back
/// to the same number, in plain decimal notation), several times faster: the digits come from
/// the Żmij algorithm (the `zmij` crate), which finds the same shortest, closest digits as the
/// standard library. A test holds the two equal on a million random numbers.
pub fn display_f64(v: f64, out: &mut String) {
    if may_tie(v) {
        // Two shortest candidates can be equally close only when the number's exact decimal
        // expansion is short; there the two algorithms round the tie differently, so the
        // standard library writes it.
        use std::fmt::Write;
        let _ = write!(out, "{v}");
        return;
    }
    let mut b = zmij::Buffer::new();
    let s = b.format_finite(v);
    // zmij's exponent is "e", a sign and one to three digits: the 'e' is third to fifth from the
    // end (a look at three bytes, where a search would cost a call per number).
    let tail = |k: usize| s.len() >= k && s.as_bytes()[s.len() - k] == b'e';
    if !(tail(3) || tail(4) || tail(5)) {
        // Plain notation already (1e-5 <= |v| < 1e16): the same text, but "12.0" is "12".
        out.push_str(s.strip_suffix(".0").unwrap_or(s));
        return;
    }
    let (neg, s) = match s.strip_prefix('-') {
        Some(rest) => (true, rest),
        None => (false, s),
    };
    let (mant, exp) = match s.split_once('e') {
        Some((m, e)) => (m, e.parse::<i32>().unwrap_or(0)),
        None => (s, 0),
    };
    let (int, frac) = mant.split_once('.').unwrap_or((mant, ""));
    // All digits, and where the decimal point falls among them.
    let mut digits = [0u8; 40];
    let mut n = 0;
    for &d in int.as_bytes().iter().chain(frac.as_bytes()) {
        if n < digits.len() {
            digits[n] = d;
            n += 1;
        }
    }
    let mut point = int.len() as i32 + exp;
    let mut lo = 0;
    while lo < n && digits[lo] == b'0' {
        lo += 1;
        point -= 1;
    }
    let mut hi = n;
    while hi > lo && digits[hi - 1] == b'0' {
        hi -= 1;
    }
    if neg {
        out.push('-');
    }
    let ds = std::str::from_utf8(&digits[lo..hi]).unwrap_or("0");
    let len = ds.len() as i32;
    if len == 0 {
        out.push('0');
    } else if point <= 0 {
        out.push_str("0.");
        (0..-point).for_each(|_| out.push('0'));
        out.push_str(ds);
    } else if point >= len {
        out.push_str(ds);
        (0..point - len).for_each(|_| out.push('0'));
    } else {
        out.push_str(&ds[..point as usize]);
        out.push('.');
        out.push_str(&ds[point as usize..]);
    }
}

/// True when `v`'s exact decimal expansion has at most 18 significant digits (so a tie between
/// two shortest renderings is possible) or `v` is an integer beyond 2^53.
fn may_tie(v: f64) -> bool {
    if v == 0.0 {
        return false;
    }
    let bits = v.to_bits();
    let biased = ((bits >> 52) & 0x7ff) as i32;
    let frac = bits & ((1u64 << 52) - 1);
    let (mut m, mut e) = if biased == 0 {
        (frac, -1074)
    } else {
        (frac | (1u64 << 52), biased - 1075)
    };
    let tz = m.trailing_zeros();
    m >>= tz;
    e += tz as i32;
    if e >= 0 {
        return v.abs() >= 9_007_199_254_740_992.0;
    }
    // m / 2^k = m * 5^k / 10^k: the significant digits are those of m * 5^k.
    let k = (-e) as u32;
    k <= 26 && u128::from(m) * 5u128.pow(k) < 1_000_000_000_000_000_000
}

/// A loaded CSV file.
#[derive(Debug, Clone)]
pub struct Table {
    pub path: PathBuf,
    /// SHA-256 of the file's bytes, hex.
    pub sha256: String,
    pub columns: Vec<Column>,
    /// CSV line number of each data row (header = 1), for error messages.
    pub lines: Vec<u64>,
    /// The cells as written, read again on first use (`raw`).
    pub(crate) raw: std::sync::OnceLock<std::result::Result<std::sync::Arc<RawRows>, String>>,
}

/// The data file's records as written, for the files handed to an external command: its cells
/// go there byte for byte (`29.60` stays `29.60`), not as the parsed numbers print. Holds the
/// file's bytes and where each record starts.
pub struct RawRows {
    bytes: Vec<u8>,
    starts: Vec<usize>,
}

impl std::fmt::Debug for RawRows {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "RawRows({} bytes, {} rows)",
            self.bytes.len(),
            self.starts.len()
        )
    }
}

impl RawRows {
    /// Read `table`'s file again; refused when its bytes no longer hash as they did when the
    /// table was read, or hold another number of records.
    fn read(table: &Table) -> std::result::Result<RawRows, String> {
        let bytes = std::fs::read(&table.path)
            .map_err(|e| format!("cannot read {} again: {e}", table.path.display()))?;
        if !table.sha256.is_empty() && crate::spec::hex(&Sha256::digest(&bytes)) != table.sha256 {
            return Err(format!(
                "{} changed while the run used it; run again on a file that stays as it is",
                table.path.display()
            ));
        }
        let skip = if bytes.starts_with(b"\xEF\xBB\xBF") {
            3
        } else {
            0
        };
        let mut rdr = csv::ReaderBuilder::new()
            .has_headers(true)
            .flexible(false)
            .from_reader(&bytes[skip..]);
        let mut rec = csv::ByteRecord::new();
        let mut starts = Vec::with_capacity(table.n_rows());
        loop {
            match rdr.read_byte_record(&mut rec) {
                Ok(true) => starts.push(skip + rec.position().map_or(0, |p| p.byte() as usize)),
                Ok(false) => break,
                Err(e) => return Err(format!("cannot read {} again: {e}", table.path.display())),
            }
        }
        if starts.len() != table.n_rows() {
            return Err(format!(
                "{} holds {} records on a second reading, not {}",
                table.path.display(),
                starts.len(),
                table.n_rows()
            ));
        }
        Ok(RawRows { bytes, starts })
    }

    /// Row `row`'s fields as written (unquoted, untrimmed).
    pub fn record(&self, row: usize) -> std::result::Result<csv::StringRecord, String> {
        let at = *self
            .starts
            .get(row)
            .ok_or_else(|| format!("no row {row}"))?;
        let mut rdr = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_reader(&self.bytes[at..]);
        let mut rec = csv::StringRecord::new();
        match rdr.read_record(&mut rec) {
            Ok(true) => Ok(rec),
            Ok(false) => Err(format!("no record at row {row}")),
            Err(e) => Err(format!("cannot read row {row} again: {e}")),
        }
    }
}

impl Table {
    /// The file's records as written (read once, on first use, and checked against `sha256`).
    pub fn raw(&self) -> std::result::Result<&RawRows, String> {
        self.raw
            .get_or_init(|| RawRows::read(self).map(std::sync::Arc::new))
            .as_ref()
            .map(|r| &**r)
            .map_err(Clone::clone)
    }

    pub fn n_rows(&self) -> usize {
        self.lines.len()
    }

    pub fn column(&self, name: &str) -> Option<&Column> {
        self.columns.iter().find(|c| c.name == name)
    }

    pub fn index_of(&self, name: &str) -> Option<usize> {
        self.columns.iter().position(|c| c.name == name)
    }

    /// " (did you mean 'x'?)" for a column name that is not in the file.
    pub fn suggest(&self, name: &str) -> String {
        did_you_mean(name, self.columns.iter().map(|c| c.name.as_str()))
    }
}

/// A row's identity for exposure accounting: 16 bytes of SHA-256 of the key column's name and
/// value when there is a key, else of every cell with its column name, columns in name order (so
/// reordering columns keeps the identity; adding or changing a column changes it).
pub type RowKey = [u8; 16];

/// How a partition's rows are identified. Identities are stored in ledgers, and each
/// partition names the version it was made with (in its stored settings), so identities are
/// compared only within one version: a table's rows are identified again the way each stored
/// partition identifies its own.
///
/// - `V1`: SHA-256 of every cell's text: `probity-row\0`, then per column in name order the
///   name, NUL, the cell's text (numbers in shortest round-trip form, missing as empty) and US
///   (0x1f).
/// - `V2`: the same rows told apart by the cells' values, without writing numbers as text:
///   `probity-row-v2\0`, then per column in name order its name (8-byte little-endian length,
///   then the bytes), then per column in name order the cell: 0x00 when missing; 0x01 and the
///   8 little-endian bytes of the IEEE-754 double for a number, and for a text cell that is a
///   number's shortest round-trip text (so a column read as text and as numbers agrees, as in
///   V1); otherwise 0x02, the text's 8-byte little-endian length and its bytes.
///
///   With a key column both hash `probity-row-key\0`, the key's name, NUL and its text.
/// - `V3` (`identity`): the feature cells only, by column name, numbers to ten significant
///   digits; and, with a key, the normalised key as a second identity. A row matches a stored
///   one when either matches.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Identity {
    V1,
    V2,
    V3,
}

/// The versions that hash every cell of a row (`row_keys`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Legacy {
    V1,
    V2,
}

impl Identity {
    /// The version a new partition uses.
    pub const CURRENT: Identity = Identity::V3;

    pub fn number(self) -> i64 {
        match self {
            Identity::V1 => 1,
            Identity::V2 => 2,
            Identity::V3 => 3,
        }
    }

    /// The version a partition's stored settings name (1 when they name none; `None` for a
    /// version this probity does not know).
    pub fn of_number(n: i64) -> Option<Identity> {
        match n {
            1 => Some(Identity::V1),
            2 => Some(Identity::V2),
            3 => Some(Identity::V3),
            _ => None,
        }
    }

    /// The whole-row version, for `row_keys`; `None` for version 3.
    pub fn legacy(self) -> Option<Legacy> {
        match self {
            Identity::V1 => Some(Legacy::V1),
            Identity::V2 => Some(Legacy::V2),
            Identity::V3 => None,
        }
    }
}

/// Whole-row identities (versions 1 and 2) of `rows`: the key's when `key` is given, else
/// every cell's.
pub fn row_keys(
    table: &Table,
    key: Option<usize>,
    rows: &[usize],
    threads: usize,
    identity: Legacy,
) -> Vec<RowKey> {
    let mut order: Vec<usize> = (0..table.columns.len()).collect();
    order.sort_by(|&a, &b| table.columns[a].name.cmp(&table.columns[b].name));
    // The header part of a V2 identity and each text level's cell bytes, once for all rows.
    let v2 = (identity == Legacy::V2 && key.is_none()).then(|| CellBytes::of(table, &order));
    // Rows are independent: cut them into one contiguous run per thread, joined in order.
    let per = rows.len().div_ceil(threads.max(1)).max(4096);
    std::thread::scope(|s| {
        let parts: Vec<_> = rows
            .chunks(per)
            .map(|part| {
                let v2 = v2.as_ref();
                let order = &order;
                s.spawn(move || match v2 {
                    Some(c) => keys_v2(table, c, order, part),
                    None => keys_of(table, key, order, part),
                })
            })
            .collect();
        parts
            .into_iter()
            // A worker's panic is a bug: carry it on, never return fewer identities.
            .flat_map(|h| h.join().unwrap_or_else(|e| std::panic::resume_unwind(e)))
            .collect()
    })
}

/// Rows per block of `keys_of`: their canonical texts are built column by column (each column
/// read in row order, not 20 scattered reads per row), then hashed row by row.
const KEY_BLOCK: usize = 128;

fn keys_of(table: &Table, key: Option<usize>, order: &[usize], rows: &[usize]) -> Vec<RowKey> {
    // Each row's canonical bytes, built in its own buffer and hashed with one call.
    let mut bytes: Vec<String> = (0..KEY_BLOCK.min(rows.len()))
        .map(|_| String::with_capacity(1024))
        .collect();
    let mut out = Vec::with_capacity(rows.len());
    for block in rows.chunks(KEY_BLOCK) {
        let bufs = &mut bytes[..block.len()];
        match key {
            Some(k) => {
                let col = &table.columns[k];
                for (b, &r) in bufs.iter_mut().zip(block) {
                    b.clear();
                    b.push_str("probity-row-key\0");
                    b.push_str(&col.name);
                    b.push('\0');
                    col.push_text(r, b);
                }
            }
            None => {
                bufs.iter_mut().for_each(|b| {
                    b.clear();
                    b.push_str("probity-row\0");
                });
                for &c in order {
                    let col = &table.columns[c];
                    for (b, &r) in bufs.iter_mut().zip(block) {
                        b.push_str(&col.name);
                        b.push('\0');
                        col.push_text(r, b);
                        b.push('\x1f');
                    }
                }
            }
        }
        out.extend(bufs.iter().map(|b| {
            let d = Sha256::digest(b.as_bytes());
            let mut k = [0u8; 16];
            k.copy_from_slice(&d[..16]);
            k
        }));
    }
    out
}

/// What V2 identities share across rows: the hash state after the header part, and per column
/// in name order, for a text column, each level's cell bytes.
struct CellBytes {
    head: Sha256,
    levels: Vec<Option<Vec<Vec<u8>>>>,
    /// The most bytes a row's cells take.
    width: usize,
}

impl CellBytes {
    fn of(table: &Table, order: &[usize]) -> CellBytes {
        let mut head = Sha256::new();
        head.update(b"probity-row-v2\0");
        for &c in order {
            let name = table.columns[c].name.as_bytes();
            head.update((name.len() as u64).to_le_bytes());
            head.update(name);
        }
        let levels: Vec<Option<Vec<Vec<u8>>>> = order
            .iter()
            .map(|&c| match &table.columns[c].values {
                Values::Numeric(_) => None,
                Values::Text { levels, .. } => Some(levels.iter().map(|l| text_cell(l)).collect()),
            })
            .collect();
        let width = levels
            .iter()
            .map(|l| match l {
                None => 9,
                Some(ls) => ls.iter().map(Vec::len).max().unwrap_or(1),
            })
            .sum();
        CellBytes {
            head,
            levels,
            width,
        }
    }
}

/// A V2 cell for a text value: a number's when the text is one's shortest round-trip form.
fn text_cell(text: &str) -> Vec<u8> {
    if text.is_empty() {
        return vec![0];
    }
    if let Ok(x) = text.parse::<f64>()
        && x.is_finite()
    {
        let mut shortest = String::new();
        display_f64(x, &mut shortest);
        if shortest == text {
            let mut out = vec![1];
            out.extend_from_slice(&x.to_bits().to_le_bytes());
            return out;
        }
    }
    let mut out = vec![2];
    out.extend_from_slice(&(text.len() as u64).to_le_bytes());
    out.extend_from_slice(text.as_bytes());
    out
}

/// V2 identities without a key column: each row's cells are written column by column for a
/// block of rows (each column read in row order), then hashed from the shared header state.
fn keys_v2(table: &Table, cells: &CellBytes, order: &[usize], rows: &[usize]) -> Vec<RowKey> {
    let width = cells.width;
    let mut buf = vec![0u8; KEY_BLOCK.min(rows.len()) * width];
    let mut lens = vec![0usize; KEY_BLOCK];
    let mut out = Vec::with_capacity(rows.len());
    for block in rows.chunks(KEY_BLOCK) {
        lens.iter_mut().for_each(|l| *l = 0);
        for (&c, levels) in order.iter().zip(&cells.levels) {
            match (&table.columns[c].values, levels) {
                (Values::Numeric(v), _) => {
                    for (i, &r) in block.iter().enumerate() {
                        let at = i * width + lens[i];
                        let x = v[r];
                        if x.is_nan() {
                            buf[at] = 0;
                            lens[i] += 1;
                        } else {
                            buf[at] = 1;
                            buf[at + 1..at + 9].copy_from_slice(&x.to_bits().to_le_bytes());
                            lens[i] += 9;
                        }
                    }
                }
                (Values::Text { codes, .. }, Some(levels)) => {
                    for (i, &r) in block.iter().enumerate() {
                        let at = i * width + lens[i];
                        let cell: &[u8] = levels.get(codes[r] as usize).map_or(&[0], |l| l);
                        buf[at..at + cell.len()].copy_from_slice(cell);
                        lens[i] += cell.len();
                    }
                }
                // `CellBytes::of` gives every text column its levels.
                (Values::Text { .. }, None) => {}
            }
        }
        out.extend((0..block.len()).map(|i| {
            let mut h = cells.head.clone();
            h.update(&buf[i * width..i * width + lens[i]]);
            let d = h.finalize();
            let mut k = [0u8; 16];
            k.copy_from_slice(&d[..16]);
            k
        }));
    }
    out
}

/// Every core the machine offers (the default thread count).
pub fn all_cores() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

/// SHA-256 of a file's bytes, hex.
pub fn file_sha256(path: &Path) -> Result<String> {
    let bytes = read(path)?;
    Ok(crate::spec::hex(&Sha256::digest(&bytes)))
}

/// Refuse a data path that is not a regular file, before anything opens it.
fn regular(path: &Path) -> Result<()> {
    match crate::files::not_regular(path) {
        Some(kind) => Err(Error::data(
            path,
            None,
            None,
            format!("is {kind}, not a CSV file; pass the path of a file on disk"),
        )),
        None => Ok(()),
    }
}

fn read(path: &Path) -> Result<Vec<u8>> {
    regular(path)?;
    std::fs::read(path).map_err(|e| Error::Io {
        action: "cannot read data file",
        path: path.to_path_buf(),
        source: e,
    })
}

/// Load a CSV file on `threads` threads (the table is the same for any number). Columns named
/// in `text_columns` are read as text even when numeric.
pub fn load(path: &Path, text_columns: &[&str], threads: usize) -> Result<Table> {
    regular(path)?;
    if let Some(t) = fast::load(path, text_columns, threads.max(1), FAST_BLOCK)? {
        return Ok(t);
    }
    let bytes = read(path)?;
    let sha256 = crate::spec::hex(&Sha256::digest(&bytes));
    parse(&bytes, path, sha256, text_columns)
}

/// `load` without the file's SHA-256 (`Table::sha256` is empty): reading and parsing alone,
/// the floor the benchmark divides by (`PROBITY_TIMINGS=parse-only`). Never for a run: a run
/// records the hash.
#[doc(hidden)]
pub fn parse_only(path: &Path, text_columns: &[&str], threads: usize) -> Result<Table> {
    regular(path)?;
    if let Some(t) = fast::load_hashing(path, text_columns, threads.max(1), FAST_BLOCK, false)? {
        return Ok(t);
    }
    let bytes = read(path)?;
    parse(&bytes, path, String::new(), text_columns)
}

/// The fast reader alone, with a chosen block size (for the fuzz checks in `crate::fuzzing`):
/// `Ok(None)` when the file is not plain and only the general reader may read it.
#[doc(hidden)]
pub fn load_plain(
    path: &Path,
    text_columns: &[&str],
    threads: usize,
    block: usize,
) -> Result<Option<Table>> {
    fast::load(path, text_columns, threads, block)
}

/// Parse CSV bytes (a UTF-8 BOM and CRLF line ends are accepted; quoted fields may hold commas
/// and newlines).
pub fn parse(bytes: &[u8], path: &Path, sha256: String, text_columns: &[&str]) -> Result<Table> {
    let body = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    if body.starts_with(b"\xEF\xBB\xBF") {
        return Err(Error::data(
            path,
            Some(1),
            None,
            "the file starts with two byte-order marks (the UTF-8 BOM twice); remove one and save it as UTF-8",
        ));
    }
    if body.iter().all(|b| b.is_ascii_whitespace()) {
        return Err(Error::data(
            path,
            None,
            None,
            "the file is empty; it needs a header line and at least one data row",
        ));
    }
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(false)
        .from_reader(body);
    let csv_err = |e: csv::Error| -> Error {
        let line = e.position().map(|p| line_at(body, p.byte() as usize));
        let msg = match e.kind() {
            csv::ErrorKind::UnequalLengths {
                expected_len, len, ..
            } => {
                format!(
                    "this row has {len} fields but the header has {expected_len}; every row needs the same number of fields"
                )
            }
            csv::ErrorKind::Utf8 { .. } => {
                "the file is not valid UTF-8 text; save it as UTF-8".to_string()
            }
            _ => format!("cannot parse CSV: {e}"),
        };
        Error::data(path, line, None, msg)
    };
    let headers: Vec<String> = rdr
        .headers()
        .map_err(csv_err)?
        .iter()
        .map(|h| h.trim().to_string())
        .collect();
    for (i, h) in headers.iter().enumerate() {
        if h.is_empty() {
            return Err(Error::data(
                path,
                Some(1),
                None,
                format!("header field {} is empty; every column needs a name", i + 1),
            ));
        }
        if headers[..i].contains(h) {
            return Err(Error::data(
                path,
                Some(1),
                Some(h),
                "this column name appears twice in the header; rename one",
            ));
        }
    }
    let ncol = headers.len();
    let forced: Vec<bool> = headers
        .iter()
        .map(|h| text_columns.contains(&h.as_str()))
        .collect();
    // Pass 1: numbers straight into f64 columns, counting what does not parse, so a large
    // numeric file never holds its cells as strings.
    let mut nums: Vec<Vec<f64>> = vec![Vec::new(); ncol];
    let mut counts = vec![(0usize, 0usize); ncol]; // (numbers, texts)
    let mut first_bad: Vec<Option<(usize, String, bool)>> = vec![None; ncol]; // (row, text, non-finite)
    let mut lines = Vec::new();
    // Line numbers are counted here from byte offsets: the reader's own count lags by one after
    // a CRLF line end, and users look rows up by line.
    let (mut counted_to, mut line) = (0usize, 1u64);
    let mut line_of = |offset: usize| -> u64 {
        let mut at = offset.min(body.len());
        line += line_ends(body, counted_to, at);
        counted_to = at;
        while at < body.len() && (body[at] == b'\r' || body[at] == b'\n') {
            at += 1;
        }
        line += line_ends(body, counted_to, at);
        counted_to = counted_to.max(at);
        line
    };
    let mut rec = csv::StringRecord::new();
    while rdr.read_record(&mut rec).map_err(csv_err)? {
        let row = lines.len();
        lines.push(rec.position().map_or(0, |p| line_of(p.byte() as usize)));
        for (c, f) in rec.iter().enumerate() {
            if forced[c] {
                continue;
            }
            let f = f.trim();
            let v = if f.is_empty() {
                f64::NAN
            } else {
                cell_value(f, row, &mut counts[c], &mut first_bad[c])
            };
            nums[c].push(v);
        }
    }
    if lines.is_empty() {
        return Err(Error::data(
            path,
            Some(1),
            None,
            "the file has a header but no data rows",
        ));
    }
    let is_text = decide(path, &headers, &forced, &counts, &first_bad, |row| {
        lines[row]
    })?;
    // Pass 2, only when some column is text: intern its cells, then sort the levels.
    let mut texts: Vec<Option<Interned>> = is_text
        .iter()
        .map(|&t| {
            t.then(|| {
                (
                    Vec::with_capacity(lines.len()),
                    std::collections::BTreeMap::new(),
                )
            })
        })
        .collect();
    if is_text.iter().any(|&t| t) {
        let mut rdr = csv::ReaderBuilder::new()
            .has_headers(true)
            .flexible(false)
            .from_reader(body);
        while rdr.read_record(&mut rec).map_err(csv_err)? {
            for (c, f) in rec.iter().enumerate() {
                if let Some((codes, seen)) = texts[c].as_mut() {
                    let f = f.trim();
                    if f.is_empty() {
                        codes.push(MISSING_CODE);
                    } else {
                        let next = seen.len() as u32;
                        codes.push(*seen.entry(f.to_string()).or_insert(next));
                    }
                }
            }
        }
    }
    Ok(Table {
        path: path.to_path_buf(),
        sha256,
        columns: assemble(headers, nums, texts),
        lines,
        raw: Default::default(),
    })
}

/// Which columns are text (forced, no numbers, or mostly non-numbers); an error for the first
/// bad cell of a numeric column. `line` maps a row to its CSV line.
fn decide(
    path: &Path,
    headers: &[String],
    forced: &[bool],
    counts: &[(usize, usize)],
    first_bad: &[Option<(usize, String, bool)>],
    line: impl Fn(usize) -> u64,
) -> Result<Vec<bool>> {
    let ncol = headers.len();
    let is_text: Vec<bool> = (0..ncol)
        .map(|c| forced[c] || counts[c].0 == 0 || counts[c].1 > counts[c].0)
        .collect();
    for c in (0..ncol).filter(|&c| !is_text[c]) {
        if let Some((row, text, nonfinite)) = &first_bad[c] {
            let msg = if *nonfinite {
                format!("'{text}' is not a finite number; leave the cell empty for a missing value")
            } else {
                format!(
                    "'{text}' is not a number in a numeric column; fix the value, leave the cell empty for a missing value, or list the column in [data] categorical"
                )
            };
            return Err(Error::data(path, Some(line(*row)), Some(&headers[c]), msg));
        }
    }
    Ok(is_text)
}

/// Columns from the parsed numbers and the interned text columns (levels sorted by byte order).
fn assemble(
    headers: Vec<String>,
    nums: Vec<Vec<f64>>,
    texts: Vec<Option<Interned>>,
) -> Vec<Column> {
    let mut columns = Vec::with_capacity(headers.len());
    for ((name, num), text) in headers.into_iter().zip(nums).zip(texts) {
        let values = match text {
            None => Values::Numeric(num),
            Some((codes, seen)) => {
                // BTreeMap iterates in byte order: that is the level order.
                let mut remap = vec![0u32; seen.len()];
                let mut levels = Vec::with_capacity(seen.len());
                for (i, (level, first)) in seen.into_iter().enumerate() {
                    remap[first as usize] = i as u32;
                    levels.push(level);
                }
                let codes = codes
                    .into_iter()
                    .map(|c| {
                        if c == MISSING_CODE {
                            c
                        } else {
                            remap[c as usize]
                        }
                    })
                    .collect();
                Values::Text { codes, levels }
            }
        };
        columns.push(Column { name, values });
    }
    columns
}

/// The 1-based line of the record starting at `offset` (line ends before it are skipped).
fn line_at(body: &[u8], offset: usize) -> u64 {
    let from = offset.min(body.len());
    let mut at = from;
    while at < body.len() && (body[at] == b'\r' || body[at] == b'\n') {
        at += 1;
    }
    1 + line_ends(body, 0, at)
}

/// Line ends in `body[from..to]` as the CSV reader sees them: LF, CRLF and a bare CR each end
/// a line (a CR is looked at with the byte after it, even past `to`, so a CRLF split between
/// two ranges counts once).
fn line_ends(body: &[u8], from: usize, to: usize) -> u64 {
    let mut n = 0;
    for i in from..to {
        let b = body[i];
        if b == b'\n' || (b == b'\r' && body.get(i + 1) != Some(&b'\n')) {
            n += 1;
        }
    }
    n
}

/// A text column being read: codes in first-seen order, and level -> first-seen code.
type Interned = (Vec<u32>, std::collections::BTreeMap<String, u32>);

/// The first cell of a column that is not a finite number: (row, text, non-finite number).
type FirstBad = Option<(usize, String, bool)>;

/// A non-empty cell's value in a column being typed: counts (numbers, texts) and keeps the
/// column's first bad cell; NaN for a cell that is not a finite number.
fn cell_value(s: &str, row: usize, counts: &mut (usize, usize), first_bad: &mut FirstBad) -> f64 {
    match number(s) {
        Some(Ok(v)) => {
            counts.0 += 1;
            v
        }
        other => {
            let nonfinite = other.is_some();
            if nonfinite {
                counts.0 += 1;
            } else {
                counts.1 += 1;
            }
            if first_bad.is_none() {
                *first_bad = Some((row, s.to_string(), nonfinite));
            }
            f64::NAN
        }
    }
}

/// A finite number, or the reason it is not one.
fn number(s: &str) -> Option<std::result::Result<f64, ()>> {
    match s.parse::<f64>() {
        Ok(v) if v.is_finite() => Some(Ok(v)),
        Ok(_) => Some(Err(())),
        Err(_) => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn p(text: &str) -> Result<Table> {
        parse(text.as_bytes(), Path::new("t.csv"), String::new(), &[])
    }

    /// Row identities are stored in ledgers, so their bytes are pinned: the expected values
    /// were computed with Python's hashlib (3.11) from the canonical bytes the doc comment of
    /// `Identity` describes (V1: columns in name order, name NUL text US, missing as empty
    /// text; V2: the names length-prefixed, then each cell tagged, numbers as their 8 IEEE-754
    /// bytes, little-endian, via `struct.pack('<d')`).
    #[test]
    fn row_identities_are_pinned_and_do_not_depend_on_blocks_or_threads() {
        let t = p("c,b,a\n,x,2.5\n").unwrap();
        let hexed = |k: &RowKey| crate::spec::hex(k);
        assert_eq!(
            hexed(&row_keys(&t, None, &[0], 1, Legacy::V1)[0]),
            "6f3c245c2661cd9ec5bb6cf6d52a4655"
        );
        assert_eq!(
            hexed(&row_keys(&t, None, &[0], 1, Legacy::V2)[0]),
            "a837af1bb2f18a018c28ad7d2de99de9"
        );
        // With a key column, both versions hash the key's text.
        for v in [Legacy::V1, Legacy::V2] {
            assert_eq!(
                hexed(&row_keys(&t, Some(1), &[0], 1, v)[0]),
                "f3df287cc36860339b767a9ce0b26779"
            );
        }
        // A text column's number-shaped level is the number (as V1's texts are equal).
        let t = parse(
            b"k,v\nq,0\n7,1.5\n",
            Path::new("t.csv"),
            String::new(),
            &["k"],
        )
        .unwrap();
        assert!(matches!(t.columns[0].values, Values::Text { .. }));
        assert_eq!(
            hexed(&row_keys(&t, None, &[1], 1, Legacy::V2)[0]),
            "a0f1a205310ced6fa0dc6bc0ed352342"
        );
        // Many rows (several blocks, several threads) give each row its own one-row key.
        let mut text = String::from("c,b,a\n");
        for i in 0..700 {
            text.push_str(&format!(
                "{},{},{}\n",
                i % 7,
                ["x", "y", "z"][i % 3],
                i as f64 / 8.0
            ));
        }
        let t = p(&text).unwrap();
        let rows: Vec<usize> = (0..700).rev().step_by(2).collect();
        for v in [Legacy::V1, Legacy::V2] {
            for threads in [1, 3] {
                let all = row_keys(&t, None, &rows, threads, v);
                for (k, &r) in all.iter().zip(&rows) {
                    assert_eq!(*k, row_keys(&t, None, &[r], 1, v)[0]);
                }
            }
        }
    }

    /// Both versions call the same rows equal: each row of one file against each of another,
    /// which spells numbers differently, orders its columns differently, reads a column as
    /// text (listed as categorical), and holds rows that differ by a sign of zero, a last digit or a missing cell.
    #[test]
    fn both_identity_versions_call_the_same_rows_equal() {
        let a =
            p("x,y,z\n1.5,7,a\n-0,7,a\n0,7,a\n0.1,,b\n0.30000000000000004,2,c\n1e3,3,d\n").unwrap();
        let b = parse(
            b"z,y,x\na,7,1.50\na,7.0,0\nb,,1e-1\nc,2,0.3\nd,3,1000\nd,n/a,1000\na,07,-0.0\na,7,0\n",
            Path::new("t.csv"),
            String::new(),
            &["y"],
        )
        .unwrap();
        assert!(matches!(b.columns[1].values, Values::Text { .. }));
        let ra: Vec<usize> = (0..a.n_rows()).collect();
        let rb: Vec<usize> = (0..b.n_rows()).collect();
        let mut equal = Vec::new();
        for v in [Legacy::V1, Legacy::V2] {
            let (ka, kb) = (row_keys(&a, None, &ra, 1, v), row_keys(&b, None, &rb, 1, v));
            let pairs: Vec<(usize, usize)> = (0..ka.len())
                .flat_map(|i| (0..kb.len()).map(move |j| (i, j)))
                .filter(|&(i, j)| ka[i] == kb[j])
                .collect();
            equal.push(pairs);
        }
        // "7.0" and "07" are not 7's shortest text, so as text they differ from the number,
        // in both versions; 1.50, 1e-1 and 1000 are numbers in both files.
        // The last row of `b` is the third of `a`, not the second (-0).
        assert_eq!(equal[0], vec![(0, 0), (2, 7), (3, 2), (5, 4)]);
        assert_eq!(equal[0], equal[1]);
    }
    #[test]
    fn types_columns_and_marks_missing() {
        let t = p("a,b,c\n1,x,\n2.5,y,3\n").unwrap();
        assert_eq!(t.columns[0].values, Values::Numeric(vec![1.0, 2.5]));
        assert_eq!(
            t.columns[1].values,
            Values::Text {
                codes: vec![0, 1],
                levels: vec!["x".into(), "y".into()]
            }
        );
        assert!(t.columns[2].is_missing(0));
        assert_eq!(t.lines, vec![2, 3]);
    }

    #[test]
    fn bom_crlf_and_quoted_fields_work() {
        let t = p("\u{feff}a,b\r\n1,\"x, with comma\nand newline\"\r\n2,y\r\n").unwrap();
        assert_eq!(t.columns[0].name, "a");
        assert_eq!(t.columns[1].text(0), "x, with comma\nand newline");
        assert_eq!(t.lines, vec![2, 4]);
        // Bare CR line ends (old Mac files) are lines too, in the data and in the messages.
        let t = p("a,b\r1,2\r3,4\r").unwrap();
        assert_eq!(t.lines, vec![2, 3]);
        let e = p("a,b\r1,2\r3,x\r5,6\r7\r").unwrap_err().to_string();
        assert!(e.contains("t.csv:5"), "{e}");
    }

    #[test]
    fn refuses_bad_files_with_place() {
        let e = p("a,b\n1,2\n3\n").unwrap_err().to_string();
        assert!(e.contains("t.csv:3") && e.contains("fields"), "{e}");
        let e = p("a,b\r\n1,2\r\n3,4\r\n5\r\n").unwrap_err().to_string();
        assert!(e.contains("t.csv:4") && e.contains("fields"), "{e}");
        let e = p("a,a\n1,2\n").unwrap_err().to_string();
        assert!(e.contains("twice"), "{e}");
        let e = p("a,b\n1,2\n2,3\nzz,4\n").unwrap_err().to_string();
        assert!(
            e.contains("t.csv:4 (column 'a')") && e.contains("'zz'"),
            "{e}"
        );
        let e = p("a\n1\nNaN\n").unwrap_err().to_string();
        assert!(e.contains("finite"), "{e}");
        assert!(p("").unwrap_err().to_string().contains("empty"));
        assert!(p("a,b\n").unwrap_err().to_string().contains("no data rows"));
    }

    #[test]
    fn forced_text_keeps_numbers_as_levels() {
        let t = parse(b"bay\n10\n9\n", Path::new("t.csv"), String::new(), &["bay"]).unwrap();
        assert_eq!(
            t.columns[0].values,
            Values::Text {
                codes: vec![0, 1],
                levels: vec!["10".into(), "9".into()]
            }
        );
    }

    /// A deterministic mixed file: numbers in several spellings, text, missing cells, an
    /// all-text column, padding spaces.
    fn mixed(rows: usize, crlf: bool, last_newline: bool) -> String {
        let end = if crlf { "\r\n" } else { "\n" };
        let mut s = format!("id,x, y ,grade,note,code{end}");
        for r in 0..rows {
            let x = match r % 7 {
                0 => format!("{}", r as f64 * 0.1),
                1 => format!("{:e}", r as f64 * 1.5e-9),
                2 => String::new(),
                3 => format!(" -{}.25 ", r),
                4 => format!("+{r}"),
                5 => format!("{}.", r),
                _ => format!("{}", 1.0 / (r as f64 + 1.0)),
            };
            let grade = ["a", "b", "é", ""][r % 4];
            s.push_str(&format!("{r},{x},{},{grade},n{},{}", r * 3, r % 11, r % 5));
            if r + 1 < rows || last_newline {
                s.push_str(end);
            }
        }
        s
    }

    #[test]
    fn fast_loader_equals_the_general_reader() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("m.csv");
        for (rows, crlf, last) in [(1, false, true), (3000, false, true), (2500, true, false)] {
            let text = mixed(rows, crlf, last);
            std::fs::write(&path, &text).unwrap();
            for forced in [&[][..], &["code"][..]] {
                let want = parse(
                    text.as_bytes(),
                    &path,
                    crate::spec::hex(&Sha256::digest(text.as_bytes())),
                    forced,
                )
                .unwrap();
                for threads in [1, 2, 3] {
                    for block in [1024, 4096, 1 << 20] {
                        let got = fast::load(&path, forced, threads, block)
                            .unwrap()
                            .expect("a plain file takes the fast path");
                        for (g, w) in got.columns.iter().zip(&want.columns) {
                            let first = (0..rows).find(|&r| g.text(r) != w.text(r));
                            let same = match (&g.values, &w.values) {
                                // Bitwise, so missing cells (NaN) compare equal.
                                (Values::Numeric(a), Values::Numeric(b)) => a
                                    .iter()
                                    .map(|v| v.to_bits())
                                    .eq(b.iter().map(|v| v.to_bits())),
                                (a, b) => a == b,
                            };
                            assert!(
                                same && g.name == w.name,
                                "column {} differs ({rows} rows, {threads} threads, block {block}), first at row {first:?}: {:?} vs {:?}",
                                w.name,
                                first.map(|r| g.text(r)),
                                first.map(|r| w.text(r))
                            );
                        }
                        assert_eq!(got.lines, want.lines);
                        assert_eq!(got.sha256, want.sha256);
                    }
                }
            }
        }
    }

    /// The fast reader reads a plain number and finds its comma in one pass, with its own float
    /// parser: every spelling, valid or not, must come out as the general reader's (which uses
    /// `str::parse`), bit for bit or with the same message. Spellings chosen by hand: signs,
    /// bare points, exponents, non-finite words, stray bytes, rounding boundaries, subnormals,
    /// overflow, and mantissas beyond 19 digits (where the parsers take their slow paths).
    #[test]
    fn fast_number_reading_agrees_with_str_parse_on_odd_spellings() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("n.csv");
        let cells = [
            "1e5",
            "1E5",
            "1e+5",
            "1e-5",
            "1.",
            "-1.",
            ".5",
            "-.5",
            "+.5",
            "+1",
            "-0",
            "0",
            "00012",
            "1e",
            "1e+",
            "1.e5",
            "e5",
            ".",
            "-",
            "+",
            "inf",
            "-inf",
            "+inf",
            "infinity",
            "NaN",
            "nan",
            "-nan",
            " 1",
            "1 ",
            "1_0",
            "0x10",
            "1e400",
            "-1e400",
            "1e-400",
            "4.9e-324",
            "2.4703282292062328e-324",
            "2.2250738585072011e-308",
            "1.7976931348623157e308",
            "1.7976931348623159e308",
            "9007199254740993",
            "123456789012345678901234567890",
            "0.1000000000000000055511151231257827021181583404541015625",
            "7.2057594037927933e16",
            "1..2",
            "1e5.5",
            "--1",
            "1-",
            "\u{661}",
            "1\t",
            "\t1",
            "0.0000000000000000000000000000000000001",
            "1e-00000000000000000000000005",
        ];
        for cell in cells {
            for body in [
                format!("a,b\n1,{cell}\n2,3\n"),
                format!("a,b\n{cell},1\n3,2\r\n"),
                format!("a,b\n1,2\n3,{cell}"),
            ] {
                crate::fuzzing::csv_bytes(body.as_bytes(), &path);
            }
        }
    }

    #[test]
    fn fast_loader_leaves_unusual_files_to_the_general_reader() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("u.csv");
        for text in [
            "a,b\n1,\"2\"\n",
            "a,b\n1,2\n\n3,4\n",
            "a,b\n1,2\n3\n",
            "a,b\n1,2\r3,4\n",
            // A bare CR in the header (found by the csv_loader fuzz target).
            "a@\0\0\0\0\r\0\0\0\nx5",
            "a,b\r1,2\n3,4\n",
            // Two byte-order marks (also found by the fuzz target).
            "\u{feff}\u{feff}a,b\n1,2\n",
            "a,a\n1,2\n",
            "a,b\n",
            // A column that turns to text after a numeric first row.
            "a,b\n1,2\n3,x\n4,y\n5,z\n",
        ] {
            std::fs::write(&path, text).unwrap();
            assert!(
                fast::load(&path, &[], 2, 1024).unwrap().is_none(),
                "{text:?}"
            );
        }
        // A bad number in a numeric column is reported with its line, as the general reader does.
        std::fs::write(&path, "a,b\n1,2\n2,3\nzz,4\n").unwrap();
        let e = fast::load(&path, &[], 2, 1024).unwrap_err().to_string();
        assert!(
            e.contains("u.csv:4 (column 'a')") && e.contains("'zz'"),
            "{e}"
        );
        std::fs::write(&path, [0xffu8, b',', b'b', b'\n', b'1', b',', b'2', b'\n']).unwrap();
        assert!(fast::load(&path, &[], 2, 1024).unwrap().is_none());
    }

    #[test]
    fn display_f64_writes_what_format_writes() {
        let mut state = 0x9e3779b97f4a7c15u64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        let mut buf = String::new();
        let specials = [
            0.0,
            -0.0,
            1.0,
            -1.0,
            0.1,
            100.0,
            1e21,
            1e22,
            1e-7,
            123.456,
            5e-324,
            f64::MAX,
            f64::MIN_POSITIVE,
            9007199254740993.0,
            0.30000000000000004,
        ];
        let randoms = (0..1_000_000).map(|i| {
            let bits = next();
            let v = f64::from_bits(bits);
            // Half raw bit patterns (every exponent), half numbers of everyday size.
            if i % 2 == 0 {
                v
            } else {
                ((bits >> 11) as f64 / (1u64 << 53) as f64 - 0.5)
                    * 10f64.powi((bits % 13) as i32 - 4)
            }
        });
        // Short exact expansions (halves, quarters, ...) and integers around 2^53, where ties
        // between two shortest renderings live.
        let dyadic = (0..20_000).flat_map(|i| {
            let x = i as f64 * 1.000_000_119;
            [
                x / 2.0,
                x / 64.0,
                x / 1024.0,
                x * 1e12 + 0.5,
                9_007_199_254_740_992.0 + 2.0 * i as f64,
            ]
        });
        for v in specials
            .into_iter()
            .chain(randoms)
            .chain(dyadic)
            .filter(|v| v.is_finite())
        {
            buf.clear();
            display_f64(v, &mut buf);
            assert_eq!(buf, format!("{v}"), "{:e}", v);
        }
    }

    /// A line longer than a block makes the fast loader grow its buffer; a quoted file goes to
    /// the general reader through `load`; both give the general reader's table.
    /// `parse_only` (the benchmark's floor) reads the table `load` reads, without the file's
    /// hash, through the fast reader (a plain file) and the general one (a quoted field).
    #[test]
    fn parse_only_reads_what_load_reads_without_the_hash() {
        let dir = tempfile::tempdir().unwrap();
        for (name, text, plain) in [
            ("plain.csv", "a,b,y\n1,x,2.5\n3,y,4\n", true),
            ("quoted.csv", "a,b,y\n1,\"x, z\",2.5\n3,y,4\n", false),
        ] {
            let path = dir.path().join(name);
            std::fs::write(&path, text).unwrap();
            assert_eq!(fast::load(&path, &[], 2, 1024).unwrap().is_some(), plain);
            let full = load(&path, &[], 2).unwrap();
            let bare = parse_only(&path, &[], 2).unwrap();
            assert_eq!(bare.columns, full.columns);
            assert_eq!(bare.lines, full.lines);
            assert_eq!(
                full.sha256,
                crate::spec::hex(&Sha256::digest(text.as_bytes()))
            );
            assert!(bare.sha256.is_empty());
        }
    }

    #[test]
    fn long_lines_and_quoted_files_load_right() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("wide.csv");
        let ncol = 600;
        let header: Vec<String> = (0..ncol).map(|c| format!("c{c}")).collect();
        let mut text = header.join(",") + "\n";
        for r in 0..5 {
            let row: Vec<String> = (0..ncol).map(|c| format!("{}.25", r * ncol + c)).collect();
            text.push_str(&(row.join(",") + "\n"));
        }
        assert!(
            text.lines().nth(1).unwrap().len() > 2048,
            "longer than the 1 KiB block"
        );
        std::fs::write(&path, &text).unwrap();
        let want = parse(
            text.as_bytes(),
            &path,
            crate::spec::hex(&Sha256::digest(text.as_bytes())),
            &[],
        )
        .unwrap();
        let got = fast::load(&path, &[], 2, 1024)
            .unwrap()
            .expect("plain file");
        assert_eq!(got.columns, want.columns);
        assert_eq!(got.sha256, want.sha256);
        let quoted = dir.path().join("q.csv");
        let q = "a,b\n1,\"x, y\"\n2,z\n";
        std::fs::write(&quoted, q).unwrap();
        let t = load(&quoted, &[], 2).unwrap();
        assert_eq!(t.columns[1].text(0), "x, y");
        assert_eq!(t.sha256, crate::spec::hex(&Sha256::digest(q.as_bytes())));
    }
}

//! Row identity version 3: a row is told apart by the cells a model reads (its features, found
//! by column name) or by its key, so that edits a model cannot see keep every identity, and a
//! sealed test row stays the same row after the file is reshaped.
//!
//! This module owns the definition below, the `Recipe` that names the columns an identity
//! reads, and the computation for many rows at once (the same bytes for any thread count).
//! The older identities (`Identity::V1`, `Identity::V2`) hash every cell of the file and live
//! in the parent module.
//!
//! # Column names
//!
//! A recipe stores its feature names and its key name normalised (`normalise`): trimmed of
//! ASCII whitespace and lower-cased with `str::to_lowercase`, so `bmi`, `BMI` and ` Bmi ` name
//! one column. A table's column matches a recipe name when its own name, normalised the same
//! way, equals it (`find`). When several columns of a table normalise to the same name, the
//! first of them in the table is taken, so such a file is always read the same way.
//!
//! # Feature identity
//!
//! A recipe names the feature columns: normalised, sorted by byte order, each name once. When
//! a recipe column is not in the table, no identity can be formed (`None`). Otherwise a row's
//! identity is the first 16 bytes of the SHA-256 of:
//!
//! 1. the bytes `probity-row-v3` and a NUL byte;
//! 2. for each recipe column, in order: the byte length of its normalised name (u64,
//!    little-endian), then the normalised name's bytes;
//! 3. for each recipe column, in the same order, the row's cell:
//!    - a missing cell (a numeric column's NaN, a text column's missing code, or a text that
//!      is empty once trimmed of ASCII whitespace): the byte `0x00`;
//!    - a number (a numeric column's value, or a text that, trimmed of ASCII whitespace,
//!      reads as a finite `f64` with Rust's `str::parse`): its canonical form, below;
//!    - any other text: trimmed of ASCII whitespace and lower-cased with `str::to_lowercase`,
//!      then `0x02`, that text's byte length (u64, little-endian) and its bytes.
//!
//! So column order, the case and surrounding spaces of column names and of text cells
//! (`Benign` and ` benign` are one cell), columns outside the recipe (the target among them,
//! under any name) and the spelling of a number (`1.5`, `1.50`, `1.5e0`, a text column's
//! `1.5`) do not enter. An empty recipe gives every row the same identity: a caller names at
//! least one feature.
//!
//! ## Canonical form of a number x
//!
//! The number rounded to 10 significant digits, `m * 10^(d - 9)`, with IEEE-754 double
//! operations only, so that another language reproduces it bit for bit
//! (`tests/reference/identity_v3.py` does, in Python):
//!
//! - `x == 0` (either sign): `m = 0`, `d = 0`.
//! - `P(j)` is the double nearest 10^j (the text `1e{j}` read as an `f64`).
//! - `d` is the integer with `P(d) <= |x| < P(d + 1)`.
//! - Fallback: when `x` is subnormal (or not finite, which the loader never gives), or
//!   `d < -299` or `d > 300`, the cell is `0x03` and the 8 bytes of `x`'s IEEE-754 bit
//!   pattern, little-endian, instead of the decimal form. (`d = -300` would need `P(309)`,
//!   which is infinite.)
//! - Otherwise `k = 9 - d`, and `v = |x| * P(k)` when `k >= 0`, else `v = |x| / P(-k)` (one
//!   rounded operation either way); `m = floor(v + 0.5)`, the addition rounded to a double
//!   before the floor. When `m >= 10^10`, then `m = 10^9` and `d = d + 1`. The powers are
//!   rounded, so `m` might come out below 10^9; it stays as it is: the definition is these
//!   operations, not exact decimal arithmetic. For a negative `x`, `m = -m`.
//! - The cell is `0x01`, then `m` (i64, little-endian), then `d` (i16, little-endian).
//!
//! So `12.87`, `12.870`, `1.287e1` and `12.87 + 1e-12` give one cell (`m = 1287000000`,
//! `d = 1`), while `12.87` and `12.88` do not. A change of about 1e-12 relative keeps the cell
//! unless the value sits at a rounding boundary of the 10th digit; a change in the 9th digit
//! always changes it.
//!
//! # Labelled identity
//!
//! A row with its target: the first 16 bytes of the SHA-256 of the bytes `probity-labelled-v3`
//! and a NUL byte, the row's feature identity (16 bytes), and its target cell written as a
//! feature cell is (`0x00` when missing, a number's canonical form, or a text). It tells the
//! same record from a record that only looks alike to a model (two bays with the same
//! climate, say): a run's rows always carry their targets, so the ledger compares them
//! labelled, while a prediction's rows, whose targets may be absent, are compared by features.
//!
//! # Key identity
//!
//! A row whose key cell is missing (or empty once trimmed of ASCII whitespace) has no key
//! identity. Otherwise the key's text is normalised: a numeric column's value as `display_f64`
//! writes it (shortest round-trip digits, plain notation: `1.50` is `1.5`, `1e3` is `1000`);
//! a text column's cell trimmed of ASCII whitespace and lower-cased with `str::to_lowercase`.
//! The identity is the first 16 bytes of the SHA-256 of the bytes `probity-key-v3`, a NUL byte
//! and the normalised text. The key column's name is not part of it, so renaming the column
//! keeps every identity.
//!
//! # Development fingerprint
//!
//! A partition's development rows are identified by a 64-bit fingerprint instead of a labelled
//! identity. It is not SHA-256 for speed: the ledger stores one for every development row
//! (millions for a large file), and it only feeds a warning (a development row that looks like
//! a sealed test row), never a count of looks at test rows. It reads the cells a labelled
//! identity reads, the same way, so the same edits keep it (names do not enter: a partition's
//! fingerprints are compared under its own recipe). For each row:
//!
//! - `h = 0x6a09e667f3bcc908`; for each recipe column in recipe order, then the target
//!   column: `h = fmix64(h ^ word(cell))`; the fingerprint is `fmix64(h ^ n)`, with `n` the
//!   number of cells hashed (the recipe's columns and the target).
//! - `fmix64` is the 64-bit finalizer of MurmurHash3 (Austin Appleby, public domain), with
//!   wrapping multiplications: `x ^= x >> 33; x *= 0xff51afd7ed558ccd; x ^= x >> 33;
//!   x *= 0xc4ceb9fe1a85ec53; x ^= x >> 33`.
//! - `word(cell)`, with the cell read as for a feature identity:
//!   - missing: `0`;
//!   - a number whose canonical form is `m` and `d`: `(1 << 62) | (((d + 512) & 0x3ff) << 40)
//!     | (m & 0xff_ffff_ffff)`, `m` in 40-bit two's complement (`|m| < 10^10 < 2^39`);
//!   - a number in the fallback form, with bits `b`: `(3 << 62) ^ fmix64(b)`;
//!   - a text (trimmed and lower-cased): `(2 << 62) | (fnv1a64(bytes) >> 2)`, where `fnv1a64`
//!     is the 64-bit FNV-1a hash (offset basis `0xcbf29ce484222325`, prime `0x100000001b3`)
//!     of the text's UTF-8 bytes.
//!
//! For a fixed word each step is a bijection of `h` (as `fmix64` is), so two rows whose words
//! differ in one cell only never share a fingerprint; rows that differ more share one by
//! chance, about 2^-64 a pair (and two texts share a word with a chance near 2^-62).
//!
//! A development row's key fingerprint is `fmix64(fnv1a64(text))` of the normalised key text a
//! key identity hashes; a row whose key is missing has none.

use super::{Column, RowKey, Table, Values, display_f64};
use sha2::{Digest, Sha256};
use std::sync::OnceLock;

const ROW_TAG: &[u8] = b"probity-row-v3\0";
const LABEL_TAG: &[u8] = b"probity-labelled-v3\0";
const KEY_TAG: &[u8] = b"probity-key-v3\0";

/// The powers of ten the table holds: P(j) for j in -SPAN..=SPAN, wider than any decade a
/// double reaches.
const SPAN: i64 = 330;

/// The decades written in decimal form; the others take the fallback.
const DECADES: std::ops::RangeInclusive<i64> = -299..=300;

/// The decades `common` answers for: those written in decimal form with `k >= 0`.
const USUAL: std::ops::RangeInclusive<i64> = -299..=9;

/// Rows whose cells are written together, column by column, before they are hashed.
const BLOCK: usize = 128;

/// The fewest rows worth a thread of their own.
const MIN_CHUNK: usize = 4096;

/// The columns an identity reads: an optional key, and the feature columns sorted by byte
/// order, each once; every name normalised (`normalise`).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Recipe {
    key: Option<String>,
    columns: Vec<String>,
}

impl Recipe {
    /// A recipe from the key's name and the feature names in any order and any case (names
    /// normalised, then duplicates dropped).
    pub fn new<S: AsRef<str>>(key: Option<&str>, features: &[S]) -> Recipe {
        let mut columns: Vec<String> = features.iter().map(|f| normalise(f.as_ref())).collect();
        columns.sort();
        columns.dedup();
        Recipe {
            key: key.map(normalise),
            columns,
        }
    }

    /// The key's normalised name.
    pub fn key(&self) -> Option<&str> {
        self.key.as_deref()
    }

    /// The feature columns' normalised names, sorted by byte order, distinct.
    pub fn columns(&self) -> &[String] {
        &self.columns
    }

    /// `{"columns": [...], "key": null or "name"}`, the form a ledger stores.
    pub fn to_json(&self) -> serde_json::Value {
        serde_json::json!({ "columns": self.columns, "key": self.key })
    }

    /// The recipe `to_json` wrote; `None` for any other shape, including columns that are not
    /// sorted and distinct, or names that are not normalised: `to_json` never writes those, so
    /// such a value is refused, not repaired.
    pub fn from_json(v: &serde_json::Value) -> Option<Recipe> {
        let fields = v.as_object()?;
        if fields.len() != 2 {
            return None;
        }
        let key = match fields.get("key")? {
            serde_json::Value::Null => None,
            serde_json::Value::String(s) => Some(s.clone()),
            _ => return None,
        };
        let columns = fields
            .get("columns")?
            .as_array()?
            .iter()
            .map(|c| c.as_str().map(str::to_string))
            .collect::<Option<Vec<String>>>()?;
        if !columns.windows(2).all(|w| w[0] < w[1])
            || columns.iter().chain(&key).any(|n| normalise(n) != *n)
        {
            return None;
        }
        Some(Recipe { key, columns })
    }
}

/// A column name as a recipe stores it: trimmed of ASCII whitespace and lower-cased with
/// `str::to_lowercase`.
pub fn normalise(name: &str) -> String {
    name.trim_ascii().to_lowercase()
}

/// The index of the first column of `table` whose normalised name equals `name`'s; the first,
/// so that a table with two columns named alike (`BMI`, `bmi`) is always read the same way.
pub fn find(table: &Table, name: &str) -> Option<usize> {
    let want = normalise(name);
    table
        .columns
        .iter()
        .position(|c| normalise(&c.name) == want)
}

/// Two columns of `table` whose names normalise alike (`BMI` and ` bmi`), if any: identities
/// read one of them while a model may read the other, so the commands refuse such a file.
pub fn ambiguous(table: &Table) -> Option<(&str, &str)> {
    let mut names: Vec<(String, usize)> = table
        .columns
        .iter()
        .enumerate()
        .map(|(i, c)| (normalise(&c.name), i))
        .collect();
    names.sort();
    names.windows(2).find(|w| w[0].0 == w[1].0).map(|w| {
        (
            table.columns[w[0].1].name.as_str(),
            table.columns[w[1].1].name.as_str(),
        )
    })
}

/// Refuse a table with two columns named alike (`ambiguous`), naming the file and the columns.
pub fn refuse_ambiguous(table: &Table) -> crate::error::Result<()> {
    match ambiguous(table) {
        None => Ok(()),
        Some((a, b)) => Err(crate::error::Error::data(
            &table.path,
            Some(1),
            None,
            format!(
                "columns '{a}' and '{b}' differ only in case or surrounding spaces; probity tells rows apart by column names read that way, so rename one of them"
            ),
        )),
    }
}

/// The table's columns for the recipe's, in recipe order; `None` when one is missing.
fn recipe_columns<'a>(table: &'a Table, recipe: &Recipe) -> Option<Vec<&'a Column>> {
    recipe
        .columns
        .iter()
        .map(|n| find(table, n).map(|i| &table.columns[i]))
        .collect()
}

/// A number's canonical cell (see the module documentation).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum NumberCell {
    /// `m * 10^(d - 9)`, written `0x01`, `m` and `d` little-endian.
    Decimal { m: i64, d: i16 },
    /// The fallback: the double's bits, written `0x03` and the bits little-endian.
    Bits(u64),
}

impl NumberCell {
    /// The most bytes a number's cell takes.
    const WIDTH: usize = 11;

    /// Writes the cell at the start of `out` (at least `WIDTH` bytes) and returns its length.
    fn write(self, out: &mut [u8]) -> usize {
        match self {
            NumberCell::Decimal { m, d } => {
                out[0] = 1;
                out[1..9].copy_from_slice(&m.to_le_bytes());
                out[9..11].copy_from_slice(&d.to_le_bytes());
                11
            }
            NumberCell::Bits(b) => {
                out[0] = 3;
                out[1..9].copy_from_slice(&b.to_le_bytes());
                9
            }
        }
    }

    /// The cell's bytes.
    pub fn bytes(self) -> Vec<u8> {
        let mut out = [0u8; Self::WIDTH];
        let n = self.write(&mut out);
        out[..n].to_vec()
    }
}

/// Entries of the powers table.
const POWERS: usize = 2 * SPAN as usize + 1;

/// P(j) for j in -SPAN..=SPAN, at index j + SPAN.
type Powers = [f64; POWERS];

fn powers() -> &'static Powers {
    static TABLE: OnceLock<Powers> = OnceLock::new();
    TABLE.get_or_init(|| {
        let mut p = [0.0; POWERS];
        for (e, j) in p.iter_mut().zip(-SPAN..=SPAN) {
            // Parsing is correctly rounded, so this is the double nearest 10^j; the text
            // always parses (the NaN is never taken).
            *e = format!("1e{j}").parse::<f64>().unwrap_or(f64::NAN);
        }
        p
    })
}

/// The canonical cell of a number (see the module documentation).
pub fn canonical_number(x: f64) -> NumberCell {
    match common(x, binades()) {
        (m, d, true) => NumberCell::Decimal { m, d },
        _ => general(x, powers()),
    }
}

/// The decade of a normal `|x|`, from its biased binary exponent: d0 = floor(e2 * log10 2)
/// for the unbiased exponent e2 (the multiply-shift is exact for |e2| <= 1650), so
/// 10^d0 <= 2^e2 <= |x| < 2^(e2 + 1) < 10^(d0 + 2). Rounding to the nearest double keeps
/// order, and 2^e2 and 2^(e2 + 1) are doubles (or infinite), so P(d0) <= |x| < P(d0 + 2): the
/// decade is d0 or d0 + 1, told by one comparison instead of a loop of steps.
#[inline(always)]
fn decade(a: f64, biased: i64, p: &Powers) -> i64 {
    let d0 = ((biased - 1023) * 78913) >> 18;
    // The clamp only keeps the load inside the table for exponents the callers refuse.
    d0 + i64::from(a >= p[(d0 + 1 + SPAN).clamp(0, 2 * SPAN) as usize])
}

/// What `common` needs for the numbers of one binary exponent: the decade is d0 or d0 + 1
/// (see `decade`), told by `next` = P(d0 + 1); for each of the two, the scale P(9 - d) and
/// whether it is a usual decade (`USUAL`).
#[derive(Debug, Clone, Copy)]
struct Binade {
    next: f64,
    scale: [f64; 2],
    d0: i16,
    usual: [bool; 2],
}

/// One `Binade` per biased exponent; subnormals (0) and non-finite values (0x7ff) have no
/// usual decade.
fn binades() -> &'static [Binade; 2048] {
    static TABLE: OnceLock<[Binade; 2048]> = OnceLock::new();
    TABLE.get_or_init(|| {
        let p = powers();
        let at = |j: i64| p[(j + SPAN).clamp(0, 2 * SPAN) as usize];
        let mut t = [Binade {
            next: f64::INFINITY,
            scale: [1.0; 2],
            d0: 0,
            usual: [false; 2],
        }; 2048];
        for (biased, entry) in (0i64..).zip(t.iter_mut()).take(2047).skip(1) {
            // As in `decade`.
            let d0 = ((biased - 1023) * 78913) >> 18;
            *entry = Binade {
                next: at(d0 + 1),
                scale: [at(9 - d0), at(8 - d0)],
                d0: d0 as i16,
                usual: [USUAL.contains(&d0), USUAL.contains(&(d0 + 1))],
            };
        }
        t
    })
}

/// The canonical form of the usual number, in a few operations without a loop: `(m, d, true)`
/// when `x` is normal and its decade is `USUAL` (so `k >= 0`, a multiplication); otherwise
/// the flag is false and `general` decides. Equal to `general` wherever the flag is true (a
/// unit test checks it across every binary exponent).
#[inline(always)]
fn common(x: f64, t: &[Binade; 2048]) -> (i64, i16, bool) {
    let a = x.abs();
    let b = &t[((a.to_bits() >> 52) & 0x7ff) as usize];
    let up = usize::from(a >= b.next);
    // v + 0.5 is positive and below 2^63 when the flag is set, where truncation is the floor.
    let m = (a * b.scale[up] + 0.5) as i64;
    let carry = m >= 10_000_000_000;
    let m = if carry { 1_000_000_000 } else { m };
    let m = if x < 0.0 { -m } else { m };
    (m, b.d0 + up as i16 + i16::from(carry), b.usual[up])
}

/// The definition, step by step, for every number.
fn general(x: f64, p: &Powers) -> NumberCell {
    if x == 0.0 {
        return NumberCell::Decimal { m: 0, d: 0 };
    }
    let fallback = NumberCell::Bits(x.to_bits());
    let a = x.abs();
    let biased = (a.to_bits() >> 52) as i64;
    if biased == 0 || biased == 0x7ff {
        return fallback;
    }
    let mut d = decade(a, biased, p);
    if !DECADES.contains(&d) {
        return fallback;
    }
    let k = 9 - d;
    // |k| <= 308 inside the decades: in the table.
    let s = p[(k.abs() + SPAN) as usize];
    let v = if k >= 0 { a * s } else { a / s };
    // v + 0.5 is positive and below 2^63, where truncation is the floor.
    let mut m = (v + 0.5) as i64;
    if m >= 10_000_000_000 {
        m = 1_000_000_000;
        d += 1;
    }
    NumberCell::Decimal {
        m: if x < 0.0 { -m } else { m },
        // Inside the decades, so it fits.
        d: d as i16,
    }
}

/// How a text cell reads (see the module documentation).
enum TextCell {
    Missing,
    Number(NumberCell),
    /// Trimmed and lower-cased.
    Text(String),
}

fn read_text(text: &str) -> TextCell {
    let t = text.trim_ascii();
    if t.is_empty() {
        return TextCell::Missing;
    }
    if let Ok(x) = t.parse::<f64>()
        && x.is_finite()
    {
        return TextCell::Number(canonical_number(x));
    }
    TextCell::Text(t.to_lowercase())
}

/// A text cell's bytes (see the module documentation).
fn text_cell(text: &str) -> Vec<u8> {
    match read_text(text) {
        TextCell::Missing => vec![0],
        TextCell::Number(n) => n.bytes(),
        TextCell::Text(t) => {
            let mut out = Vec::with_capacity(9 + t.len());
            out.push(2);
            out.extend_from_slice(&(t.len() as u64).to_le_bytes());
            out.extend_from_slice(t.as_bytes());
            out
        }
    }
}

/// Feature identities of `rows` (table row indices), in order, on up to `threads` threads; the
/// same bytes for any thread count. `None` when a recipe column is not in the table.
pub fn feature_ids(
    table: &Table,
    recipe: &Recipe,
    rows: &[usize],
    threads: usize,
) -> Option<Vec<RowKey>> {
    let columns = recipe_columns(table, recipe)?;
    let plan = Plan::of(&recipe.columns, &columns);
    Some(in_chunks(rows, threads, |part| plan.ids(part)))
}

/// Feature and labelled identities of `rows`, in order: (feature, labelled) per row, with the
/// target read from `target` (a column of `table`). `None` when a recipe column is not in the
/// table.
pub fn labelled_ids(
    table: &Table,
    recipe: &Recipe,
    target: usize,
    rows: &[usize],
    threads: usize,
) -> Option<Vec<(RowKey, RowKey)>> {
    let features = feature_ids(table, recipe, rows, threads)?;
    let column = &table.columns[target];
    let levels: Vec<Vec<u8>> = match &column.values {
        Values::Text { levels, .. } => levels.iter().map(|l| text_cell(l)).collect(),
        Values::Numeric(_) => Vec::new(),
    };
    let pairs: Vec<(usize, RowKey)> = rows.iter().copied().zip(features).collect();
    Some(in_chunks(&pairs, threads, |part| {
        part.iter()
            .map(|&(r, f)| {
                let mut h = Sha256::new();
                h.update(LABEL_TAG);
                h.update(f);
                match &column.values {
                    Values::Numeric(v) if v[r].is_nan() => h.update([0u8]),
                    Values::Numeric(v) => h.update(canonical_number(v[r]).bytes()),
                    Values::Text { codes, .. } => {
                        h.update(levels.get(codes[r] as usize).map_or(&[0u8][..], |c| c))
                    }
                }
                (f, first16(h))
            })
            .collect()
    }))
}

/// What all rows share: the hash state after the header, and how each column's cells are
/// written.
struct Plan<'a> {
    head: Sha256,
    sources: Vec<Source<'a>>,
    /// The most bytes a row's cells take.
    width: usize,
    powers: &'static Powers,
    binades: &'static [Binade; 2048],
}

enum Source<'a> {
    Numbers(&'a [f64]),
    /// Each level's cell bytes, computed once; a code past them is a missing cell.
    Text {
        codes: &'a [u32],
        cells: Vec<Vec<u8>>,
    },
}

impl<'a> Plan<'a> {
    fn of(names: &[String], columns: &[&'a Column]) -> Plan<'a> {
        let mut head = Sha256::new();
        head.update(ROW_TAG);
        for n in names {
            head.update((n.len() as u64).to_le_bytes());
            head.update(n.as_bytes());
        }
        let sources: Vec<Source<'a>> = columns
            .iter()
            .map(|c| match &c.values {
                Values::Numeric(v) => Source::Numbers(v),
                Values::Text { codes, levels } => Source::Text {
                    codes,
                    cells: levels.iter().map(|l| text_cell(l)).collect(),
                },
            })
            .collect();
        let width = sources
            .iter()
            .map(|s| match s {
                Source::Numbers(_) => NumberCell::WIDTH,
                Source::Text { cells, .. } => cells.iter().map(Vec::len).max().unwrap_or(1),
            })
            .sum();
        Plan {
            head,
            sources,
            width,
            powers: powers(),
            binades: binades(),
        }
    }

    /// Each block's cells are written column by column (each column read in row order), then
    /// hashed row by row from the shared header state.
    fn ids(&self, rows: &[usize]) -> Vec<RowKey> {
        let width = self.width;
        let mut buf = vec![0u8; BLOCK.min(rows.len()) * width];
        let mut lens = [0usize; BLOCK];
        let mut numbers = [(0i64, 0i16, false); BLOCK];
        let mut out = Vec::with_capacity(rows.len());
        for block in rows.chunks(BLOCK) {
            lens.iter_mut().for_each(|l| *l = 0);
            for source in &self.sources {
                match source {
                    Source::Numbers(v) => {
                        // The block's usual numbers first, in a loop of their own: each is a
                        // chain of dependent loads and operations, and a short loop without
                        // branches lets the processor overlap many of them.
                        for (n, &r) in numbers.iter_mut().zip(block) {
                            *n = common(v[r], self.binades);
                        }
                        for (i, (&(m, d, ok), &r)) in numbers.iter().zip(block).enumerate() {
                            let at = i * width + lens[i];
                            lens[i] += if ok {
                                NumberCell::Decimal { m, d }.write(&mut buf[at..])
                            } else if v[r].is_nan() {
                                buf[at] = 0;
                                1
                            } else {
                                general(v[r], self.powers).write(&mut buf[at..])
                            };
                        }
                    }
                    Source::Text { codes, cells } => {
                        for (i, &r) in block.iter().enumerate() {
                            let at = i * width + lens[i];
                            let cell: &[u8] = cells.get(codes[r] as usize).map_or(&[0], |c| c);
                            buf[at..at + cell.len()].copy_from_slice(cell);
                            lens[i] += cell.len();
                        }
                    }
                }
            }
            out.extend((0..block.len()).map(|i| {
                let mut h = self.head.clone();
                h.update(&buf[i * width..i * width + lens[i]]);
                first16(h)
            }));
        }
        out
    }
}

/// Key identities of `rows` in the column `key_column` of `table`, in order, on up to
/// `threads` threads: `None` for a row whose key is missing.
pub fn key_ids(
    table: &Table,
    key_column: usize,
    rows: &[usize],
    threads: usize,
) -> Vec<Option<RowKey>> {
    let column = &table.columns[key_column];
    in_chunks(rows, threads, |part| {
        let mut text = String::new();
        part.iter()
            .map(|&r| {
                text.clear();
                key_text(column, r, &mut text);
                (!text.is_empty()).then(|| {
                    let mut h = Sha256::new();
                    h.update(KEY_TAG);
                    h.update(text.as_bytes());
                    first16(h)
                })
            })
            .collect()
    })
}

/// The normalised key text of a row into `out` (left empty when the key is missing).
fn key_text(column: &Column, row: usize, out: &mut String) {
    match &column.values {
        Values::Numeric(v) => {
            let x = v[row];
            if x.is_finite() {
                display_f64(x, out);
            } else if !x.is_nan() {
                // The loader refuses infinities; a table built otherwise still gets a text.
                use std::fmt::Write;
                let _ = write!(out, "{x}");
            }
        }
        Values::Text { codes, levels } => {
            if let Some(l) = levels.get(codes[row] as usize) {
                let t = l.trim_ascii();
                // ASCII text needs no allocation; both give what str::to_lowercase gives.
                if t.is_ascii() {
                    out.extend(t.chars().map(|c| c.to_ascii_lowercase()));
                } else {
                    out.push_str(&t.to_lowercase());
                }
            }
        }
    }
}

/// The start of every development fingerprint's chain.
const FINGERPRINT_START: u64 = 0x6a09_e667_f3bc_c908;

/// Rows whose fingerprints advance together, column by column.
const FP_BLOCK: usize = 1024;

/// The low 40 bits, where a number's word holds `m`.
const M_BITS: u64 = 0xff_ffff_ffff;

/// The 64-bit finalizer of MurmurHash3 (fmix64, by Austin Appleby, public domain): a bijection
/// in which every input bit reaches every output bit, in five cheap operations.
#[inline(always)]
fn fmix64(mut x: u64) -> u64 {
    x ^= x >> 33;
    x = x.wrapping_mul(0xff51_afd7_ed55_8ccd);
    x ^= x >> 33;
    x = x.wrapping_mul(0xc4ce_b9fe_1a85_ec53);
    x ^ (x >> 33)
}

/// The 64-bit FNV-1a hash of `bytes`.
fn fnv1a64(bytes: &[u8]) -> u64 {
    bytes.iter().fold(0xcbf2_9ce4_8422_2325, |h, &b| {
        (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3)
    })
}

/// The word of the number `m * 10^(d - 9)` without `m`: the tag and `d + 512` in 10 bits.
fn decade_word(d: i64) -> u64 {
    (1 << 62) | ((((d + 512) as u64) & 0x3ff) << 40)
}

/// The word of the number `m * 10^(d - 9)`: `m` fits in 40 bits and `d + 512` in 10, so
/// distinct numbers have distinct words.
fn decimal_word(m: i64, d: i16) -> u64 {
    decade_word(i64::from(d)) | ((m as u64) & M_BITS)
}

impl NumberCell {
    /// The cell's word in a development fingerprint.
    fn word(self) -> u64 {
        match self {
            NumberCell::Decimal { m, d } => decimal_word(m, d),
            NumberCell::Bits(b) => (3 << 62) ^ fmix64(b),
        }
    }
}

/// A number's word by the definition (through `common` where it answers).
fn number_word(x: f64, t: &[Binade; 2048], p: &Powers) -> u64 {
    match common(x, t) {
        (m, d, true) => decimal_word(m, d),
        _ if x.is_nan() => 0,
        _ => general(x, p).word(),
    }
}

/// A text cell's word in a development fingerprint.
fn text_word(text: &str) -> u64 {
    match read_text(text) {
        TextCell::Missing => 0,
        TextCell::Number(n) => n.word(),
        TextCell::Text(t) => (2 << 62) | (fnv1a64(t.as_bytes()) >> 2),
    }
}

/// What `usual_word` needs for the numbers of one sign and binary exponent: as in `Binade`,
/// the decade is d0 or d0 + 1, here told by the mantissa bits alone.
#[derive(Debug, Clone, Copy)]
struct Signed {
    /// The mantissa bits of P(d0 + 1), shifted to the top, when it has this binary exponent;
    /// `u64::MAX`, which no shifted mantissa reaches, when it is larger.
    next: u64,
    /// P(9 - d) for the two decades.
    scale: [f64; 2],
    /// 0.5 with the numbers' sign.
    half: f64,
    /// The word without `m` (`decade_word`) of each decade when it is usual; else `UNUSUAL`.
    word: [u64; 2],
}

/// A word no number's word equals (its top bit is set, while a decimal word's tag is 01).
const UNUSUAL: u64 = 1 << 63;

/// One `Signed` per sign and biased exponent (the top 12 bits of a double).
fn signed() -> &'static [Signed; 4096] {
    static TABLE: OnceLock<[Signed; 4096]> = OnceLock::new();
    TABLE.get_or_init(|| {
        let p = powers();
        let at = |j: i64| p[(j + SPAN).clamp(0, 2 * SPAN) as usize];
        let word = |d: i64| {
            if USUAL.contains(&d) {
                decade_word(d)
            } else {
                UNUSUAL
            }
        };
        let mut t = [Signed {
            next: u64::MAX,
            scale: [1.0; 2],
            half: 0.5,
            word: [UNUSUAL; 2],
        }; 4096];
        for (top, entry) in (0i64..).zip(t.iter_mut()) {
            let biased = top & 0x7ff;
            entry.half = if top > 0x7ff { -0.5 } else { 0.5 };
            // Subnormals, infinities and NaNs have no usual decade.
            if biased == 0 || biased == 0x7ff {
                continue;
            }
            // As in `decade`; P(d0 + 1) is at least 2^(biased - 1023), so it has this exponent
            // or a larger one.
            let d0 = ((biased - 1023) * 78913) >> 18;
            let next = at(d0 + 1).to_bits();
            entry.next = if (next >> 52) as i64 == biased {
                next << 12
            } else {
                u64::MAX
            };
            entry.scale = [at(9 - d0), at(8 - d0)];
            entry.word = [word(d0), word(d0 + 1)];
        }
        t
    })
}

/// The word of a usual number (as `common` answers for), in fewer operations than `common` and
/// `decimal_word`: the sign rides in the table, since x * P(k) and adding -0.5 are exactly the
/// negatives of the operations on |x|, and truncation of the negative sum is -floor. The word
/// has its top bit set when `common` would not answer (a unit test checks both across every
/// binary exponent).
#[inline(always)]
fn usual_word(x: f64, t: &[Signed; 4096]) -> u64 {
    let bits = x.to_bits();
    let e = &t[(bits >> 52) as usize];
    // Within one exponent, mantissas order as the numbers do.
    let up = usize::from(bits << 12 >= e.next);
    // Truncation saturates, so an unusual number's garbage never panics.
    let m = (x * e.scale[up] + e.half) as i64;
    let word = e.word[up];
    // |m| = 10^10 is the carry (m = ±10^9, d + 1); one comparison tells it.
    if m.wrapping_add(9_999_999_999) as u64 >= 19_999_999_999 {
        return (word + (1 << 40)) | ((m / 10) as u64 & M_BITS);
    }
    word | (m as u64 & M_BITS)
}

/// How a column's cells become words.
enum Words<'a> {
    Numbers(&'a [f64]),
    /// Each level's word, computed once; a code past them is a missing cell.
    Text {
        codes: &'a [u32],
        words: Vec<u64>,
    },
}

impl<'a> Words<'a> {
    fn of(column: &'a Column) -> Words<'a> {
        match &column.values {
            Values::Numeric(v) => Words::Numbers(v),
            Values::Text { codes, levels } => Words::Text {
                codes,
                words: levels.iter().map(|l| text_word(l)).collect(),
            },
        }
    }
}

/// Development fingerprints of `rows` (table row indices), in order, on up to `threads`
/// threads: the recipe's columns and the target (`target`, a column of `table`), see the
/// module documentation; the same values for any thread count. `None` when a recipe column is
/// not in the table.
pub fn fingerprints(
    table: &Table,
    recipe: &Recipe,
    target: usize,
    rows: &[usize],
    threads: usize,
) -> Option<Vec<u64>> {
    let mut sources: Vec<Words> = recipe_columns(table, recipe)?
        .into_iter()
        .map(Words::of)
        .collect();
    sources.push(Words::of(&table.columns[target]));
    let count = sources.len() as u64;
    let (p, t, s) = (powers(), binades(), signed());
    // A cell the fast path flags (missing or unusual), the slow way.
    let exact = |x: f64| match usual_word(x, s) {
        w if w & UNUSUAL == 0 => w,
        _ => number_word(x, t, p),
    };
    Some(in_chunks(rows, threads, |part| {
        let mut out = Vec::with_capacity(part.len());
        // A block's rows advance column by column from `before` into `after`: each row's
        // chain is serial, but the rows of a block are independent, so the processor
        // overlaps them.
        let mut state = ([0u64; FP_BLOCK], [0u64; FP_BLOCK]);
        let (mut before, mut after) = (&mut state.0, &mut state.1);
        for block in part.chunks(FP_BLOCK) {
            let n = block.len();
            before[..n].fill(FINGERPRINT_START);
            let mut i = 0;
            while i < sources.len() {
                let (from, to) = (&before[..n], &mut after[..n]);
                let mut seen = 0;
                match (&sources[i], sources.get(i + 1)) {
                    // Two number columns in one pass: half the reads and writes of the state.
                    (&Words::Numbers(a), Some(&Words::Numbers(b))) => {
                        for ((h, &f), &r) in to.iter_mut().zip(from).zip(block) {
                            let (wa, wb) = (usual_word(a[r], s), usual_word(b[r], s));
                            seen |= wa | wb;
                            *h = fmix64(fmix64(f ^ wa) ^ wb);
                        }
                        if seen & UNUSUAL != 0 {
                            for ((h, &f), &r) in to.iter_mut().zip(from).zip(block) {
                                *h = fmix64(fmix64(f ^ exact(a[r])) ^ exact(b[r]));
                            }
                        }
                        i += 2;
                    }
                    (&Words::Numbers(a), _) => {
                        for ((h, &f), &r) in to.iter_mut().zip(from).zip(block) {
                            let w = usual_word(a[r], s);
                            seen |= w;
                            *h = fmix64(f ^ w);
                        }
                        if seen & UNUSUAL != 0 {
                            for ((h, &f), &r) in to.iter_mut().zip(from).zip(block) {
                                *h = fmix64(f ^ exact(a[r]));
                            }
                        }
                        i += 1;
                    }
                    (Words::Text { codes, words }, _) => {
                        for ((h, &f), &r) in to.iter_mut().zip(from).zip(block) {
                            let w = words.get(codes[r] as usize).copied().unwrap_or(0);
                            *h = fmix64(f ^ w);
                        }
                        i += 1;
                    }
                }
                std::mem::swap(&mut before, &mut after);
            }
            out.extend(before[..n].iter().map(|&h| fmix64(h ^ count)));
        }
        out
    }))
}

/// Development key fingerprints of `rows` in the column `key_column` of `table`, in order, on
/// up to `threads` threads: `None` for a row whose key is missing, else `fmix64(fnv1a64(text))`
/// of the normalised key text that `key_ids` hashes.
pub fn key_fingerprints(
    table: &Table,
    key_column: usize,
    rows: &[usize],
    threads: usize,
) -> Vec<Option<u64>> {
    let column = &table.columns[key_column];
    in_chunks(rows, threads, |part| {
        let mut text = String::new();
        part.iter()
            .map(|&r| {
                text.clear();
                key_text(column, r, &mut text);
                (!text.is_empty()).then(|| fmix64(fnv1a64(text.as_bytes())))
            })
            .collect()
    })
}

fn first16(h: Sha256) -> RowKey {
    let d = h.finalize();
    let mut k = [0u8; 16];
    k.copy_from_slice(&d[..16]);
    k
}

/// `work` over contiguous runs of `rows`, one per thread (the last on the calling thread),
/// joined in row order; rows are independent, so the result is the same for any count.
fn in_chunks<I: Sync, T: Send>(
    rows: &[I],
    threads: usize,
    work: impl Fn(&[I]) -> Vec<T> + Sync,
) -> Vec<T> {
    let per = rows.len().div_ceil(threads.max(1)).max(MIN_CHUNK);
    if rows.len() <= per {
        return work(rows);
    }
    let work = &work;
    std::thread::scope(|s| {
        let mut parts = rows.chunks(per);
        let last = parts.next_back().unwrap_or(&[]);
        let handles: Vec<_> = parts.map(|part| s.spawn(move || work(part))).collect();
        let tail = work(last);
        let mut out = Vec::with_capacity(rows.len());
        for h in handles {
            // A worker's panic is a bug: carry it on, never return fewer identities.
            out.extend(h.join().unwrap_or_else(|e| std::panic::resume_unwind(e)));
        }
        out.extend(tail);
        out
    })
}

#[cfg(test)]
mod tests;

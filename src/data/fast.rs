//! The fast loader for plain files: no quote characters, no blank lines, one record per line.
//!
//! The file is read in blocks (so a large file is never held whole in memory); each block is
//! cut at line ends into pieces parsed on several threads. With more than one thread, a thread
//! of its own computes the file's SHA-256, each block while the next one is read, so it takes no
//! core from the parse. Pieces are joined in file order, so the table does not depend on the
//! thread count or the block size. Anything unusual (quotes, a blank line, a ragged row, invalid
//! UTF-8, a bad header) returns `None`, and the general reader, which owns every error message
//! about the file's shape, reads the file instead. The result equals the general reader's, cell
//! for cell.

use super::{Interned, MISSING_CODE, Table, assemble, cell_value, decide, number};
use crate::error::{Error, Result};
use sha2::{Digest, Sha256};
use std::collections::BTreeMap;
use std::io::Read;
use std::path::Path;

/// Pieces per thread in a block: small pieces keep every core busy to the end of a block.
const PIECES_PER_THREAD: usize = 4;

/// What one piece of lines found besides the values it wrote.
struct Piece {
    counts: Vec<(usize, usize)>,
    /// (row within the piece, trimmed text, non-finite number)
    first_bad: Vec<Option<(usize, String, bool)>>,
    /// Per interned column: the levels in first-seen order within the piece (the codes it
    /// wrote index this list).
    orders: Vec<Option<Vec<String>>>,
}

/// The layout the pieces share: which columns are forced text and which are interned.
struct Layout {
    ncol: usize,
    forced: Vec<bool>,
    interned: Vec<bool>,
    /// Neither forced text nor interned: cells are read as numbers.
    plain: Vec<bool>,
}

fn io(path: &Path, e: std::io::Error) -> Error {
    Error::Io {
        action: "cannot read data file",
        path: path.to_path_buf(),
        source: e,
    }
}

/// Fill `buf` from `f` until it holds `want` bytes or the file ends; false at end of file.
fn fill(f: &mut std::fs::File, buf: &mut Vec<u8>, want: usize, path: &Path) -> Result<bool> {
    while buf.len() < want {
        let at = buf.len();
        buf.resize(want, 0);
        let n = f.read(&mut buf[at..]).map_err(|e| io(path, e))?;
        buf.truncate(at + n);
        if n == 0 {
            return Ok(false);
        }
    }
    Ok(true)
}

/// Load `path` if it is a plain file; `Ok(None)` sends it to the general reader.
pub(super) fn load(
    path: &Path,
    text_columns: &[&str],
    threads: usize,
    block: usize,
) -> Result<Option<Table>> {
    load_hashing(path, text_columns, threads, block, true)
}

/// `load`, with the file's SHA-256 (when `hash`) or without it (`sha256` is then empty: the
/// parse alone, for the benchmark's floor).
pub(super) fn load_hashing(
    path: &Path,
    text_columns: &[&str],
    threads: usize,
    block: usize,
    hash: bool,
) -> Result<Option<Table>> {
    let block = block.max(1 << 10);
    let Some((headers, nums, texts, rows, sha256)) =
        parse_blocks(path, text_columns, threads.max(1), block, hash)?
    else {
        return Ok(None);
    };
    Ok(Some(Table {
        path: path.to_path_buf(),
        sha256,
        columns: assemble(headers, nums, texts),
        // One record per line after the header: row i is on line i + 2.
        lines: (0..rows as u64).map(|r| r + 2).collect(),
        raw: Default::default(),
    }))
}

type Parsed = (
    Vec<String>,
    Vec<Vec<f64>>,
    Vec<Option<Interned>>,
    usize,
    String,
);

/// The columns, the interned texts and the row count.
type Columns = (Vec<String>, Vec<Vec<f64>>, Vec<Option<Interned>>, usize);

/// Where the reader's blocks are hashed, in file order: (bytes, how many of them to hash).
enum Hasher {
    /// One thread: the reader hashes each block itself.
    Inline(Sha256),
    /// The hash thread's channels: blocks go to it, and come back, hashed, for reuse.
    Thread {
        blocks: std::sync::mpsc::Sender<(Vec<u8>, usize)>,
        hashed: std::sync::mpsc::Receiver<Vec<u8>>,
        /// Blocks sent and not yet back.
        out: usize,
    },
}

impl Hasher {
    fn send(&mut self, bytes: Vec<u8>, n: usize, pool: &mut Vec<Vec<u8>>) {
        match self {
            Hasher::Inline(sha) => {
                sha.update(&bytes[..n]);
                pool.push(bytes);
            }
            Hasher::Thread { blocks, out, .. } => {
                // The thread ends only when this side closes, or by a panic, which its join
                // carries on.
                if blocks.send((bytes, n)).is_ok() {
                    *out += 1;
                }
            }
        }
    }

    /// Wait until every block sent is hashed; their buffers go to `pool`.
    fn settle(&mut self, pool: &mut Vec<Vec<u8>>) {
        if let Hasher::Thread { hashed, out, .. } = self {
            while *out > 0 {
                *out -= 1;
                pool.extend(hashed.recv().ok());
            }
        }
    }

    /// The digest, when the reader took it itself.
    fn finish(self) -> Option<String> {
        match self {
            Hasher::Inline(sha) => Some(crate::spec::hex(&sha.finalize())),
            Hasher::Thread { .. } => None,
        }
    }
}

fn parse_blocks(
    path: &Path,
    text_columns: &[&str],
    threads: usize,
    block: usize,
    hash: bool,
) -> Result<Option<Parsed>> {
    if !hash || threads == 1 {
        // No hash (it is then empty), or one thread that hashes as it reads.
        let hasher = hash.then(|| Hasher::Inline(Sha256::new()));
        let parsed = read_blocks(path, text_columns, threads, block, hasher)?;
        return Ok(parsed.map(|((h, n, t, r), d)| (h, n, t, r, d.unwrap_or_default())));
    }
    // The hash works while the reader reads the next block and sizes the columns for it, when
    // one thread works and the other cores would wait; the parse of that block waits for it.
    std::thread::scope(|s| {
        let (blocks, queue) = std::sync::mpsc::channel::<(Vec<u8>, usize)>();
        let (back, hashed) = std::sync::mpsc::channel();
        let job = s.spawn(move || {
            let mut sha = Sha256::new();
            for (bytes, n) in queue {
                sha.update(&bytes[..n]);
                // The reader may have finished: then the buffer is simply freed.
                let _ = back.send(bytes);
            }
            crate::spec::hex(&sha.finalize())
        });
        // The reader's side closes when it returns, so the hash ends with the last block (or
        // early, with a partial digest nobody uses, when the file goes to the general reader).
        let hasher = Hasher::Thread {
            blocks,
            hashed,
            out: 0,
        };
        let parsed = read_blocks(path, text_columns, threads, block, Some(hasher));
        let digest = job.join().unwrap_or_else(|e| std::panic::resume_unwind(e));
        Ok(parsed?.map(|((h, n, t, r), _)| (h, n, t, r, digest)))
    })
}

/// Read and parse the blocks; each block's whole lines go to `hasher` (when given) in order.
/// Also returns the digest when the reader took it itself.
fn read_blocks(
    path: &Path,
    text_columns: &[&str],
    threads: usize,
    block: usize,
    mut hasher: Option<Hasher>,
) -> Result<Option<(Columns, Option<String>)>> {
    let mut f = std::fs::File::open(path).map_err(|e| io(path, e))?;
    let size = f.metadata().map_err(|e| io(path, e))?.len() as usize;
    let capacity = block + (1 << 16);
    let mut buf: Vec<u8> = Vec::with_capacity(capacity);
    let mut more = fill(&mut f, &mut buf, block, path)?;
    // Buffers the hash thread is done with.
    let mut pool: Vec<Vec<u8>> = Vec::new();
    let start = if buf.starts_with(b"\xEF\xBB\xBF") {
        3
    } else {
        0
    };
    // A header longer than a block: read on until its line ends.
    while more && memchr::memchr(b'\n', &buf[start..]).is_none() {
        let want = buf.len() * 2;
        more = fill(&mut f, &mut buf, want, path)?;
    }
    let Some(nl) = memchr::memchr(b'\n', &buf[start..]).map(|i| i + start) else {
        return Ok(None);
    };
    let header = &buf[start..nl];
    let header = header.strip_suffix(b"\r").unwrap_or(header);
    // A bare CR ends a line for the general reader: the header line is not what it seems.
    // A second byte-order mark: the general reader owns the message.
    if header.contains(&b'"') || header.contains(&b'\r') || header.starts_with(b"\xEF\xBB\xBF") {
        return Ok(None);
    }
    let Ok(header) = std::str::from_utf8(header) else {
        return Ok(None);
    };
    let headers: Vec<String> = header.split(',').map(|h| h.trim().to_string()).collect();
    for (i, h) in headers.iter().enumerate() {
        if h.is_empty() || headers[..i].contains(h) {
            return Ok(None);
        }
    }
    let ncol = headers.len();
    let forced: Vec<bool> = headers
        .iter()
        .map(|h| text_columns.contains(&h.as_str()))
        .collect();
    if let Some(h) = &mut hasher {
        h.send(buf[..=nl].to_vec(), nl + 1, &mut pool);
    }
    buf.drain(..=nl);
    // Columns whose first cell is not a number are interned as they are read; a column that
    // turns out to be text without that is rare, and goes to the general reader.
    let interned: Vec<bool> = {
        let first = memchr::memchr(b'\n', &buf).map_or(&buf[..], |i| &buf[..i]);
        let first = first.strip_suffix(b"\r").unwrap_or(first);
        let cells: Vec<&[u8]> = first.split(|&b| b == b',').collect();
        (0..ncol)
            .map(|c| {
                forced[c]
                    || cells.get(c).is_some_and(|cell| {
                        std::str::from_utf8(cell)
                            .map(|s| {
                                let s = s.trim();
                                !s.is_empty() && number(s).is_none()
                            })
                            .unwrap_or(true)
                    })
            })
            .collect()
    };
    let plain = (0..ncol).map(|c| !forced[c] && !interned[c]).collect();
    let layout = Layout {
        ncol,
        forced,
        interned,
        plain,
    };
    let mut nums: Vec<Vec<f64>> = vec![Vec::new(); ncol];
    let mut counts = vec![(0usize, 0usize); ncol];
    let mut first_bad: Vec<Option<(usize, String, bool)>> = vec![None; ncol];
    let mut texts: Vec<Option<Interned>> = layout
        .interned
        .iter()
        .map(|&t| t.then(|| (Vec::new(), BTreeMap::new())))
        .collect();
    let mut rows = 0usize;
    let mut reserved = false;
    loop {
        // The complete lines of this block; a partial last line waits for the next block.
        let end = if more {
            match memchr::memrchr(b'\n', &buf) {
                Some(i) => i + 1,
                // A line longer than the block: grow the block. (The buffer may be empty, when
                // the header ended exactly at the end of a block: read at least a block then.)
                None => {
                    let want = (buf.len() * 2).max(block);
                    more = fill(&mut f, &mut buf, want, path)?;
                    continue;
                }
            }
        } else {
            buf.len()
        };
        let chunk = &buf[..end];
        if memchr::memchr(b'"', chunk).is_some() {
            return Ok(None);
        }
        // Count the rows of each piece first, so every piece parses straight into its own slice
        // of the final columns.
        let bounds = cut(chunk, threads * PIECES_PER_THREAD);
        let piece_rows: Vec<usize> = bounds
            .windows(2)
            .map(|w| {
                memchr::memchr_iter(b'\n', &chunk[w[0]..w[1]]).count()
                    + usize::from(!chunk[w[0]..w[1]].ends_with(b"\n") && w[1] > w[0])
            })
            .collect();
        let block_rows: usize = piece_rows.iter().sum();
        if !reserved && block_rows > 0 {
            // Size the columns once from the first block's bytes per row, so a large file does
            // not pass through the doubling reallocations.
            let want = (size as f64 * block_rows as f64 / end as f64 * 1.02) as usize + 1024;
            for (c, n) in nums.iter_mut().enumerate() {
                if !layout.forced[c] {
                    n.reserve(want);
                }
            }
            for t in texts.iter_mut().flatten() {
                t.0.reserve(want);
            }
            reserved = true;
        }
        for (c, n) in nums.iter_mut().enumerate() {
            if !layout.forced[c] {
                n.resize(rows + block_rows, f64::NAN);
            }
        }
        for t in texts.iter_mut().flatten() {
            t.0.resize(rows + block_rows, MISSING_CODE);
        }
        // The previous block's hash is done before this block's parse takes every core.
        if let Some(h) = &mut hasher {
            h.settle(&mut pool);
        }
        let Some(pieces) = parse_chunk(
            chunk,
            &bounds,
            &piece_rows,
            rows,
            &layout,
            &mut nums,
            &mut texts,
            threads,
        ) else {
            return Ok(None);
        };
        let mut at = rows;
        for (p, n) in pieces.into_iter().zip(&piece_rows) {
            for c in 0..ncol {
                counts[c].0 += p.counts[c].0;
                counts[c].1 += p.counts[c].1;
                if first_bad[c].is_none()
                    && let Some((r, t, nf)) = &p.first_bad[c]
                {
                    first_bad[c] = Some((at + r, t.clone(), *nf));
                }
            }
            for (global, order) in texts.iter_mut().zip(p.orders) {
                if let (Some((codes, seen)), Some(order)) = (global.as_mut(), order) {
                    let remap: Vec<u32> = order
                        .into_iter()
                        .map(|level| {
                            let next = seen.len() as u32;
                            *seen.entry(level).or_insert(next)
                        })
                        .collect();
                    for code in &mut codes[at..at + n] {
                        if *code != MISSING_CODE {
                            *code = remap[*code as usize];
                        }
                    }
                }
            }
            at += n;
        }
        rows += block_rows;
        match &mut hasher {
            // The next block begins with this one's partial last line, in another buffer:
            // this one goes to the hash while the next is read.
            Some(h) => {
                let mut next = pool.pop().unwrap_or_else(|| Vec::with_capacity(capacity));
                next.clear();
                next.extend_from_slice(&buf[end..]);
                h.send(std::mem::replace(&mut buf, next), end, &mut pool);
            }
            None => {
                buf.drain(..end);
            }
        }
        if !more {
            break;
        }
        more = fill(&mut f, &mut buf, block, path)?;
    }
    if rows == 0 {
        return Ok(None);
    }
    let is_text = decide(path, &headers, &layout.forced, &counts, &first_bad, |row| {
        row as u64 + 2
    })?;
    if (0..ncol).any(|c| is_text[c] && texts[c].is_none()) {
        return Ok(None);
    }
    let texts = texts
        .into_iter()
        .zip(&is_text)
        .map(|(t, &keep)| t.filter(|_| keep))
        .collect();
    Ok(Some((
        (headers, nums, texts, rows),
        hasher.and_then(Hasher::finish),
    )))
}

/// Cut `chunk` (whole lines) into `threads` pieces at line ends: the piece boundaries.
fn cut(chunk: &[u8], threads: usize) -> Vec<usize> {
    let mut bounds = vec![0usize];
    for i in 1..threads {
        let target = (chunk.len() * i / threads).max(*bounds.last().unwrap_or(&0));
        let cut = match memchr::memchr(b'\n', &chunk[target..]) {
            Some(j) => target + j + 1,
            None => chunk.len(),
        };
        bounds.push(cut.min(chunk.len()));
    }
    bounds.push(chunk.len());
    bounds
}

/// Parse the pieces of `chunk` in parallel, each into its rows of the columns (from `first`).
#[allow(clippy::too_many_arguments)]
fn parse_chunk(
    chunk: &[u8],
    bounds: &[usize],
    piece_rows: &[usize],
    first: usize,
    layout: &Layout,
    nums: &mut [Vec<f64>],
    texts: &mut [Option<Interned>],
    threads: usize,
) -> Option<Vec<Piece>> {
    // Split every column's new rows into one disjoint slice per piece.
    let mut outs: Vec<Out> = piece_rows.iter().map(|_| Out::default()).collect();
    for (c, col) in nums.iter_mut().enumerate() {
        let mut rest: &mut [f64] = if layout.forced[c] {
            &mut []
        } else {
            &mut col[first..]
        };
        for (o, &n) in outs.iter_mut().zip(piece_rows) {
            let (mine, tail) = rest.split_at_mut(if layout.forced[c] { 0 } else { n });
            o.nums.push(mine);
            rest = tail;
        }
    }
    for t in texts.iter_mut() {
        match t {
            Some((codes, _)) => {
                let mut rest: &mut [u32] = &mut codes[first..];
                for (o, &n) in outs.iter_mut().zip(piece_rows) {
                    let (mine, tail) = rest.split_at_mut(n);
                    o.codes.push(Some(mine));
                    rest = tail;
                }
            }
            None => outs.iter_mut().for_each(|o| o.codes.push(None)),
        }
    }
    let jobs: Vec<std::sync::Mutex<Option<Job>>> = bounds
        .windows(2)
        .map(|w| &chunk[w[0]..w[1]])
        .zip(outs)
        .zip(piece_rows)
        .map(|((sl, o), &n)| std::sync::Mutex::new(Some((sl, o, n))))
        .collect();
    let results: Vec<std::sync::Mutex<Option<Option<Piece>>>> =
        jobs.iter().map(|_| std::sync::Mutex::new(None)).collect();
    let next = std::sync::atomic::AtomicUsize::new(0);
    // Job j parses piece j and writes only its own slot.
    let work = || {
        loop {
            let j = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
            let Some(job) = jobs.get(j) else {
                break;
            };
            let taken = job.lock().ok().and_then(|mut g| g.take());
            if let Some((sl, o, n)) = taken {
                let piece = parse_piece(sl, layout, o, n);
                if let Ok(mut g) = results[j].lock() {
                    *g = Some(piece);
                }
            }
        }
    };
    std::thread::scope(|s| {
        for _ in 1..threads.min(jobs.len()) {
            s.spawn(work);
        }
        work();
    });
    results
        .into_iter()
        .map(|r| r.into_inner().ok().flatten().flatten())
        .collect()
}

/// One parse job: the piece's bytes, where it writes, and how many rows it holds.
type Job<'a, 'b> = (&'a [u8], Out<'b>, usize);

/// Where one piece writes: its slice of each column (empty for forced text) and of each
/// interned column's codes.
#[derive(Default)]
struct Out<'a> {
    nums: Vec<&'a mut [f64]>,
    codes: Vec<Option<&'a mut [u32]>>,
}

fn parse_piece(piece: &[u8], layout: &Layout, mut out: Out<'_>, expect: usize) -> Option<Piece> {
    let ncol = layout.ncol;
    let mut counts = vec![(0usize, 0usize); ncol];
    let mut first_bad: Vec<Option<(usize, String, bool)>> = vec![None; ncol];
    let mut orders: Vec<Option<Vec<String>>> =
        layout.interned.iter().map(|&t| t.then(Vec::new)).collect();
    let mut lookup: Vec<BTreeMap<&str, u32>> = vec![BTreeMap::new(); ncol];
    // Valid UTF-8 as a whole, so every cell cut at an ASCII comma or line end is a &str.
    let text = std::str::from_utf8(piece).ok()?;
    let bytes = text.as_bytes();
    let mut row = 0usize;
    let mut at = 0usize;
    while at < bytes.len() {
        let end = memchr::memchr(b'\n', &bytes[at..]).map_or(bytes.len(), |i| at + i);
        let mut stop = end;
        if stop > at && bytes[stop - 1] == b'\r' {
            stop -= 1;
        }
        let line_start = at;
        at = end + 1;
        // A blank line, or a bare CR (which the general reader takes as a line end).
        if stop == line_start
            || row >= expect
            || memchr::memchr(b'\r', &bytes[line_start..stop]).is_some()
        {
            return None;
        }
        let mut c = 0usize;
        let mut from = line_start;
        let mut i = line_start;
        loop {
            // The usual cell: a plain finite number straight up to its comma or the line end,
            // read and delimited in one pass. fast-float2 rounds correctly, as `str::parse` does,
            // and reads the same decimal syntax, so the value has the same bits; anything else
            // (spaces, text, inf, nan, a stray byte after the digits) takes the general path.
            if i == from
                && c < ncol
                && layout.plain[c]
                && let Ok((v, n)) = fast_float2::parse_partial::<f64, _>(&bytes[i..stop])
                && (i + n == stop || bytes[i + n] == b',')
                && f64::is_finite(v)
            {
                out.nums[c][row] = v;
                counts[c].0 += 1;
                c += 1;
                i += n;
                if i == stop {
                    break;
                }
                i += 1;
                from = i;
                continue;
            }
            if i < stop && bytes[i] != b',' {
                i += 1;
                continue;
            }
            if c >= ncol {
                return None;
            }
            let s = trim(&text[from..i]);
            if let (Some(codes), Some(order)) = (out.codes[c].as_deref_mut(), orders[c].as_mut())
                && !s.is_empty()
            {
                let map = &mut lookup[c];
                codes[row] = match map.get(s) {
                    Some(&code) => code,
                    None => {
                        let code = order.len() as u32;
                        order.push(s.to_string());
                        map.insert(s, code);
                        code
                    }
                };
            }
            if !layout.forced[c] && !s.is_empty() {
                out.nums[c][row] = cell_value(s, row, &mut counts[c], &mut first_bad[c]);
            }
            c += 1;
            if i == stop {
                break;
            }
            i += 1;
            from = i;
        }
        if c != ncol {
            return None;
        }
        row += 1;
    }
    (row == expect).then_some(Piece {
        counts,
        first_bad,
        orders,
    })
}

/// `str::trim`, with a shortcut for the usual cell that has nothing to trim.
fn trim(s: &str) -> &str {
    match (s.as_bytes().first(), s.as_bytes().last()) {
        (Some(&a), Some(&b)) if a > b' ' && a < 0x80 && b > b' ' && b < 0x80 => s,
        _ => s.trim(),
    }
}

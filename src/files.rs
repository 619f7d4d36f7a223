//! What a path must be before probity opens it: a regular file (or, for a ledger, nothing yet).
//! A FIFO would block the reader forever, a device (`/dev/zero`) never ends, and `/dev/null`
//! as a ledger would take writes and keep nothing; each is refused before it is opened, by its
//! metadata alone.

use std::path::Path;

/// What kind of thing `path` is, in words, when it is there and not a regular file (symbolic
/// links are followed). `None` for a regular file or a path that does not exist (opening it
/// then says so).
pub fn not_regular(path: &Path) -> Option<&'static str> {
    let meta = std::fs::metadata(path).ok()?;
    let t = meta.file_type();
    if t.is_file() {
        return None;
    }
    Some(if t.is_dir() {
        "a folder"
    } else {
        kind_unix(&t).unwrap_or("not a regular file")
    })
}

#[cfg(unix)]
fn kind_unix(t: &std::fs::FileType) -> Option<&'static str> {
    use std::os::unix::fs::FileTypeExt;
    if t.is_fifo() {
        Some("a named pipe (FIFO)")
    } else if t.is_char_device() || t.is_block_device() {
        Some("a device")
    } else if t.is_socket() {
        Some("a socket")
    } else {
        None
    }
}

#[cfg(not(unix))]
fn kind_unix(_: &std::fs::FileType) -> Option<&'static str> {
    None
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn devices_folders_and_pipes_are_named() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("a.csv");
        std::fs::write(&f, "a\n1\n").unwrap();
        assert_eq!(not_regular(&f), None);
        assert_eq!(not_regular(&dir.path().join("missing.csv")), None);
        assert_eq!(not_regular(dir.path()), Some("a folder"));
        #[cfg(unix)]
        assert_eq!(not_regular(Path::new("/dev/null")), Some("a device"));
    }
}
